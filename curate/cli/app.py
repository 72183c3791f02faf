"""The ``curate`` commands: each parses, calls one API method, prints through the text layer.

No computation here. Errors a user can fix print one line on stderr and exit with code 2.
"""

from __future__ import annotations

import contextlib
import difflib
import json
import os
import sys
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Annotated, Any

import click
import typer
from rich.console import Console
from typer.core import TyperGroup

from curate.api import Catalog, open_catalog, read_petab
from curate.cli.options import (
    DIALECT_OPTIONS,
    DatasetId,
    Decimal,
    Delimiter,
    Encoding,
    EndAtBlank,
    FooterRows,
    ForceFlag,
    JsonFlag,
    Thousands,
    parse_columns,
    parse_conditions,
    selection_options,
)
from curate.demo import run_demo
from curate.errors import CurateError, InputError
from curate.fit import FitOptions
from curate.fit.new_points import parse_times
from curate.ingest import build_draft
from curate.ingest.corrections import Correction
from curate.ingest.inspection import inspect_file
from curate.jsontext import to_json
from curate.ledger import DEFAULT_CATALOG, AddPlan, default_actor, restore_catalog
from curate.ledger.provenance import parse_head
from curate.present import run_text, text
from curate.present.html import write_sensitivity_report
from curate.present.progress import progress_bar
from curate.quality.grading import load_checklist
from curate.quality.noise import METHODS as NOISE_METHODS
from curate.records import DatasetVersion
from curate.units import parse_quantity
from curate.version import __version__
from curate.weighting import Policy, Selection, load_policy


class _Commands(TyperGroup):
    """The command group; a mistyped command name is answered with the closest names."""

    def resolve_command(self, ctx: Any, args: list[str]) -> Any:
        """Give the command named first in ``args``, or fail naming the closest commands."""
        if args and not args[0].startswith("-") and self.get_command(ctx, args[0]) is None:
            known = self.list_commands(ctx)
            close = difflib.get_close_matches(args[0], known, n=3, cutoff=0.5)
            hint = (" or ".join(f"'{name}'" for name in close) + "?") if close else ""
            ctx.fail(
                f"no command '{args[0]}'"
                + (f"; did you mean {hint}" if hint else "; `curate --help` lists them")
            )
        return super().resolve_command(ctx, args)


app = typer.Typer(
    cls=_Commands,
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    rich_markup_mode=None,
    help="Keep measured time courses with their provenance, noise and trust grade; "
    "turn them into weighted, checkable data for any fitter.",
)
out = Console(highlight=False, soft_wrap=True, emoji=False, markup=False)  # ':abc:' stays text
if not out.is_terminal:  # piped output: keep table rows whole rather than folding them
    out.width = 220
err_console = Console(stderr=True, highlight=False, soft_wrap=True, emoji=False, markup=False)


class _State:
    catalog_path: str | None = None
    actor: str | None = None


state = _State()


def _catalog(*, create: bool = False) -> Catalog:
    """Open the chosen catalog; only commands that log data may ``create`` a missing one."""
    return open_catalog(state.catalog_path, actor=state.actor, create=create)


@contextlib.contextmanager
def _created_only_if_written() -> Iterator[None]:
    """Remove a catalog this command created if the command then fails (nothing was stored)."""
    chosen = state.catalog_path or os.environ.get("CURATE_CATALOG") or DEFAULT_CATALOG
    path = Path(chosen)
    existed = str(chosen) == ":memory:" or path.exists()
    try:
        yield
    except CurateError:
        if not existed:
            for suffix in ("", "-wal", "-shm"):
                Path(str(path) + suffix).unlink(missing_ok=True)
        raise


def _put(options: dict[str, Any], path: str, value: Any) -> None:
    """Set ``options['a']['b'] = value`` for the dotted ``path`` 'a.b' (the sidecar's shape);
    None sets nothing."""
    if value is None:
        return
    node = options
    *parents, last = path.split(".")
    for part in parents:
        node = node.setdefault(part, {})
    node[last] = value


def _emit_json(value: Any) -> None:
    sys.stdout.write(to_json(value) + "\n")


def _show(data: Any, render: Callable[[], Any], as_json: bool) -> None:
    """Print the JSON of ``data``, or the rich text ``render()`` gives."""
    if as_json:
        _emit_json(data)
    else:
        out.print(render())


@app.callback()
def _global(
    catalog: Annotated[
        str | None,
        typer.Option(
            "--catalog",
            envvar="CURATE_CATALOG",
            help="catalog file (default ./curate.db; also $CURATE_CATALOG)",
        ),
    ] = None,
    actor: Annotated[
        str | None,
        typer.Option(
            "--actor", envvar="CURATE_USER", help="who is acting, recorded in every event"
        ),
    ] = None,
) -> None:
    """Global options."""
    state.catalog_path = catalog
    state.actor = actor


@app.command()
def version() -> None:
    """Print the curate version."""
    out.print(__version__)


