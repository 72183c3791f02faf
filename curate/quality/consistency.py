"""Consistency between datasets of one observable under matching conditions. Pure computation.

Always on the uncertainties as measured (never trust-inflated sigmas: a low grade must not
make a bad dataset look consistent).

- :func:`against_consensus`: each dataset against the consensus of the others on its own time
  points (linear interpolation inside each other dataset's range only; relative-unit data put
  on one scale first, and the dataset's own scale factor fitted in closed form, costing one
  degree of freedom): chi2, dof, Birge ratio R = sqrt(chi2/dof), p-value.

Scale factors follow the convention of the whole tool, data = s x reference (the fit's
data = s x model, PEtab's ``observableParameter1 * model``): a relative dataset's reported
``scale`` is s with y ~ s c, c the consensus of the others on the absolute scale (or, in a
group of relative data only, on a common scale of typical level 1).
- :func:`summary_consistency`: per-dataset summary values with uncertainties: weighted mean,
  Cochran's Q, I^2 and H (Higgins & Thompson 2002), DerSimonian-Laird and Paule-Mandel tau^2
  with random-effects means, the Particle Data Group scale factor, and the largest consistent
  subset (Cox 2007).
- :func:`match_groups`: which datasets measure the same thing under the same conditions.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from scipy import interpolate, optimize, stats

from curate.errors import InputError

__all__ = [
    "ConsensusResult",
    "Series",
    "SummaryConsistency",
    "against_consensus",
    "collapse_replicates",
    "consensus_at",
    "consistent_subsets",
    "largest_consistent_subset",
    "match_groups",
    "pdg_scale_factor",
    "summary_consistency",
    "summary_values",
]


@dataclass(frozen=True, eq=False)
class Series:
    """One dataset's points for a consistency check: time-sorted, sd = SD as measured."""

    id: str
    lab: str
    time: np.ndarray
    value: np.ndarray
    sd: np.ndarray
    relative: bool = False
    calibration_group: str | None = None  # the name its scale factor goes by (None: its id)


def collapse_replicates(series: Series) -> Series:
    """Give the series with replicates at one time replaced by their mean and its SD.

    The SD of a mean of n independent points with SDs s_j is sqrt(sum s_j^2) / n.
    """
    times, inverse, counts = np.unique(series.time, return_inverse=True, return_counts=True)
    if len(times) == len(series.time):
        return series
    means = np.bincount(inverse, weights=series.value) / counts
    sd = np.sqrt(np.bincount(inverse, weights=series.sd**2)) / counts
    return Series(
        series.id, series.lab, times, means, sd, series.relative, series.calibration_group
    )


