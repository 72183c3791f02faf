"""A stored PEtab problem as a model backend: its SBML model simulated with libroadrunner.

The backend carries its own noise model (``noise_model``): :meth:`PetabSbml.evaluate` gives each
measurement row's simulation and sigma with its transformation and distribution, and the fit
minimises the PEtab negative log-likelihood (:mod:`curate.fit.likelihood`).

The points it evaluates carry each row's PEtab measurement cells in the columns
``petab_observableId``, ``petab_simulationConditionId``, ``petab_preequilibrationConditionId``,
``petab_time`` (the problem's own time unit), ``petab_observableParameters`` and
``petab_noiseParameters`` (see :mod:`curate.fit.problem_runs`).

It is portable: its description carries the problem's files, so a worker process rebuilds it
(compiled once per process and problem); the run record keeps id, version, hash and tolerances.
"""

from __future__ import annotations

import hashlib
import math
from typing import Any, ClassVar

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.fit.backends.base import ModelBackend, PointEvaluation
from curate.fit.petab.model import PetabModel, SolverTolerances
from curate.fit.spec import Parameter, ParameterSpec

__all__ = ["PetabSbml", "SolverTolerances"]

_COMPILED: dict[tuple[str, tuple[float, float, int]], PetabModel] = {}  # per process


def _files_key(files: dict[str, bytes]) -> str:
    digest = hashlib.sha256()
    for name in sorted(files):
        digest.update(name.encode() + b"\0" + hashlib.sha256(files[name]).digest())
    return digest.hexdigest()


