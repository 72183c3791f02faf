"""Weighting policies and least-squares weights. Pure computation: frames in, frames out.

Weight of point i of dataset d (see the default policy file for the words):

    w_i = b_d / (sd_i^2 * v_grade(d)),    sigma_i = sd_i * sqrt(v_grade(d) / b_d) = w_i^-1/2

with sd_i the measured SD after the noise floors sd_i >= max(absolute, relative * |y_i|),
v_grade the policy's variance inflation of the dataset's trust grade and b_d the balancing
factor. Without balancing (b_d = 1) the weighted sum of squares is a Gaussian negative
log-likelihood (up to constants) whose per-dataset variances the grades inflate; any
balancing or lab cap makes it a weighted criterion that is no longer a likelihood.

Kish's effective sample size n_eff = (sum w)^2 / sum w^2 (Kish 1965, Survey Sampling).

Shares, balancing and lab caps are computed within each observable, on one footing that does
not depend on any dataset's arbitrary units:

- absolute data as they are;
- relative-unit data of an observable that also has absolute data on the absolute scale: with
  the consensus scale factor s = sum w y h / sum w h^2 (data = s x reference; h the mean of
  the absolute datasets weighted by their weights, trust included, so a low grade's level
  counts for little, under the same conditions, else of all absolute
  datasets of the observable, interpolated linearly at the dataset's times inside their
  range; the fit's closed form), sd/s is the sd on the absolute scale, so the dataset weighs
  w s^2. This is also the information a point gives the model in a fit of s x f (d(s f)/df
  = s). Without time overlap s is the ratio of the medians of |y|;
- an observable of relative data only: each dataset on the scale of its own median |y| = m
  (w m^2, i.e. 1/CV^2), the scale-free footing.

The weights themselves are never changed by the footing; only balancing factors computed on
it are.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from curate.errors import InputError
from curate.quality.consistency import Series, consensus_at
from curate.units import short_unit
from curate.weighting.policy import Policy

__all__ = [
    "DatasetParts",
    "DatasetWeight",
    "Footing",
    "WeightSummary",
    "apply_policy",
    "balance_factors",
    "footing_of",
    "kish_n_eff",
    "summarise_parts",
    "zero_sd_message",
]

# shares are sums of floating-point weights: differences below this are rounding, not weight
_SHARE_TOLERANCE = 1e-9


def kish_n_eff(weights: np.ndarray) -> float:
    """Give Kish's effective sample size (sum w)^2 / sum w^2."""
    w = np.asarray(weights, dtype=float)
    total = float(np.sum(w))
    return total * total / float(np.sum(w * w)) if total > 0 else 0.0


@dataclass(frozen=True)
class DatasetWeight:
    """One dataset's part of the total weight of its observable."""

    id: str
    observable: str
    lab: str
    grade: str
    n_points: int
    inflation: float
    balance: float
    share: float  # of its observable's total weight, on the footing below
    n_eff: float
    scale: float | None = None  # relative units: s in data = s x the footing's scale
    footing: str = "absolute"  # absolute | consensus | median ratio | scale-free

    def to_dict(self) -> dict[str, Any]:
        """Give the row as plain data."""
        return dict(self.__dict__)


@dataclass
class WeightSummary:
    """Shares, effective sample sizes and warnings of one weighting, per observable."""

    policy: Policy
    datasets: list[DatasetWeight]
    lab_shares: dict[str, dict[str, float]]  # observable -> lab -> share
    n_points: int
    n_eff: dict[str, float]  # observable -> Kish n_eff
    weight_span: dict[str, float]  # observable -> max/min weight
    likelihood: bool
    warnings: list[str] = field(default_factory=list)

    def to_dict(self) -> dict[str, Any]:
        """Give the summary as plain data."""
        return {
            "policy": {
                "name": self.policy.name,
                "sha256": self.policy.sha256,
                "origin": self.policy.origin,
            },
            "datasets": [d.to_dict() for d in self.datasets],
            "lab_shares": self.lab_shares,
            "n_points": self.n_points,
            "n_eff": self.n_eff,
            "weight_span": self.weight_span,
            "likelihood": self.likelihood,
            "warnings": self.warnings,
        }


