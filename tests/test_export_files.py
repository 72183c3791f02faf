"""What every writer shares: atomic writes, strict JSON files, a sealed manifest that reads back."""

from __future__ import annotations

import json

import numpy as np
import pytest

from curate.errors import InputError
from curate.export.files import write_json, write_text
from curate.export.manifest import read_manifest, seal_manifest
from curate.jsontext import finite


def strict(text):
    # JSON has no NaN or Infinity (RFC 8259, section 6): a strict parser refuses them
    return json.loads(text, parse_constant=lambda name: (_ for _ in ()).throw(ValueError(name)))


def test_json_files_are_strict(tmp_path):
    write_json(tmp_path / "a.json", {"n_eff": float("nan"), "span": np.inf, "x": np.float64(2.5)})
    assert strict((tmp_path / "a.json").read_text()) == {"n_eff": None, "span": None, "x": 2.5}


def test_a_manifest_with_a_missing_number_reads_back_sealed(tmp_path):
    manifest = seal_manifest(finite({"catalog_id": "c", "weights": {"n_eff": float("nan")}}))
    write_json(tmp_path / "manifest.json", manifest, sort_keys=True)
    assert read_manifest(tmp_path)["weights"] == {"n_eff": None}


def test_writing_onto_a_folder_is_a_clear_error(tmp_path):
    (tmp_path / "out").mkdir()
    with pytest.raises(InputError, match="out: is a folder; expected a file name"):
        write_text(tmp_path / "out", "x")
