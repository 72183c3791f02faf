"""Fits of a stored PEtab problem: its datasets' weighted points with their PEtab rows, and its model.

``curate fit --problem ID`` and ``curate sensitivity --problem ID`` fit the datasets imported
from a stored problem (narrowed by the usual selection options) with the problem's own SBML
model, observable and noise formulas (the ``petab-sbml`` backend). Each weighted point gets its
PEtab measurement row back (observable, conditions, time in the problem's own unit, observable
and noise parameters) from the rows its dataset kept at import; the parameter table gives the
starts, bounds, scales and which parameters are estimated; a spec (``--params``) replaces the
entries of the parameters it names and leaves the others as the table gives them.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.fit.backends.petab_sbml import PetabSbml, SolverTolerances
from curate.fit.spec import ParameterSpec, overlay
from curate.ledger import Ledger
from curate.ledger.problems import StoredProblem, read_problem, summarise_problems
from curate.weighting import Policy, Selection, WeightedTable, weighted_table

__all__ = ["PETAB_COLUMNS", "ProblemFit", "check_problem_model", "problem_fit", "simulation_table"]

# the points table's PEtab columns (what the backend reads) and the measurement columns they hold
PETAB_COLUMNS = {
    "petab_observableId": "observableId",
    "petab_simulationConditionId": "simulationConditionId",
    "petab_preequilibrationConditionId": "preequilibrationConditionId",
    "petab_time": "time",
    "petab_observableParameters": "observableParameters",
    "petab_noiseParameters": "noiseParameters",
}


@dataclass
class ProblemFit:
    """What a fit of a stored problem needs: the stored problem, its backend, spec and points."""

    problem: StoredProblem
    backend: PetabSbml
    spec: ParameterSpec
    weighted: WeightedTable
    points: pd.DataFrame  # the weighted table with the PETAB_COLUMNS
    rows: list[dict[str, str]]  # each point's PEtab measurement row as imported (for --simulations)


def check_problem_model(files: dict[str, bytes], source: str) -> None:
    """Refuse (one line) a problem whose model cannot be simulated: an SBML file libroadrunner
    cannot load, a formula naming an unknown symbol, a condition column the model lacks.

    Run before a problem is stored, so that a problem the catalog keeps can be evaluated;
    what depends on parameter values (a noise formula <= 0, a failed integration) is found
    when it is evaluated.
    """
    PetabSbml(files, source)


def problem_fit(catalog: Ledger, problem_id: str, *, policy: Policy, selection: Selection,
                spec: ParameterSpec | None = None,
                tolerances: SolverTolerances | None = None) -> ProblemFit:  # fmt: skip
    """Give the stored problem's backend, spec and weighted points (its datasets in the selection)."""
    summaries = {s.id: s for s in summarise_problems(catalog.store)}
    if problem_id not in summaries:
        known = (
            ", ".join(sorted(summaries)) or "none; `curate import-petab PROBLEM.yaml` stores one"
        )
        raise InputError(f"--problem {problem_id}: no such stored problem (stored: {known})")
    linked = set(summaries[problem_id].datasets)
    ids = tuple(sorted(linked & set(selection.ids))) if selection.ids else tuple(sorted(linked))
    if not ids:
        raise InputError(
            f"--problem {problem_id}: no dataset of the selection comes from it "
            f"({selection.describe()})"
        )
    # the problem's noise formulas give sigma: a dataset without a measured sd must not stop
    # the table (its sd column is then the policy's default, used only by a balancing policy)
    lenient = dataclasses.replace(policy, unknown_noise="default")
    weighted = weighted_table(catalog, lenient, dataclasses.replace(selection, ids=ids))
    weighted = dataclasses.replace(weighted, policy=policy)
    # the newest version, as `export petab` writes it (an edit such as new bounds makes a new
    # problem version while its unchanged datasets stay linked to the first)
    problem = read_problem(catalog.store, problem_id)
    backend = PetabSbml(problem.files, problem.source, problem_id=problem.id,
                        version=problem.version, tolerances=tolerances)  # fmt: skip
    points, rows = _with_petab_rows(weighted)
    table = backend.parameter_spec()
    chosen = overlay(table, spec) if spec is not None else table
    return ProblemFit(problem, backend, chosen, weighted, points, rows)


def _with_petab_rows(weighted: WeightedTable) -> tuple[pd.DataFrame, list[dict[str, str]]]:
    """Give the weighted table with each point's PEtab row, checked point by point."""
    table = weighted.table.reset_index(drop=True)
    by_id = {v.id: v for v in weighted.versions}
    columns: dict[str, list[Any]] = {name: [None] * len(table) for name in PETAB_COLUMNS}
    rows: list[dict[str, str]] = [{} for _ in range(len(table))]
    for dataset_id, group in table.groupby("dataset_id", sort=False, observed=True):
        record = by_id[str(dataset_id)].record
        kept = weighted.aside.annotation(str(dataset_id), record.annotations.get("petab_rows"))
        if not isinstance(kept, dict) or not kept.get("measurement"):
            raise InputError(
                f"dataset {dataset_id}: no PEtab rows were kept at import; it cannot be fitted "
                "with its problem's model"
            )
        count = len(kept["measurement"])
        if count != len(group):
            raise InputError(
                f"dataset {dataset_id}: {len(group)} points in the weighted table but {count} "
                "PEtab rows kept at import"
            )
        for position, (index, value) in enumerate(zip(group.index, group["value"], strict=True)):
            row = {column: str(cells[position]) for column, cells in kept.items()}
            measured = float(row["measurement"])
            if not math.isclose(measured, float(value), rel_tol=1e-9, abs_tol=1e-300):
                raise InputError(
                    f"dataset {dataset_id}, point {position + 1}: value {value} differs from its "
                    f"PEtab row's measurement {row['measurement']}; the rows no longer match"
                )
            rows[index] = row
            for name, column in PETAB_COLUMNS.items():
                cell = row.get(column, "")
                cell = "" if cell.strip().lower() == "nan" else cell.strip()
                columns[name][index] = float(cell) if name == "petab_time" else cell
    points = table.assign(**{name: np.asarray(values, dtype=float if name == "petab_time" else object)
                             for name, values in columns.items()})  # fmt: skip
    return points, rows


def simulation_table(fitted: ProblemFit, simulation: np.ndarray,
                     sigma: np.ndarray | None = None) -> pd.DataFrame:  # fmt: skip
    """Give the PEtab simulation table: each point's measurement row as imported, plus
    ``simulation`` (the observable at the given parameters) and, where given, ``curateSigma``
    (the sigma the objective used: the noise model's times the trust factor)."""
    frame = pd.DataFrame(fitted.rows)
    first = [c for c in ("observableId", "preequilibrationConditionId", "simulationConditionId",
                         "measurement", "time") if c in frame.columns]  # fmt: skip
    frame = frame[first + [c for c in frame.columns if c not in first]]
    frame.insert(frame.columns.get_loc("measurement") + 1, "simulation", simulation)
    if sigma is not None:
        frame["curateSigma"] = sigma
    return frame