def _interpolate(other: Series, times: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Give (values, variances, inside) of ``other`` linearly interpolated at ``times``.

    Var of (1-w) y_j + w y_{j+1} is (1-w)^2 s_j^2 + w^2 s_{j+1}^2 (independent points), plus
    the squared gap to a monotone cubic interpolant where the series curves.
    """
    t = other.time
    inside = (times >= t[0]) & (times <= t[-1])
    j = (
        np.clip(np.searchsorted(t, times, side="right") - 1, 0, len(t) - 2)
        if len(t) > 1
        else np.zeros(len(times), int)
    )
    if len(t) == 1:
        exact = times == t[0]
        return np.full(len(times), other.value[0]), np.full(len(times), other.sd[0] ** 2), exact
    span = t[j + 1] - t[j]
    w = np.clip((times - t[j]) / span, 0.0, 1.0)
    values = (1 - w) * other.value[j] + w * other.value[j + 1]
    variances = (1 - w) ** 2 * other.sd[j] ** 2 + w**2 * other.sd[j + 1] ** 2
    if len(t) >= 3 and inside.any():
        # between its points a curved series is not a straight line: count the gap between
        # the linear and the monotone cubic interpolant (PCHIP, Fritsch & Carlson 1980) as
        # interpolation uncertainty (an error indicator by common practice, no single source);
        # it is 0 at the series' own times
        cubic = interpolate.PchipInterpolator(t, other.value)(np.clip(times, t[0], t[-1]))
        variances = variances + np.where(inside, (cubic - values) ** 2, 0.0)
    return values, variances, inside


def _consensus(
    target_times: np.ndarray, others: Sequence[Series], scales: Sequence[float]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Give (consensus, variance, covered) of the scaled others at the target times."""
    weight_sum = np.zeros(len(target_times))
    weighted = np.zeros(len(target_times))
    for other, scale in zip(others, scales, strict=True):
        values, variances, inside = _interpolate(other, target_times)
        values, variances = values * scale, variances * scale**2
        use = inside & (variances > 0)
        weight_sum[use] += 1.0 / variances[use]
        weighted[use] += values[use] / variances[use]
    covered = weight_sum > 0
    consensus = np.where(covered, weighted / np.where(covered, weight_sum, 1.0), np.nan)
    variance = np.where(covered, 1.0 / np.where(covered, weight_sum, 1.0), np.nan)
    return consensus, variance, covered


def consensus_at(
    times: np.ndarray, others: Sequence[Series]
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Give (consensus, variance, covered) of ``others`` at ``times``.

    Each other series (replicates collapsed) is interpolated linearly inside its own time range
    only; the consensus is their inverse-variance weighted mean where at least one covers the
    time (NaN elsewhere, ``covered`` False).
    """
    collapsed = [collapse_replicates(o) for o in others]
    return _consensus(np.asarray(times, dtype=float), collapsed, [1.0] * len(collapsed))


def _fit_scale(series: Series, consensus: np.ndarray, variance: np.ndarray, start: float) -> float:
    """Give s minimising sum (s y - c)^2 / (s^2 sd^2 + var_c): closed form, weights iterated."""
    scale = start
    for _ in range(20):
        w = 1.0 / (scale**2 * series.sd**2 + variance)
        denominator = float(np.sum(w * series.value**2))
        if denominator <= 0:
            return scale
        new = float(np.sum(w * series.value * consensus) / denominator)
        if not np.isfinite(new) or new <= 0:
            return scale
        if abs(new - scale) <= 1e-12 * abs(scale):
            return new
        scale = new
    return scale


@dataclass(frozen=True)
class ConsensusResult:
    """One dataset against the consensus of the others."""

    id: str
    lab: str
    n_overlap: int
    chi2: float | None
    dof: int | None
    birge_ratio: float | None
    p_value: float | None
    scale: float | None  # relative units: s in data = s x consensus; absolute: None
    note: str = ""
    in_consensus: bool = True  # part of the consensus pool others are judged against
    calibration_group: str | None = None  # the name of its scale factor (relative units)
    # it disagrees with the only other absolute dataset(s) and nothing tells which one is off
    # (relative data cannot decide a level): no grade should follow from it
    ambiguous: bool = False

    def to_dict(self) -> dict[str, Any]:
        """Give the result as plain data."""
        return {
            "id": self.id,
            "lab": self.lab,
            "n_overlap": self.n_overlap,
            "chi2": self.chi2,
            "dof": self.dof,
            "birge_ratio": self.birge_ratio,
            "p_value": self.p_value,
            "scale": self.scale,
            "note": self.note,
            "in_consensus": self.in_consensus,
            "calibration_group": self.calibration_group,
            "ambiguous": self.ambiguous,
        }


def _align_scales(series: Sequence[Series], reference: set[int] | None = None) -> list[float]:
    """Give one scale per series putting relative-unit series on a common scale (1 if absolute).

    With ``reference``, each relative series is aligned on those series only (the consensus
    pool), so a dataset left out of the consensus cannot pull the others' scales.
    """
    scales = [
        1.0 / max(float(np.median(np.abs(s.value))), 1e-300) if s.relative else 1.0 for s in series
    ]
    if not any(s.relative for s in series):
        return scales
    for _ in range(50):
        previous = list(scales)
        for k, s in enumerate(series):
            if not s.relative:
                continue
            chosen = [
                i for i in range(len(series)) if i != k and (reference is None or i in reference)
            ]
            if not chosen:
                continue
            others = [series[i] for i in chosen]
            other_scales = [scales[i] for i in chosen]
            consensus, variance, covered = _consensus(s.time, others, other_scales)
            if covered.sum() >= 1:
                part = Series(s.id, s.lab, s.time[covered], s.value[covered], s.sd[covered], True)
                scales[k] = _fit_scale(part, consensus[covered], variance[covered], scales[k])
        if all(
            s.relative for s in series
        ):  # fix the overall level: geometric mean of scales = first start
            level = np.exp(np.mean(np.log(scales)))
            start = np.exp(np.mean(np.log(previous)))
            scales = [x * start / level for x in scales]
        if np.allclose(scales, previous, rtol=1e-10):
            break
    return scales


def _evaluate(
    collapsed: Sequence[Series], pool: set[int], scales: Sequence[float]
) -> list[ConsensusResult]:
    """Give each series against the consensus of the pool members other than itself."""
    results = []
    for k, s in enumerate(collapsed):
        members = [i for i in sorted(pool) if i != k]
        if not members:  # a lone pool member is judged against everything else
            members = [i for i in range(len(collapsed)) if i != k]
        others = [collapsed[i] for i in members]
        other_scales = [scales[i] for i in members]
        consensus, variance, covered = _consensus(s.time, others, other_scales)
        n = int(covered.sum())
        in_pool = k in pool
        group = (s.calibration_group or s.id) if s.relative else None
        if n == 0:
            results.append(
                ConsensusResult(
                    s.id,
                    s.lab,
                    0,
                    None,
                    None,
                    None,
                    None,
                    None,
                    note="no time overlap with the others",
                    in_consensus=in_pool,
                    calibration_group=group,
                )
            )
            continue
        y, sd = s.value[covered], s.sd[covered]
        scale, lost = 1.0, 0
        if s.relative:
            part = Series(s.id, s.lab, s.time[covered], y, sd, True)
            scale = _fit_scale(part, consensus[covered], variance[covered], scales[k])
            lost = 1
        residual = scale * y - consensus[covered]
        chi2 = float(np.sum(residual**2 / (scale**2 * sd**2 + variance[covered])))
        dof = n - lost
        # the fit above puts the data on the consensus (scale * y ~ c); reported is its
        # inverse, s in y ~ s c, the tool's one convention
        relative_scale = 1.0 / scale if s.relative else None
        if dof <= 0:
            results.append(
                ConsensusResult(
                    s.id,
                    s.lab,
                    n,
                    chi2,
                    0,
                    None,
                    None,
                    relative_scale,
                    note="too few overlapping points after the scale fit",
                    in_consensus=in_pool,
                    calibration_group=group,
                )
            )
            continue
        results.append(
            ConsensusResult(
                s.id,
                s.lab,
                n,
                chi2,
                dof,
                float(np.sqrt(chi2 / dof)),
                float(stats.chi2.sf(chi2, dof)),
                relative_scale,
                in_consensus=in_pool,
                calibration_group=group,
            )
        )
    return results


_AMBIGUOUS = "disagrees with the only other absolute level; nothing here tells which one is off"


def against_consensus(series: Sequence[Series], *, alpha: float = 0.05) -> list[ConsensusResult]:
    """Give each dataset's chi2 against the consensus of the others on its own time points.

    chi2 = sum (y_t - c_t)^2 / (sd_t^2 + var_c,t) over the points inside the others' time
    ranges; dof = that count (minus 1 for a fitted scale); R = sqrt(chi2/dof);
    p = P(chi2_dof > chi2). Relative-unit data are aligned on one scale first.

    The consensus pool is the largest consistent subset (Cox 2007): the largest set of datasets
    each of which passes the test at ``alpha`` against the others of the set, searched subset by
    subset for groups of up to ten (beyond that, the failing member with the largest Birge ratio
    leaves the pool, one at a time). An overconfident bad dataset would otherwise dominate the
    inverse-variance consensus and make the good ones look wrong. Only a majority can out-vote
    a level: relative data fit any level through their scale factor, so where two absolute
    levels disagree with no third to side with either, both are marked ``ambiguous`` and no
    grade should follow. Every dataset is then judged against the pool members other than
    itself.
    """
    if len(series) < 2:
        raise InputError(
            "a consistency check needs at least two datasets of one observable under matching conditions"
        )
    collapsed = [collapse_replicates(s) for s in series]
    for s in collapsed:
        if not np.all(np.isfinite(s.sd)):
            raise InputError(
                f"dataset {s.id}: every point needs a positive, finite sd; run `curate noise {s.id}` first"
            )
        if np.any(s.sd <= 0):
            times = ", ".join(f"{t:g}" for t in s.time[s.sd <= 0][:5])
            raise InputError(
                f"dataset {s.id}: sd 0 at time {times} s; a consistency test needs positive sds: "
                "log the data again with the sd corrected, or grade it X to leave it out"
            )

    def judge(pool: set[int]) -> list[ConsensusResult]:
        members = sorted(pool)
        scales = [1.0] * len(collapsed)
        for i, scale in zip(members, _align_scales([collapsed[i] for i in members]), strict=True):
            scales[i] = scale
        for i in range(len(collapsed)):
            if i not in pool and collapsed[i].relative:
                scales[i] = 1.0 / max(float(np.median(np.abs(collapsed[i].value))), 1e-300)
        return _evaluate(collapsed, pool, scales)

    def failing(results: list[ConsensusResult], pool: set[int]) -> list[int]:
        # p may underflow to exactly 0: the strongest disagreement, never "no test"
        p_values = {i: results[i].p_value for i in pool}
        return [i for i, p in p_values.items() if p is not None and p < alpha]

    everyone = set(range(len(collapsed)))
    results = judge(everyone)
    if not any(r.n_overlap for r in results):
        raise InputError(
            "no dataset overlaps another in time: a consensus needs a shared time range"
        )
    if not failing(results, everyone):
        return results
    if len(collapsed) <= _EXHAUSTIVE:
        found = _largest_consistent_subset(collapsed, judge, failing)
        if found is not None:
            return found
    return _pruned_greedily(collapsed, judge, failing)


_EXHAUSTIVE = 10  # groups up to this size are searched subset by subset (2^10 checks at most)


def _mark_ambiguous(results: list[ConsensusResult], undecided: set[int]) -> list[ConsensusResult]:
    return [
        replace(r, ambiguous=True, note=_AMBIGUOUS) if k in undecided else r
        for k, r in enumerate(results)
    ]


_Judge = Callable[[set[int]], list[ConsensusResult]]
_Failing = Callable[[list[ConsensusResult], set[int]], list[int]]


def _largest_consistent_subset(
    collapsed: Sequence[Series], judge: _Judge, failing: _Failing
) -> list[ConsensusResult] | None:
    """Give the results against the largest subset whose members all pass, or None.

    The largest consistent subset (Cox 2007), searched over every subset: among subsets of one
    size, those holding the most absolute datasets win (relative data fit any level through
    their scale, so they cannot out-vote one); the lowest total chi2 breaks remaining ties.
    Absolute datasets that are in some winning subsets but not in all are marked ambiguous:
    the data cannot tell which of those levels is off.
    """
    n = len(collapsed)
    absolute = {i for i in range(n) if not collapsed[i].relative}
    for size in range(n - 1, 1, -1):
        winners: list[tuple[int, float, set[int], list[ConsensusResult]]] = []
        for members in itertools.combinations(range(n), size):
            pool = set(members)
            if absolute and not pool & absolute:
                continue  # shapes alone never decide a level
            results = judge(pool)
            if failing(results, pool):
                continue
            chi2 = sum(results[i].chi2 or 0.0 for i in pool)
            winners.append((len(pool & absolute), chi2, pool, results))
        if not winners:
            continue
        most = max(w[0] for w in winners)
        best = sorted((w for w in winners if w[0] == most), key=lambda w: w[1])
        in_all = set.intersection(*(w[2] & absolute for w in best))
        in_some = set.union(*(w[2] & absolute for w in best))
        if in_some == in_all:
            return best[0][3]
        # several levels each with its own majority: judge against all of them, decide nothing
        return _mark_ambiguous(judge(set.union(*(w[2] for w in best))), in_some - in_all)
    return None


def _pruned_greedily(
    collapsed: Sequence[Series], judge: _Judge, failing: _Failing
) -> list[ConsensusResult]:
    """Give the results after leaving out, one at a time, the failing member with the largest
    Birge ratio (for groups too large to search subset by subset)."""
    pool = set(range(len(collapsed)))
    while True:
        results = judge(pool)
        bad = failing(results, pool)
        absolute = [i for i in pool if not collapsed[i].relative]
        undecided = {i for i in bad if not collapsed[i].relative}
        if undecided and len(absolute) <= 2:
            # two absolute levels disagree and no third one sides with either: a relative
            # dataset fits any level by its scale, so it cannot tell which is off
            return _mark_ambiguous(results, undecided)
        if not bad or len(pool) <= 2:
            return results
        pool.discard(max(bad, key=lambda i: results[i].birge_ratio or 0.0))


def summary_values(
    series: Sequence[Series], *, at: float | None = None, reference: set[str] | None = None
) -> list[tuple[str, str, float, float]]:
    """Give (id, lab, value, sd) per dataset: the value at time ``at`` (interpolated), or else
    the late level: the weighted mean of the points in the last quarter of the shared time range.

    Relative-unit data are put on a common scale first (with ``reference``, the ids of the
    consensus pool, on that pool's scale only).
    """
    collapsed = [collapse_replicates(s) for s in series]
    pool = None if reference is None else {k for k, s in enumerate(collapsed) if s.id in reference}
    scales = _align_scales(collapsed, pool or None)
    shared_end = min(float(s.time[-1]) for s in collapsed)
    shared_start = max(float(s.time[0]) for s in collapsed)
    if shared_end < shared_start:
        raise InputError("the datasets share no time range; summary values need one")
    out = []
    for s, scale in zip(collapsed, scales, strict=True):
        if at is not None:
            if not (s.time[0] <= at <= s.time[-1]):
                raise InputError(
                    f"dataset {s.id}: time {at:g} s is outside its range {s.time[0]:g}-{s.time[-1]:g} s"
                )
            values, variances, _ = _interpolate(s, np.array([float(at)]))
            out.append(
                (s.id, s.lab, float(values[0] * scale), float(np.sqrt(variances[0]) * scale))
            )
            continue
        start = shared_start + 0.75 * (shared_end - shared_start)
        use = (s.time >= start) & (s.time <= shared_end)
        if not use.any():
            use = np.abs(s.time - shared_end) == np.min(np.abs(s.time - shared_end))
        w = 1.0 / s.sd[use] ** 2
        out.append(
            (
                s.id,
                s.lab,
                float(np.sum(w * s.value[use]) / np.sum(w) * scale),
                float(scale / np.sqrt(np.sum(w))),
            )
        )
    return out


def pdg_scale_factor(x: np.ndarray, dx: np.ndarray) -> tuple[float, int, float]:
    """Give (S, N used, weighted mean) of the Particle Data Group scale factor.

    Weighted mean with w_i = 1/dx_i^2 over all N; S = sqrt(chi2 / (N' - 1)) with chi2 summed
    only over measurements with dx_i < 3 sqrt(N) dx_mean (dx_mean the unscaled error of the
    mean of all N); the others still enter the mean. S is applied only when > 1, never below 1.
    (Review of Particle Physics, "Introduction: averaging procedures".)
    """
    x = np.asarray(x, dtype=float)
    dx = np.asarray(dx, dtype=float)
    w = 1.0 / dx**2
    mean = float(np.sum(w * x) / np.sum(w))
    dx_mean = float(1.0 / np.sqrt(np.sum(w)))
    used = dx < 3.0 * np.sqrt(len(x)) * dx_mean
    n_used = int(used.sum())
    if n_used < 2:
        return 1.0, n_used, mean
    chi2 = float(np.sum(w[used] * (x[used] - mean) ** 2))
    return float(np.sqrt(chi2 / (n_used - 1))), n_used, mean


def _chi2_about_mean(x: np.ndarray, dx: np.ndarray) -> float:
    w = 1.0 / dx**2
    mean = np.sum(w * x) / np.sum(w)
    return float(np.sum(w * (x - mean) ** 2))


def largest_consistent_subset(
    x: np.ndarray, dx: np.ndarray, *, alpha: float = 0.05
) -> tuple[int, ...]:
    """Give the indices of the largest subset whose chi2 test passes at level ``alpha``.

    Cox (2007), Metrologia 44:187: among all subsets of the largest size that pass
    (chi2 <= chi2_{1-alpha}(n-1)), the one with the smallest chi2. Exhaustive up to 16 entries;
    beyond that, the entry with the largest normalised deviation is removed one at a time.
    """
    return consistent_subsets(x, dx, alpha=alpha)[0]


def consistent_subsets(
    x: np.ndarray, dx: np.ndarray, *, alpha: float = 0.05
) -> list[tuple[int, ...]]:
    """Give every subset of the largest size whose chi2 test passes at ``alpha``, smallest chi2
    first (as ``largest_consistent_subset``). More than one means the largest consistent set
    is not unique: the data cannot tell which of those groups is right. A single entry of one
    index means no two values agree (the most precise one is given)."""
    x = np.asarray(x, dtype=float)
    dx = np.asarray(dx, dtype=float)
    n = len(x)
    if n <= 16:
        for size in range(n, 1, -1):
            passing: list[tuple[float, tuple[int, ...]]] = []
            limit = stats.chi2.ppf(1 - alpha, size - 1)
            for subset in itertools.combinations(range(n), size):
                index = np.asarray(subset)
                chi2 = _chi2_about_mean(x[index], dx[index])
                if chi2 <= limit:
                    passing.append((chi2, subset))
            if passing:
                return [subset for _, subset in sorted(passing)]
        return [(int(np.argmin(dx)),)] if n else [()]
    keep = list(range(n))
    while len(keep) > 1:
        index = np.asarray(keep)
        if _chi2_about_mean(x[index], dx[index]) <= stats.chi2.ppf(1 - alpha, len(keep) - 1):
            break
        w = 1.0 / dx[index] ** 2
        mean = np.sum(w * x[index]) / np.sum(w)
        keep.pop(int(np.argmax(np.abs(x[index] - mean) / dx[index])))
    return [tuple(keep)]


@dataclass(frozen=True)
class SummaryConsistency:
    """Consistency of per-dataset (or per-lab) summary values."""

    labels: tuple[str, ...]
    values: tuple[float, ...]
    uncertainties: tuple[float, ...]
    weighted_mean: float
    mean_stderr: float
    q: float
    dof: int
    q_p_value: float
    i2: float
    h: float
    birge_ratio: float
    tau2_dl: float
    mean_dl: float
    stderr_dl: float
    tau2_pm: float
    mean_pm: float
    pdg_scale: float
    pdg_n_used: int
    scaled_stderr: float
    consistent_subset: tuple[str, ...]
    alpha: float
    # other subsets of the same size that pass too: the largest consistent set is not unique
    tied_subsets: tuple[tuple[str, ...], ...] = ()
    extra: dict[str, Any] = field(default_factory=dict)

    def to_dict(self) -> dict[str, Any]:
        """Give the result as plain data."""
        return {
            name: (list(value) if isinstance(value, tuple) else value)
            for name, value in self.__dict__.items()
        }


def _paule_mandel(x: np.ndarray, v: np.ndarray) -> float:
    """Give the Paule-Mandel tau^2: the root of sum w_i*(x_i - mu*)^2 = N - 1, w* = 1/(v + tau^2)."""
    n = len(x)

    def excess(tau2: float) -> float:
        w = 1.0 / (v + tau2)
        mu = np.sum(w * x) / np.sum(w)
        return float(np.sum(w * (x - mu) ** 2) - (n - 1))

    if excess(0.0) <= 0:
        return 0.0
    upper = max(float(np.var(x)) * 10 + float(v.max()), 1e-300)
    while excess(upper) > 0:
        upper *= 10
    return float(optimize.brentq(excess, 0.0, upper, xtol=1e-14, rtol=1e-14, maxiter=500))


def summary_consistency(
    labels: Sequence[str], x: Sequence[float], dx: Sequence[float], *, alpha: float = 0.05
) -> SummaryConsistency:
    """Give every summary statistic of N values with standard uncertainties.

    Weighted mean with w_i = 1/dx_i^2; Cochran's Q = sum w_i (x_i - mean)^2 on N-1 dof;
    H = sqrt(Q/(N-1)) (= the Birge ratio of the mean); I^2 = max(0, (Q-(N-1))/Q) (Higgins &
    Thompson 2002, Stat. Med. 21:1539); DerSimonian-Laird (1986) tau^2 =
    max(0, (Q-(N-1)) / (sum w - sum w^2 / sum w)); Paule-Mandel (1982) tau^2.
    """
    values = np.asarray(x, dtype=float)
    sd = np.asarray(dx, dtype=float)
    n = len(values)
    if n < 2:
        raise InputError("summary consistency needs at least two values")
    if np.any(~np.isfinite(sd)) or np.any(sd <= 0):
        raise InputError("every summary value needs a positive, finite uncertainty")
    w = 1.0 / sd**2
    mean = float(np.sum(w * values) / np.sum(w))
    stderr = float(1.0 / np.sqrt(np.sum(w)))
    q = float(np.sum(w * (values - mean) ** 2))
    dof = n - 1
    h = float(np.sqrt(q / dof))
    i2 = float(max(0.0, (q - dof) / q)) if q > 0 else 0.0
    tau2_dl = float(max(0.0, (q - dof) / (np.sum(w) - np.sum(w**2) / np.sum(w))))
    w_dl = 1.0 / (sd**2 + tau2_dl)
    mean_dl = float(np.sum(w_dl * values) / np.sum(w_dl))
    tau2_pm = _paule_mandel(values, sd**2)
    w_pm = 1.0 / (sd**2 + tau2_pm)
    scale, n_used, _ = pdg_scale_factor(values, sd)
    subsets = consistent_subsets(values, sd, alpha=alpha)
    subset = subsets[0]
    return SummaryConsistency(
        labels=tuple(labels),
        values=tuple(float(v) for v in values),
        uncertainties=tuple(float(v) for v in sd),
        weighted_mean=mean,
        mean_stderr=stderr,
        q=q,
        dof=dof,
        q_p_value=float(stats.chi2.sf(q, dof)),
        i2=i2,
        h=h,
        birge_ratio=h,
        tau2_dl=tau2_dl,
        mean_dl=mean_dl,
        stderr_dl=float(1.0 / np.sqrt(np.sum(w_dl))),
        tau2_pm=tau2_pm,
        mean_pm=float(np.sum(w_pm * values) / np.sum(w_pm)),
        pdg_scale=scale,
        pdg_n_used=n_used,
        scaled_stderr=stderr * max(scale, 1.0),
        consistent_subset=tuple(labels[i] for i in subset),
        alpha=alpha,
        tied_subsets=tuple(tuple(labels[i] for i in other) for other in subsets[1:]),
    )


def _matches(a: dict[str, Any], b: dict[str, Any], tolerance: float) -> bool:
    if set(a) != set(b):
        return False
    for key, left in a.items():
        right = b[key]
        if isinstance(left, float) and isinstance(right, float) and not isinstance(left, bool):
            if abs(left - right) > tolerance * max(abs(left), abs(right)) and left != right:
                return False
        elif left != right:
            return False
    return True


def match_groups(
    items: Sequence[tuple[str, str, dict[str, Any]]], *, tolerance: float = 0.01
) -> list[list[str]]:
    """Give groups of ids with one observable and matching conditions.

    ``items`` are (id, observable, conditions). Categorical conditions must be equal; numeric
    ones may differ by ``tolerance`` relative to the larger magnitude. Groups keep input order.
    """
    if tolerance < 0:
        raise InputError(f"--tolerance {tolerance}: expected a relative tolerance >= 0")
    groups: list[tuple[str, dict[str, Any], list[str]]] = []
    for ident, observable, conditions in items:
        for group_observable, representative, members in groups:
            if group_observable == observable and _matches(representative, conditions, tolerance):
                members.append(ident)
                break
        else:
            groups.append((observable, conditions, [ident]))
    return [members for _, _, members in groups]
