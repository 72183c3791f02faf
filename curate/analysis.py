"""Fits and sensitivity checks on the catalog's weighted data: the API glue.

Builds the weighted table (:mod:`curate.exporting`), fits it (:mod:`curate.fitting`), runs the
leave-one-group-out checks (:mod:`curate.sensitivity`) with a Python model or any external
fitter, and records each run in the catalog as an event naming the dataset versions, the model
file's hash, the spec and the policy, so that ``impact`` can find fits a correction touches.
"""

from __future__ import annotations

import json
import shlex
import subprocess
import tempfile
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from curate import exporting, fitting, sensitivity, weights
from curate.errors import InputError
from curate.export import write_table

if TYPE_CHECKING:
    from curate.catalog import Catalog

__all__ = ["ExternalFold", "run_fit", "run_sensitivity"]


def _record(catalog: Catalog, kind: str, *, model: str, spec: fitting.ParameterSpec | None, policy: weights.Policy,
            versions: list[Any], selection: exporting.Selection, summary: dict[str, Any]) -> None:  # fmt: skip
    manifest = exporting._manifest(catalog, kind, policy, selection, versions, {})
    exporting.record_run(catalog, kind, policy, versions, manifest, extra={
        "model": model, "model_sha256": fitting.model_sha256(model) if ":" in model else None,
        "spec_sha256": spec.sha256 if spec else None, "spec": spec.to_dict() if spec else None, "result": summary,
    })  # fmt: skip


def _problem(catalog: Catalog, model_ref: str, spec_path: str | Path, policy: weights.Policy,
             selection: exporting.Selection) -> tuple[fitting.FitProblem, pd.DataFrame, list[Any], fitting.ParameterSpec]:  # fmt: skip
    spec = fitting.load_spec(spec_path)
    model = fitting.load_model(_absolute(model_ref))
    table, _, versions = exporting.weighted_table(catalog, policy=policy, selection=selection)
    return fitting.FitProblem(table, model, spec), table, versions, spec


def _absolute(model_ref: str) -> str:
    target, sep, name = model_ref.rpartition(":")
    if sep and target.endswith(".py"):
        return f"{Path(target).resolve()}:{name}"
    return model_ref


def run_fit(catalog: Catalog, model_ref: str, spec_path: str | Path, *, policy: weights.Policy | None = None,
            selection: exporting.Selection | None = None, options: fitting.FitOptions | None = None) -> fitting.FitResult:  # fmt: skip
    """Fit a Python model to the weighted selection; record the fit; give the result."""
    policy = policy or weights.load_policy()
    selection = selection or exporting.Selection()
    problem, _, versions, spec = _problem(catalog, model_ref, spec_path, policy, selection)
    result = fitting.fit(problem, options)
    _record(catalog, "fit", model=model_ref, spec=spec, policy=policy, versions=versions, selection=selection,
            summary={k: v for k, v in result.to_dict().items() if k != "starts"})  # fmt: skip
    return result


@dataclass
class ExternalFold:
    """One external fitter run: its folder, exit status and parameters."""

    group: str
    folder: Path
    parameters: dict[str, float] = field(default_factory=dict)
    stderr: dict[str, float] = field(default_factory=dict)
    error: str | None = None


def _external(
    command: str, table: pd.DataFrame, folder: Path, group: str, timeout: float
) -> ExternalFold:
    folder.mkdir(parents=True, exist_ok=True)
    write_table(table, folder, "data")
    data, out = folder / "data.csv", folder / "result.json"
    out.unlink(missing_ok=True)
    try:
        arguments = [
            part.replace("{data}", str(data)).replace("{out}", str(out))
            for part in shlex.split(command)
        ]
    except ValueError as err:
        raise InputError(f"--fitter-cmd: cannot split the command ({err})") from None
    if not arguments:
        raise InputError("--fitter-cmd: the command is empty")
    fold = ExternalFold(group, folder)
    log = folder / "fitter.log"
    try:
        with log.open("w", encoding="utf-8") as stream:
            completed = subprocess.run(
                arguments, stdout=stream, stderr=subprocess.STDOUT, timeout=timeout, check=False
            )
    except FileNotFoundError:
        raise InputError(f"--fitter-cmd: no program '{arguments[0]}'") from None
    except subprocess.TimeoutExpired:
        fold.error = f"the fitter ran longer than {timeout:g} s and was stopped (log: {log})"
        return fold
    if completed.returncode != 0:
        fold.error = f"the fitter exited with code {completed.returncode} (log: {log})"
        return fold
    try:
        content = json.loads(out.read_text(encoding="utf-8"))
        raw = content["parameters"]
        for name, value in raw.items():
            if isinstance(value, dict):
                fold.parameters[name] = float(value["value"])
                if value.get("stderr") is not None:
                    fold.stderr[name] = float(value["stderr"])
            else:
                fold.parameters[name] = float(value)
        for name, value in (content.get("stderr") or {}).items():
            fold.stderr[name] = float(value)
    except FileNotFoundError:
        fold.error = f"the fitter wrote no {out.name} (log: {log})"
    except (json.JSONDecodeError, KeyError, TypeError, ValueError, AttributeError) as err:
        fold.error = f'the fitter\'s {out.name} is not {{"parameters": {{NAME: value}}}} ({type(err).__name__}: {err})'
    return fold


