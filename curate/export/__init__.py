"""Writers of export formats. The only package besides the catalog that writes files."""

from __future__ import annotations

from curate.export.common import MANIFEST, prepare_folder, read_manifest, seal_manifest
from curate.export.datapackage import write_datapackage
from curate.export.petab import petab_tables, write_petab
from curate.export.prov import lineage_document, write_prov
from curate.export.table import write_table

__all__ = [
    "MANIFEST",
    "lineage_document",
    "petab_tables",
    "prepare_folder",
    "read_manifest",
    "seal_manifest",
    "write_datapackage",
    "write_petab",
    "write_prov",
    "write_table",
]
