"""Tests of small-count suppression."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from casemix.errors import InputError
from casemix.report.suppress import suppress_counts


def test_counts_from_one_to_n_minus_one_are_hidden():
    # common practice in health statistics: cells from 1 to 10 are not published (N = 11)
    frame = pd.DataFrame({"program": list("abcdef"), "count": [0, 1, 5, 10, 11, np.nan]})
    out = suppress_counts(frame, ["count"], 11)
    assert out["count"].tolist() == ["0", "<11", "<11", "<11", "11", None]
    assert out["program"].tolist() == list("abcdef")
    assert frame["count"].iloc[1] == 1  # the input is not changed


def test_suppress_counts_errors():
    frame = pd.DataFrame({"count": [1, 2.5]})
    with pytest.raises(InputError, match=r"no column 'events' in the table"):
        suppress_counts(frame, ["events"], 11)
    with pytest.raises(InputError, match=r"'count': values that are not whole numbers in row 1 "):
        suppress_counts(frame, ["count"], 11)
    for bad in (1, 2.5, True):
        with pytest.raises(InputError, match=r"suppress_below must be a whole number of at least"):
            suppress_counts(frame.head(1), ["count"], bad)
