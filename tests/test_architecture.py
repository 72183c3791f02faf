"""The shape of the code: import contracts, one option group, one backend protocol, one splitter base."""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent


def test_import_contracts_hold():
    # the contracts live in pyproject.toml ([tool.importlinter]); import-linter comes from the
    # package registry with the test extras
    program = Path(sys.executable).with_name("lint-imports")
    command = (
        [str(program)] if program.exists() else [shutil.which("lint-imports") or "lint-imports"]
    )
    proc = subprocess.run(
        [*command, "--no-cache"], cwd=ROOT, capture_output=True, text=True, timeout=300
    )
    assert proc.returncode == 0, proc.stdout[-3000:] + proc.stderr[-2000:]
    assert "broken" not in proc.stdout.lower().replace("0 broken", "")
    assert proc.stdout.count(" KEPT") == 4


def test_selection_options_are_one_group_in_every_command_that_selects():
    import typer

    from curate.cli import app

    wanted = {
        "--policy",
        "--observable",
        "--lab",
        "--condition",
        "--grade",
        "--id",
        "--version",
        "--retired",
    }
    group = typer.main.get_command(app)
    for name in ("weights", "export", "folds", "fit", "sensitivity"):
        command = group.commands[name]  # type: ignore[attr-defined]
        options = {opt for param in command.params for opt in param.opts}
        assert wanted <= options, (name, wanted - options)
    assert not wanted & {opt for param in group.commands["trace"].params for opt in param.opts}


def test_the_cli_module_holds_no_repeated_option_block():
    source = (ROOT / "curate" / "cli" / "app.py").read_text(encoding="utf-8")
    assert source.count('"--observable"') == 0  # the group is declared once, in cli/options.py
    assert (ROOT / "curate" / "cli" / "options.py").read_text(encoding="utf-8").count(
        '"--observable"'
    ) == 1


def test_every_splitter_shares_the_base_class():
    from curate.weighting import splitters

    classes = [splitters.LeaveOneGroupOut, splitters.GroupKFold]
    assert all(issubclass(c, splitters.GroupSplitter) for c in classes)
    with pytest.raises(NotImplementedError):
        list(splitters.GroupSplitter().split([1, 2], groups=["a", "b"]))


def test_every_backend_is_registered_and_rebuilds_from_its_description(tmp_path):
    from curate.fit.backends import BACKENDS, ExternalFitter, ModelBackend, PythonFunction, rebuild

    assert set(BACKENDS) == {"python", "external"}
    assert all(issubclass(b, ModelBackend) for b in BACKENDS.values())
    model = tmp_path / "m.py"
    model.write_text("def f(params, points):\n    return [params['a']] * len(points)\n")
    python = PythonFunction.from_reference(f"{model}:f")
    again = rebuild(python.describe())
    assert isinstance(again, PythonFunction) and again.portable
    import pandas as pd

    assert list(again.predict({"a": 2.5}, pd.DataFrame({"time": [0.0, 1.0]}))) == [2.5, 2.5]
    external = rebuild(ExternalFitter("fit {data} {out}", timeout=5).describe())
    assert isinstance(external, ExternalFitter) and external.fits_itself and external.timeout == 5
