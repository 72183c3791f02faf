"""A PEtab v1 problem's model, simulated with libroadrunner: conditions, preequilibration, formulas.

Semantics (PEtab v1 specification, "Condition table", "Observables table", "Measurement table"):

- every parameter-table id that is a model parameter takes its value (nominal, or the fitted
  one) before each simulation; a condition-table column sets a model parameter, a species'
  initial concentration or a compartment's initial size, to a number or a parameter-table id;
  an empty or NaN cell keeps the model's own value (after preequilibration: the preequilibrated
  value);
- a row with a preequilibration condition is simulated from the preequilibration condition to
  a steady state first; then the simulation condition's parameters apply and every state keeps
  its preequilibrated value except the states the simulation condition sets (partial
  preequilibration);
- the observable formula gives the simulation, the noise formula sigma, both with the row's
  ``observableParameter{n}_{id}`` / ``noiseParameter{n}_{id}`` placeholders filled from its
  ``observableParameters`` / ``noiseParameters`` (numbers or parameter ids, per row), and with
  model species (concentrations), parameters, compartments, parameter-table ids, condition-table
  output parameters and ``time``.

Each (preequilibration, simulation condition) pair is simulated once per evaluation, at the union
of its rows' times. Solver tolerances are explicit (:class:`SolverTolerances`).
"""

from __future__ import annotations

import contextlib
import io
import math
import os
import sys
from collections.abc import Iterator
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd
import yaml

from curate.errors import InputError, SimulationFailed
from curate.fit.petab.formulas import Formula, parse_formula
from curate.ingest.petab import petab_file_names

__all__ = ["PetabModel", "SolverTolerances"]

_STEADY_RATE = 1e-10  # max |dx/dt| (relative to max(1, |x|)) taken as a steady state
_STEADY_HORIZONS = (1e2, 1e3, 1e4, 1e5, 1e6, 1e7, 1e8)


_SINK: int | None = None  # the null device, for _native_messages_hidden


@contextlib.contextmanager
def _native_messages_hidden() -> Iterator[None]:
    """Hide what the solver's C code writes to the process's stdout and stderr: SUNDIALS prints
    CVODE's warnings and failures there, bypassing libroadrunner's logger, and they would mix
    into the command's output (a ``--json`` document on stdout); the error itself is raised."""
    for stream in (sys.stdout, sys.stderr):  # what Python has buffered goes out first
        with contextlib.suppress(Exception):
            stream.flush()
    global _SINK
    saved: list[tuple[int, int]] = []
    try:
        if _SINK is None:  # opened once per process: every simulation passes here
            _SINK = os.open(os.devnull, os.O_WRONLY)
        for descriptor in (1, 2):
            try:
                saved.append((descriptor, os.dup(descriptor)))
            except OSError:  # no such descriptor to hide
                continue
            os.dup2(_SINK, descriptor)
        yield
    finally:
        for descriptor, copy in saved:
            os.dup2(copy, descriptor)
            os.close(copy)


def _first_line(err: BaseException) -> str:
    """Give a libroadrunner error's first line without its C++ location ("at virtual ...")."""
    first = (str(err).strip().splitlines() or ["no message"])[0]
    for cut in ("; In virtual ", ", at virtual ", " at virtual "):
        first = first.split(cut)[0]
    return first.strip() or "no message"


@dataclass(frozen=True)
class SolverTolerances:
    """The ODE solver's settings (CVODE inside libroadrunner), recorded with every run."""

    relative: float = 1e-8
    absolute: float = 1e-10
    max_steps: int = 100_000

    def to_dict(self) -> dict[str, float]:
        """Give the settings as plain data."""
        return {"relative": self.relative, "absolute": self.absolute, "max_steps": self.max_steps}


