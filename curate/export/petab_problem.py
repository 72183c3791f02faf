"""A stored PEtab problem given back whole, with the selected measurements and their trust.

When every dataset of a selection was imported from one stored problem (``curate
import-petab`` links each to it: ``annotations['petab_problem']``), the PEtab export is that
problem, runnable: its SBML models byte for byte under their own names, its condition,
observable and parameter tables, and the selected datasets' measurement rows with every
original cell (``annotations['petab_rows']``), in the measurement file's own order
(``annotations['petab_row_index']``) and under the file's own name. A table that needs no
change is copied byte for byte; one that does is rewritten with its cells verbatim.

Trust acts on sigma: sigma_eff = sigma_model * sqrt(v_grade / b_d), v_grade and b_d being the
``inflation`` and ``balance`` columns of the weighted table. Where that factor is 1 on every
exported row of an observable, the observable and its rows are left as imported. Otherwise
its ``noiseFormula`` becomes ``(<original>) * noiseParameter{k+1}_<observableId>`` (k: the
noise placeholders the original uses) and each of its rows gets ``;<factor>`` appended to its
``noiseParameters`` (the factor alone in an empty cell), 15 significant digits. PEtab's normal
and laplace distributions take sigma as their scale on the transformed scale, so this is
exact for every noise model and transformation, estimated sigmas included.

What the exported rows no longer use is left out, so that the problem lints: conditions and
observables the stored rows named and no exported row names (those the stored problem held
unused stay), parameters that only the left-out rows, observables or conditions referred to
(never an id of the SBML model), visualization rows of left-out datasets or observables, and
any measurement or visualization file left empty. The YAML is copied as stored when every file
stays, else rewritten without the files left out.
"""

from __future__ import annotations

import csv
import hashlib
import io
import json
import math
import re
import textwrap
from collections.abc import Callable, Iterable
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import pandas as pd

from curate.errors import InputError
from curate.export.files import write_bytes
from curate.ingest.tables import Table, table_from_bytes
from curate.ledger.problems import StoredProblem

__all__ = [
    "CURATE_COLUMNS",
    "ProblemExport",
    "plan_problem_export",
    "problem_of_selection",
    "trust_factor_text",
    "write_problem_export",
]

# curate's own measurement columns (PEtab 1 allows extra columns; import-petab reads them back)
CURATE_COLUMNS = (
    "curateVersion", "trustGrade", "curateSd", "curateWeight", "curateGrade", "curateUnit",
    "curateRelative", "curateConditions",
)  # fmt: skip
_TABLE_ROLES = ("condition", "observable", "parameter", "measurement", "visualization")
_IDENTIFIER = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_SHOWN = 5  # datasets named in a refusal before "and N more"


@dataclass(frozen=True)
class ProblemExport:
    """A stored problem planned for export: every file's bytes, and what changed."""

    problem_id: str
    problem_version: int
    source: str
    content_sha256: str
    files: dict[str, bytes]  # name as the YAML gives it -> bytes; the YAML under ``source``
    copied: tuple[str, ...]  # written byte for byte as stored
    left_out: dict[str, list[str]]  # files, conditions, observables, parameters, visualization_rows
    noise_placeholders: dict[str, str]  # observable -> the placeholder its factor fills

    def manifest_entry(self) -> dict[str, Any]:
        """Give what the export's manifest records of the problem."""
        return {
            "id": self.problem_id,
            "version": self.problem_version,
            "source": self.source,
            "content_sha256": self.content_sha256,
            "copied": list(self.copied),
            "rewritten": sorted(set(self.files) - set(self.copied)),
            "left_out": self.left_out,
            "noise_placeholders": self.noise_placeholders,
        }

    def readme_text(self) -> str:
        """Give the README's section on the problem and on how trust is written into it."""
        changed = ", ".join(f"{obs} ({name})" for obs, name in self.noise_placeholders.items())
        left = "; ".join(
            f"{kind.replace('_', ' ')}: {', '.join(ids)}"
            for kind, ids in self.left_out.items()
            if ids
        )
        text = PROBLEM_README.format(
            problem_id=self.problem_id, version=self.problem_version, source=self.source,
            copied=", ".join(self.copied) or "none", changed=changed or "none (every factor is 1)",
            left_out=left or "nothing",
        )  # fmt: skip
        # the lists can be long: each line wrapped, its continuation indented
        return "\n".join(
            textwrap.fill(line, width=96, subsequent_indent="  ", break_on_hyphens=False)
            if len(line) > 96
            else line
            for line in text.split("\n")
        )