@app.command()
def add(
    file: Annotated[Path, typer.Argument(help="data file (.csv, .tsv, .xlsx) or its TOML sidecar")],
    meta: Annotated[
        Path | None, typer.Option(help="TOML sidecar (default: FILE with .toml)")
    ] = None,
    observable: Annotated[str | None, typer.Option(help="observable id, e.g. front_speed")] = None,
    label: Annotated[str | None, typer.Option(help="human label of the observable")] = None,
    unit: Annotated[
        str | None, typer.Option(help="unit of the values: nM, um/min, a.u., 1")
    ] = None,
    time_unit: Annotated[
        str | None, typer.Option(help="unit of the time column: s, min, h")
    ] = None,
    lab: Annotated[str | None, typer.Option(help="source lab or group")] = None,
    condition: Annotated[
        list[str] | None,
        typer.Option(help="KEY=VALUE, repeatable: temperature=25degC, genotype=wt, dose=10uM"),
    ] = None,
    sd_type: Annotated[
        str | None,
        typer.Option(help="what the sd column holds: sd, sem, ci, percent, estimated, assumed"),
    ] = None,
    sd_scale: Annotated[str | None, typer.Option(help="scale of the sd: linear, ln, log10")] = None,
    ci_level: Annotated[
        float | None, typer.Option(help="confidence level when --sd-type ci")
    ] = None,
    sem_n: Annotated[int | None, typer.Option(help="n behind an SEM without an n column")] = None,
    relative: Annotated[
        bool | None,
        typer.Option(
            "--relative/--absolute", help="values in relative units (need a scale factor)"
        ),
    ] = None,
    layout: Annotated[str | None, typer.Option(help="long, wide or auto")] = None,
    sheet: Annotated[
        str | None, typer.Option(help="XLSX sheet: its name, or its position from 1")
    ] = None,
    column: Annotated[
        list[str] | None,
        typer.Option(
            help='ROLE=HEADER, repeatable: time="Time (min)", value=pERK, sd=SD, replicate, n'
        ),
    ] = None,
    header_row: Annotated[
        int | None,
        typer.Option(help="the line (sheet row) of the header; lines above are left out"),
    ] = None,
    skip_rows: Annotated[
        int | None, typer.Option(help="lines (sheet rows) at the top to leave out")
    ] = None,
    footer_rows: FooterRows = None,
    end_at_blank: EndAtBlank = None,
    delimiter: Delimiter = None,
    decimal: Decimal = None,
    thousands: Thousands = None,
    encoding: Encoding = None,
    method: Annotated[str | None, typer.Option(help="measurement method")] = None,
    instrument: Annotated[str | None, typer.Option(help="instrument")] = None,
    contact: Annotated[str | None, typer.Option(help="contact person or address")] = None,
    acquired: Annotated[str | None, typer.Option(help="acquisition date, YYYY-MM-DD")] = None,
    reference: Annotated[str | None, typer.Option(help="publication, DOI or notebook page")] = None,
    calibration_group: Annotated[
        str | None, typer.Option(help="blot, gel, plate or run sharing one scale and noise level")
    ] = None,
    normalisation: Annotated[
        str | None, typer.Option(help="none, reference_time, reference_condition, peak, sum")
    ] = None,
    grade: Annotated[
        str | None, typer.Option(help="trust grade A-D, or X (kept, never fitted)")
    ] = None,
    reason: Annotated[str | None, typer.Option(help="rationale of the grade")] = None,
    dataset_id: Annotated[
        str | None, typer.Option("--id", help="dataset id (default: generated)")
    ] = None,
    supersedes: Annotated[
        str | None,
        typer.Option(help="ID of the dataset this file replaces (it is retired, the link kept)"),
    ] = None,
    censored_token: Annotated[
        list[str] | None,
        typer.Option(help="a cell meaning 'below the limit', e.g. n.d., LOD, BLQ (repeatable)"),
    ] = None,
    detection_limit: Annotated[
        float | None,
        typer.Option(help="the limit a censored token stands for, in the values' unit"),
    ] = None,
    as_json: JsonFlag = False,
    dry_run: Annotated[bool, typer.Option(help="validate and show what would be written")] = False,
) -> None:
    """Log one data file with its metadata; print the new dataset's id."""
    options: dict[str, Any] = {}
    if supersedes is not None:
        options["supersedes"] = supersedes

    def put(path: str, value: Any) -> None:
        _put(options, path, value)

    put("observable.id", observable)
    put("observable.label", label)
    put("observable.unit", unit)
    put("observable.relative", relative)
    put("time.unit", time_unit)
    put("source.lab", lab)
    put("source.method", method)
    put("source.instrument", instrument)
    put("source.contact", contact)
    put("source.acquired", acquired)
    put("source.reference", reference)
    put("uncertainty.type", sd_type)
    put("uncertainty.scale", sd_scale)
    put("uncertainty.level", ci_level)
    put("uncertainty.n", sem_n)
    put("layout", layout)
    put("sheet", sheet)
    put("header_row", header_row)
    put("skip_rows", skip_rows)
    for name, value in (("footer_rows", footer_rows), ("end_at_blank", end_at_blank),
                        ("delimiter", delimiter), ("decimal", decimal),
                        ("thousands", thousands), ("encoding", encoding)):  # fmt: skip
        put(DIALECT_OPTIONS[name], value)
    for role, header in parse_columns(column or []).items():
        put(f"columns.{role}", header)
    put("protocol.calibration_group", calibration_group)
    put("protocol.normalisation.kind", normalisation)
    put("id", dataset_id)
    if censored_token:
        put("censoring.tokens", list(censored_token))
    put("censoring.limit", detection_limit)
    if grade is not None or reason is not None:
        if grade is None or not (reason or "").strip():
            raise InputError("--grade and --reason go together: a grade needs its reason")
        put("trust.grade", grade)
        put("trust.rationale", reason)
    if condition:
        options["conditions"] = parse_conditions(condition)
    # read and validate the file before the catalog is opened: a bad first file creates nothing
    draft = build_draft(file, sidecar=meta, options=options, actor=state.actor or default_actor())
    with _catalog(create=True) as catalog:
        result: Any = catalog.plan_add(draft) if dry_run else catalog.add_drafts([draft])[0]
    if isinstance(result, AddPlan):
        if as_json:
            _emit_json(result.to_dict())
        else:
            out.print(text.plan_text(result))
        return
    if as_json:
        _emit_json(result.to_dict())
        return
    out.print(text.added_text(result))
    if result.added and draft.record.supersedes is not None:
        out.print(f"retired {draft.record.supersedes}: superseded by {result.id}")
    for note in text.added_notes(result):
        err_console.print(note)


@app.command()
def intake(
    folder: Annotated[Path, typer.Argument(help="folder of data files and sidecars")],
    quarantine: Annotated[
        Path | None, typer.Option(help="where bad files go (default FOLDER/quarantine)")
    ] = None,
    lab: Annotated[
        str | None, typer.Option(help="source lab of files whose sidecar names none")
    ] = None,
    as_json: JsonFlag = False,
) -> None:
    """Log every data file in a folder; move each bad one, with a reason, to quarantine."""
    show_bar = not as_json and err_console.is_terminal
    with (
        _catalog(create=True) as catalog,
        progress_bar(err_console, "logging", enabled=show_bar) as update,
    ):
        result = catalog.intake(folder, quarantine=quarantine, lab=lab, progress=update)
    _show(result.to_dict(), lambda: text.intake_text(result), as_json)
    if result.count("quarantined") or result.count("refused"):
        raise typer.Exit(1)


