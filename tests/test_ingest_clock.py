"""Times written as durations or clock times in text files, converted to the stated unit.

The readings are worked out by hand beside each case: 'h:mm[:ss]' as spreadsheet programs read
such text (1:30 is one and a half hours; common practice, no single source), dates with times in
ISO 8601 (ISO 8601-1:2019, the extended format with 'T' or, as RFC 3339 5.6 allows, a space).
"""

from __future__ import annotations

import numpy as np
import pytest

from curate.errors import InputError
from curate.ingest.clock import times_in_unit

CASES = [
    (["0:00", "0:15", "1:30"], "min", [0.0, 15.0, 90.0], "durations"),
    (["00:00:00", "00:15:00", "25:00:30.5"], "s", [0.0, 900.0, 90030.5], "durations"),
    (["-0:05:00", "0:05:00"], "min", [-5.0, 5.0], "durations"),
    (["T10:00:00", "T10:30:00", "T12:00"], "h", [0.0, 0.5, 2.0], "time of day"),
    (["2026-05-04 23:30:00", "2026-05-05T00:15:00", "2026-05-04 23:00"], "min", [0.0, 45.0, -30.0],
     "dates with times"),
]  # fmt: skip


@pytest.mark.parametrize(("cells", "unit", "expected", "kind"), CASES)
def test_times_as_written_in_the_unit_stated(cells, unit, expected, kind):
    found = times_in_unit(np.array(cells, dtype=object), unit, lambda k: f"row {k}: ")
    assert found is not None
    values, note = found
    assert np.allclose(values, expected, rtol=1e-12, atol=0)
    assert kind in note


def test_plain_numbers_are_not_times():
    assert times_in_unit(np.array(["0", "1.5"], dtype=object), "s", str) is None


@pytest.mark.parametrize(("cells", "message"), [
    (["0:15", "20"], "row 1: '20', but the first time is a duration (h:mm:ss) ('0:15')"),
    (["0:15", ""], "row 1: empty, but the first time is a duration"),
    (["0:75"], "row 0: '0:75' is not h:mm:ss (minutes and seconds below 60)"),
    (["T10:00", "2026-05-04 10:00"], "row 1: '2026-05-04 10:00', but the first time is a time of day"),
    (["2026-02-30 10:00"], "row 0: '2026-02-30 10:00' is not a date with a time"),
])  # fmt: skip
def test_times_that_cannot_be_read_alike_are_refused(cells, message):
    with pytest.raises(InputError, match="^" + message.replace("(", r"\(").replace(")", r"\)")):
        times_in_unit(np.array(cells, dtype=object), "s", lambda k: f"row {k}: ")


def test_a_csv_of_elapsed_times_logs_in_seconds(catalog, tmp_path):
    path = tmp_path / "reader.csv"
    path.write_text("Time,OD600\n0:00:00,0.1\n0:15:00,0.2\n1:30:00,0.4\n")
    result = catalog.add(path, options={"observable": {"id": "od", "unit": "1"},
                                        "time": {"unit": "min"}, "source": {"lab": "Lab Quill"}})  # fmt: skip
    assert catalog.points(result.id)["time"].tolist() == [0.0, 900.0, 5400.0]