def problem_of_selection(links: dict[str, Any]) -> str | None:
    """Give the id of the one stored problem every dataset comes from, None if none does.

    ``links`` maps dataset id to its ``petab_problem`` annotation (None for a dataset from no
    stored problem). A selection mixing problems, or a problem with other data, is refused:
    a runnable problem has one model and one set of tables.
    """
    by_problem: dict[str, list[str]] = {}
    for dataset_id, link in links.items():
        problem = link.get("id") if isinstance(link, dict) else None
        key = f"stored problem {problem}" if isinstance(problem, str) else "no stored problem"
        by_problem.setdefault(key, []).append(dataset_id)
    if len(by_problem) <= 1:
        key = next(iter(by_problem), "no stored problem")
        return None if key == "no stored problem" else key.removeprefix("stored problem ")
    parts = [f"{key} ({_listed(ids)})" for key, ids in sorted(by_problem.items())]
    raise InputError(
        "petab export: the selection mixes datasets of " + " with datasets of ".join(parts)
        + "; a runnable problem comes from one stored problem, so select one part "
        "(--id, --lab or --observable) and export the others separately"
    )  # fmt: skip


def _listed(ids: list[str]) -> str:
    shown = ", ".join(ids[:_SHOWN])
    return shown + (f" and {len(ids) - _SHOWN} more" if len(ids) > _SHOWN else "")


def trust_factor_text(inflation: float, balance: float) -> str:
    """Give sqrt(inflation / balance), the factor on sigma, as PEtab text (15 significant digits)."""
    return f"{math.sqrt(inflation / balance):.15g}"


def _read(name: str, raw: bytes) -> Table:
    return table_from_bytes(Path(name), raw, require_rows=False, strict_text=True)


def _rows(table: Table) -> list[dict[str, str]]:
    return [{c: str(table.cells[c][i]) for c in table.columns} for i in range(len(table))]


def _tsv(columns: Iterable[str], rows: list[dict[str, str]]) -> bytes:
    header = list(columns)
    buffer = io.StringIO()
    writer = csv.writer(buffer, delimiter="\t", lineterminator="\n")
    writer.writerow(header)
    writer.writerows([[row.get(c, "") for c in header] for row in rows])
    return buffer.getvalue().encode("utf-8")


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _symbols(texts: Iterable[str]) -> set[str]:
    """Give the identifiers in formulas, override lists and condition cells."""
    found: set[str] = set()
    for text in texts:
        for part in str(text).split(";"):
            if part.strip() and not _is_number(part.strip()):
                found.update(_IDENTIFIER.findall(part))
    return found


def _references(
    measurements: list[dict[str, str]],
    observables: list[dict[str, str]],
    conditions: list[dict[str, str]],
) -> set[str]:
    """Give every parameter id the rows of these tables refer to."""
    cells = [
        row.get(c, "") for row in measurements for c in ("observableParameters", "noiseParameters")
    ]
    cells += [row.get(c, "") for row in observables for c in ("observableFormula", "noiseFormula")]
    cells += [
        v for row in conditions for c, v in row.items() if c not in ("conditionId", "conditionName")
    ]
    return _symbols(cells)


