"""An external fitter: any program that fits the exported table and writes its parameters.

``--fitter-cmd 'COMMAND {data} {out}'``: curate writes the (weighted) points as ``{data}`` (CSV,
the columns of ``curate export table``), runs the command with a timeout, and reads ``{out}``:
``{"parameters": {NAME: value or {"value", "stderr"}}, "stderr": {NAME: value}}``. The
program's output goes to ``fitter.log`` beside the data. A fitter in any language can be
checked this way.
"""

from __future__ import annotations

import json
import math
import shlex
import subprocess
from pathlib import Path
from typing import Any

import pandas as pd

from curate.errors import InputError
from curate.export.table import write_table
from curate.fit.backends.base import ExternalFit, ModelBackend

__all__ = ["ExternalFitter"]


class ExternalFitter(ModelBackend):
    """A program that fits a table itself; curate compares its fits with and without groups."""

    kind = "external"
    fits_itself = True

    def __init__(self, command: str, *, timeout: float = 600.0) -> None:
        self.command = command
        self.timeout = timeout

    def check(self) -> None:
        """Refuse, before anything runs, a command that cannot work: unsplittable, empty, or
        without the ``{data}`` it reads or the ``{out}`` it must write."""
        try:
            parts = shlex.split(self.command)
        except ValueError as err:
            raise InputError(f"--fitter-cmd: cannot split the command ({err})") from None
        if not parts:
            raise InputError("--fitter-cmd: the command is empty")
        missing = [m for m in ("{data}", "{out}") if not any(m in part for part in parts)]
        if missing:
            raise InputError(
                f"--fitter-cmd '{self.command}': no {' and no '.join(missing)} in the command; "
                "curate writes the training table to {data} and reads the fitted parameters "
                "from {out}, e.g. 'julia fit.jl {data} {out}'"
            )

    @classmethod
    def from_description(cls, description: dict[str, Any]) -> ModelBackend:
        """Give the fitter back from its recorded command and timeout."""
        return cls(str(description["command"]), timeout=float(description.get("timeout", 600.0)))

    @property
    def portable(self) -> bool:
        """Tell that a worker can run the same command."""
        return True

    @property
    def label(self) -> str:
        """Give 'external: COMMAND'."""
        return f"external: {self.command}"

    def describe(self) -> dict[str, Any]:
        """Give kind, command and timeout."""
        return {
            "kind": self.kind,
            "command": self.command,
            "timeout": self.timeout,
            "label": self.label,
        }

    def fit_points(self, points: pd.DataFrame, *, folder: Path, group: str) -> ExternalFit:
        """Run the program on ``points`` in ``folder``; give its parameters or why it failed."""
        folder.mkdir(parents=True, exist_ok=True)
        write_table(points, folder, "data")
        data, out = folder / "data.csv", folder / "result.json"
        out.unlink(missing_ok=True)
        try:
            arguments = [
                part.replace("{data}", str(data)).replace("{out}", str(out))
                for part in shlex.split(self.command)
            ]
        except ValueError as err:
            raise InputError(f"--fitter-cmd: cannot split the command ({err})") from None
        if not arguments:
            raise InputError("--fitter-cmd: the command is empty")
        fold = ExternalFit(group, folder)
        log = folder / "fitter.log"
        try:
            with log.open("w", encoding="utf-8") as stream:
                completed = subprocess.run(
                    arguments,
                    stdout=stream,
                    stderr=subprocess.STDOUT,
                    timeout=self.timeout,
                    check=False,
                )
        except FileNotFoundError:
            raise InputError(f"--fitter-cmd: no program '{arguments[0]}'") from None
        except subprocess.TimeoutExpired:
            fold.error = (
                f"the fitter ran longer than {self.timeout:g} s and was stopped (log: {log})"
            )
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
            fold.error = (
                f"the fitter's {out.name} is not "
                f'{{"parameters": {{NAME: value}}}} ({_reason(err)})'
            )
        if fold.error is None:
            bad = [n for n, v in fold.parameters.items() if not math.isfinite(v)]
            if bad:  # a NaN is no parameter value: the refit failed, whatever its exit code
                fold.error = f"the fitter's {out.name} gives no finite value for {', '.join(bad)}"
            for name in [n for n, v in fold.stderr.items() if not math.isfinite(v)]:
                del fold.stderr[name]  # a standard error that is not a number is none
        return fold


def _reason(err: Exception) -> str:
    """Give why a result file could not be read, in words."""
    if isinstance(err, json.JSONDecodeError):
        return f"not JSON: {err.msg} at line {err.lineno}, column {err.colno}"
    if isinstance(err, KeyError):
        return f"no key {err.args[0]!r}" if err.args else "a key is missing"
    return str(err) or "unexpected content"