@app.command()
def inspect(
    file: Annotated[Path, typer.Argument(help="data file (.csv, .tsv, .xlsx) or its TOML sidecar")],
    meta: Annotated[
        Path | None, typer.Option(help="TOML sidecar (default: FILE with .toml)")
    ] = None,
    observable: Annotated[str | None, typer.Option(help="observable id, e.g. front_speed")] = None,
    unit: Annotated[str | None, typer.Option(help="unit of the values")] = None,
    time_unit: Annotated[str | None, typer.Option(help="unit of the time column")] = None,
    lab: Annotated[str | None, typer.Option(help="source lab or group")] = None,
    sheet: Annotated[
        str | None, typer.Option(help="XLSX sheet: its name, or its position from 1")
    ] = None,
    column: Annotated[
        list[str] | None, typer.Option(help="ROLE=HEADER, repeatable (as for add)")
    ] = None,
    header_row: Annotated[
        int | None, typer.Option(help="the line (sheet row) of the header")
    ] = None,
    skip_rows: Annotated[
        int | None, typer.Option(help="lines (sheet rows) at the top to leave out")
    ] = None,
    layout: Annotated[str | None, typer.Option(help="long, wide or auto")] = None,
    footer_rows: FooterRows = None,
    end_at_blank: EndAtBlank = None,
    delimiter: Delimiter = None,
    decimal: Decimal = None,
    thousands: Thousands = None,
    encoding: Encoding = None,
    as_json: JsonFlag = False,
) -> None:
    """Show what a data file holds (sheets, columns, units in headers, dialect) and what `add`
    would log from it with these options; nothing is written."""
    options: dict[str, Any] = {}
    for path, value in (("observable.id", observable), ("observable.unit", unit),
                        ("time.unit", time_unit), ("source.lab", lab), ("sheet", sheet),
                        ("header_row", header_row), ("skip_rows", skip_rows), ("layout", layout),
                        *((f"columns.{r}", h) for r, h in parse_columns(column or []).items()),
                        *((DIALECT_OPTIONS[name], given) for name, given in (
                            ("footer_rows", footer_rows), ("end_at_blank", end_at_blank),
                            ("delimiter", delimiter), ("decimal", decimal),
                            ("thousands", thousands), ("encoding", encoding)))):  # fmt: skip
        _put(options, path, value)
    found = inspect_file(file, sidecar=meta, options=options)
    _show(found.to_dict(), lambda: text.inspection_text(found), as_json)


@app.command("import-petab")
def import_petab(
    problem: Annotated[Path, typer.Argument(help="PEtab problem YAML")],
    lab: Annotated[
        str | None, typer.Option(help="source lab (default: the problem's name)")
    ] = None,
    time_unit: Annotated[str, typer.Option(help="the model's time unit")] = "s",
    unit: Annotated[str, typer.Option(help="unit of the measurements")] = "1",
    as_json: JsonFlag = False,
) -> None:
    """Store a PEtab problem (YAML, SBML and tables byte for byte) and log its measurements,
    one dataset per observable and condition, each linked to the stored problem."""
    # read and validate the problem before the catalog is opened: a bad problem creates nothing
    imported = read_petab(
        problem, lab=lab, time_unit=time_unit, unit=unit, actor=state.actor or default_actor()
    )
    with _created_only_if_written(), _catalog(create=True) as catalog:
        results = catalog.add_petab(imported)
    if as_json:
        _emit_json([r.to_dict() for r in results])
        return
    out.print(text.petab_import_text(results))


@app.command()
def models(as_json: JsonFlag = False) -> None:
    """List the stored PEtab problems: source, SBML sha256, parameter, observable and
    condition ids, and the datasets imported from each."""
    with _catalog() as catalog:
        found = catalog.models()
    _show([s.to_dict() for s in found], lambda: text.models_table(found), as_json)


@app.command("list")
def list_(
    observable: Annotated[str | None, typer.Option(help="only this observable")] = None,
    lab: Annotated[str | None, typer.Option(help="only this lab")] = None,
    condition: Annotated[list[str] | None, typer.Option(help="KEY=VALUE, repeatable")] = None,
    grade: Annotated[str | None, typer.Option(help="only this grade (or 'none')")] = None,
    retired: Annotated[bool, typer.Option("--retired", help="include retired datasets")] = False,
    as_json: JsonFlag = False,
) -> None:
    """List the newest version of every dataset (filters combine)."""
    with _catalog() as catalog:
        found = catalog.list(
            observable=observable,
            lab=lab,
            conditions=parse_conditions(condition),
            grade=grade,
            include_retired=retired,
        )
    _show([v.summary() for v in found], lambda: text.list_table(found), as_json)


@app.command()
def show(
    dataset_id: DatasetId,
    version: Annotated[int | None, typer.Option(help="an earlier version")] = None,
    points: Annotated[bool, typer.Option("--points", help="print every point")] = False,
    as_json: JsonFlag = False,
) -> None:
    """Show one dataset: metadata, warnings, noise, trust and its points."""
    with _catalog() as catalog:
        found = catalog.show(dataset_id, version)
        total = len(catalog.versions(dataset_id))
        frame = catalog.points(dataset_id, found.version)
    if as_json:
        payload = {
            **found.summary(),
            "created_at": found.created_at.isoformat(),
            "record_hash": found.record_hash,
            "versions": total,
            "record": found.record.model_dump(mode="json"),
        }
        if points:
            payload["points"] = json.loads(frame.to_json(orient="records"))
        _emit_json(payload)
        return
    out.print(text.show_text(found, total, frame, all_points=points))


@app.command()
def history(
    dataset_id: DatasetId,
    as_json: JsonFlag = False,
) -> None:
    """Show every change of one dataset: when, who, what and why."""
    with _catalog() as catalog:
        entries = catalog.history(dataset_id)
    _show([e.to_dict() for e in entries], lambda: text.history_text(dataset_id, entries), as_json)


@app.command()
def retire(
    dataset_id: DatasetId,
    reason: Annotated[str, typer.Option(help="why it leaves later selections")],
) -> None:
    """Hide a dataset from later selections; it stays in the catalog."""
    with _catalog() as catalog:
        new = catalog.retire(dataset_id, reason=reason)
    out.print(text.retired_text(new))