def _sbml_ids(raw: bytes) -> set[str]:
    """Give every id in an SBML model (its parameters, species, compartments, ...)."""
    import xml.etree.ElementTree as ElementTree

    return {e.get("id", "") for e in ElementTree.fromstring(raw).iter()} - {""}


def _placeholder_count(formula: str, observable: str) -> int:
    numbers = re.findall(rf"\bnoiseParameter(\d+)_{re.escape(observable)}\b", formula)
    return max((int(n) for n in numbers), default=0)


@dataclass
class _Row:
    cells: dict[str, str]
    file: str
    order: tuple[int, int]
    factor: str
    dataset_id: str


def _file_of(facts: dict[str, Any], measurement_files: list[str], files: dict[str, bytes]) -> str:
    """Give the measurement file a dataset's rows came from (by its bytes' sha256, else name)."""
    petab = facts.get("petab") or {}
    sha = petab.get("measurement_file_sha256")
    for name in measurement_files:
        if hashlib.sha256(files[name]).hexdigest() == sha:
            return name
    for name in measurement_files:
        if Path(name).name == petab.get("measurement_file"):
            return name
    return measurement_files[0]


def _measurement_rows(
    points: pd.DataFrame, datasets: dict[str, dict[str, Any]], problem: StoredProblem
) -> list[_Row]:
    measurement_files = problem.file_names("measurement")
    rows: list[_Row] = []
    sequence = 0
    for dataset_id, group in points.groupby("dataset_id", sort=False, observed=True):
        facts = datasets[str(dataset_id)]
        kept = facts.get("petab_rows")
        if not isinstance(kept, dict) or not kept:
            raise InputError(
                f"petab export: dataset {dataset_id} is linked to stored problem {problem.id} "
                "but keeps no PEtab rows (annotations 'petab_rows'); import it again with "
                "`curate import-petab`"
            )
        lengths = {len(v) for v in kept.values()}
        if lengths != {len(group)}:
            raise InputError(
                f"petab export: dataset {dataset_id} has {len(group)} points but keeps "
                f"{sorted(lengths)} PEtab rows; import it again with `curate import-petab`"
            )
        file = _file_of(facts, measurement_files, problem.files)
        numbers = (facts.get("petab_row_index") or {}).get("row")
        own = _own_columns(group, facts)
        for k, (inflation, balance) in enumerate(
            zip(group["inflation"], group["balance"], strict=True)
        ):
            cells = {column: str(values[k]) for column, values in kept.items()}
            cells.update(own[k])
            # datasets imported before row numbers were kept come after, in their stored order
            order = (0, int(numbers[k])) if numbers is not None else (1, sequence)
            sequence += 1
            factor = trust_factor_text(float(inflation), float(balance))
            rows.append(_Row(cells, file, order, factor, str(dataset_id)))
    return rows


def _number_text(value: float) -> str:
    return repr(float(value))


def _own_columns(group: pd.DataFrame, facts: dict[str, Any]) -> list[dict[str, str]]:
    """Give curate's columns for each point: version, grades, sd and weight, unit, flags."""
    conditions = json.dumps(
        {k: v for k, v in facts["conditions"].items() if isinstance(v, bool | str)},
        sort_keys=True, ensure_ascii=False,
    )  # fmt: skip
    own = []
    for _, row in group.iterrows():
        # a problem's noise model is its own: an sd curate estimated at export, or a policy
        # default, is no measurement and would come back as one on import
        reported = str(row["sd_source"]) == "reported"
        own.append({
            "curateVersion": str(int(row["version"])),
            "trustGrade": str(row["grade_used"]),
            "curateSd": _number_text(row["sd"]) if reported else "",
            "curateWeight": _number_text(row["weight"]) if reported else "",
            "curateGrade": "" if pd.isna(row.get("grade")) else str(row["grade"]),
            "curateUnit": facts["unit_verbatim"],
            "curateRelative": "true" if facts["relative"] else "false",
            "curateConditions": conditions,
        })  # fmt: skip
    return own


