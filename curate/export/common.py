"""What every export shares: the output folder rule, atomic writes, the manifest, the README."""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any

from curate.errors import InputError
from curate.records import canonical_json

__all__ = [
    "FITTER_README",
    "MANIFEST",
    "prepare_folder",
    "read_manifest",
    "seal_manifest",
    "sha256_file",
    "write_bytes",
    "write_text",
]

MANIFEST = "manifest.json"


def prepare_folder(outdir: Path, *, force: bool) -> None:
    """Create the export folder; refuse a non-empty one unless ``force`` (nothing is deleted)."""
    if outdir.exists() and not outdir.is_dir():
        raise InputError(f"{outdir}: exists and is not a folder")
    if outdir.is_dir() and any(outdir.iterdir()) and not force:
        raise InputError(
            f"{outdir}: the folder exists and is not empty; choose a new one, or pass --force to write our files into it (nothing else is touched)"
        )
    outdir.mkdir(parents=True, exist_ok=True)


def write_bytes(path: Path, data: bytes) -> str:
    """Write a file atomically (temporary file, then rename); give its sha256."""
    path.parent.mkdir(parents=True, exist_ok=True)
    handle, temporary = tempfile.mkstemp(dir=path.parent, prefix=f".{path.name}.", suffix=".part")
    try:
        with os.fdopen(handle, "wb") as stream:
            stream.write(data)
        umask = os.umask(0)
        os.umask(umask)
        os.chmod(temporary, 0o666 & ~umask)  # mkstemp makes files private; exports are for sharing
        os.replace(temporary, path)
    except BaseException:
        Path(temporary).unlink(missing_ok=True)
        raise
    return hashlib.sha256(data).hexdigest()


def write_text(path: Path, text: str) -> str:
    """Write UTF-8 text atomically; give its sha256."""
    return write_bytes(path, text.encode("utf-8"))


def sha256_file(path: Path) -> str:
    """Give a file's sha256."""
    digest = hashlib.sha256()
    with path.open("rb") as stream:
        for block in iter(lambda: stream.read(1 << 20), b""):
            digest.update(block)
    return digest.hexdigest()


def seal_manifest(manifest: dict[str, Any]) -> dict[str, Any]:
    """Give the manifest with ``manifest_sha256`` over the canonical JSON of everything else."""
    body = {k: v for k, v in manifest.items() if k != "manifest_sha256"}
    return {**body, "manifest_sha256": hashlib.sha256(canonical_json(body).encode()).hexdigest()}


def read_manifest(outdir: Path) -> dict[str, Any]:
    """Give an export's manifest; InputError if missing, unreadable or edited by hand."""
    path = outdir / MANIFEST if outdir.is_dir() else outdir
    if not path.is_file():
        raise InputError(f"{path}: no export manifest here")
    try:
        manifest = json.loads(path.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as err:
        raise InputError(f"{path}: not a readable manifest ({err})") from None
    if not isinstance(manifest, dict) or "manifest_sha256" not in manifest:
        raise InputError(f"{path}: not a curate export manifest (no manifest_sha256)")
    if seal_manifest(manifest)["manifest_sha256"] != manifest["manifest_sha256"]:
        raise InputError(
            f"{path}: the manifest was edited after it was written (its hash does not match); re-export instead"
        )
    return manifest


def now_utc() -> str:
    """Give the current UTC time as ISO 8601 with Z."""
    return dt.datetime.now(dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


FITTER_README = """\
Exported by curate {version} on {date} from catalog {catalog_id}.
Weighting policy: {policy_name} (sha256 {policy_sha256}).
{likelihood}

Columns (one row per measured point; time in seconds, values in the unit column):
  sd      the measured or estimated noise SD of the point (after the policy's noise floors)
  sigma   the effective SD after trust inflation and balancing: sigma = sd * sqrt(inflation / balance)
  weight  1 / sigma^2, the weight of the point in sum(weight * (y - f)^2)
All uncertainties are on the linear scale of the values.

Handing the data to a fitter:
  scipy.optimize.curve_fit(f, t, y, sigma=sigma, absolute_sigma=True)
  scipy.optimize.least_squares(lambda p: (y - f(t, p)) / sigma, p0)
  statsmodels WLS(y, X, weights=weight)            (weights = 1/sigma^2)
  lmfit: Model.fit(y, params, weights=1/sigma)     (lmfit multiplies the residual by its weights)
  PEtab tools (petab/ folder): sigma is in noiseParameters, one value per row
  MATLAB lsqnonlin / Julia LsqFit: residual (y - f) ./ sigma, or weights 1 ./ sigma.^2
Relative-unit datasets (relative = true) need a scale factor in the fit, one per
calibration_group (or per dataset where none is given).

manifest.json names every dataset version (and content hash) in this export;
`curate trace {outdir_name}` tells whether the catalog still holds exactly that data.
"""
