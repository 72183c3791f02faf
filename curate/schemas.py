"""JSON Schema files for every record, generated from the pydantic models.

``python -m curate.schemas [FOLDER]`` rewrites them (default: schemas/ of the checkout); a test
fails when the committed files drift from the models.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

from pydantic import BaseModel

from curate.ingest.sidecar import Sidecar
from curate.records import DatasetRecord, DatasetVersion

__all__ = ["SCHEMA_MODELS", "render_schemas", "write_schemas"]

SCHEMA_MODELS: dict[str, type[BaseModel]] = {
    "dataset_version.schema.json": DatasetVersion,
    "dataset_record.schema.json": DatasetRecord,
    "sidecar.schema.json": Sidecar,
}


def render_schemas() -> dict[str, str]:
    """Give file name -> JSON Schema text for every record model."""
    rendered = {}
    for name, model in SCHEMA_MODELS.items():
        schema: dict[str, Any] = model.model_json_schema()
        schema = {
            "$schema": "https://json-schema.org/draft/2020-12/schema",
            "$id": f"https://curate.invalid/schemas/{name}",
            **schema,
        }
        rendered[name] = json.dumps(schema, indent=2, sort_keys=True, ensure_ascii=False) + "\n"
    return rendered


def write_schemas(folder: Path) -> list[Path]:
    """Write every schema file into ``folder``; give the paths written."""
    folder.mkdir(parents=True, exist_ok=True)
    written = []
    for name, text in render_schemas().items():
        path = folder / name
        path.write_text(text, encoding="utf-8")
        written.append(path)
    return written


if __name__ == "__main__":
    target = Path(sys.argv[1]) if len(sys.argv) > 1 else Path(__file__).parent.parent / "schemas"
    for path in write_schemas(target):
        print(path)