def _apply_trust(rows: list[_Row], observables: dict[str, dict[str, str]]) -> dict[str, str]:
    """Write each row's factor into the noise model where an observable needs it; give
    {observable: the new placeholder} of the observables changed."""
    by_observable: dict[str, list[_Row]] = {}
    for row in rows:
        by_observable.setdefault(row.cells.get("observableId", "").strip(), []).append(row)
    placeholders = {}
    for observable, members in by_observable.items():
        if all(row.factor == "1" for row in members):
            continue
        entry = observables[observable]
        formula = entry.get("noiseFormula", "").strip()
        if not formula:
            raise InputError(
                f"petab export: observable {observable} has no noiseFormula, so its trust "
                "factor has nothing to scale; give it one in the problem and import it again"
            )
        count = _placeholder_count(formula, observable)
        for row in members:
            given = row.cells.get("noiseParameters", "").strip()
            if len(given.split(";") if given else []) != count:
                raise InputError(
                    f"petab export: dataset {row.dataset_id}, observable {observable}: "
                    f"noiseParameters '{given}' fill {len(given.split(';')) if given else 0} "
                    f"placeholders but the noiseFormula uses {count}; correct the problem"
                )
            row.cells["noiseParameters"] = f"{given};{row.factor}" if given else row.factor
        placeholders[observable] = f"noiseParameter{count + 1}_{observable}"
        entry["noiseFormula"] = f"({formula}) * {placeholders[observable]}"
    return placeholders


def _check_names(
    rows: list[_Row], problem: StoredProblem, observables: set[str], conditions: set[str]
) -> None:
    """Refuse a row naming an observable or condition the problem's tables lack."""
    for row in rows:
        for column, known, kind in (
            ("observableId", observables, "observable"),
            ("simulationConditionId", conditions, "condition"),
            ("preequilibrationConditionId", conditions, "condition"),
        ):
            used = row.cells.get(column, "").strip()
            if used and used not in known:
                raise InputError(
                    f"petab export: dataset {row.dataset_id} names {kind} '{used}', which the "
                    f"{kind} table of stored problem {problem.id} version {problem.version} "
                    "lacks; import the problem again"
                )


def _used(rows: list[dict[str, str]], *columns: str) -> set[str]:
    """Give the ids the rows name in these columns."""
    return {row.get(c, "").strip() for row in rows for c in columns} - {""}


class _Tables:
    """The problem's tables as rows of text, and the rows an export keeps of each file."""

    def __init__(self, problem: StoredProblem) -> None:
        self.names = {role: problem.file_names(role) for role in ("sbml", *_TABLE_ROLES)}
        self.tables = {
            name: _read(name, problem.files[name]) for role in _TABLE_ROLES for name in self.names[role]
        }  # fmt: skip
        self.original = {name: _rows(table) for name, table in self.tables.items()}
        self.out: dict[str, list[dict[str, str]]] = {}
        self.changed: set[str] = set()

    def rows(self, role: str, *, kept: bool = False) -> list[dict[str, str]]:
        """Give every row of one role's files (as stored, or as kept)."""
        source = self.out if kept else self.original
        return [row for name in self.names[role] for row in source[name]]

    def keep(
        self,
        role: str,
        wanted: Callable[[dict[str, str]], bool],
        label: Callable[[dict[str, str]], str],
    ) -> list[str]:
        """Keep the rows of one role that ``wanted`` accepts; give the labels of the others."""
        dropped = []
        for name in self.names[role]:
            self.out[name] = [row for row in self.original[name] if wanted(row)]
            dropped += [label(row) for row in self.original[name] if not wanted(row)]
            if len(self.out[name]) < len(self.original[name]):
                self.changed.add(name)
        return dropped

    def keep_ids(self, role: str, key: str, wanted: Callable[[str], bool]) -> list[str]:
        """Keep the rows of one role whose id ``wanted`` accepts; give the ids of the others."""
        return self.keep(role, lambda row: wanted(row[key].strip()), lambda row: row[key])


