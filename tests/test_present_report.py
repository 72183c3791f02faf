"""The HTML report: the fit overlay, thinned plots, bounded tables, current counts."""

from __future__ import annotations

from collections import Counter

import numpy as np
import pandas as pd
import pytest
from conftest import MIXED_SCALE, add_mixed_observable, mixed_truth, saturating_model

from curate.present import report
from curate.present.html import MAX_TABLE_ROWS, column_extremes
from curate.present.report import PANEL_PIXELS, _top, build_report, write_report
from curate.weighting import load_policy


def test_fit_overlay_draws_relative_data_with_their_calibration_groups_scale(catalog, tmp_path):
    # the fit records scale factors by calibration group (data = s x model); the overlay must
    # find the relative dataset's factor under its group, not under its dataset id
    absolute, relative = add_mixed_observable(catalog)
    model, params = saturating_model(tmp_path)
    fitted = catalog.fit(f"{model}:predict", params)
    assert set(fitted.scale_factors) == {"blot_7"}
    table = catalog.weighted_table()
    templates = report._templates(table, sorted(set(table["dataset_id"].astype(str))))
    _, overlay = report._fit_overlay(catalog, templates)
    assert overlay is not None
    for dataset, factor in ((absolute, 1.0), (relative, MIXED_SCALE)):
        curve = overlay["predictions"][dataset]
        expected = factor * mixed_truth(np.asarray(curve["minutes"]))
        np.testing.assert_allclose(curve["value"], expected, rtol=1e-5, atol=1e-6 * factor)
    assert fitted.scale_factors["blot_7"] == pytest.approx(MIXED_SCALE, rel=1e-6)


def test_column_extremes_keep_every_columns_minimum_and_maximum():
    rng = np.random.default_rng(1)
    n = 1_500_000
    x = np.sort(rng.uniform(0, 5000, n))
    y = rng.normal(0, 1, n)
    y[123_456], y[1_000_001] = 80.0, -75.0  # spikes a plot must not lose
    kept = column_extremes(x, y, 341)
    assert len(kept) <= 2 * 341 and np.all(np.diff(kept) > 0)
    assert {int(np.argmax(y)), int(np.argmin(y))} <= set(kept.tolist())
    # reference: the same bins grouped by pandas; each column's min and max are drawn
    bins = np.minimum(((x - x[0]) / (x[-1] - x[0]) * 341).astype(int), 340)
    frame = pd.DataFrame({"bin": bins, "y": y})
    reference = frame.groupby("bin")["y"].agg(["min", "max"])
    drawn = pd.DataFrame({"bin": bins[kept], "y": y[kept]}).groupby("bin")["y"].agg(["min", "max"])
    pd.testing.assert_frame_equal(drawn, reference)
    # short series come back whole
    assert column_extremes(x[:500], y[:500], 341).tolist() == list(range(500))


@pytest.mark.slow
def test_report_of_a_million_point_dataset_is_small_and_keeps_its_spikes(tmp_path, catalog):
    n = 1_200_000
    rng = np.random.default_rng(0)
    time = np.arange(n, dtype=float)
    value = rng.uniform(0, 1000, n)
    value[n // 3], value[2 * n // 3] = 9000.0, -4000.0
    big = catalog.draft(time, value, sd=rng.uniform(0, 300, n), observable="velarin_conc",
                        unit="nM", time_unit="s", lab="Big Lab")  # fmt: skip
    small = catalog.draft(np.arange(10.0), np.arange(10.0) + 500, sd=np.full(10, 5.0),
                          observable="velarin_conc", unit="nM", time_unit="s", lab="Small Lab")  # fmt: skip
    added = catalog.add_drafts([big, small])
    catalog.retire(added[1].id, reason="superseded")
    out = tmp_path / "report.html"
    write_report(catalog, out, load_policy(None))
    page = out.read_text(encoding="utf-8")
    assert out.stat().st_size < 400_000  # plots are PNGs of a bounded number of points
    assert "1 long series (big_velarin_conc_01) are drawn by their smallest and largest" in page
    # item 21: the glance counts current datasets and names the retired one apart
    assert "1 current dataset (1,200,000 points) from 1 lab" in page
    assert "1 retired dataset is kept but not counted" in page
    # what the panel draws is the min/max envelope: the spikes are in it
    kept = column_extremes(time / 60.0, value, PANEL_PIXELS)
    assert {n // 3, 2 * n // 3} <= set(kept.tolist())


def test_report_tables_are_bounded_and_say_what_they_left_out(memory_catalog):
    drafts = [memory_catalog.draft(np.arange(5.0), np.arange(5.0) + k, sd=np.full(5, 0.5),
                                   observable="velarin_conc", unit="nM", time_unit="s", lab=f"Lab {k}",
                                   conditions={"dose": f"{k} nM"})
              for k in range(MAX_TABLE_ROWS + 25)]  # fmt: skip
    memory_catalog.add_drafts(drafts)
    page = build_report(memory_catalog, load_policy(None))
    overview = page[page.index('id="overview"') : page.index('id="series"')]
    assert overview.count("<tr>") == MAX_TABLE_ROWS + 1  # the header and the first rows
    assert f"25 more datasets not shown here (the first {MAX_TABLE_ROWS} of 225)" in overview
    series = page[page.index('id="series"') : page.index('id="weights"')]
    assert "177 more series not shown here (the first 48 of 225)" in series
    weights = page[page.index('id="weights"') : page.index('id="consistency"')]
    assert "25 more datasets (the largest shares are shown) not shown here" in weights
    # the glance chart sums the labs beyond the 29 largest into one bar
    labs = Counter({f"Lab {k}": 1 for k in range(MAX_TABLE_ROWS + 25)})
    assert len(_top(labs)) == 30 and _top(labs)["196 others"] == 196


def test_glance_counts_current_datasets_and_the_retired_apart(memory_catalog):
    drafts = [memory_catalog.draft(np.arange(4.0), np.arange(4.0) * k, observable="velarin_conc",
                                   unit="nM", time_unit="s", lab=lab, sd=np.full(4, 0.2))
              for k, lab in enumerate(["A Lab", "B Lab", "B Lab"], start=1)]  # fmt: skip
    added = memory_catalog.add_drafts(drafts)
    memory_catalog.retire(added[0].id, reason="superseded")
    memory_catalog.retire(added[1].id, reason="superseded")
    page = build_report(memory_catalog, load_policy(None))
    assert "1 current dataset (4 points) from 1 lab" in page
    assert "2 retired datasets are kept but not counted." in page