def apply_policy(
    points: pd.DataFrame, policy: Policy, *, conditions: Sequence[str] = ()
) -> tuple[pd.DataFrame, WeightSummary]:
    """Give the points with sd (floored), inflation, balance, sigma and weight columns, and a summary.

    ``points`` needs columns dataset_id, observable, lab, grade (None for ungraded), value, sd;
    with relative-unit data also time and relative, and ``conditions`` names the condition
    columns whose values a relative dataset's absolute references must share. Rows of excluded
    grades must already be gone (the selection removes them).
    """
    frame = points.copy()
    if frame.empty:
        raise InputError("nothing to weight: the selection holds no points")
    grades = frame["grade"].where(frame["grade"].notna(), policy.ungraded).astype(str)
    excluded = grades.isin(policy.exclude)
    if excluded.any():
        raise InputError(
            f"dataset {frame.loc[excluded, 'dataset_id'].iloc[0]}: its grade is excluded by the policy"
        )
    frame["grade_used"] = grades
    frame["inflation"] = grades.map(policy.inflation).astype(float)
    sd = frame["sd"].to_numpy(dtype=float)
    if not np.all(np.isfinite(sd)) or np.any(sd < 0):
        bad = frame.loc[~np.isfinite(sd) | (sd < 0), "dataset_id"].iloc[0]
        raise InputError(f"dataset {bad}: a point has no usable sd")
    # the absolute floor is in the observable's physical unit: it means nothing for data in
    # arbitrary units, which only the relative floor reaches
    relative_rows = (
        frame["relative"].to_numpy(dtype=bool)
        if "relative" in frame.columns
        else np.zeros(len(frame), bool)
    )
    floored = np.maximum(sd, np.where(relative_rows, 0.0, policy.absolute_floor))
    floored = np.maximum(
        floored, policy.relative_floor * np.abs(frame["value"].to_numpy(dtype=float))
    )
    if np.any(floored <= 0):
        raise InputError(zero_sd_message(frame[floored <= 0], policy))
    frame["sd"] = floored
    base = 1.0 / (floored**2 * frame["inflation"].to_numpy())
    codes, uniques = pd.factorize(frame["dataset_id"], sort=True)  # hashing: no sort of every row
    inverse = np.asarray(codes)
    unique_ids = np.asarray(uniques, dtype=object)
    totals = np.bincount(inverse, weights=base)
    sizes = np.bincount(inverse).astype(float)
    labs = frame.groupby("dataset_id")["lab"].first().reindex(unique_ids).to_numpy()
    observable_of = (
        frame.groupby("dataset_id")["observable"].first().reindex(unique_ids).astype(str).to_numpy()
    )
    footing = footing_of(frame, base, inverse, observable_of, conditions)
    # balancing and caps act within each observable (weights of different units do not add
    # up), on the footing: a relative dataset's arbitrary units must not buy or cost weight
    factors = balance_factors(totals * footing.multiplier, sizes, labs, observable_of, policy)
    frame["balance"] = factors[inverse]
    weight = base * frame["balance"].to_numpy()
    frame["weight"] = weight
    frame["sigma"] = 1.0 / np.sqrt(weight)
    summary = _summarise(frame, policy, unique_ids, inverse, labs, footing)
    return frame, summary