def _table(files: dict[str, bytes], names: list[str], kind: str) -> tuple[pd.DataFrame, str]:
    frames = []
    for name in names:
        try:
            frames.append(pd.read_csv(io.BytesIO(files[name]), sep="\t", dtype=str,
                                      keep_default_na=False))  # fmt: skip
        except (KeyError, pd.errors.ParserError, UnicodeDecodeError) as err:
            raise InputError(f"{name}: cannot read the {kind} table ({err})") from None
    if not frames:
        return pd.DataFrame(), ""
    return pd.concat(frames, ignore_index=True), names[0]


def _placeholder_count(formula: Formula, prefix: str, observable_id: str) -> int:
    """Give the highest n of the formula's ``{prefix}{n}_{observable_id}`` placeholders."""
    numbers = [int(name[len(prefix):].split("_", 1)[0]) for name in formula.names
               if name.startswith(prefix) and name.endswith(f"_{observable_id}")
               and name[len(prefix):].split("_", 1)[0].isdigit()]  # fmt: skip
    return max(numbers, default=0)


def _check_parameter_rows(parameters: pd.DataFrame, file: str) -> None:
    """Refuse estimated parameters whose bounds cannot hold a fit (one line, naming the row)."""
    for k, row in enumerate(parameters.to_dict("records")):
        if str(row.get("estimate", "1")).strip() in ("0", "0.0"):
            continue
        name = str(row.get("parameterId", "")).strip()
        where = f"{file}, row {k + 2} ({name})"
        lower = _number(str(row.get("lowerBound", "")).strip())
        upper = _number(str(row.get("upperBound", "")).strip())
        scale = (str(row.get("parameterScale", "lin")).strip() or "lin").lower()
        if lower is not None and upper is not None and not lower < upper:
            raise InputError(f"{where}: lowerBound {lower:g} is not below upperBound {upper:g}")
        if scale in ("log", "log10") and lower is not None and lower <= 0:
            raise InputError(
                f"{where}: parameterScale {scale} needs a positive lowerBound, not {lower:g}"
            )


def _species_compartments(sbml: str) -> dict[str, str]:
    """Give each species' compartment, read from the SBML text (libroadrunner does not say)."""
    import xml.etree.ElementTree as ElementTree  # the model was loaded: the XML is well formed

    root = ElementTree.fromstring(sbml.encode("utf-8"))
    return {
        str(node.get("id")): str(node.get("compartment"))
        for node in root.iter()
        if str(node.tag).rsplit("}", 1)[-1] == "species"
    }


def _number(text: str) -> float | None:
    try:
        value = float(text)
    except ValueError:
        return None
    return value


@dataclass
class _Observable:
    id: str
    formula: Formula
    noise: Formula
    transformation: str
    distribution: str