@app.command()
def revise(
    dataset_id: DatasetId,
    reason: Annotated[str, typer.Option(help="why the metadata change")],
    label: Annotated[str | None, typer.Option(help="new observable label")] = None,
    condition: Annotated[
        list[str] | None, typer.Option(help="KEY=VALUE to set, KEY= to remove; repeatable")
    ] = None,
    lab: Annotated[str | None, typer.Option(help="corrected lab")] = None,
    reference: Annotated[str | None, typer.Option(help="corrected reference")] = None,
    calibration_group: Annotated[str | None, typer.Option(help="calibration group")] = None,
    unretire: Annotated[
        bool, typer.Option("--unretire", help="bring a retired dataset back")
    ] = False,
    unit: Annotated[
        str | None, typer.Option(help="the unit the values really are in (reconverted)")
    ] = None,
    time_unit: Annotated[
        str | None, typer.Option(help="the unit the times really are in (reconverted)")
    ] = None,
    uncertainty_type: Annotated[
        str | None,
        typer.Option(
            help="what the sd column really holds: sd, sem, ci, percent, estimated, assumed"
        ),
    ] = None,
    sem_n: Annotated[int | None, typer.Option(help="n behind an SEM without an n column")] = None,
    ci_level: Annotated[float | None, typer.Option(help="level of a confidence interval")] = None,
    relative: Annotated[
        bool | None,
        typer.Option("--relative/--absolute", help="the values are in relative units (or not)"),
    ] = None,
    normalisation: Annotated[
        str | None,
        typer.Option(help="none, reference_time, reference_condition, peak, sum (KIND:REFERENCE)"),
    ] = None,
) -> None:
    """Correct a dataset as a new version: its metadata, or how its numbers read (unit, time
    unit, uncertainty, relative flag, normalisation: values reconverted from the numbers as the
    file gave them)."""
    correction = Correction(
        unit=unit, time_unit=time_unit, uncertainty_type=uncertainty_type, sem_n=sem_n,
        ci_level=ci_level, relative=relative, normalisation=normalisation,
    )  # fmt: skip
    with _catalog() as catalog:
        before = catalog.show(dataset_id).record.content_hash
        new = catalog.revise(
            dataset_id,
            reason=reason,
            label=label,
            conditions=parse_conditions(condition),
            lab=lab,
            reference=reference,
            calibration_group=calibration_group,
            unretire=unretire,
            correction=correction,
        )
        changes = catalog.history(dataset_id)[-1].changes
    if new.record.content_hash != before:
        changes += ("values reconverted from the numbers as the file gave them",)
    out.print(text.revised_text(new, changes))


@app.command()
def mask(
    dataset_id: DatasetId,
    time: Annotated[
        list[str],
        typer.Option(
            help="time of the points to set aside (in the dataset's time unit, or '30 min'); repeatable"
        ),
    ],
    reason: Annotated[str, typer.Option(help="why these points stay out of fits")],
    replicate: Annotated[
        str | None, typer.Option(help="mask only this replicate (default: every one)")
    ] = None,
) -> None:
    """Set points aside as a new version: kept in the catalog, out of weights, exports, fits."""
    with _catalog() as catalog:
        new = catalog.mask(dataset_id, time, reason=reason, replicate=replicate)
    out.print(text.masked_text(new))


@app.command()
def unmask(
    dataset_id: DatasetId,
    time: Annotated[
        list[str], typer.Option(help="time of masked points to bring back; repeatable")
    ],
    reason: Annotated[str, typer.Option(help="why these points return")],
    replicate: Annotated[str | None, typer.Option(help="only this replicate's mask")] = None,
) -> None:
    """Bring masked points back into weights, exports and fits (a new version)."""
    with _catalog() as catalog:
        new = catalog.mask(dataset_id, time, reason=reason, replicate=replicate, unmask=True)
    out.print(text.masked_text(new))


@app.command()
def verify(
    head: Annotated[
        str | None,
        typer.Option(
            metavar="SEQ:HASH",
            help="a chain head kept earlier (as verify prints it): exit 1 if the catalog "
            "no longer extends it",
        ),
    ] = None,
    against: Annotated[
        Path | None,
        typer.Option(
            metavar="EXPORT_OR_BACKUP",
            help="an export folder, its manifest.json, or a backup file: exit 1 if the "
            "catalog no longer extends the chain head recorded there",
        ),
    ] = None,
    as_json: JsonFlag = False,
) -> None:
    """Recompute every hash, policy and the event chain, print the chain head; exit 1 naming
    the first problem if any (or if the catalog no longer extends --head / --against)."""
    anchor = parse_head(head) if head is not None else None
    with _catalog() as catalog:
        result = catalog.verify(anchor, against=against)
    _show(result.to_dict(), lambda: text.verify_text(result), as_json)
    if not result.ok:
        raise typer.Exit(1)


@app.command()
def noise(
    dataset_id: Annotated[str | None, typer.Argument(metavar="[ID]", help="dataset id")] = None,
    all_: Annotated[bool, typer.Option("--all", help="every current dataset")] = False,
    method: Annotated[
        str,
        typer.Option(help=", ".join(NOISE_METHODS)),
    ] = "auto",
    as_json: JsonFlag = False,
) -> None:
    """Estimate each dataset's noise and store it (with its method) as a new version."""
    if (dataset_id is None) == (not all_):
        raise InputError("noise: name one dataset ID or pass --all")
    with _catalog() as catalog:
        written = catalog.estimate_noise(None if all_ else [dataset_id or ""], method=method)
    if as_json:
        _emit_json(
            [
                {"id": o.version.id, "version": o.version.version, **o.result.to_dict(),
                 "changed": o.changed}
                for o in written
            ]
        )  # fmt: skip
        return
    out.print(text.noise_table(written))


