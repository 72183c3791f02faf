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
from collections.abc import Callable
from dataclasses import dataclass
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
    def accuracy(self) -> float:
        """Give the solver's relative tolerance: what CVODE's numbers are good to."""
        return max(float(self.tolerances.relative), float(np.finfo(float).eps))

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
        return self.prepare(points)(parameters)

    def prepare(self, points: pd.DataFrame) -> Callable[[dict[str, float]], PointEvaluation]:
        """Give the evaluation of these rows as a function of the parameters: the rows are read
        once (conditions grouped, placeholders split, numbers parsed), so that each evaluation
        is the simulations and the formulas only."""
        plan = _Plan(self, points)
        return plan.evaluate

    def _names(self, observable_id: str) -> tuple[str, ...]:
        observable = self.model.observables.get(observable_id)
        return () if observable is None else (*observable.formula.names, *observable.noise.names)


@dataclass
class _Part:
    """The rows of one observable under one condition pair, with what its formulas need."""

    rows: np.ndarray  # positions in the points
    local: np.ndarray  # positions within the condition pair's simulation
    observable: Any
    fixed: dict[str, Any]  # time and numeric placeholders / condition cells
    chosen: list[
        tuple[str, np.ndarray, list[tuple[Any, str]]]
    ]  # name, numbers, (row, parameter id)
    simulated: list[str]  # model symbols taken from the simulation


@dataclass
class _Group:
    pre: str
    condition: str
    times: np.ndarray
    needed: list[str]
    parts: list[_Part]


class _Plan:
    """The rows of a points table read once for repeated evaluation (see PetabSbml.prepare)."""

    def __init__(self, backend: PetabSbml, points: pd.DataFrame) -> None:
        model = backend.model
        self.model = model
        n = self.n = len(points)
        observable_ids = points["petab_observableId"].astype(str).to_numpy()
        conditions = points["petab_simulationConditionId"].astype(str).to_numpy()
        pres = points["petab_preequilibrationConditionId"].fillna("").astype(str).to_numpy()
        times = points["petab_time"].to_numpy(dtype=float)
        self.times = times
        observable_cells = points["petab_observableParameters"].fillna("").astype(str).to_numpy()
        noise_cells = points["petab_noiseParameters"].fillna("").astype(str).to_numpy()
        self.transformation = np.empty(n, dtype=object)
        self.distribution = np.empty(n, dtype=object)
        self.groups: list[_Group] = []
        for (pre, condition), index in pd.Series(range(n)).groupby([pres, conditions], sort=False):
            rows = index.to_numpy()
            needed = sorted({name for o in set(observable_ids[rows]) for name in backend._names(o)
                             if name in model.model_symbols})  # fmt: skip
            condition_row = model._condition(condition)
            parts = []
            for observable_id in dict.fromkeys(observable_ids[rows]):
                local = np.flatnonzero(observable_ids[rows] == observable_id)
                part = rows[local]
                observable = model.observables.get(observable_id)
                if observable is None:
                    raise InputError(
                        f"measurement rows name observable '{observable_id}', which the observable table lacks"
                    )
                fixed: dict[str, Any] = {"time": times[part]}
                chosen: list[tuple[str, np.ndarray, list[tuple[Any, str]]]] = []
                simulated: list[str] = []
                for name in backend._names(observable_id):
                    if name in needed:
                        simulated.append(name)
                    elif name in model.output_parameters:
                        cell = str(condition_row.get(name, ""))
                        chosen.append((name, *_cells([cell] * len(part), model.nominal,
                            f"{model.condition_file}, condition {condition}, column {name}")))  # fmt: skip
                    elif name in model.nominal:
                        chosen.append((name, np.full(len(part), model.nominal[name]),
                                       [(slice(None), name)]))  # fmt: skip
                for prefix, cells in (("observableParameter", observable_cells[part]),
                                      ("noiseParameter", noise_cells[part])):  # fmt: skip
                    for name, numbers, named in _placeholders(
                        backend, prefix, observable_id, cells
                    ):
                        chosen.append((name, numbers, named))
                missing = [name for name in (*observable.formula.names, *observable.noise.names)
                           if name not in fixed and name not in simulated
                           and name not in {c[0] for c in chosen}]  # fmt: skip
                if missing:
                    raise InputError(
                        f"observable {observable_id}: placeholder {missing[0]!r} has no value in the "
                        f"measurement rows of condition {condition}"
                    )
                self.transformation[part] = observable.transformation
                self.distribution[part] = observable.distribution
                parts.append(_Part(part, local, observable, fixed, chosen, simulated))
            self.groups.append(_Group(pre, condition, times[rows], needed, parts))

    def evaluate(self, parameters: dict[str, float]) -> PointEvaluation:
        """Give simulation, sigma, transformation and distribution for every row."""
        model = self.model
        simulation, sigma = np.empty(self.n), np.empty(self.n)
        for group in self.groups:
            values = model.simulate(
                group.pre, group.condition, group.times, group.needed, parameters
            )
            for part in group.parts:
                symbols = dict(part.fixed)
                for name in part.simulated:
                    symbols[name] = values[name][part.local]
                for name, numbers, named in part.chosen:
                    if not named:
                        symbols[name] = numbers
                        continue
                    column = numbers.copy()
                    for where, parameter in named:
                        column[where] = parameters.get(
                            parameter, model.nominal.get(parameter, math.nan)
                        )
                    symbols[name] = column
                size = len(part.rows)
                simulation[part.rows] = part.observable.formula(symbols, size)
                noise = part.observable.noise(symbols, size)
                sigma[part.rows] = noise
                bad = ~(np.isfinite(noise) & (noise > 0))
                if bad.any():
                    k = part.rows[int(np.argmax(bad))]
                    raise InputError(
                        f"{model.observable_file}, observable {part.observable.id}: the noise formula gives "
                        f"{sigma[k]:g} at condition {group.condition}, time {self.times[k]:g}; sigma must be positive"
                    )
        return PointEvaluation(simulation, sigma, self.transformation, self.distribution)