def balance_factors(
    footed: np.ndarray, sizes: np.ndarray, labs: np.ndarray, observable_of: np.ndarray,
    policy: Policy,
) -> np.ndarray:  # fmt: skip
    """Give each dataset's balancing factor b_d from its total weight on its observable's
    footing (``footed``), its number of points, its lab and its observable (datasets sorted by id)."""
    factors = np.ones(len(footed))
    for observable in np.unique(observable_of):
        part = observable_of == observable
        if policy.balance == "equal":
            factors[part] = footed[part].mean() / footed[part]
        elif policy.balance == "sqrt":
            target = np.sqrt(sizes[part])
            factors[part] = target / footed[part] * (footed[part].sum() / target.sum())
        if policy.lab_cap > 0 and len(np.unique(labs[part])) > 1:
            factors[part] = (
                _cap_labs(footed[part] * factors[part], labs[part], policy.lab_cap, policy.origin)
                / footed[part]
            )
    return factors


@dataclass(frozen=True)
class Footing:
    """Per dataset: the factor putting its weights on its observable's footing, and why."""

    multiplier: np.ndarray
    scale: list[float | None]
    kind: list[str]


def _condition_key(frame: pd.DataFrame, row: int, columns: Sequence[str]) -> tuple[Any, ...]:
    """Give a row's condition values as a hashable key (numbers to 12 significant digits)."""
    key: list[Any] = []
    for column in columns:
        value = frame[column].iat[row]
        if value is None or (isinstance(value, float) and np.isnan(value)):
            key.append(None)
        elif isinstance(value, float | np.floating):
            key.append(float(f"{float(value):.12g}"))
        else:
            key.append(value)
    return tuple(key)


def footing_of(
    frame: pd.DataFrame,
    base: np.ndarray,
    inverse: np.ndarray,
    observable_of: np.ndarray,
    conditions: Sequence[str],
) -> Footing:
    """Give each dataset's footing (see the module docstring): 1 for absolute data, s^2 for
    relative data with scale factor s against the absolute data, m^2 without them."""
    count = len(observable_of)
    multiplier = np.ones(count)
    scale: list[float | None] = [None] * count
    kind = ["absolute"] * count
    if "relative" not in frame.columns or not frame["relative"].any():
        return Footing(multiplier, scale, kind)
    order = np.argsort(inverse, kind="stable")
    rows_of = np.split(order, np.cumsum(np.bincount(inverse, minlength=count))[:-1])
    if "censored" in frame.columns:  # a censored value is a limit: no footing is read from it
        observed = (frame["censored"].astype(str) == "").to_numpy()
        rows_of = [rows[observed[rows]] if observed[rows].any() else rows for rows in rows_of]
    relative = frame["relative"].to_numpy(dtype=bool)
    value = frame["value"].to_numpy(dtype=float)
    time = frame["time"].to_numpy(dtype=float) if "time" in frame.columns else None
    is_relative = np.array([bool(relative[rows[0]]) for rows in rows_of])
    columns = [c for c in conditions if c in frame.columns]
    condition_of = [_condition_key(frame, int(rows[0]), columns) for rows in rows_of]

    sigma = 1.0 / np.sqrt(base)  # trust-inflated: a low grade's level counts for little

    def series(k: int, times: np.ndarray) -> Series:
        rows = rows_of[k][np.argsort(times[rows_of[k]], kind="stable")]
        return Series(str(k), "", times[rows], value[rows], sigma[rows])

    for observable in np.unique(observable_of):
        members = np.flatnonzero(observable_of == observable)
        absolute = [int(k) for k in members if not is_relative[k]]
        for k in (k for k in members if is_relative[k]):
            rows = rows_of[k]
            magnitude = float(np.median(np.abs(value[rows])))
            if not absolute:
                s = magnitude if magnitude > 0 else 1.0
                multiplier[k], scale[k], kind[k] = s * s, s, "scale-free"
                continue
            references = [a for a in absolute if condition_of[a] == condition_of[k]] or absolute
            s = float("nan")
            if time is not None:
                h, _, covered = consensus_at(time[rows], [series(a, time) for a in references])
                w, y, h = base[rows][covered], value[rows][covered], h[covered]
                denominator = float(np.sum(w * h * h))
                if denominator > 0:
                    s = float(np.sum(w * y * h)) / denominator
            if np.isfinite(s) and s > 0:
                multiplier[k], scale[k], kind[k] = s * s, s, "consensus"
                continue
            pooled = np.concatenate([value[rows_of[a]] for a in references])
            reference = float(np.median(np.abs(pooled)))
            s = magnitude / reference if magnitude > 0 and reference > 0 else 1.0
            multiplier[k], scale[k], kind[k] = s * s, s, "median ratio"
    return Footing(multiplier, scale, kind)