@dataclass
class PetabModel:
    """A PEtab problem's model and tables, ready to simulate rows at given parameters."""

    files: dict[str, bytes]
    source: str
    tolerances: SolverTolerances = field(default_factory=SolverTolerances)

    def __post_init__(self) -> None:
        try:
            description = yaml.safe_load(self.files[self.source].decode("utf-8"))
        except (KeyError, UnicodeDecodeError, yaml.YAMLError) as err:
            raise InputError(f"{self.source}: cannot read the problem's YAML ({err})") from None
        names = petab_file_names(description, self.source)
        if not names["sbml"]:
            raise InputError(f"{self.source}: the problem names no SBML model; nothing to simulate")
        self.sbml_name = names["sbml"][0]
        conditions, self.condition_file = _table(self.files, names["condition"], "condition")
        observables, self.observable_file = _table(self.files, names["observable"], "observable")
        parameters, self.parameter_file = _table(self.files, names["parameter"], "parameter")
        self.conditions: dict[str, dict[str, Any]] = {}
        for k, row in enumerate(conditions.to_dict("records")):
            condition_id = str(row["conditionId"]).strip()
            if condition_id in self.conditions:
                raise InputError(
                    f"{self.condition_file}, row {k + 2}: condition '{condition_id}' is defined "
                    "twice; each conditionId once"
                )
            self.conditions[condition_id] = row
        self.parameters = parameters
        _check_parameter_rows(parameters, self.parameter_file)
        self.nominal = {
            str(row["parameterId"]).strip(): float(row["nominalValue"])
            for row in parameters.to_dict("records")
        }
        with _native_messages_hidden():
            self._load_model()
        self.output_parameters = self._output_parameters()  # once: every evaluation asks
        self.observables = {
            str(row["observableId"]).strip(): self._observable(row, k)
            for k, row in enumerate(observables.to_dict("records"))
        }
        self._check_conditions()
        self._check_measurements(names["measurement"])

    def _check_measurements(self, names: list[str]) -> None:
        """Refuse rows a simulation cannot honour: a time before 0 (a PEtab v1 simulation
        starts at t = 0), more observable or noise parameters than the formula's placeholders."""
        for name in names:
            table, _ = _table(self.files, [name], "measurement")
            for k, row in enumerate(table.to_dict("records")):
                where = f"{name}, row {k + 2}"
                time = _number(str(row.get("time", "")).strip())
                if time is not None and time < 0:
                    raise InputError(
                        f"{where}: time {time:g} is before 0; a PEtab v1 simulation starts at "
                        "t = 0 (shift the times, or leave the row out)"
                    )
                observable = self.observables.get(str(row.get("observableId", "")).strip())
                if observable is None:
                    continue
                for column, prefix, formula in (
                    ("observableParameters", "observableParameter", observable.formula),
                    ("noiseParameters", "noiseParameter", observable.noise),
                ):
                    cell = str(row.get(column, "") or "").strip()
                    given = len(cell.split(";")) if cell and cell.lower() != "nan" else 0
                    wanted = _placeholder_count(formula, prefix, observable.id)
                    if given > wanted:
                        raise InputError(
                            f"{where}, {column}: '{cell}' gives {given} values, but observable "
                            f"{observable.id}'s formula has {wanted} {prefix} placeholder"
                            f"{'' if wanted == 1 else 's'}"
                        )

    # -- the model -------------------------------------------------------------------------

    def _load_model(self) -> None:
        import roadrunner

        try:
            text = self.files[self.sbml_name].decode("utf-8")
            self.runner = roadrunner.RoadRunner(text)
        except Exception as err:  # libroadrunner raises RuntimeError and others
            raise InputError(
                f"{self.sbml_name}: libroadrunner cannot load the SBML model: {_first_line(err)}"
            ) from None
        runner = self.runner
        integrator = runner.integrator
        integrator.relative_tolerance = self.tolerances.relative
        integrator.absolute_tolerance = self.tolerances.absolute
        integrator.maximum_num_steps = self.tolerances.max_steps
        model = runner.model
        self.species = list(model.getFloatingSpeciesIds()) + list(model.getBoundarySpeciesIds())
        rules = set(runner.getAssignmentRuleIds())
        self.model_parameters = list(model.getGlobalParameterIds())
        self.settable = [p for p in self.model_parameters if p not in rules]
        self.compartments = list(model.getCompartmentIds())
        self.compartment_of = _species_compartments(text)
        self.model_symbols = set(self.species) | set(self.model_parameters) | set(self.compartments)
        # the state variables (species amounts, rate-rule targets), named as the rates name them
        self.state_ids = [str(c).rstrip("'") for c in runner.getRatesOfChangeNamedArray().colnames]
        self.state_set = set(self.state_ids)
        self._selections: list[str] = []
        self._grids: dict[tuple[bytes, tuple[str, ...]], tuple[np.ndarray, list[str]]] = {}
        self._condition_cells: dict[str, list[tuple[str, float | None, str]]] = {}

    def _observable(self, row: dict[str, str], index: int) -> _Observable:
        observable_id = str(row["observableId"]).strip()
        where = f"{self.observable_file}, row {index + 2} ({observable_id})"
        formula = parse_formula(
            row.get("observableFormula", ""), where=where + ", observableFormula"
        )
        noise = parse_formula(row.get("noiseFormula", "") or "1", where=where + ", noiseFormula")
        transformation = (row.get("observableTransformation") or "lin").strip() or "lin"
        distribution = (row.get("noiseDistribution") or "normal").strip() or "normal"
        if transformation not in ("lin", "log", "log10"):
            raise InputError(
                f"{where}, observableTransformation: '{transformation}'; expected lin, log or log10"
            )
        if distribution not in ("normal", "laplace"):
            raise InputError(
                f"{where}, noiseDistribution: '{distribution}'; expected normal or laplace"
            )
        output = self.output_parameters
        for column, parsed in (("observableFormula", formula), ("noiseFormula", noise)):
            for name in parsed.names:
                if name.startswith(("observableParameter", "noiseParameter")) and name.endswith(
                    f"_{observable_id}"
                ):
                    continue
                if (
                    name in self.model_symbols
                    or name in self.nominal
                    or name in output
                    or name == "time"
                ):
                    continue
                raise InputError(
                    f"{where}, {column}: '{name}' is neither a model symbol, a parameter-table id "
                    "nor a placeholder of this observable"
                )
        return _Observable(observable_id, formula, noise, transformation, distribution)

    def _output_parameters(self) -> set[str]:
        """Give the condition-table columns that are not model symbols (observable parameters)."""
        columns = {c for row in self.conditions.values() for c in row} - {
            "conditionId",
            "conditionName",
        }
        return {c for c in columns if c not in self.model_symbols}

    def _check_conditions(self) -> None:
        used = {n for o in self.observables.values() for n in (*o.formula.names, *o.noise.names)}
        for column in sorted(self.output_parameters):
            if column not in used:
                raise InputError(
                    f"{self.condition_file}, column {column}: the model has no symbol '{column}' "
                    "and no observable or noise formula uses it"
                )

    # -- values ------------------------------------------------------------------------------

    def _value(self, cell: str, parameters: dict[str, float], where: str) -> float:
        text = str(cell).strip()
        number = _number(text)
        if number is not None:
            return number
        if text in parameters:
            return float(parameters[text])
        if text in self.nominal:
            return self.nominal[text]
        raise InputError(f"{where}: '{text}' is neither a number nor a parameter-table id")

    def _condition(self, condition_id: str) -> dict[str, str]:
        row = self.conditions.get(condition_id)
        if row is None:
            raise InputError(
                f"{self.condition_file}: no condition '{condition_id}' for a measurement row"
            )
        return dict(row)

    def _overrides(self, condition_id: str, parameters: dict[str, float]) -> dict[str, float]:
        """Give the condition's model-symbol values (NaN and empty cells left out)."""
        cells = self._condition_cells.get(condition_id)
        if cells is None:  # read once: (column, its number or None, its text)
            cells = []
            for column, cell in self._condition(condition_id).items():
                if column in ("conditionId", "conditionName") or column not in self.model_symbols:
                    continue
                text = str(cell).strip()
                if text:
                    cells.append((column, _number(text), text))
            self._condition_cells[condition_id] = cells
        out: dict[str, float] = {}
        for column, number, text in cells:
            value = (
                number
                if number is not None
                else self._value(
                    text,
                    parameters,
                    f"{self.condition_file}, condition {condition_id}, column {column}",
                )
            )
            if not math.isnan(value):
                out[column] = value
        return out

    def _condition_values(self) -> set[str]:
        """Give the parameter ids the condition table's cells name."""
        return {str(cell).strip() for row in self.conditions.values() for cell in row.values()}

    def _initialise(self, condition_id: str, parameters: dict[str, float]) -> dict[str, float]:
        """Reset the model to its values under one condition; give the condition's overrides.

        Only current values are set: libroadrunner's `init(...)` setter regenerates the model
        (about 0.1 s a call) and its reset rules differ by kind of symbol. The order keeps the
        PEtab meaning: parameters first, then `reset()` evaluates the initial assignments under
        them; a compartment given a new size keeps its species' concentrations; species given a
        value take it last.
        """
        runner = self.runner
        runner.resetAll()  # every value as the SBML file gives it (init values are never changed)
        overrides = self._overrides(condition_id, parameters)
        given: dict[str, float] = {}
        for name in self.settable:
            if name in overrides:
                given[name] = overrides[name]
            elif name in parameters:
                given[name] = float(parameters[name])
            elif name in self.nominal:
                given[name] = self.nominal[name]
        for name, value in given.items():
            runner.setValue(name, value)
        runner.reset()  # species and rate-rule targets from their initial assignments
        for name, value in given.items():  # a rate rule's parameter the reset put back
            if name in self.state_set:
                runner.setValue(name, value)
        resized = [c for c in self.compartments if c in overrides]
        if resized:
            kept = {n: runner.getValue(f"[{n}]") for n in self.species}
            for name in resized:
                runner.setValue(name, overrides[name])
            for name, value in kept.items():
                if name not in overrides and self.compartment_of[name] in resized:
                    runner.setValue(f"[{name}]", value)
        for name, value in overrides.items():
            if name in self.species:
                runner.setValue(f"[{name}]", value)
        return overrides

    def _steady_state(self, where: str) -> None:
        runner = self.runner
        start = 0.0
        for horizon in _STEADY_HORIZONS:
            runner.simulate(start, horizon, 2)
            start = horizon
            rates = np.asarray(runner.getRatesOfChange(), dtype=float)
            state = np.array([runner.getValue(n) for n in self.state_ids], dtype=float)
            if np.all(np.abs(rates) <= _STEADY_RATE * np.maximum(1.0, np.abs(state))):
                return
        raise SimulationFailed(f"{where}: no steady state reached by t = {_STEADY_HORIZONS[-1]:g}")

    def simulate(self, pre: str, condition: str, times: np.ndarray, names: list[str],
                 parameters: dict[str, float]) -> dict[str, np.ndarray]:  # fmt: skip
        """Give each named model symbol's value at each time under one condition pair."""
        with _native_messages_hidden():
            return self._simulate(pre, condition, times, names, parameters)

    def _simulate(self, pre: str, condition: str, times: np.ndarray, names: list[str],
                  parameters: dict[str, float]) -> dict[str, np.ndarray]:  # fmt: skip
        runner = self.runner
        where = f"condition {condition}" + (f" after preequilibration {pre}" if pre else "")
        try:
            if pre:
                self._initialise(pre, parameters)
                self._steady_state(f"preequilibration {pre}")
                kept = {n: runner.getValue(n) for n in self.state_ids}
                overrides = self._initialise(condition, parameters)
                for name, value in kept.items():  # states the condition sets start afresh
                    if name not in overrides:
                        runner.setValue(name, value)
            else:
                self._initialise(condition, parameters)
            key = (times.tobytes(), tuple(names))
            known = self._grids.get(key)
            if known is None:  # the same rows come back at every evaluation of a fit
                if len(self._grids) > 256:
                    self._grids.clear()
                known = self._grids[key] = (
                    np.unique(np.concatenate([[0.0], times])),
                    ["time"] + [f"[{n}]" if n in self.species else n for n in names],
                )
            grid, selections = known
            if selections != self._selections:  # setting them costs as much as a short run
                runner.timeCourseSelections = selections
                self._selections = selections
            if len(grid) == 1:
                values = np.array([[0.0] + [runner.getValue(s) for s in selections[1:]]])
            else:
                values = np.asarray(runner.simulate(times=grid.tolist()), dtype=float)
        except SimulationFailed:
            raise
        except RuntimeError as err:
            first = _first_line(err)
            # every value the simulation takes from the parameters (not the observable's own)
            shown = ", ".join(f"{k}={v:.4g}" for k, v in parameters.items()
                              if k in self.model_symbols or k in self._condition_values())  # fmt: skip
            raise SimulationFailed(
                f"{self.sbml_name}: the simulation of {where} failed at {shown}: {first}"
            ) from None
        position = np.searchsorted(values[:, 0], times)
        return {name: values[position, k + 1] for k, name in enumerate(names)}

    def parameter_rows(self) -> list[dict[str, Any]]:
        """Give the parameter table's rows as dicts (text cells)."""
        return list(self.parameters.to_dict("records"))