def _cells(
    cells: list[str], nominal: dict[str, float], where: str
) -> tuple[np.ndarray, list[tuple[Any, str]]]:
    """Give the numbers of the cells and, for cells naming parameter-table ids, (rows, id) for
    each id (its rows as an index array)."""
    numbers = np.full(len(cells), math.nan)
    rows_of: dict[str, list[int]] = {}
    for k, cell in enumerate(cells):
        text = str(cell).strip()
        try:
            numbers[k] = float(text)
            continue
        except ValueError:
            pass
        if text not in nominal:
            raise InputError(f"{where}: '{text}' is neither a number nor a parameter-table id")
        rows_of.setdefault(text, []).append(k)
    return numbers, [(np.array(rows), name) for name, rows in rows_of.items()]


def _placeholders(backend: PetabSbml, prefix: str, observable_id: str, cells: np.ndarray
                  ) -> list[tuple[str, np.ndarray, list[tuple[Any, str]]]]:  # fmt: skip
    wanted = sorted({name for name in backend._names(observable_id)
                     if name.startswith(prefix) and name.endswith(f"_{observable_id}")})  # fmt: skip
    if not wanted:
        return []
    split = [
        [part.strip() for part in str(cell).split(";")] if str(cell).strip() else []
        for cell in cells
    ]
    out = []
    for name in wanted:
        number = int(name[len(prefix) :].split("_", 1)[0])
        texts = []
        for k, parts in enumerate(split):
            if number > len(parts):
                raise InputError(
                    f"observable {observable_id}: {name} needs {number} {prefix}s per row; a row gives "
                    f"'{cells[k]}'"
                )
            texts.append(parts[number - 1])
        out.append(
            (
                name,
                *_cells(texts, backend.model.nominal, f"{prefix}s of observable {observable_id}"),
            )
        )
    return out