def _sensitivity_external(command: str, table: pd.DataFrame, labels: np.ndarray, *, by: str, timeout: float,
                          workdir: Path, threshold: float,
                          progress: Callable[[int, int], None] | None) -> sensitivity.SensitivityResult:  # fmt: skip
    full = _external(command, table, workdir / "full", "full", timeout)
    if full.error is not None:
        raise InputError(f"--fitter-cmd on the full data: {full.error}")
    groups = []
    unique = sorted(set(labels.astype(str).tolist()))
    names = sorted(full.parameters)
    for done, group in enumerate(unique):
        keep = labels.astype(str) != group
        safe = "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in group)
        fold = _external(command, table[keep], workdir / f"without_{safe}", group, timeout)
        if progress:
            progress(done + 1, len(unique))
        if fold.error is not None:
            groups.append(
                sensitivity.GroupResult.failed(
                    group,
                    int((~keep).sum()),
                    f"fold without {by} {group} failed: {fold.error}",
                    fold.error,
                )
            )
            continue
        parameters: dict[str, dict[str, float | None]] = {}
        flags = []
        for name in names:
            value = fold.parameters.get(name)
            se = full.stderr.get(name)
            shift = (value - full.parameters[name]) / se if (value is not None and se) else None
            parameters[name] = {"value": value, "shift_se": shift}
            if shift is not None and abs(shift) > threshold:
                flags.append(f"{name} depends on {by} {group}: shifts {shift:+.1f} SE without it")
        groups.append(
            sensitivity.GroupResult(group, int((~keep).sum()), parameters, None, None, None, flags)
        )
    good = [{n: g.parameters[n]["value"] for n in g.parameters} for g in groups if g.error is None]
    full_dict: dict[str, Any] = {"parameters": {n: {"value": v, "stderr": full.stderr.get(n)} for n, v in full.parameters.items()},
                 "scale_factors": {}, "chi2": None, "dof": None, "n_points": len(table), "converged": True,
                 "starts": [], "fitter": command, "workdir": str(workdir)}  # fmt: skip
    return sensitivity.SensitivityResult(
        full=full_dict, by=by, method="external", groups=groups,
        jackknife_stderr=sensitivity.jackknife_stderr(good, names),  # type: ignore[arg-type]
        shift_threshold=threshold, cook_threshold=sensitivity.DEFAULT_COOK_THRESHOLD, executor=f"external: {command}",
    )  # fmt: skip


def run_sensitivity(
    catalog: Catalog,
    *,
    by: str,
    model_ref: str | None = None,
    spec_path: str | Path | None = None,
    fitter_cmd: str | None = None,
    method: str = "exact",
    policy: weights.Policy | None = None,
    selection: exporting.Selection | None = None,
    options: fitting.FitOptions | None = None,
    workers: int = 1,
    dask: str | None = None,
    threshold: float = sensitivity.DEFAULT_SHIFT_THRESHOLD,
    alternative_policies: list[weights.Policy] | None = None,
    timeout: float = 600.0,
    workdir: str | Path | None = None,
    progress: Callable[[int, int], None] | None = None,
) -> sensitivity.SensitivityResult:
    """Run the leave-one-group-out check (and a policy sweep); record it; give the result."""
    if by.startswith("kfold"):
        raise InputError("--by for sensitivity: expected dataset, lab or condition:KEY")
    if (model_ref is None) == (fitter_cmd is None):
        raise InputError("sensitivity: give either --model with --params, or --fitter-cmd")
    policy = policy or weights.load_policy()
    selection = selection or exporting.Selection()
    if fitter_cmd is not None:
        table, _, versions = exporting.weighted_table(catalog, policy=policy, selection=selection)
        labels, _ = exporting.fold_groups(table, by)
        folder = Path(workdir) if workdir else Path(tempfile.mkdtemp(prefix="curate-fitter-"))
        result = _sensitivity_external(fitter_cmd, table, labels, by=by, timeout=timeout, workdir=folder,
                                       threshold=threshold, progress=progress)  # fmt: skip
        _record(catalog, "sensitivity", model=f"external: {fitter_cmd}", spec=None, policy=policy, versions=versions,
                selection=selection, summary=_summary(result))  # fmt: skip
        return result
    if spec_path is None:
        raise InputError("sensitivity: --model needs --params SPEC.toml")
    assert model_ref is not None
    problem, table, versions, spec = _problem(catalog, model_ref, spec_path, policy, selection)
    labels, _ = exporting.fold_groups(table, by)
    full = fitting.fit(problem, options)
    result = sensitivity.leave_one_group_out(
        problem, full, labels, by=by, method=method, options=options, model_ref=_absolute(model_ref),
        workers=workers, dask=dask, shift_threshold=threshold, progress=progress,
    )  # fmt: skip
    for alternative in alternative_policies or []:
        other_problem, _, _, _ = _problem(catalog, model_ref, spec_path, alternative, selection)
        refit = fitting.fit(
            other_problem, fitting.FitOptions(tolerance=(options or fitting.FitOptions()).tolerance)
        )
        shifts = {}
        for name in full.free:
            se = full.parameters[name]["stderr"]
            value = refit.parameters[name]["value"]
            base = full.parameters[name]["value"]
            shifts[name] = {
                "value": value,
                "shift_se": (value - base) / se
                if (se and value is not None and base is not None)
                else None,
            }
        result.policies.append({"policy": alternative.name, "origin": alternative.origin, "sha256": alternative.sha256,
                                "parameters": shifts, "chi2": refit.chi2})  # fmt: skip
    _record(catalog, "sensitivity", model=model_ref, spec=spec, policy=policy, versions=versions, selection=selection,
            summary=_summary(result))  # fmt: skip
    return result


def _summary(result: sensitivity.SensitivityResult) -> dict[str, Any]:
    """Give the whole result as plain data (the report draws from the newest recorded run)."""
    data = result.to_dict()
    data["full"] = {k: v for k, v in data["full"].items() if k != "starts"}
    data["flags"] = result.flags()
    return data