@app.command()
def grade(
    dataset_id: DatasetId,
    new_grade: Annotated[
        str | None, typer.Argument(metavar="[GRADE]", help="A, B, C, D, or X (kept, never fitted)")
    ] = None,
    reason: Annotated[str | None, typer.Option(help="why this grade (required with GRADE)")] = None,
    checklist: Annotated[
        Path | None, typer.Option(help="answers file: [answers] question = true/false")
    ] = None,
    checklist_file: Annotated[
        Path | None, typer.Option(help="the lab's own checklist (default: the one curate ships)")
    ] = None,
    accept: Annotated[bool, typer.Option(help="record the checklist's suggested grade")] = False,
    accept_suggestion: Annotated[
        bool, typer.Option(help="record the newest grade suggested by `curate consistency`")
    ] = False,
    as_json: JsonFlag = False,
) -> None:
    """Grade a dataset's trust: directly with a reason, from a checklist, or from a suggestion."""
    with _catalog() as catalog:
        if new_grade is not None:
            if checklist or accept_suggestion:
                raise InputError(
                    "grade: give GRADE with --reason, or --checklist, or --accept-suggestion"
                )
            version = catalog.grade(dataset_id, new_grade, reason=reason or "")
            _print_graded(version, as_json)
            return
        if accept_suggestion:
            _print_graded(catalog.accept_suggestion(dataset_id, reason=reason), as_json)
            return
        answers = None
        if checklist is None:
            if not sys.stdin.isatty():
                raise InputError(
                    "grade: give GRADE --reason, --checklist FILE or --accept-suggestion "
                    "(questions are asked only at a terminal)"
                )
            answers = _ask_checklist(checklist_file)
        suggestion, graded = catalog.grade_from_checklist(
            dataset_id,
            answers=answers,
            answers_file=checklist,
            checklist_file=checklist_file,
            accept=accept,
        )
    if as_json:
        _emit_json(
            {
                "id": dataset_id,
                "suggestion": suggestion.to_dict(),
                "graded": None
                if graded is None
                else {"version": graded.version, "grade": graded.grade},
            }
        )
        return
    out.print(text.suggestion_text(dataset_id, suggestion, graded))


def _ask_checklist(checklist_file: Path | None) -> dict[str, bool | None]:
    answers: dict[str, bool | None] = {}
    for question in load_checklist(checklist_file).questions:
        answers[question.id] = typer.confirm(question.text, default=False)
    return answers


def _print_graded(version: DatasetVersion, as_json: bool) -> None:
    _show(text.graded_data(version), lambda: text.graded_text(version), as_json)


@app.command()
def consistency(
    observable: Annotated[str | None, typer.Option(help="only this observable")] = None,
    tolerance: Annotated[
        float, typer.Option(help="numeric conditions match within this relative tolerance")
    ] = 0.01,
    at: Annotated[
        str | None,
        typer.Option(
            help="compare summary values at this time, e.g. '60 min' (default: the late level)"
        ),
    ] = None,
    level: Annotated[float, typer.Option(help="significance level of the tests")] = 0.05,
    as_json: JsonFlag = False,
) -> None:
    """Test each dataset against the others measuring the same thing; suggest grades."""
    at_seconds = None
    if at is not None:
        parsed = parse_quantity(at, role="--at")
        if parsed is None or parsed[1].dimensionality != "[time]":
            raise InputError(f"--at '{at}': expected a time with its unit, e.g. '60 min'")
        at_seconds = parsed[0]
    with _catalog() as catalog:
        result = catalog.consistency(
            observable=observable, tolerance=tolerance, at=at_seconds, alpha=level
        )
    _show(result.to_dict(), lambda: text.consistency_text(result), as_json)


@app.command()
@selection_options
def weights(
    *,
    selection: Selection,
    policy: Policy,
    as_json: JsonFlag = False,
) -> None:
    """Show each dataset's share of the total weight, its effective sample size and warnings."""
    with _catalog() as catalog:
        summary = catalog.weights(policy=policy, selection=selection)
    _show(summary.to_dict(), lambda: run_text.weights_text(summary), as_json)


@app.command()
@selection_options
def export(
    fmt: Annotated[str, typer.Argument(metavar="FORMAT", help="table, petab, datapackage or prov")],
    outdir: Annotated[Path, typer.Argument(help="new (or empty) folder to write into")],
    *,
    selection: Selection,
    policy: Policy,
    force: ForceFlag = False,
    as_json: JsonFlag = False,
) -> None:
    """Write the weighted selection for a fitter, with a README and a traceable manifest."""
    with _catalog() as catalog:
        result = catalog.export(fmt, outdir, policy=policy, selection=selection, force=force)
    _show(result.to_dict(), lambda: run_text.export_text(result), as_json)


@app.command()
@selection_options
def folds(
    outdir: Annotated[Path, typer.Argument(help="new (or empty) folder for the folds")],
    by: Annotated[
        str, typer.Option(help="dataset, lab, condition:KEY, kfold:K or kfold:K:SEED")
    ] = "dataset",
    *,
    selection: Selection,
    policy: Policy,
    force: ForceFlag = False,
    as_json: JsonFlag = False,
) -> None:
    """Write holdout folds: one folder per fold with train and test tables and what training lacks."""
    with _catalog() as catalog:
        result = catalog.folds(by, outdir, policy=policy, selection=selection, force=force)
    _show(result.to_dict(), lambda: run_text.folds_text(result), as_json)


@app.command()
def trace(
    outdir: Annotated[Path, typer.Argument(help="an export folder (or its manifest.json)")],
    as_json: JsonFlag = False,
) -> None:
    """Tell whether the catalog still holds exactly the data an export used (exit 1 if not)."""
    with _catalog() as catalog:
        result = catalog.trace(outdir)
    _show(result.to_dict(), lambda: run_text.trace_text(result), as_json)
    if not result.intact:
        raise typer.Exit(1)


@app.command()
def impact(
    dataset_id: DatasetId,
    as_json: JsonFlag = False,
) -> None:
    """List every export that used a version of this dataset that has since changed."""
    with _catalog() as catalog:
        found = catalog.impact(dataset_id)
    _show([f.to_dict() for f in found], lambda: run_text.impact_text(dataset_id, found), as_json)