class PetabSbml(ModelBackend):
    """A PEtab problem's SBML model, conditions, observable and noise formulas."""

    kind = "petab-sbml"
    noise_model: ClassVar[bool] = True

    def __init__(self, files: dict[str, bytes], source: str, *, problem_id: str = "",
                 version: int = 0, tolerances: SolverTolerances | None = None) -> None:  # fmt: skip
        self.files = dict(files)
        self.source = source
        self.problem_id = problem_id
        self.version = version
        self.tolerances = tolerances or SolverTolerances()
        self.sha256 = _files_key(self.files)
        key = (
            self.sha256,
            (self.tolerances.relative, self.tolerances.absolute, self.tolerances.max_steps),
        )
        if key not in _COMPILED:
            _COMPILED[key] = PetabModel(self.files, source, self.tolerances)
        self.model = _COMPILED[key]

    @property
    def label(self) -> str:
        """Give the stored problem's id (or its YAML's name)."""
        return self.problem_id or self.source

    @property
    def portable(self) -> bool:
        """Rebuilt in workers from the files its description carries."""
        return True

    def run_record(self) -> dict[str, Any]:
        """Give what a run record keeps: the problem named and hashed, the solver's settings."""
        return {"kind": self.kind, "problem_id": self.problem_id, "version": self.version,
                "label": self.label, "sha256": self.sha256, "source": self.source,
                "tolerances": self.tolerances.to_dict()}  # fmt: skip

    def describe(self) -> dict[str, Any]:
        """Give the run record plus the files (text), enough to rebuild in a worker."""
        return {
            **self.run_record(),
            "files": {n: raw.decode("latin-1") for n, raw in self.files.items()},
        }

    @classmethod
    def from_description(cls, description: dict[str, Any]) -> ModelBackend:
        """Give the backend back from :meth:`describe`'s data."""
        files = description.get("files")
        if not isinstance(files, dict):
            raise InputError(
                "the petab-sbml backend's record holds no files; rebuild it from the catalog"
            )
        tolerances = SolverTolerances(**description.get("tolerances", {}))
        return cls({n: str(t).encode("latin-1") for n, t in files.items()}, str(description["source"]),
                   problem_id=str(description.get("problem_id", "")),
                   version=int(description.get("version", 0)), tolerances=tolerances)  # fmt: skip

    def parameter_spec(self) -> ParameterSpec:
        """Give the parameter table as a spec: nominal starts, bounds, log scales, fixed ones."""
        parameters = []
        for row in self.model.parameter_rows():
            name = str(row["parameterId"]).strip()
            scale = (str(row.get("parameterScale", "lin")).strip() or "lin").lower()
            estimated = str(row.get("estimate", "1")).strip() not in ("0", "0.0")
            lower = float(row.get("lowerBound") or -math.inf) if estimated else -math.inf
            upper = float(row.get("upperBound") or math.inf) if estimated else math.inf
            parameters.append(Parameter(name, float(row["nominalValue"]), lower, upper,
                                        scale in ("log", "log10") and estimated, not estimated))  # fmt: skip
        return ParameterSpec(tuple(parameters), scale_factors=False, origin=f"{self.source} (parameter table)",
                             sha256=self.sha256)  # fmt: skip

    def predict(self, parameters: dict[str, float], points: pd.DataFrame) -> np.ndarray:
        """Give the observable of every row."""
        return self.evaluate(parameters, points).simulation

    def evaluate(self, parameters: dict[str, float], points: pd.DataFrame) -> PointEvaluation:
        """Give simulation, sigma, transformation and distribution for every row."""
        model = self.model
        n = len(points)
        simulation, sigma = np.full(n, np.nan), np.full(n, np.nan)
        transformation = np.empty(n, dtype=object)
        distribution = np.empty(n, dtype=object)
        observable_ids = points["petab_observableId"].astype(str).to_numpy()
        conditions = points["petab_simulationConditionId"].astype(str).to_numpy()
        pres = points["petab_preequilibrationConditionId"].fillna("").astype(str).to_numpy()
        times = points["petab_time"].to_numpy(dtype=float)
        observable_cells = points["petab_observableParameters"].fillna("").astype(str).to_numpy()
        noise_cells = points["petab_noiseParameters"].fillna("").astype(str).to_numpy()
        output = model.output_parameters
        for (pre, condition), index in pd.Series(range(n)).groupby([pres, conditions], sort=False):
            rows = index.to_numpy()
            needed = sorted({name for o in set(observable_ids[rows]) for name in self._names(o)
                             if name in model.model_symbols})  # fmt: skip
            values = model.simulate(pre, condition, times[rows], needed, parameters)
            condition_row = model._condition(condition)
            for observable_id in dict.fromkeys(observable_ids[rows]):
                part = rows[observable_ids[rows] == observable_id]
                local = np.flatnonzero(observable_ids[rows] == observable_id)
                observable = model.observables.get(observable_id)
                if observable is None:
                    raise InputError(
                        f"measurement rows name observable '{observable_id}', which the observable table lacks"
                    )
                symbols: dict[str, Any] = {"time": times[part]}
                for name in self._names(observable_id):
                    if name in values:
                        symbols[name] = values[name][local]
                    elif name in output:
                        where = f"{model.condition_file}, condition {condition}, column {name}"
                        symbols[name] = model._value(condition_row.get(name, ""), parameters, where)
                    elif name in model.nominal:
                        symbols[name] = float(parameters.get(name, model.nominal[name]))
                    elif name in model.model_symbols:
                        symbols[name] = values[name][local]
                symbols.update(
                    self._placeholders(
                        "observableParameter", observable_id, observable_cells[part], parameters
                    )
                )
                symbols.update(
                    self._placeholders(
                        "noiseParameter", observable_id, noise_cells[part], parameters
                    )
                )
                try:
                    simulation[part] = observable.formula(symbols, len(part))
                    sigma[part] = observable.noise(symbols, len(part))
                except KeyError as err:
                    raise InputError(
                        f"observable {observable_id}: placeholder {err.args[0]} has no value in the "
                        f"measurement rows of condition {condition}"
                    ) from None
                transformation[part] = observable.transformation
                distribution[part] = observable.distribution
                bad = ~(np.isfinite(sigma[part]) & (sigma[part] > 0))
                if bad.any():
                    k = part[int(np.argmax(bad))]
                    raise InputError(
                        f"{model.observable_file}, observable {observable_id}: the noise formula gives "
                        f"{sigma[k]:g} at condition {condition}, time {times[k]:g}; sigma must be positive"
                    )
        return PointEvaluation(simulation, sigma, transformation, distribution)

    def _names(self, observable_id: str) -> tuple[str, ...]:
        observable = self.model.observables.get(observable_id)
        return () if observable is None else (*observable.formula.names, *observable.noise.names)

    def _placeholders(self, prefix: str, observable_id: str, cells: np.ndarray,
                      parameters: dict[str, float]) -> dict[str, np.ndarray]:  # fmt: skip
        wanted = sorted({name for name in self._names(observable_id)
                         if name.startswith(prefix) and name.endswith(f"_{observable_id}")})  # fmt: skip
        if not wanted:
            return {}
        out: dict[str, np.ndarray] = {}
        split = [
            [part.strip() for part in str(cell).split(";")] if str(cell).strip() else []
            for cell in cells
        ]
        for name in wanted:
            number = int(name[len(prefix) :].split("_", 1)[0])
            column = np.empty(len(cells))
            for k, parts in enumerate(split):
                if number > len(parts):
                    raise InputError(
                        f"observable {observable_id}: {name} needs {number} {prefix}s per row; a row gives "
                        f"'{cells[k]}'"
                    )
                column[k] = self.model._value(
                    parts[number - 1], parameters, f"{prefix}s of observable {observable_id}"
                )
            out[name] = column
        return out
