"""Content hashing and storage round trips (hypothesis), and the record invariants."""

from __future__ import annotations

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.extra import numpy as hnp

import curate
from curate.records import SeriesArrays, content_hash

finite = st.floats(allow_nan=False, allow_infinity=False, width=64, min_value=-1e12, max_value=1e12)


@st.composite
def series(draw):
    n = draw(st.integers(min_value=1, max_value=40))
    time = draw(hnp.arrays(np.float64, n, elements=finite))
    value = draw(hnp.arrays(np.float64, n, elements=finite))
    sd = draw(st.none() | hnp.arrays(np.float64, n, elements=st.floats(0, 1e6)))
    return time, value, sd


@settings(
    max_examples=150, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture]
)
@given(data=series())
def test_arrays_round_trip_through_the_catalog(memory_catalog, data):
    time, value, sd = data
    draft = memory_catalog.draft(
        time, value, sd=sd, observable="x", unit="nM", time_unit="s", lab="L"
    )
    result = memory_catalog.add_drafts([draft])[0]
    stored = memory_catalog.arrays(result.id, result.version)
    order = np.argsort(time, kind="stable")
    np.testing.assert_array_equal(stored.time, time[order])
    np.testing.assert_array_equal(stored.value, value[order])
    if sd is not None:
        np.testing.assert_array_equal(stored.sd, sd[order])
    assert content_hash(stored, value_unit="nanomolar") == draft.record.content_hash


@settings(max_examples=100, deadline=None)
@given(data=series())
def test_content_hash_is_a_function_of_content(data):
    time, value, sd = data
    a = SeriesArrays(time=time.copy(), value=value.copy(), sd=None if sd is None else sd.copy())
    b = SeriesArrays(time=time.copy(), value=value.copy(), sd=None if sd is None else sd.copy())
    assert content_hash(a, value_unit="nanomolar") == content_hash(b, value_unit="nanomolar")
    assert content_hash(a, value_unit="nanomolar") != content_hash(a, value_unit="micrometer")
    changed = value.copy()
    changed[0] = changed[0] + 1.0 if abs(changed[0]) < 1e11 else changed[0] / 2
    c = SeriesArrays(time=time, value=changed, sd=a.sd)
    assert content_hash(c, value_unit="nanomolar") != content_hash(a, value_unit="nanomolar")


def test_negative_zero_and_nan_hash_canonically():
    a = SeriesArrays(
        time=np.array([0.0, 1.0]), value=np.array([-0.0, 1.0]), sd=np.array([np.nan, 1.0])
    )
    b = SeriesArrays(
        time=np.array([0.0, 1.0]), value=np.array([0.0, 1.0]), sd=np.array([-np.nan, 1.0])
    )
    assert content_hash(a, value_unit="x") == content_hash(b, value_unit="x")


def test_absent_and_present_arrays_differ():
    base = SeriesArrays(time=np.array([0.0]), value=np.array([1.0]))
    with_sd = SeriesArrays(time=np.array([0.0]), value=np.array([1.0]), sd=np.array([np.nan]))
    assert content_hash(base, value_unit="x") != content_hash(with_sd, value_unit="x")


def test_mismatched_array_lengths_are_refused():
    with pytest.raises(ValueError, match="array 'value' has 1 entries, time has 2"):
        SeriesArrays(time=np.array([0.0, 1.0]), value=np.array([1.0]))


def test_csv_values_survive_exactly(catalog, tmp_path):
    # the shortest repr of a float64 reads back to the same float (IEEE 754 round trip)
    rng = np.random.default_rng(7)
    values = rng.normal(10, 3, 50)
    text = "time,value\n" + "\n".join(f"{i},{float(v)!r}" for i, v in enumerate(values)) + "\n"
    path = tmp_path / "exact.csv"
    path.write_text(text)
    result = catalog.add(
        path,
        options={
            "observable": {"id": "x", "unit": "nM"},
            "time": {"unit": "s"},
            "source": {"lab": "L"},
        },
    )
    np.testing.assert_array_equal(catalog.points(result.id)["value"].to_numpy(), values)
    assert isinstance(result, curate.AddResult)