MaxEvaluations = Annotated[
    int | None,
    typer.Option(help="stop after this many model evaluations (the whole fit; each refit apart)"),
]
Generations = Annotated[
    int | None, typer.Option(help="generations of the --global search (default 300)")
]
ProblemOption = Annotated[
    str | None,
    typer.Option(
        metavar="ID", help="a stored PEtab problem (`curate models`): its model and datasets"
    ),
]
RelativeTolerance = Annotated[
    float | None, typer.Option(help="with --problem: the ODE solver's relative tolerance (1e-8)")
]
AbsoluteTolerance = Annotated[
    float | None, typer.Option(help="with --problem: the ODE solver's absolute tolerance (1e-10)")
]


def _budget(option: str, value: int | None) -> int | None:
    if value is not None and value < 1:
        raise InputError(f"{option} {value}: expected at least 1")
    return value


@app.command()
@selection_options
def fit(
    model: Annotated[
        str | None, typer.Option(help="module:function or path/to/model.py:function")
    ] = None,
    params: Annotated[
        Path | None,
        typer.Option(help="parameter spec TOML (start, lower, upper, log, fixed)"),
    ] = None,
    problem: ProblemOption = None,
    evaluate: Annotated[
        bool, typer.Option(help="with --problem: the objective at the start, not optimised")
    ] = False,
    simulations: Annotated[
        Path | None,
        typer.Option(metavar="FILE.tsv", help="with --problem: write the PEtab simulation table"),
    ] = None,
    relative_tolerance: RelativeTolerance = None,
    absolute_tolerance: AbsoluteTolerance = None,
    *,
    selection: Selection,
    policy: Policy,
    starts: Annotated[
        int, typer.Option(help="number of starts (Latin hypercube within the bounds)")
    ] = 1,
    seed: Annotated[int, typer.Option(help="seed of the multi-start sampler")] = 0,
    global_search: Annotated[
        bool, typer.Option("--global", help="differential evolution first (finite bounds)")
    ] = False,
    scale_covariance: Annotated[
        bool,
        typer.Option(
            help="scale the covariance by the reduced chi2 (when sigmas are only relative)"
        ),
    ] = False,
    max_evaluations: MaxEvaluations = None,
    generations: Generations = None,
    as_json: JsonFlag = False,
) -> None:
    """Fit a model to the weighted selection: values, standard errors, scale factors, chi2."""
    if starts < 1:
        raise InputError(f"--starts {starts}: expected at least 1")
    options = FitOptions(
        starts=starts, seed=seed, global_search=global_search, scale_covariance=scale_covariance,
        max_evaluations=_budget("--max-evaluations", max_evaluations),
        generations=_budget("--generations", generations),
    )  # fmt: skip
    show_bar = not as_json and err_console.is_terminal
    tolerances = _tolerances(relative_tolerance, absolute_tolerance, problem)
    with _catalog() as catalog, progress_bar(err_console, "fitting", enabled=show_bar) as update:
        result = catalog.fit(
            model,
            params,
            problem=problem,
            policy=policy,
            selection=selection,
            options=options,
            evaluate=evaluate,
            simulations=simulations,
            tolerances=tolerances,
            progress=update,
        )
    _show(result.to_dict(), lambda: run_text.fit_text(result), as_json)
    if simulations is not None and not as_json:
        out.print(text.written_text("simulations", simulations))


@app.command()
@selection_options
def ensemble(
    model: Annotated[
        str | None, typer.Option(help="module:function or path/to/model.py:function")
    ] = None,
    params: Annotated[
        Path | None,
        typer.Option(help="parameter spec TOML (start, lower, upper, log, fixed)"),
    ] = None,
    problem: ProblemOption = None,
    relative_tolerance: RelativeTolerance = None,
    absolute_tolerance: AbsoluteTolerance = None,
    *,
    selection: Selection,
    policy: Policy,
    starts: Annotated[
        int, typer.Option(help="number of starts (Latin hypercube within the bounds)")
    ] = 100,
    seed: Annotated[int, typer.Option(help="seed of the Latin hypercube")] = 0,
    threshold: Annotated[
        float | None,
        typer.Option(help="keep fits within this of the best (chi2 units; default chi2(0.95, p))"),
    ] = None,
    cut: Annotated[
        float, typer.Option(help="clustering cut in the optimiser's coordinates (ln p for log)")
    ] = 0.5,
    workers: Annotated[int, typer.Option(help="local worker processes (default: cores)")] = 0,
    dask: Annotated[
        str | None,
        typer.Option(help="run the starts on a Dask scheduler at this address, or 'local'"),
    ] = None,
    as_json: JsonFlag = False,
) -> None:
    """Fit from many starts; keep every fit about as good as the best; group them into families."""
    count = _worker_count(workers)
    tolerances = _tolerances(relative_tolerance, absolute_tolerance, problem)
    show_bar = not as_json and err_console.is_terminal
    with _catalog() as catalog, progress_bar(err_console, "ensemble", enabled=show_bar) as update:
        result = catalog.ensemble(
            model, params, problem=problem, options=FitOptions(starts=starts, seed=seed),
            threshold=threshold, cut=cut, policy=policy, selection=selection,
            tolerances=tolerances, workers=count, dask=dask, progress=update,
        )  # fmt: skip
    _show(result.to_dict(), lambda: run_text.ensemble_text(result), as_json)


