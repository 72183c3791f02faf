"""W3C PROV lineage of an export: raw files -> dataset versions -> the export, as PROV-JSON.

Written with the ``prov`` library (PROV-JSON for machines, PROV-N beside it for people).
"""

from __future__ import annotations

import datetime as dt
from pathlib import Path
from typing import Any

from curate.export.files import write_text

__all__ = ["lineage_document", "write_prov"]

NAMESPACE = "https://curate.invalid/id/"
VOCABULARY = "https://curate.invalid/ns#"


def _time(text: str) -> dt.datetime:
    value = dt.datetime.fromisoformat(text.replace("Z", "+00:00"))
    return value if value.tzinfo else value.replace(tzinfo=dt.UTC)


def lineage_document(
    manifest: dict[str, Any], versions: list[dict[str, Any]], *, tool_version: str
) -> Any:
    """Give a prov.model.ProvDocument for an export manifest and its dataset versions.

    Each entry of ``versions``: id, version, content_hash, record_hash, lab, created_at,
    actor, raw_file_name, raw_file_sha256, grade, observable.
    """
    from prov.model import PROV, PROV_LABEL, PROV_TYPE, ProvDocument

    doc = ProvDocument()
    ex = doc.add_namespace("ex", NAMESPACE)
    cur = doc.add_namespace("cur", VOCABULARY)
    tool = doc.agent(
        ex[f"curate/{tool_version}"],
        {PROV_TYPE: PROV["SoftwareAgent"], PROV_LABEL: f"curate {tool_version}"},
    )
    catalog_id = manifest["catalog_id"]
    export_id = f"export/{manifest['manifest_sha256'][:16]}"
    bundle = doc.entity(ex[export_id], {PROV_TYPE: cur["ExportBundle"], cur["format"]: manifest["format"],
                                        cur["policySha256"]: manifest["policy"]["sha256"]})  # fmt: skip
    export = doc.activity(ex[f"{export_id}/run"], _time(manifest["created_at"]), _time(manifest["created_at"]),
                          {PROV_TYPE: cur["Export"]})  # fmt: skip
    doc.wasGeneratedBy(bundle, export)
    doc.wasAssociatedWith(export, tool)
    labs: dict[str, Any] = {}
    people: dict[str, Any] = {}
    for entry in versions:
        lab = entry["lab"]
        if lab not in labs:
            labs[lab] = doc.agent(
                ex[f"lab/{_local(lab)}"], {PROV_TYPE: PROV["Organization"], PROV_LABEL: lab}
            )
        actor = entry["actor"]
        if actor not in people:
            people[actor] = doc.agent(
                ex[f"person/{_local(actor)}"], {PROV_TYPE: PROV["Person"], PROV_LABEL: actor}
            )
        record = doc.entity(ex[f"catalog/{catalog_id}/{entry['id']}/v{entry['version']}"], {
            PROV_TYPE: cur["DatasetVersion"], PROV_LABEL: f"{entry['id']} version {entry['version']}",
            cur["contentSha256"]: entry["content_hash"], cur["recordSha256"]: entry["record_hash"],
            cur["observable"]: entry["observable"], cur["trustGrade"]: entry["grade"] or "ungraded",
        })  # fmt: skip
        logging = doc.activity(ex[f"catalog/{catalog_id}/{entry['id']}/v{entry['version']}/written"],
                               _time(entry["created_at"]), _time(entry["created_at"]),
                               {PROV_TYPE: cur["Curation"]})  # fmt: skip
        doc.wasGeneratedBy(record, logging)
        doc.wasAssociatedWith(logging, people[actor])
        doc.wasAssociatedWith(logging, tool)
        doc.wasAttributedTo(record, labs[lab])
        if entry.get("raw_file_sha256"):
            raw = doc.entity(ex[f"raw/{entry['raw_file_sha256']}"], {
                PROV_TYPE: cur["RawFile"], PROV_LABEL: entry.get("raw_file_name") or "",
                cur["sha256"]: entry["raw_file_sha256"],
            })  # fmt: skip
            doc.wasAttributedTo(raw, labs[lab])
            doc.used(logging, raw)
            doc.wasDerivedFrom(record, raw, activity=logging)
        doc.used(export, record)
        doc.wasDerivedFrom(bundle, record, activity=export)
    return doc


def _local(text: str) -> str:
    return "".join(ch if ch.isalnum() or ch in "-_." else "_" for ch in text) or "_"


def write_prov(
    manifest: dict[str, Any], versions: list[dict[str, Any]], outdir: Path, *, tool_version: str
) -> dict[str, str]:
    """Write lineage.json (PROV-JSON) and lineage.provn (PROV-N); give file name -> sha256."""
    doc = lineage_document(manifest, versions, tool_version=tool_version)
    return {
        "lineage.json": write_text(
            outdir / "lineage.json", doc.serialize(format="json", indent=2) + "\n"
        ),
        "lineage.provn": write_text(outdir / "lineage.provn", doc.get_provn() + "\n"),
    }