def plan_problem_export(
    problem: StoredProblem, points: pd.DataFrame, datasets: dict[str, dict[str, Any]]
) -> ProblemExport:
    """Give every file of the export of a selection from one stored problem (nothing written).

    ``points`` is the weighted table (inflation and balance give each row's factor);
    ``datasets`` maps dataset id to the facts of :func:`curate.export.formats` (its PEtab
    annotations, unit, relative flag, conditions).
    """
    tables = _Tables(problem)
    names = tables.names
    rows = _measurement_rows(points, datasets, problem)
    observable_rows = {row["observableId"].strip(): row for row in tables.rows("observable")}
    condition_ids = {row["conditionId"].strip() for row in tables.rows("condition")}
    _check_names(rows, problem, set(observable_rows), condition_ids)
    # references before the noise formulas change: what the problem as stored refers to
    before = _references(
        tables.rows("measurement"), tables.rows("observable"), tables.rows("condition")
    )
    placeholders = _apply_trust(rows, observable_rows)
    for name in names["measurement"]:  # the selected rows, in file order
        mine = sorted((row for row in rows if row.file == name), key=lambda row: row.order)
        tables.out[name] = [row.cells for row in mine]
        tables.changed.add(name)
    # what the stored rows used and the exported rows do not is left out; what the stored
    # problem holds without using it (conditions of other experiments) stays, as published
    stored, exported = tables.rows("measurement"), [row.cells for row in rows]
    pair = ("simulationConditionId", "preequilibrationConditionId")
    observables = _used(exported, "observableId")
    unused_observables = _used(stored, "observableId") - observables
    unused_conditions = _used(stored, *pair) - _used(exported, *pair)
    left_out: dict[str, list[str]] = {"files": []}
    left_out["conditions"] = tables.keep_ids(
        "condition", "conditionId", lambda c: c not in unused_conditions
    )
    left_out["observables"] = tables.keep_ids(
        "observable", "observableId", lambda o: o not in unused_observables
    )
    for name in names["observable"]:
        if any(row["observableId"].strip() in placeholders for row in tables.out[name]):
            tables.changed.add(name)
    # parameters that only left-out rows referred to would be extraneous to PEtab's linter;
    # an id of the model stays (its row sets a model parameter's value, bounds, estimation)
    model_ids: set[str] = set()
    for name in names["sbml"]:
        model_ids |= _sbml_ids(problem.files[name])
    after = _references(
        exported,
        tables.rows("observable", kept=True),
        tables.rows("condition", kept=True),
    )
    unused = (before - after) - model_ids
    left_out["parameters"] = tables.keep_ids("parameter", "parameterId", lambda p: p not in unused)
    datasets_kept = _used(exported, "datasetId")
    left_out["visualization_rows"] = tables.keep(
        "visualization",
        lambda r: _plots_kept(r, datasets_kept, observables),
        lambda r: f"{r.get('plotId', '?')} {r.get('datasetId', '')}".strip(),
    )
    files: dict[str, bytes] = {}
    copied = []
    for role in ("sbml", *_TABLE_ROLES):
        for name in names[role]:
            if name not in tables.changed:
                files[name] = problem.files[name]
                copied.append(name)
            elif tables.out[name] or role == "parameter":  # PEtab 1 needs its one parameter file
                files[name] = _tsv(
                    _columns(tables.tables[name], tables.out[name]), tables.out[name]
                )
            else:  # a table file no row of the export is in
                left_out["files"].append(name)
    yaml_bytes = _yaml(problem, set(left_out["files"]))
    if not left_out["files"]:
        copied.insert(0, problem.source)
    return ProblemExport(
        problem_id=problem.id,
        problem_version=problem.version,
        source=problem.source,
        content_sha256=problem.content_sha256,
        files={problem.source: yaml_bytes, **files},
        copied=tuple(copied),
        left_out=left_out,
        noise_placeholders=placeholders,
    )  # fmt: skip


