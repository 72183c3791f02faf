"""Option groups shared by several commands, and the parsers of their values.

``@selection_options`` gives a command the selection filters (``--observable``, ``--lab``,
``--condition``, ``--grade``, ``--id``, ``--version``, ``--retired``) and ``--policy``, and hands
it a built :class:`~curate.weighting.Selection` and a loaded :class:`~curate.weighting.Policy`
as its ``selection`` and ``policy`` parameters: written once, parsed once.
"""

from __future__ import annotations

import functools
import inspect
import re
from collections.abc import Callable
from pathlib import Path
from typing import Annotated, Any, TypeVar

import typer

from curate.errors import InputError
from curate.records import normalise_grade
from curate.weighting import Policy, Selection, load_policy

__all__ = [
    "DIALECT_OPTIONS",
    "DatasetId",
    "Decimal",
    "Delimiter",
    "Encoding",
    "EndAtBlank",
    "FooterRows",
    "ForceFlag",
    "JsonFlag",
    "Thousands",
    "parse_columns",
    "parse_conditions",
    "parse_pins",
    "selection_options",
]

JsonFlag = Annotated[bool, typer.Option("--json", help="print JSON")]
ForceFlag = Annotated[
    bool, typer.Option(help="write into a non-empty folder (other files are left alone)")
]
DatasetId = Annotated[str, typer.Argument(metavar="ID", help="dataset id")]

# where the table sits and how a text file is written: the same options on add and inspect,
# each filling the sidecar field named beside it
Delimiter = Annotated[
    str | None, typer.Option(help="text files: the delimiter (',', ';', tab, '|')")
]
Decimal = Annotated[str | None, typer.Option(help="text files: the decimal mark ('.' or ',')")]
Thousands = Annotated[
    str | None, typer.Option(help="text files: the thousands separator ('', '.', ',', ' ', \"'\")")
]
Encoding = Annotated[
    str | None, typer.Option(help="text files: the encoding (utf-8, latin-1, cp1252, utf-16 ...)")
]
FooterRows = Annotated[
    int | None,
    typer.Option(help="lines (sheet rows) at the end to leave out: notes below the data"),
]
EndAtBlank = Annotated[
    bool | None, typer.Option("--end-at-blank", help="the table ends at its first blank line (row)")
]
DIALECT_OPTIONS = {"delimiter": "dialect.delimiter", "decimal": "dialect.decimal",
                   "thousands": "dialect.thousands", "encoding": "dialect.encoding",
                   "footer_rows": "footer_rows", "end_at_blank": "end_at_blank"}  # fmt: skip

_KEY = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")

Command = TypeVar("Command", bound=Callable[..., Any])


def parse_conditions(pairs: list[str] | None, option: str = "--condition") -> dict[str, str]:
    """Give {key: value} of repeated ``--condition KEY=VALUE`` options (keys checked, each once)."""
    result: dict[str, str] = {}
    given: dict[str, str] = {}
    for pair in pairs or []:
        key, sep, value = pair.partition("=")
        key = key.strip()
        if not sep:
            raise InputError(f"{option} '{pair}': expected KEY=VALUE, e.g. temperature=25degC")
        if not _KEY.match(key):
            raise InputError(
                f"{option} '{pair}': key '{key}' is not a valid identifier; use "
                "letters, digits and '_', not starting with a digit"
            )
        if key in given:
            raise InputError(
                f"{option} '{pair}': key '{key}' is given twice (also '{given[key]}'); "
                "give each condition key once"
            )
        given[key] = pair
        result[key] = value.strip()
    return result


COLUMN_ROLES = ("time", "value", "sd", "replicate", "n")


def parse_columns(pairs: list[str]) -> dict[str, str]:
    """Give {role: header} of repeated ``--column ROLE=HEADER`` options."""
    result: dict[str, str] = {}
    for pair in pairs:
        role, sep, header = pair.partition("=")
        role, header = role.strip().lower(), header.strip().strip('"').strip("'")
        if not sep or not header:
            raise InputError(f"--column '{pair}': expected ROLE=HEADER, e.g. time=\"Time (min)\"")
        if role not in COLUMN_ROLES:
            raise InputError(
                f"--column '{pair}': unknown role '{role}'; expected one of {', '.join(COLUMN_ROLES)}"
            )
        if role in result:
            raise InputError(f"--column '{pair}': role '{role}' is given twice; give each once")
        result[role] = header
    return result


def parse_pins(pairs: list[str] | None) -> tuple[tuple[str, int], ...]:
    """Give (id, version) pairs of repeated ``--version ID=N`` options."""
    pinned = []
    for pair in pairs or []:
        ident, sep, number = pair.partition("=")
        if not sep or not number.strip().isdigit():
            raise InputError(f"--version '{pair}': expected ID=N, e.g. harrow_velarin_conc_01=2")
        pinned.append((ident.strip(), int(number)))
    return tuple(pinned)


# the options of the group, as (parameter name, annotation, default), in the order --help shows
_GROUP: tuple[tuple[str, Any, Any], ...] = (
    ("policy_file", Annotated[Path | None, typer.Option("--policy", help="weighting policy TOML (default: the one curate ships)")], None),
    ("observable", Annotated[list[str] | None, typer.Option("--observable", help="only these observables (repeatable)")], None),
    ("lab", Annotated[list[str] | None, typer.Option("--lab", help="only these labs (repeatable)")], None),
    ("condition", Annotated[list[str] | None, typer.Option("--condition", help="KEY=VALUE that must match (repeatable)")], None),
    ("grade", Annotated[list[str] | None, typer.Option("--grade", help="only these grades (repeatable; 'none' = ungraded)")], None),
    ("ids", Annotated[list[str] | None, typer.Option("--id", help="only these datasets (repeatable)")], None),
    ("versions", Annotated[list[str] | None, typer.Option("--version", help="ID=N pins a dataset to version N (repeatable)")], None),
    ("retired", Annotated[bool, typer.Option("--retired", help="include retired datasets")], False),
)  # fmt: skip


def _selection(values: dict[str, Any]) -> Selection:
    return Selection(
        observables=tuple(values["observable"] or ()),
        labs=tuple(values["lab"] or ()),
        conditions=tuple(parse_conditions(values["condition"]).items()),
        grades=tuple(normalise_grade(g) for g in values["grade"] or ()),
        ids=tuple(values["ids"] or ()),
        versions=parse_pins(values["versions"]),
        include_retired=values["retired"],
    )


def selection_options(command: Command) -> Command:
    """Replace a command's ``selection`` and ``policy`` parameters by the shared option group."""
    signature = inspect.signature(command, eval_str=True)
    own = [p for p in signature.parameters.values() if p.name not in ("selection", "policy")]
    where = list(signature.parameters).index("selection")
    group = [
        inspect.Parameter(name, inspect.Parameter.KEYWORD_ONLY, default=default, annotation=kind)
        for name, kind, default in _GROUP
    ]
    parameters = [*own[:where], *group, *own[where:]]
    parameters = [p.replace(kind=inspect.Parameter.KEYWORD_ONLY) for p in parameters]

    @functools.wraps(command)
    def wrapper(**given: Any) -> Any:
        values = {name: given.pop(name) for name, _, _ in _GROUP}
        selection = _selection(values)
        policy: Policy = load_policy(values["policy_file"])
        return command(**given, selection=selection, policy=policy)

    del wrapper.__wrapped__  # typer must see the new signature, not the command's
    wrapper.__signature__ = signature.replace(parameters=parameters)  # type: ignore[attr-defined]
    wrapper.__annotations__ = {p.name: p.annotation for p in parameters}
    return wrapper  # type: ignore[return-value]
