"""Harrell's C against the hand example, lifelines and a brute-force pair count."""

from __future__ import annotations

import numpy as np
import pytest
from oracles import lazy

from casemix.errors import InputError
from casemix.survival import concordance

concordance_index = lazy("lifelines.utils", "concordance_index")

ROSSI_FULL = ("fin", "age", "race", "wexp", "mar", "paro", "prio")


def test_hand_example():
    # docs/validation.md section 11, COMMON PRACTICE definition (Harrell et al. 1982),
    # counts confirmed by lifelines and sksurv: 10 comparable, 9 concordant, 1 tied -> 0.95.
    result = concordance([2, 3, 5, 7, 8, 10], [1, 0, 1, 1, 0, 1], [0.9, 0.3, 0.6, 0.6, 0.1, 0.2])
    assert (result.concordant, result.discordant, result.tied_risk, result.comparable) == (
        9,
        0,
        1,
        10,
    )
    assert result.c == pytest.approx(0.95, abs=1e-15)


def test_rossi_linear_predictor(rossi, rossi_fit):
    lp = rossi_fit.linear_predictor(rossi[list(ROSSI_FULL)].to_numpy(float))
    result = concordance(rossi["week"], rossi["arrest"], lp)
    # docs/validation.md section 11, REFERENCE LIBRARY lifelines and sksurv:
    # C = 0.6403292; concordant 27242, discordant 15291, tied risk 49.
    assert (result.concordant, result.discordant, result.tied_risk) == (27242, 15291, 49)
    assert result.c == pytest.approx(0.6403292, abs=1e-7)
    # REFERENCE LIBRARY: lifelines.utils.concordance_index (higher score = longer survival).
    assert result.c == pytest.approx(
        concordance_index(rossi["week"], -lp, rossi["arrest"]), abs=1e-12
    )


def test_rossi_prio_many_tied_scores(rossi):
    # docs/validation.md section 11, REFERENCE LIBRARY lifelines, sksurv: 22075 / 14586 /
    # 5921 tied, C = 0.5879362.
    result = concordance(rossi["week"], rossi["arrest"], rossi["prio"])
    assert (result.concordant, result.discordant, result.tied_risk) == (22075, 14586, 5921)
    assert result.c == pytest.approx(0.5879362, abs=1e-7)


def _brute(time, event, risk):
    """All pairs, straight from the definition (COMMON PRACTICE; docs/validation.md conv. 9)."""
    conc = disc = tied = 0
    for i in np.flatnonzero(event):
        later = (time > time[i]) | ((time == time[i]) & (event == 0))
        conc += int((risk[later] < risk[i]).sum())
        disc += int((risk[later] > risk[i]).sum())
        tied += int((risk[later] == risk[i]).sum())
    return conc, disc, tied


@pytest.mark.parametrize("seed", range(6))
@pytest.mark.parametrize("unit", [1.0, 0.37, 1000.0])  # whole days, fractions, a wide span
def test_random_ties_against_pairs_and_lifelines(seed, unit):
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 300))
    time = rng.integers(0, 12, n) * unit
    event = rng.integers(0, 2, n)
    event[0] = 1
    risk = rng.integers(0, 6, n).astype(float)
    result = concordance(time, event, risk)
    assert (result.concordant, result.discordant, result.tied_risk) == _brute(time, event, risk)
    # REFERENCE LIBRARY: lifelines.utils.concordance_index computed here.
    assert result.c == pytest.approx(concordance_index(time, -risk, event), abs=1e-12)


def test_no_comparable_pair_gives_nan_and_bad_scores_are_refused():
    assert np.isnan(concordance([1.0, 1.0], [1, 1], [0.1, 0.2]).c)
    with pytest.raises(
        InputError, match=r"risk has 1 row that is NaN or infinite \(first at row 1"
    ):
        concordance([1.0, 2.0], [1, 0], [0.1, np.nan])
    with pytest.raises(InputError, match=r"risk must have one score per row \(2\)"):
        concordance([1.0, 2.0], [1, 0], [0.1])
