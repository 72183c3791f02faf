"""schemas/ matches the pydantic models, and real sidecars validate against the JSON Schema."""

from __future__ import annotations

import json
import tomllib

import pytest
from conftest import EXAMPLES, ROOT

from curate.schemas import render_schemas

jsonschema = pytest.importorskip("jsonschema")


def test_committed_schemas_match_models():
    rendered = render_schemas()
    folder = ROOT / "schemas"
    committed = {p.name for p in folder.glob("*.schema.json")}
    assert committed == set(rendered), "run: python -m curate.schemas"
    for name, text in rendered.items():
        assert (folder / name).read_text(encoding="utf-8") == text, (
            f"schemas/{name} drifted from the models; run: python -m curate.schemas"
        )


def test_schemas_are_valid_json_schema():
    for text in render_schemas().values():
        jsonschema.Draft202012Validator.check_schema(json.loads(text))


def test_example_sidecars_validate_against_schema():
    schema = json.loads((ROOT / "schemas" / "sidecar.schema.json").read_text())
    validator = jsonschema.Draft202012Validator(schema)
    sidecars = sorted(EXAMPLES.glob("*.toml"))
    assert len(sidecars) >= 12
    for path in sidecars:
        content = tomllib.loads(path.read_text())
        # TOML dates are date objects; JSON Schema sees the ISO text a JSON document would carry
        source = content.get("source", {})
        if "acquired" in source:
            source["acquired"] = source["acquired"].isoformat()
        errors = list(validator.iter_errors(content))
        assert not errors, (path.name, errors[0].message)


def test_schema_rejects_unknown_field():
    schema = json.loads((ROOT / "schemas" / "sidecar.schema.json").read_text())
    bad = {
        "observable": {"id": "x", "unit": "nM"},
        "time": {"unit": "s"},
        "source": {"lab": "L"},
        "colour": "red",
    }
    assert not jsonschema.Draft202012Validator(schema).is_valid(bad)


def test_stored_record_validates_against_schema(catalog, tmp_path):
    from conftest import LONG_CSV, write

    data = write(tmp_path / "a.csv", LONG_CSV)
    result = catalog.add(
        data,
        options={
            "observable": {"id": "x", "unit": "nM"},
            "time": {"unit": "s"},
            "source": {"lab": "L"},
            "conditions": {"temperature": "20 degC"},
        },
    )
    version = catalog.show(result.id)
    schema = json.loads((ROOT / "schemas" / "dataset_version.schema.json").read_text())
    jsonschema.validate(json.loads(version.model_dump_json()), schema)
