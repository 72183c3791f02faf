"""The uncertainty of each reported value: a mean of n is uncertain by its SEM."""

from __future__ import annotations

import numpy as np
import pytest

from curate.quality.measured import measured_sd, reported_sd


def _version(catalog, **uncertainty):
    draft = catalog.draft(
        [0, 60, 120], [1.0, 2.0, 3.0], observable="x_conc", unit="nM", time_unit="s",
        lab="Lab One", sd=[0.5, 0.5, 0.5], uncertainty=uncertainty,
    )  # fmt: skip
    result = catalog.add_drafts([draft])[0]
    return catalog.show(result.id), catalog.arrays(result.id)


@pytest.mark.parametrize(
    ("uncertainty", "single", "value_sd"),
    [
        # mean ± SEM of 4: one measurement scatters by SEM * sqrt(4); the mean by the SEM
        ({"type": "sem", "n": 4}, 1.0, 0.5),
        # mean ± SD of 4: the mean is uncertain by SD / sqrt(4) (the standard error of a mean)
        ({"type": "sd", "n": 4}, 0.5, 0.25),
        # an SD without n describes the value itself
        ({"type": "sd"}, 0.5, 0.5),
        # a 95% CI of a mean of 10: half-width = t_{9,0.975} SEM with t = 2.262157 (tables)
        ({"type": "ci", "level": 0.95, "n": 10}, 0.5 / 2.262157 * np.sqrt(10), 0.5 / 2.262157),
    ],
)
def test_value_uncertainty_is_the_standard_error_of_a_mean(catalog, uncertainty, single, value_sd):
    version, arrays = _version(catalog, **uncertainty)
    np.testing.assert_allclose(reported_sd(version, arrays), single, rtol=1e-6)
    np.testing.assert_allclose(measured_sd(version, arrays), value_sd, rtol=1e-6)


def test_weights_of_means_with_sem_are_one_over_sem_squared(catalog):
    version, _ = _version(catalog, type="sem", n=4)
    table = catalog.weighted_table()
    row = table[table["dataset_id"] == version.id]
    # the default policy: an ungraded dataset counts as C (inflation 4); weight = 1 / (SEM^2 * 4)
    np.testing.assert_allclose(row["sd"], 0.5)
    np.testing.assert_allclose(row["weight"], 1.0 / (0.5**2 * 4.0))
