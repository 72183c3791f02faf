"""Fitting: parameter specs, the fitting problem, the engine, sensitivity, model backends, runs.

``spec`` (parameters from TOML), ``problem`` (residual with projected scale factors),
``engine`` (weighted least squares, multi-start, covariance), ``sensitivity``
(leave-one-group-out, jackknife; process pool or Dask), ``backends`` (how a model is run),
``runs`` (fits and checks on the catalog, recorded as events). All but ``runs`` are pure.
"""

from __future__ import annotations

from curate.fit.backends import ModelBackend, PythonFunction
from curate.fit.backends.python import load_model, model_sha256
from curate.fit.engine import (
    FitOptions,
    FitResult,
    covariance_from_jacobian,
    fit,
    jacobian,
    least_squares,
)
from curate.fit.problem import FitProblem
from curate.fit.spec import Parameter, ParameterSpec, load_spec, spec_from_dict

__all__ = [
    "FitOptions",
    "FitProblem",
    "FitResult",
    "ModelBackend",
    "Parameter",
    "ParameterSpec",
    "PythonFunction",
    "covariance_from_jacobian",
    "fit",
    "jacobian",
    "least_squares",
    "load_model",
    "load_spec",
    "model_sha256",
    "spec_from_dict",
]
