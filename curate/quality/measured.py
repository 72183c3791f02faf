"""The measured uncertainty of a dataset version, as an SD per point on the linear scale.

Pure: a version and its arrays in, an array out. Two quantities, kept apart:

- the noise of one measurement (:func:`reported_sd`): what noise estimates speak of; an SEM
  with n becomes SEM * sqrt(n), a confidence interval its half-width over t (or z);
- the uncertainty of each reported value (:func:`measured_sd`): what weights, consistency and
  the report's bands use. A value that is the mean of n measurements (an n column, or n in the
  sidecar) is uncertain by the single-measurement SD / sqrt(n): its SEM. So a lab's mean ± SEM
  enters a fit with sigma = SEM, and mean ± SD with n with sigma = SD / sqrt(n).

Never trust-inflated: the policy's grades act later, on the weights.
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
    """Give the SD of every reported value on the linear scale (never trust-inflated).

    The reported uncertainty where the lab gave one, as the uncertainty of the value (a mean of
    n: the single-measurement SD / sqrt(n)); an SD on a log scale becomes
    |y| * sd_ln, or |y| * ln(10) * sd_log10), else the stored noise estimate; InputError if
    neither exists.
    """
    record = version.record
    sd = reported_sd(version, arrays)
    if sd is not None and record.uncertainty is not None:
        n = arrays.n if arrays.n is not None else record.uncertainty.n
        if n is not None:  # each value is a mean of n: its uncertainty is the SEM
            sd = sd / np.sqrt(np.asarray(n, dtype=float))
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