@app.command()
@selection_options
def predict(
    model: Annotated[
        str | None, typer.Option(help="module:function or path/to/model.py:function")
    ] = None,
    params: Annotated[
        Path | None,
        typer.Option(help="parameter spec TOML (start, lower, upper, log, fixed)"),
    ] = None,
    conditions: Annotated[
        list[str] | None,
        typer.Option(
            "--conditions",
            help="a condition to predict, KEY=VALUE with its unit "
            "(dose=5uM); repeatable (--condition selects datasets)",
        ),
    ] = None,
    times: Annotated[
        list[str] | None, typer.Option(help="times to predict, e.g. 0,10,30,60; repeatable")
    ] = None,
    time_unit: Annotated[str, typer.Option(help="unit of --times")] = "s",
    by: Annotated[
        str, typer.Option(help="leave out each dataset, lab or condition:KEY; 'none' to skip")
    ] = "dataset",
    problem: ProblemOption = None,
    *,
    selection: Selection,
    policy: Policy,
    starts: Annotated[
        int, typer.Option(help="starts of the ensemble (Latin hypercube within the bounds)")
    ] = 100,
    seed: Annotated[int, typer.Option(help="seed of the Latin hypercube")] = 0,
    threshold: Annotated[
        float | None,
        typer.Option(help="keep fits within this of the best (chi2 units; default chi2(0.95, p))"),
    ] = None,
    cut: Annotated[
        float, typer.Option(help="clustering cut in the optimiser's coordinates (ln p for log)")
    ] = 0.5,
    workers: Annotated[int, typer.Option(help="local worker processes (default: cores)")] = 0,
    as_json: JsonFlag = False,
) -> None:
    """Predict new conditions with every good fit of an ensemble: the band, and which left-out
    dataset (lab, condition) widens it most."""
    count = _worker_count(workers)
    wanted = parse_conditions(conditions, "--conditions")
    chosen_times = parse_times(times or [])
    show_bar = not as_json and err_console.is_terminal
    with _catalog() as catalog, progress_bar(err_console, "predicting", enabled=show_bar) as update:
        result = catalog.predict(
            model, params, problem=problem, conditions=wanted, times=chosen_times,
            time_unit=time_unit, by=None if by == "none" else by,
            # a model that reads an 'observable' column predicts the one selected
            observable=selection.observables[0] if len(selection.observables) == 1 else None,
            options=FitOptions(starts=starts, seed=seed), threshold=threshold, cut=cut,
            policy=policy, selection=selection, workers=count, progress=update,
        )  # fmt: skip
    _show(result.to_dict(), lambda: run_text.prediction_text(result, time_unit), as_json)


@app.command()
@selection_options
def profile(
    model: Annotated[
        str | None, typer.Option(help="module:function or path/to/model.py:function")
    ] = None,
    params: Annotated[
        Path | None,
        typer.Option(help="parameter spec TOML (start, lower, upper, log, fixed)"),
    ] = None,
    problem: ProblemOption = None,
    parameter: Annotated[
        list[str] | None, typer.Option(help="parameter to profile; repeatable (default: all free)")
    ] = None,
    level: Annotated[float, typer.Option(help="confidence level of the intervals")] = 0.95,
    relative_tolerance: RelativeTolerance = None,
    absolute_tolerance: AbsoluteTolerance = None,
    *,
    selection: Selection,
    policy: Policy,
    starts: Annotated[
        int, typer.Option(help="starts of the fit the profiles begin from (Latin hypercube)")
    ] = 1,
    seed: Annotated[int, typer.Option(help="seed of the multi-start sampler")] = 0,
    as_json: JsonFlag = False,
) -> None:
    """Profile likelihood of each parameter: its confidence interval and whether the data
    identify it (identifiable, practically or structurally non-identifiable)."""
    if starts < 1:
        raise InputError(f"--starts {starts}: expected at least 1")
    tolerances = _tolerances(relative_tolerance, absolute_tolerance, problem)
    show_bar = not as_json and err_console.is_terminal
    with _catalog() as catalog, progress_bar(err_console, "profiling", enabled=show_bar) as update:
        result = catalog.profile(
            model, params, problem=problem, parameters=parameter or (), level=level,
            policy=policy, selection=selection, options=FitOptions(starts=starts, seed=seed),
            tolerances=tolerances, progress=update,
        )  # fmt: skip
    _show(result.to_dict(), lambda: run_text.profile_text(result), as_json)


def _worker_count(workers: int) -> int:
    """Give the worker processes asked for: 0 is every core; more than the cores is refused
    (processes beyond the cores only queue for them and multiply the memory)."""
    cores = os.cpu_count() or 1
    if workers < 0:
        raise InputError(f"--workers {workers}: expected 0 (every core) or a number of processes")
    if workers > cores:
        raise InputError(
            f"--workers {workers}: this machine has {cores} cores; ask for at most {cores} "
            "(or 0 for every core; --dask ADDRESS reaches more machines)"
        )
    return workers if workers > 0 else cores


def _tolerances(
    relative: float | None, absolute: float | None, problem: str | None
) -> dict[str, float] | None:
    """Give the solver tolerances asked for (they apply to a stored problem's simulations)."""
    given = {k: v for k, v in (("relative", relative), ("absolute", absolute)) if v is not None}
    if given and problem is None:
        raise InputError("--relative-tolerance and --absolute-tolerance go with --problem ID")
    for name, value in given.items():
        if not value > 0:
            raise InputError(f"--{name}-tolerance {value}: expected a positive number")
    return given or None


