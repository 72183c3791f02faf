"""The model-backend protocol: how fit, sensitivity and the report run any model.

A backend gives predictions for a points table and a parameter dict, says whether it can be
rebuilt in a worker process from its description, and describes itself for the run record.
A backend that is itself a fitter (an external program) says so with ``fits_itself`` and fits
a table with :meth:`ModelBackend.fit_points` instead. A backend that carries its own noise model
(a PEtab problem's noise formulas) says so with ``noise_model`` and gives each point's sigma,
transformation and distribution with :meth:`ModelBackend.evaluate`; the fit then minimises the
negative log-likelihood (:mod:`curate.fit.likelihood`) instead of fixed-weight least squares.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from curate.errors import InputError

__all__ = ["ExternalFit", "ModelBackend", "PointEvaluation"]


@dataclass
class ExternalFit:
    """One run of a backend's own fitter: its folder, parameters and standard errors, or why not."""

    group: str
    folder: Path
    parameters: dict[str, float] = field(default_factory=dict)
    stderr: dict[str, float] = field(default_factory=dict)
    error: str | None = None


@dataclass(frozen=True)
class PointEvaluation:
    """A noise-model backend's answer for each point, in row order.

    ``simulation`` is the observable (untransformed); ``sigma`` the noise formula's value on
    the transformed scale; ``transformation`` 'lin', 'log' or 'log10'; ``distribution``
    'normal' or 'laplace'.
    """

    simulation: np.ndarray
    sigma: np.ndarray
    transformation: np.ndarray
    distribution: np.ndarray


class ModelBackend:
    """What every model backend offers. Subclasses set ``kind`` and implement the methods."""

    kind: ClassVar[str] = ""
    fits_itself: ClassVar[bool] = False  # an external fitter: parameters come from fit_points
    noise_model: ClassVar[bool] = False  # gives each point's sigma (see evaluate)

    @property
    def accuracy(self) -> float:
        """Give the relative accuracy of the backend's numbers (machine precision for a closed
        form; an ODE solver's relative tolerance): the fit's finite-difference steps follow it."""
        return float(np.finfo(float).eps)

    def predict(self, parameters: dict[str, float], points: pd.DataFrame) -> np.ndarray:
        """Give one prediction per row of ``points`` (before scale factors)."""
        raise InputError(f"the {self.kind} backend gives fitted parameters, not predictions")

    def evaluate(self, parameters: dict[str, float], points: pd.DataFrame) -> PointEvaluation:
        """Give predictions with each point's sigma (only where ``noise_model``)."""
        raise InputError(f"the {self.kind} backend has no noise model of its own")

    def prepare(self, points: pd.DataFrame) -> Callable[[dict[str, float]], PointEvaluation]:
        """Give :meth:`evaluate` of these rows as a function of the parameters alone (a backend
        that reads its rows once for many evaluations overrides it)."""
        return lambda parameters: self.evaluate(parameters, points)

    def run_record(self) -> dict[str, Any]:
        """Give what the run record keeps of the backend (by default :meth:`describe`)."""
        return self.describe()

    @property
    def portable(self) -> bool:
        """Tell whether :meth:`describe` suffices to rebuild the backend in a worker process."""
        return False

    @property
    def label(self) -> str:
        """Give the name a person gave the model (shown and recorded as ``model``)."""
        return self.kind

    def describe(self) -> dict[str, Any]:
        """Give plain data naming the backend for the run record (``kind`` first)."""
        return {"kind": self.kind}

    def fit_points(self, points: pd.DataFrame, *, folder: Path, group: str) -> ExternalFit:
        """Fit the points with the backend's own fitter (only where ``fits_itself``)."""
        raise InputError(f"the {self.kind} backend is fitted by curate's engine, not by itself")

    @classmethod
    def from_description(cls, description: dict[str, Any]) -> ModelBackend:
        """Give the backend back from :meth:`describe`'s data (in a worker, or for the report)."""
        raise InputError(f"the {cls.kind} backend cannot be rebuilt from its description")
