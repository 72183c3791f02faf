"""The measured uncertainty of a dataset version, as an SD per point on the linear scale.

Pure: a version and its arrays in, an array out. Used wherever a measured SD is needed
(consistency, weights, the report's bands), never trust-inflated.
"""

from __future__ import annotations

import numpy as np

from curate.errors import InputError
from curate.quality import noise
from curate.records import DatasetVersion, SeriesArrays, UncertaintyScale

__all__ = ["measured_sd", "reported_sd"]


def reported_sd(version: DatasetVersion, arrays: SeriesArrays) -> np.ndarray | None:
    """Give the lab's reported uncertainty converted to an SD per point (its own scale), or None."""
    record = version.record
    if arrays.sd is None or record.uncertainty is None:
        return None
    u = record.uncertainty
    n: np.ndarray | int | None = arrays.n if arrays.n is not None else u.n
    return noise.reported_to_sd(
        arrays.sd, kind=u.type.value, value=arrays.value, n=n, level=u.level
    )


def measured_sd(version: DatasetVersion, arrays: SeriesArrays) -> np.ndarray:
    """Give the measured SD of every point on the linear scale (never trust-inflated).

    The reported uncertainty where the lab gave one (an SD on a log scale becomes
    |y| * sd_ln, or |y| * ln(10) * sd_log10), else the stored noise estimate; InputError if
    neither exists.
    """
    record = version.record
    sd = reported_sd(version, arrays)
    if sd is not None and record.uncertainty is not None:
        if record.uncertainty.scale is UncertaintyScale.LN:
            sd = np.abs(arrays.value) * sd
        elif record.uncertainty.scale is UncertaintyScale.LOG10:
            sd = np.abs(arrays.value) * np.log(10.0) * sd
    if sd is None or not np.all(np.isfinite(sd)):
        estimate = record.noise
        if estimate is None:
            raise InputError(
                f"dataset {version.id}: no reported uncertainty and no noise estimate; run `curate noise {version.id}` first"
            )
        if estimate.method == "error-model":
            a, b = float(estimate.parameters["a"]), float(estimate.parameters["b"])
            fallback = np.sqrt(a**2 + (b * arrays.value) ** 2)
        else:
            fallback = np.full(len(arrays), estimate.sd)
        sd = fallback if sd is None else np.where(np.isfinite(sd), sd, fallback)
    return np.asarray(sd, dtype=float)