@app.command()
@selection_options
def sensitivity(
    by: Annotated[str, typer.Option(help="dataset, lab or condition:KEY")] = "dataset",
    model: Annotated[
        str | None, typer.Option(help="module:function or path/to/model.py:function")
    ] = None,
    params: Annotated[Path | None, typer.Option(help="parameter spec TOML")] = None,
    fitter_cmd: Annotated[
        str | None, typer.Option(help="external fitter instead of --model: 'COMMAND {data} {out}'")
    ] = None,
    problem: ProblemOption = None,
    relative_tolerance: RelativeTolerance = None,
    absolute_tolerance: AbsoluteTolerance = None,
    method: Annotated[str, typer.Option(help="exact refits, one-step, or auto (both)")] = "exact",
    workers: Annotated[int, typer.Option(help="local worker processes (default: cores)")] = 0,
    dask: Annotated[
        str | None, typer.Option(help="Dask scheduler address, or 'local' for a LocalCluster")
    ] = None,
    threshold: Annotated[
        float, typer.Option(help="flag shifts beyond this many standard errors")
    ] = 2.0,
    policies: Annotated[
        list[Path] | None, typer.Option(help="alternative policies to refit under: P1 P2 ...")
    ] = None,
    report_file: Annotated[
        Path | None, typer.Option("--report", help="write an HTML report here")
    ] = None,
    timeout: Annotated[
        float, typer.Option(help="seconds each external fitter run may take")
    ] = 600.0,
    workdir: Annotated[
        Path | None, typer.Option(help="folder for the external fitter's files")
    ] = None,
    profiles: Annotated[
        bool,
        typer.Option("--profiles", help="also profile each parameter without each group"),
    ] = False,
    profile_parameter: Annotated[
        list[str] | None,
        typer.Option(help="with --profiles: only this parameter; repeatable (default: all)"),
    ] = None,
    with_ensemble: Annotated[
        bool,
        typer.Option("--ensemble", help="also run an ensemble and refit it without each group"),
    ] = False,
    ensemble_starts: Annotated[
        int, typer.Option(help="with --ensemble: starts of the full ensemble")
    ] = 50,
    seed: Annotated[int, typer.Option(help="with --ensemble: seed of its Latin hypercube")] = 0,
    *,
    selection: Selection,
    policy: Policy,
    starts: Annotated[int, typer.Option(help="starts of the full fit")] = 1,
    max_evaluations: MaxEvaluations = None,
    as_json: JsonFlag = False,
) -> None:
    """Leave each dataset, lab or condition out in turn: does any conclusion hinge on it?"""
    count = _worker_count(workers)
    if report_file is not None and not report_file.parent.is_dir():  # before hours of refits
        raise InputError(f"{report_file.parent}: no such folder for --report; create it first")
    show_bar = not as_json and err_console.is_terminal
    with _catalog() as catalog, progress_bar(err_console, "refitting", enabled=show_bar) as update:
        result = catalog.sensitivity(
            by=by, model=model, params=params, fitter_cmd=fitter_cmd, problem=problem,
            tolerances=_tolerances(relative_tolerance, absolute_tolerance, problem),
            method=method, policy=policy,
            selection=selection, workers=count, dask=dask,
            options=FitOptions(starts=starts, max_evaluations=_budget("--max-evaluations", max_evaluations)),
            threshold=threshold, policies=policies or [], timeout=timeout, workdir=workdir,
            profiles=profiles, profile_parameters=profile_parameter or (), progress=update,
            ensemble=FitOptions(starts=ensemble_starts, seed=seed) if with_ensemble else None,
        )  # fmt: skip
    if report_file is not None:
        write_sensitivity_report(result, report_file)
    _show(result.to_dict(), lambda: run_text.sensitivity_text(result), as_json)
    if report_file is not None and not as_json:
        out.print(text.written_text("report", report_file))


@app.command("report")
def report_command(
    out_file: Annotated[Path, typer.Argument(metavar="OUT.html", help="where to write the report")],
    policy_file: Annotated[
        Path | None,
        typer.Option("--policy", help="weighting policy TOML (default: the one curate ships)"),
    ] = None,
) -> None:
    """Write one self-contained HTML report: catalog, series, weights, consistency, fit, sensitivity."""
    policy = load_policy(policy_file)
    with _catalog() as catalog:
        catalog.report(out_file, policy=policy)
    out.print(text.written_text("report", out_file))


@app.command()
def backup(
    destination: Annotated[Path, typer.Argument(help="new file for the copy")],
    force: Annotated[bool, typer.Option(help="overwrite an existing file")] = False,
) -> None:
    """Copy the catalog with SQLite's online backup (others may keep writing) and verify the copy."""
    with _catalog() as catalog:
        result = catalog.backup(destination, force=force)
    out.print(text.backup_text(destination, result))


@app.command()
def restore(
    source: Annotated[Path, typer.Argument(help="a backup made by `curate backup`")],
) -> None:
    """Put a verified backup in place of the catalog; the current one is kept beside it."""
    target, kept = restore_catalog(source, state.catalog_path)
    out.print(text.restored_text(source, target, kept))


@app.command()
def demo(
    outdir: Annotated[
        Path, typer.Argument(help="folder for the demo's catalog and outputs")
    ] = Path("demo_out"),
    examples: Annotated[
        Path | None,
        typer.Option(help="example data folder (default: example_datasets/ of this checkout)"),
    ] = None,
    force: Annotated[bool, typer.Option(help="reuse an existing, non-empty OUTDIR")] = False,
) -> None:
    """Run the job on the bundled invented scenario and say what it found."""
    result = run_demo(outdir, examples=examples, force=force, actor=state.actor or "curate-demo")
    out.print(run_text.demo_text(result))


def _fail(message: str, code: int = 2) -> None:
    err_console.print("curate: error: " + " ".join(message.split()), markup=False)
    sys.exit(code)


def _spread_multi_value_options(argv: list[str]) -> list[str]:
    """Turn ``--policies A B C`` into ``--policies A --policies B --policies C``."""
    spread: list[str] = []
    k = 0
    while k < len(argv):
        token = argv[k]
        spread.append(token)
        k += 1
        if token == "--policies":
            values = []
            while k < len(argv) and not argv[k].startswith("-"):
                values.append(argv[k])
                k += 1
            if values:
                spread.append(values[0])
                for value in values[1:]:
                    spread += ["--policies", value]
    return spread


# newer typer releases carry their own copy of click: catch the classes of both
_EXITS = (click.exceptions.Exit, typer.Exit)
_ABORTS = (click.exceptions.Abort, typer.Abort)
_USAGE_ERRORS = (click.ClickException, getattr(typer, "TyperException", click.ClickException))


def _usage_fail(usage: Exception) -> None:
    """Print one error line that names the help to read; exit 2."""
    ctx = getattr(usage, "ctx", None)
    format_message = getattr(usage, "format_message", None)
    message = format_message() if callable(format_message) else str(usage)
    where = f"`{ctx.command_path} --help`" if ctx is not None else "`curate --help`"
    _fail(f"{message.rstrip('.')} (see {where})")


def main(argv: list[str] | None = None) -> None:
    """Run the command line; user errors exit 2 with one line on stderr."""
    argv = _spread_multi_value_options(list(sys.argv[1:] if argv is None else argv))
    if not argv:  # plain `curate`: the help, as `curate --help` gives it
        argv = ["--help"]
    try:
        code = app(args=argv, prog_name="curate", standalone_mode=False)
    except CurateError as err:
        _fail(str(err))
    except _EXITS as exit_:
        sys.exit(exit_.exit_code)
    except _USAGE_ERRORS as usage:
        _usage_fail(usage)
    except _ABORTS:
        _fail("aborted", 130)
    except KeyboardInterrupt:
        _fail("interrupted", 130)
    except Exception as bug:  # a defect of ours: still one line, and say so
        _fail(f"internal error ({type(bug).__name__}: {bug}); please report it", 3)
    sys.exit(code if isinstance(code, int) else 0)
