"""The manifest every export and run carries, the README beside it, and the run's sealed event.

A manifest names the tool version, the catalog (its id and file name, never the folder it
sits in) and its event-chain head, the policy and its hash, the selection, every dataset
version with its content and record hashes, and each file's sha256; ``manifest_sha256`` seals
the rest. :func:`record_run` stores the policy, writes the manifest and appends the run's event
in one transaction: what ``trace`` and ``impact`` read.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import Any, Protocol

import pandas as pd

from curate.errors import InputError
from curate.export.files import now_utc, write_json
from curate.jsontext import finite
from curate.ledger import Ledger
from curate.records import canonical_json
from curate.version import __version__
from curate.weighting import Policy, Selection

__all__ = [
    "FITTER_README",
    "MANIFEST",
    "NamedVersion",
    "build_manifest",
    "censoring_readme",
    "censoring_text",
    "read_manifest",
    "readme_text",
    "record_run",
    "seal_manifest",
]

MANIFEST = "manifest.json"


class _Condition(Protocol):
    @property
    def value(self) -> float | bool | str: ...

    @property
    def unit(self) -> str | None: ...


class _NamedRecord(Protocol):
    @property
    def content_hash(self) -> str: ...

    @property
    def conditions(self) -> Mapping[str, _Condition]: ...


class NamedVersion(Protocol):
    """What a manifest, a run's event and ``units.json`` read of a dataset version: a
    :class:`curate.records.DatasetVersion`, or the facts a streamed table reads instead."""

    @property
    def id(self) -> str: ...

    @property
    def version(self) -> int: ...

    @property
    def record_hash(self) -> str: ...

    @property
    def record(self) -> _NamedRecord: ...


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


def build_manifest(catalog: Ledger, fmt: str, policy: Policy, selection: Selection, versions: Sequence[NamedVersion],
                   files: dict[str, str], extra: dict[str, Any] | None = None) -> dict[str, Any]:  # fmt: skip
    """Give the sealed manifest of an export or run."""
    seq, head = catalog.head()
    manifest = {
        "tool": "curate",
        "tool_version": __version__,
        "format": fmt,
        "created_at": now_utc(),
        "catalog_id": catalog.catalog_id,
        "catalog_file": Path(catalog.path).name if catalog.path != ":memory:" else ":memory:",
        "event_chain_head": {"seq": seq, "hash": head},
        "policy": {
            "name": policy.name,
            "sha256": policy.sha256,
            "origin": policy.origin,
            "settings": policy.to_dict(),
        },
        "selection": selection.to_dict(),
        "datasets": [
            {
                "id": v.id,
                "version": v.version,
                "content_hash": v.record.content_hash,
                "record_hash": v.record_hash,
            }
            for v in versions
        ],
        "files": dict(sorted(files.items())),
        **(extra or {}),
    }
    # a policy file is named by its file name only: no folder of this machine travels along
    if Path(policy.origin).is_file():
        manifest = _replace_value(manifest, policy.origin, Path(policy.origin).name)
    return seal_manifest(finite(manifest))  # sealed as written: strict JSON, NaN as null


def _replace_value(data: Any, old: str, new: str) -> Any:
    if isinstance(data, dict):
        return {key: _replace_value(value, old, new) for key, value in data.items()}
    if isinstance(data, list):
        return [_replace_value(value, old, new) for value in data]
    return new if data == old else data


def readme_text(catalog: Ledger, policy: Policy, outdir: Path) -> str:
    """Give the README that tells a fitter what sd, sigma and weight mean."""
    likelihood = ("No balancing: the weighted sum of squares is a Gaussian likelihood in which the grades inflate each dataset's variance."
                  if policy.is_likelihood else
                  "Balancing or a lab cap is on: the weighted sum of squares is NOT a likelihood; chi2 and standard errors lose their usual meaning.")  # fmt: skip
    return FITTER_README.format(
        version=__version__, date=now_utc(), catalog_id=catalog.catalog_id, policy_name=policy.name,
        policy_sha256=policy.sha256, likelihood=likelihood, outdir_name=outdir.name,
    )  # fmt: skip


def censoring_readme(points: pd.DataFrame, fmt: str) -> str:
    """Give the README paragraph on censored points (empty when the table holds none)."""
    if "censored" not in points.columns:
        return ""
    words = points["censored"].astype(str)
    return censoring_text(int((words == "below").sum()), int((words == "above").sum()), fmt)


def censoring_text(below: int, above: int, fmt: str) -> str:
    """Give the README paragraph on ``below`` and ``above`` censored points (empty for none)."""
    if below + above == 0:
        return ""
    text = CENSORED_README.format(below=below, above=above)
    if fmt == "petab":
        text += CENSORED_PETAB_README
    return text


def record_run(catalog: Ledger, kind: str, policy: Policy, versions: Sequence[NamedVersion],
               manifest: dict[str, Any], *, folder: Path | None = None, extra: dict[str, Any] | None = None) -> None:  # fmt: skip
    """Store the policy, write the manifest (if a folder is given) and append the run's event,
    in one transaction: what ``trace`` and ``impact`` later read.

    The event names the manifest, the chain head the manifest records, the policy's settings
    hash and the sha256 of the policy text the catalog holds (which ``verify`` recomputes).
    """
    with catalog.transaction():
        text_sha256 = catalog.store_policy(policy.sha256, policy.name, policy.origin, policy.text)
        if folder is not None:
            write_json(folder / MANIFEST, manifest, sort_keys=True)
        catalog.record_event(kind, {
            "format": manifest["format"], "outdir": str(folder.resolve()) if folder is not None else "",
            "manifest_sha256": manifest["manifest_sha256"], "event_chain_head": manifest["event_chain_head"],
            "policy_sha256": policy.sha256, "policy_text_sha256": text_sha256,
            "datasets": [[v.id, v.version] for v in versions], **(extra or {}),
        })  # fmt: skip


CENSORED_README = """
Censored points: {below} below and {above} above a limit. Their rows have censored = below
(or above), and value holds the limit, not a measured number; sd, sigma and weight are the
noise at the limit. Do not fit them as numbers: a point below L adds -log Phi((L - f) / sigma)
to the negative log-likelihood (above: -log Phi((f - L) / sigma)), the censored-normal model
(Tobin 1958), as `curate fit` does; or leave them out.
"""

CENSORED_PETAB_README = """\
PEtab 1 has no censored measurements: measurements.tsv holds the observed points only, and
censored_measurements.tsv (not named in problem.yaml, so PEtab tools do not read it) lists the
censored ones with their limit (curateLimit) and kind (curateCensored). A PEtab fitter that
uses measurements.tsv alone fits without them.
"""

FITTER_README = """\
Exported by curate {version} on {date} from catalog {catalog_id}.
Weighting policy: {policy_name} (sha256 {policy_sha256}).
{likelihood}

Columns (one row per measured point; time in seconds, values in the unit column):
  sd      the measured or estimated noise SD of the point (after the policy's noise floors)
  sigma   the effective SD after trust inflation and balancing: sigma = sd * sqrt(inflation / balance)
  weight  1 / sigma^2, the weight of the point in sum(weight * (y - f)^2)
All uncertainties are on the linear scale of the values.

Units: time is in seconds. In points.csv the unit column holds the symbol of each row's unit
(nM, µm/s, a.u., 1) and unit_ucum its UCUM code; value, sd and sigma are in that unit, weight
in its inverse square. units.json names the unit of every column, conditions included
("conditions": {{key: {{"column", "unit", "ucum"}}}}; null for text). In the PEtab tables the
measurement's unit is the row's curateUnit, conditions.tsv columns have the units in
units.json; in the Data Package every field with a unit carries it as unitCode (UCUM).

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
`curate trace FOLDER` (this folder; from the folder that holds it, `curate trace {outdir_name}`)
tells whether the catalog still holds exactly that data.
"""