def zero_sd_message(rows: pd.DataFrame, policy: Policy) -> str:
    """Say which points would get an infinite weight, and which floor can prevent it."""
    first = rows.iloc[0]
    dataset = first["dataset_id"]
    mine = rows[rows["dataset_id"] == dataset]
    times = ", ".join(f"{t:g}" for t in mine["time"].head(5)) if "time" in mine else "?"
    unit = f" {short_unit(str(first['unit']))}" if "unit" in rows and first["unit"] else ""
    at_zero = bool(np.all(mine["value"].to_numpy(dtype=float) == 0.0))
    why = (
        f"its value is 0, so the relative floor ({policy.relative_floor:g} of |y|) gives 0 there"
        if at_zero and policy.relative_floor > 0
        else "the policy sets no floor that lifts it"
    )
    return (
        f"dataset {dataset}: sd 0 at time {times} s would give an infinite weight ({why}); "
        f"set floors.absolute (in{unit or ' the observable unit'}) in your policy, or correct the sd"
    )


def _cap_labs(
    totals: np.ndarray, labs: np.ndarray, cap: float, origin: str = "the policy"
) -> np.ndarray:
    """Give per-dataset totals rescaled so no lab carries more than ``cap`` of the whole."""
    totals = totals.astype(float).copy()
    lab_names = np.unique(labs)
    if cap * len(lab_names) < 1.0:
        raise InputError(
            f"{origin}, field 'balance.lab_cap': {cap:g} is too small for {len(lab_names)} labs "
            f"(their shares add up to 1, so the cap must be at least {1 / len(lab_names):.3g})"
        )
    for _ in range(100):
        whole = totals.sum()
        shares = {lab: totals[labs == lab].sum() / whole for lab in lab_names}
        over = [lab for lab, share in shares.items() if share > cap + 1e-12]
        if not over:
            return totals
        under_total = sum(totals[labs == lab].sum() for lab in lab_names if lab not in over)
        # capped labs take exactly cap each; the rest keep their proportions
        capped_share = cap * len(over)
        for lab in over:
            totals[labs == lab] *= (cap * under_total / (1 - capped_share)) / totals[
                labs == lab
            ].sum()
    return totals


def _summarise(
    frame: pd.DataFrame,
    policy: Policy,
    ids: np.ndarray,
    inverse: np.ndarray,
    labs: np.ndarray,
    footing: Footing,
) -> WeightSummary:
    # every share, n_eff and span on the observable's one footing (module docstring)
    weight = frame["weight"].to_numpy() * footing.multiplier[inverse]
    first = frame.groupby("dataset_id").first().reindex(ids)
    observables = frame["observable"].astype(str).to_numpy()
    parts = DatasetParts(
        ids=ids,
        sizes=np.bincount(inverse),
        observable=first["observable"].astype(str).to_numpy(),
        lab=first["lab"].astype(str).to_numpy(),
        grade=first["grade_used"].astype(str).to_numpy(),
        inflation=first["inflation"].to_numpy(dtype=float),
        balance=first["balance"].to_numpy(dtype=float),
        weight=np.bincount(inverse, weights=weight),
        weight_squared=np.bincount(inverse, weights=weight**2),
    )
    by_observable = {obs: weight[observables == obs] for obs in np.unique(parts.observable)}
    return summarise_parts(policy, parts, by_observable, footing)


