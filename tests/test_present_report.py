"""The HTML report's pieces that compute something: the fit overlay."""

from __future__ import annotations

import numpy as np
import pytest
from conftest import MIXED_SCALE, add_mixed_observable, mixed_truth, saturating_model

from curate.present import report
from curate.weighting import resolve_policy


def test_fit_overlay_draws_relative_data_with_their_calibration_groups_scale(catalog, tmp_path):
    # the fit records scale factors by calibration group (data = s x model); the overlay must
    # find the relative dataset's factor under its group, not under its dataset id
    absolute, relative = add_mixed_observable(catalog)
    model, params = saturating_model(tmp_path)
    fitted = catalog.fit(f"{model}:predict", params)
    assert set(fitted.scale_factors) == {"blot_7"}
    _, overlay = report._fit_overlay(catalog, resolve_policy(None))
    assert overlay is not None
    for dataset, factor in ((absolute, 1.0), (relative, MIXED_SCALE)):
        curve = overlay["predictions"][dataset]
        expected = factor * mixed_truth(np.asarray(curve["minutes"]))
        np.testing.assert_allclose(curve["value"], expected, rtol=1e-5, atol=1e-6 * factor)
    assert fitted.scale_factors["blot_7"] == pytest.approx(MIXED_SCALE, rel=1e-6)