def _all(tables: dict[str, list[dict[str, str]]], names: list[str]) -> list[dict[str, str]]:
    return [row for name in names for row in tables[name]]


def _columns(table: Table, rows: list[dict[str, str]]) -> list[str]:
    columns = list(table.columns)
    for row in rows:
        columns += [c for c in row if c not in columns]
    return columns


def _plots_kept(row: dict[str, str], datasets: set[str], observables: set[str]) -> bool:
    dataset = row.get("datasetId", "").strip()
    observable = row.get("yValues", "").strip()
    return (not dataset or dataset in datasets) and (not observable or observable in observables)


def _yaml(problem: StoredProblem, left_out: set[str]) -> bytes:
    """Give the problem's YAML: as stored when every file stays, else without the files left out."""
    if not left_out:
        return problem.files[problem.source]
    import yaml

    content = yaml.safe_load(problem.yaml_text)
    for part in content.get("problems", []):
        for field, value in list(part.items()):
            if isinstance(value, list):
                kept = [n for n in value if n not in left_out]
                if kept:
                    part[field] = kept
                else:
                    del part[field]
    return str(yaml.safe_dump(content, sort_keys=False)).encode("utf-8")


def write_problem_export(plan: ProblemExport, outdir: Path) -> dict[str, str]:
    """Write the planned files into ``outdir`` (subfolders as the YAML names them); give
    file name -> sha256."""
    return {name: write_bytes(outdir / name, raw) for name, raw in plan.files.items()}


PROBLEM_README = """
PEtab: stored problem {problem_id} version {version}, given back whole ({source}).
Every dataset of this export was imported from that problem, so the PEtab folder is the problem
itself, runnable: the SBML model byte for byte under its own name, the problem's condition,
observable and parameter tables, and the selected datasets' measurement rows with every
original cell, in the measurement file's own order and under its own name. Time and
measurement are in the problem's own units (units.json; not seconds as above), and
observableParameters and noiseParameters are as published.
Files copied byte for byte: {copied}.
curate's columns ride along (PEtab 1 allows extra columns; `curate import-petab` reads them
back): curateVersion, trustGrade (the grade the policy applied), curateGrade (the dataset's
own), curateSd and curateWeight (only where the sd was reported; the fitter's sigma is the
noise model's), curateUnit, curateRelative, curateConditions.

Trust in PEtab: a grade acts on sigma,
  sigma_eff = sigma_model * sqrt(v_grade / b_d)
with v_grade the grade's variance inflation and b_d the dataset's balancing factor (the
inflation and balance columns of the weighted table). Where that factor is 1 on every row of an
observable, the observable's noiseFormula and its rows' noiseParameters are exactly as
imported. Otherwise the observable's noiseFormula becomes
  (<original noiseFormula>) * noiseParameter<k+1>_<observableId>
where k is the number of noise placeholders the original formula uses, and every row of that
observable gets ;<factor> appended to its noiseParameters (the factor alone where the cell was
empty), a number with 15 significant digits (1 on rows of full trust). PEtab's normal and
laplace distributions take this sigma as their scale on the scale of observableTransformation
(lin, log, log10), so the factor multiplies each point's variance by v_grade / b_d exactly,
also where sigma is an estimated parameter. The policy's noise floors act on curate's sd
(curateSd), never on the problem's noise model.
Where sigma is an estimated parameter, a fit can absorb a factor shared by every row of that
parameter: the noise estimate then moves by 1/factor and the model's parameters stay where they
were. A grade changes the fitted model only where rows of different factors share a noise
parameter, or where sigma is a number.
Observables with a factor: {changed}.
Left out (nothing exported uses them): {left_out}.
"""
