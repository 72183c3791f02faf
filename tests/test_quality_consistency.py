"""Consistency statistics against statsmodels, statistical tables and a worked PDG example."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import stats

from curate.errors import InputError
from curate.quality import consistency as cons

X = np.array([1.0, 2.0, 3.5, 2.2, 1.7])
DX = np.sqrt(np.array([0.1, 0.2, 0.3, 0.05, 0.15]))


def test_q_i2_dersimonian_laird_match_statsmodels():
    # reference: statsmodels.stats.meta_analysis.combine_effects (DerSimonian-Laird)
    meta = pytest.importorskip("statsmodels.stats.meta_analysis")
    ours = cons.summary_consistency([str(i) for i in range(5)], X, DX)
    theirs = meta.combine_effects(X, DX**2, method_re="dl")
    assert ours.q == pytest.approx(theirs.q, abs=1e-10)
    assert ours.i2 == pytest.approx(theirs.i2, abs=1e-10)
    assert ours.tau2_dl == pytest.approx(theirs.tau2, abs=1e-10)
    assert ours.mean_dl == pytest.approx(theirs.mean_effect_re, abs=1e-10)
    assert ours.stderr_dl == pytest.approx(theirs.sd_eff_w_re, abs=1e-10)
    assert ours.weighted_mean == pytest.approx(theirs.mean_effect_fe, abs=1e-10)


def test_paule_mandel_matches_statsmodels_iterated():
    # statsmodels' method_re="iterated" is the Paule-Mandel estimator; its iteration stops at
    # atol=1e-5 by default, so we ask it for more; statsmodels 0.15 gives up (tau2 = 0) when
    # asked for 1e-12 or finer on these numbers, while 1e-11 converges
    meta = pytest.importorskip("statsmodels.stats.meta_analysis")
    ours = cons.summary_consistency([str(i) for i in range(5)], X, DX)
    theirs = meta.combine_effects(X, DX**2, method_re="iterated", atol=1e-11)
    assert ours.tau2_pm == pytest.approx(theirs.tau2, rel=1e-10)
    assert ours.mean_pm == pytest.approx(theirs.mean_effect_re, rel=1e-10)


def test_tau2_is_zero_when_homogeneous():
    result = cons.summary_consistency(["a", "b", "c"], [1.0, 1.01, 0.99], [0.1, 0.1, 0.1])
    assert result.tau2_dl == 0.0 and result.tau2_pm == 0.0 and result.i2 == 0.0


def test_chi2_p_value_against_statistical_tables():
    # chi-square tables: the 5% critical value for 10 degrees of freedom is 18.307,
    # the 1% value for 4 degrees of freedom is 13.277
    assert stats.chi2.sf(18.307, 10) == pytest.approx(0.05, abs=1e-4)
    x = np.zeros(5)
    x[0] = 1.0
    # Q of one unit deviation among five equal-weight values: w * (4/5)^2 + 4 w (1/5)^2 = 0.8 w
    result = cons.summary_consistency(list("abcde"), x, np.full(5, np.sqrt(0.8 / 13.277)))
    assert result.q == pytest.approx(13.277, rel=1e-9)
    assert result.q_p_value == pytest.approx(0.01, abs=1e-4)


def test_pdg_scale_factor_worked_example():
    # x = 10.0, 10.4, 9.6, 12.0 with dx = 0.2, 0.2, 0.2, 1.0. Weights 25, 25, 25, 1; mean =
    # 762/76 = 381/38 = 10.0263; dx_mean = 1/sqrt(76) = 0.1147, so the cut 3 sqrt(4) dx_mean =
    # 0.688 drops the fourth value from S (it stays in the mean). Deviations of the others:
    # -1/38, 14.2/38, -16.2/38; chi2 = 25 (1 + 201.64 + 262.44) / 1444 = 8.05194;
    # S = sqrt(8.05194 / 2) = 2.00648 > 1, so the error of the mean grows by S.
    x = np.array([10.0, 10.4, 9.6, 12.0])
    dx = np.array([0.2, 0.2, 0.2, 1.0])
    scale, used, mean = cons.pdg_scale_factor(x, dx)
    assert mean == pytest.approx(381 / 38, rel=1e-12)
    assert used == 3
    assert scale == pytest.approx(np.sqrt(25 * 465.08 / 1444 / 2), rel=1e-12)
    assert scale == pytest.approx(2.00648, abs=1e-5)
    result = cons.summary_consistency(list("abcd"), x, dx)
    assert result.scaled_stderr == pytest.approx(scale / np.sqrt(76), rel=1e-12)


def test_scale_factor_equals_birge_ratio_and_h_for_one_mean():
    # with no measurement cut, S = sqrt(chi2/(N-1)) = Birge ratio = H by definition
    rng = np.random.default_rng(4)
    x = rng.normal(5, 1, 6)
    dx = np.full(6, 0.5)
    result = cons.summary_consistency(list("abcdef"), x, dx)
    assert result.pdg_n_used == 6
    assert result.pdg_scale == pytest.approx(result.birge_ratio, rel=1e-12)
    assert result.birge_ratio == pytest.approx(result.h, rel=1e-12)


def test_pdg_scale_never_below_one():
    result = cons.summary_consistency(list("abc"), [1.0, 1.0, 1.0], [0.1, 0.1, 0.1])
    assert result.pdg_scale == 0.0
    assert result.scaled_stderr == pytest.approx(result.mean_stderr)


def test_largest_consistent_subset():
    x = np.array([1.0, 1.1, 0.9, 3.0, 1.05])
    dx = np.full(5, 0.1)
    assert cons.largest_consistent_subset(x, dx) == (0, 1, 2, 4)
    assert cons.summary_consistency(list("abcde"), x, dx).consistent_subset == ("a", "b", "c", "e")
    # all consistent: everything is kept
    assert cons.largest_consistent_subset(np.array([1.0, 1.02, 0.98]), np.full(3, 0.1)) == (0, 1, 2)


def curve(t):
    return 20 * (1 - np.exp(-t / 300.0))


def make(ident, lab, times, rng, sd=0.5, shift=0.0, scale=1.0, relative=False):
    y = (curve(times) + shift + rng.normal(0, sd, len(times))) * scale
    return cons.Series(ident, lab, times, y, np.full(len(times), sd * scale), relative)


def test_consistent_datasets_have_birge_ratio_near_one():
    rng = np.random.default_rng(8)
    ratios = []
    for _ in range(200):
        series = [make(str(k), f"lab{k}", np.linspace(0, 1200, 25), rng) for k in range(3)]
        ratios += [r.chi2 / r.dof for r in cons.against_consensus(series)]
    # E[chi2/dof] = 1 for consistent data; 600 draws on 25 dof give a Monte-Carlo SE of ~0.012
    assert np.mean(ratios) == pytest.approx(1.0, abs=0.05)


def test_shifted_dataset_stands_out():
    rng = np.random.default_rng(9)
    series = [make(str(k), "lab", np.linspace(0, 1200, 25), rng) for k in range(3)]
    series.append(make("bad", "labZ", np.linspace(0, 1200, 25), rng, shift=3.0))
    results = {r.id: r for r in cons.against_consensus(series)}
    assert results["bad"].birge_ratio > 3 and results["bad"].p_value < 1e-6
    assert all(results[k].birge_ratio < results["bad"].birge_ratio for k in "012")


def test_relative_dataset_is_compared_after_its_scale_fit():
    rng = np.random.default_rng(10)
    times = np.linspace(0, 1200, 30)
    series = [
        make(str(k), "lab", times, rng, scale=[1.0, 40.0, 7.0][k], relative=True) for k in range(3)
    ]
    results = cons.against_consensus(series)
    assert all(r.dof == r.n_overlap - 1 for r in results)  # the scale costs one dof
    assert all(r.p_value > 0.001 for r in results)
    # data = s x reference: the dataset measured 40x gets the larger scale factor
    assert results[1].scale / results[2].scale == pytest.approx(40.0 / 7.0, rel=0.05)


def test_scale_factor_of_relative_data_against_absolute_ones_is_data_over_reference():
    # one convention everywhere: data = s x reference (the fit's data = s x model)
    rng = np.random.default_rng(11)
    times = np.linspace(0, 1200, 30)
    series = [make(str(k), f"lab{k}", times, rng) for k in range(2)]
    series.append(make("blot", "labR", times, rng, scale=0.25, relative=True))
    series[2] = cons.Series(*[getattr(series[2], f) for f in ("id", "lab", "time", "value", "sd")],
                            relative=True, calibration_group="blot_3")  # fmt: skip
    results = {r.id: r for r in cons.against_consensus(series)}
    assert results["blot"].scale == pytest.approx(0.25, rel=0.02)
    assert results["blot"].calibration_group == "blot_3"
    assert results["0"].scale is None


def test_interpolation_only_inside_the_overlap():
    rng = np.random.default_rng(12)
    a = make("a", "l", np.linspace(0, 600, 7), rng)
    b = make("b", "l", np.linspace(0, 1200, 13), rng)
    results = {r.id: r for r in cons.against_consensus([a, b])}
    assert results["b"].n_overlap == 7  # b's points beyond 600 s have no partner
    assert results["a"].n_overlap == 7


def test_interpolated_variance():
    other = cons.Series(
        "o", "l", np.array([0.0, 10.0]), np.array([0.0, 10.0]), np.array([1.0, 2.0])
    )
    values, variances, inside = cons._interpolate(other, np.array([2.5, 11.0]))
    assert values[0] == pytest.approx(2.5)
    assert variances[0] == pytest.approx(0.75**2 * 1 + 0.25**2 * 4)
    assert inside.tolist() == [True, False]


def test_no_overlap_is_an_error():
    rng = np.random.default_rng(1)
    a = make("a", "l", np.linspace(0, 100, 5), rng)
    b = make("b", "l", np.linspace(200, 300, 5), rng)
    with pytest.raises(InputError, match="no dataset overlaps another in time"):
        cons.against_consensus([a, b])


def test_missing_sd_is_an_error():
    a = cons.Series("a", "l", np.arange(3.0), np.ones(3), np.array([1.0, np.nan, 1.0]))
    b = cons.Series("b", "l", np.arange(3.0), np.ones(3), np.ones(3))
    with pytest.raises(InputError, match="run `curate noise a` first"):
        cons.against_consensus([a, b])


def test_match_groups():
    items = [
        ("a", "v", {"temperature": 37.0, "dose": 10000.0, "line": "KV-3"}),
        ("b", "v", {"temperature": 37.2, "dose": 10000.0, "line": "KV-3"}),
        ("c", "v", {"temperature": 30.0, "dose": 10000.0, "line": "KV-3"}),
        ("d", "g", {"temperature": 37.0, "dose": 10000.0, "line": "KV-3"}),
        ("e", "v", {"temperature": 37.0, "dose": 10000.0, "line": "other"}),
    ]
    assert cons.match_groups(items, tolerance=0.01) == [["a", "b"], ["c"], ["d"], ["e"]]
    assert cons.match_groups(items, tolerance=0.0) == [["a"], ["b"], ["c"], ["d"], ["e"]]


def test_summary_values_late_level_and_at_time():
    s = cons.Series(
        "a",
        "l",
        np.array([0.0, 100, 200, 300, 400]),
        np.array([0.0, 1, 2, 3, 4.0]),
        np.full(5, 0.5),
    )
    t = cons.Series("b", "l", np.array([0.0, 200, 400]), np.array([0.0, 2, 4.0]), np.full(3, 0.5))
    values = cons.summary_values([s, t], at=250.0)
    assert values[0][2] == pytest.approx(2.5) and values[1][2] == pytest.approx(2.5)
    late = cons.summary_values([s, t])  # points at t >= 300: a has 3 and 4, b has 4
    assert late[0][2] == pytest.approx(3.5) and late[0][3] == pytest.approx(0.5 / np.sqrt(2))
    assert late[1][2] == pytest.approx(4.0)


def test_an_overconfident_outlier_with_p_zero_leaves_the_consensus():
    # three labs agree on a plateau of 50 (sd 1-1.5); a fourth claims sd 0.3 at 1.4x the level.
    # Its p-value underflows to exactly 0; it must still be the one taken out of the consensus
    # (a p of 0 is the strongest disagreement, not a missing value).
    rng = np.random.default_rng(21)
    times = np.linspace(0, 3600, 13)
    level = 50.0 * (1 - np.exp(-times / 600))
    series = [
        cons.Series(
            name, name, times, level + rng.normal(0, sd, len(times)), np.full(len(times), sd)
        )
        for name, sd in (("good_a", 1.0), ("good_b", 1.5), ("good_c", 1.2))
    ]
    series.append(cons.Series("bad", "bad", times, 1.4 * level, np.full(len(times), 0.3)))
    results = {r.id: r for r in cons.against_consensus(series)}
    assert results["bad"].p_value == 0.0
    assert not results["bad"].in_consensus
    assert all(results[k].in_consensus for k in ("good_a", "good_b", "good_c"))
    assert all(results[k].p_value > 1e-3 for k in ("good_a", "good_b", "good_c"))


def test_a_reported_sd_of_zero_is_named_by_its_time_not_sent_to_noise():
    times = np.linspace(0, 600, 5)
    good = cons.Series("a", "A", times, np.ones(5), np.full(5, 0.1))
    zero = cons.Series("b", "B", times, np.ones(5), np.array([0.0, 0.1, 0.1, 0.1, 0.1]))
    with pytest.raises(InputError, match=r"dataset b: sd 0 at time 0 s; .*grade it X"):
        cons.against_consensus([good, zero])


def test_two_disagreeing_absolute_levels_and_a_relative_one_are_ambiguous():
    # an honest dataset (sd 0.5) and one 1.5x too high (sd 0.5), plus a relative dataset: the
    # relative one fits either level through its scale, so nothing says which level is off
    rng = np.random.default_rng(5)
    times = np.linspace(0, 1200, 13)
    honest = make("honest", "A", times, rng)
    high = cons.Series("high", "B", times, 1.5 * curve(times), np.full(len(times), 0.5))
    relative = make("rel", "C", times, rng, scale=40.0, relative=True)
    results = {r.id: r for r in cons.against_consensus([honest, high, relative])}
    assert results["honest"].ambiguous and results["high"].ambiguous
    assert not results["rel"].ambiguous
    assert "nothing here tells which one is off" in results["honest"].note


def test_a_third_absolute_level_decides_and_nothing_is_ambiguous():
    rng = np.random.default_rng(6)
    times = np.linspace(0, 1200, 13)
    series = [make("a", "A", times, rng), make("b", "B", times, rng)]
    series.append(cons.Series("high", "H", times, 1.5 * curve(times), np.full(len(times), 0.2)))
    results = {r.id: r for r in cons.against_consensus(series)}
    assert not any(r.ambiguous for r in results.values())
    assert not results["high"].in_consensus and results["a"].in_consensus


def test_summary_levels_put_relative_data_on_the_consensus_pool_only():
    # the relative dataset's late level must follow the datasets that agree, not the outlier
    rng = np.random.default_rng(7)
    times = np.linspace(0, 1200, 25)
    series = [make("a", "A", times, rng, sd=0.05), make("b", "B", times, rng, sd=0.05)]
    series.append(cons.Series("high", "H", times, 1.5 * curve(times), np.full(len(times), 0.01)))
    series.append(make("rel", "R", times, rng, sd=0.05, scale=40.0, relative=True))
    pooled = {r.id for r in cons.against_consensus(series) if r.in_consensus}
    assert pooled == {"a", "b", "rel"}
    levels = {v[0]: v[2] for v in cons.summary_values(series, reference=pooled)}
    assert levels["rel"] == pytest.approx(levels["a"], rel=0.02)
    assert levels["high"] == pytest.approx(1.5 * levels["a"], rel=0.02)


def test_a_sparse_series_of_a_curve_is_no_evidence_against_a_dense_one():
    # judged against a 4-point series, a dense series of the same curve sees the straight lines
    # between the 4 points; that gap is interpolation, not disagreement
    rng = np.random.default_rng(11)
    dense = make("dense", "A", np.linspace(0, 1200, 25), rng, sd=0.2)
    sparse_times = np.array([0.0, 400.0, 800.0, 1200.0])
    sparse = cons.Series("sparse", "B", sparse_times, curve(sparse_times), np.full(4, 0.2))
    third = make("third", "C", np.linspace(0, 1200, 25), rng, sd=0.2)
    results = {r.id: r for r in cons.against_consensus([dense, sparse, third])}
    assert all(r.p_value > 0.01 for r in results.values()), results


def test_a_tie_between_consistent_sets_is_named_not_decided():
    from curate.present.text import consistent_labs_line

    # two pairs that agree within each pair and not across: both pairs pass the chi2 test
    # (Cox 2007, Metrologia 44:187, defines the largest consistent subset; when two subsets of
    # that size pass, choosing one by its chi2 alone would decide what the data cannot)
    x, dx = np.array([1.0, 1.01, 2.0, 2.012]), np.full(4, 0.01)
    assert cons.consistent_subsets(x, dx) == [(0, 1), (2, 3)]  # chi2 0.5 before 0.72
    summary = cons.summary_consistency(["A", "B", "C", "D"], x, dx)
    assert summary.consistent_subset == ("A", "B") and summary.tied_subsets == (("C", "D"),)
    line = consistent_labs_line(summary)
    assert line.startswith("no single largest consistent set of labs: {A, B}; {C, D}")
    # two labs that disagree: no set of two passes; the line says so instead of naming one
    one = cons.summary_consistency(["A", "B"], np.array([1.0, 2.0]), np.array([0.01, 0.02]))
    assert one.consistent_subset == ("A",) and one.tied_subsets == ()
    assert consistent_labs_line(one).startswith("no two labs agree within their uncertainties")
    agree = cons.summary_consistency(["A", "B"], np.array([1.0, 1.01]), np.array([0.01, 0.01]))
    assert consistent_labs_line(agree) == "largest consistent set of labs: A, B"