@dataclass(frozen=True)
class DatasetParts:
    """Per dataset (sorted by id): what the weight summary is made of. ``weight`` and
    ``weight_squared`` are the sums of its points' weights (and their squares) on the footing."""

    ids: np.ndarray
    sizes: np.ndarray
    observable: np.ndarray
    lab: np.ndarray
    grade: np.ndarray
    inflation: np.ndarray
    balance: np.ndarray
    weight: np.ndarray
    weight_squared: np.ndarray


def summarise_parts(
    policy: Policy, parts: DatasetParts, by_observable: dict[str, np.ndarray], footing: Footing
) -> WeightSummary:
    """Give the weight summary from per-dataset sums and each observable's point weights on
    its footing (in table order: Kish's n_eff and the span read them whole)."""
    ids, sizes, observable_of = parts.ids, parts.sizes, parts.observable
    per_dataset, per_dataset_sq = parts.weight, parts.weight_squared
    totals = {
        obs: float(per_dataset[observable_of == obs].sum()) for obs in np.unique(observable_of)
    }
    lab_of, grade_of, inflation_of, balance_of = (
        parts.lab,
        parts.grade,
        parts.inflation,
        parts.balance,
    )
    # column-wise, then as Python values once (a numpy scalar per field and dataset is slow)
    share = per_dataset / np.asarray([totals[obs] for obs in observable_of], dtype=float)
    n_eff_of = per_dataset**2 / per_dataset_sq
    columns = zip(
        [str(i) for i in ids], np.asarray(observable_of).astype(str).tolist(),
        np.asarray(lab_of).astype(str).tolist(), np.asarray(grade_of).astype(str).tolist(),
        np.asarray(sizes).astype(int).tolist(), np.asarray(inflation_of, dtype=float).tolist(),
        np.asarray(balance_of, dtype=float).tolist(), share.tolist(), n_eff_of.tolist(),
        footing.scale, footing.kind, strict=True,
    )  # fmt: skip
    rows = [
        DatasetWeight(id=ident, observable=observable, lab=lab, grade=grade, n_points=size,
                      inflation=inflation, balance=balance, share=part, n_eff=n_eff_k,
                      scale=scale, footing=kind)
        for ident, observable, lab, grade, size, inflation, balance, part, n_eff_k, scale, kind in columns
    ]  # fmt: skip
    lab_shares: dict[str, dict[str, float]] = {}
    for row in rows:
        shares = lab_shares.setdefault(row.observable, {})
        shares[row.lab] = shares.get(row.lab, 0.0) + row.share
    n_eff = {obs: kish_n_eff(by_observable[obs]) for obs in totals}
    span = {obs: float(by_observable[obs].max() / by_observable[obs].min()) for obs in totals}
    warnings = []
    for row in rows:
        # "more than half": an even split computes as 0.5000000000000001, which is not more
        if (
            row.share > 0.5 + _SHARE_TOLERANCE
            and sum(r.observable == row.observable for r in rows) > 1
        ):
            warnings.append(
                f"dataset {row.id} carries {100 * row.share:.0f}% of the {row.observable} weight: "
                "the fit of that observable is mostly this one dataset"
            )
    for obs, value in span.items():
        if value > 1e6:
            warnings.append(
                f"{obs} weights span a factor of {value:.2g} (more than 1e6): check the smallest sds and the noise floors"
            )
    if policy.lab_cap > 0:
        for obs, shares in sorted(lab_shares.items()):
            if len(shares) == 1:
                warnings.append(
                    f"the lab cap ({policy.lab_cap:g}) cannot act on {obs}: all its data come "
                    f"from one lab ({next(iter(shares))})"
                )
    if not policy.is_likelihood:
        warnings.append(
            "balancing or a lab cap is on: the weighted sum of squares is no longer a likelihood, "
            "so chi2 and standard errors from it lose their usual meaning"
        )
    return WeightSummary(
        policy=policy,
        datasets=rows,
        lab_shares=lab_shares,
        n_points=int(sizes.sum()),
        n_eff=n_eff,
        weight_span=span,
        likelihood=policy.is_likelihood,
        warnings=warnings,
    )
