"""Tests of the design matrix against patsy, numpy and lifelines' rossi data."""

from __future__ import annotations

import json
from types import SimpleNamespace

import numpy as np
import pandas as pd
import patsy
import pytest
from oracles import lifelines

from casemix import Design
from casemix.data.design import natural_spline_basis
from casemix.data.spec import spec_from_dict
from casemix.errors import InputError, ModelFileError, SpecError

COLUMNS = {
    "recipient": "recipient_id", "program": "program",
    "transplant_date": "transplant_date", "last_seen": "last_seen_date",
}
COVARIATES = {
    "age": {"kind": "numeric", "missing": "indicator"},
    "sex": {"kind": "categorical", "reference": "female"},
    "diabetes": {"kind": "binary", "missing": "indicator"},
    "donor_type": {"kind": "categorical", "reference": "deceased", "other": "deceased"},
    "donor_age": {"kind": "spline", "knots": 4},
    "bmi": {"kind": "numeric", "missing": "median"},
    "region": {"kind": "categorical", "missing": "category", "reference": "north"},
    "cold": {"kind": "numeric", "column": "cold_hours", "missing": "indicator"},
}


def _spec(covariates: dict = COVARIATES, strata: str | None = "era"):
    d = {"columns": COLUMNS, "outcomes": {"death": {"dates": ["death_date"]}},
         "covariates": covariates}
    if strata:
        d["strata"] = {"column": strata}
    return spec_from_dict(d)


def _reference(n: int = 400, seed: int = 11) -> pd.DataFrame:
    """Invented reference population (the encoding is checked, not an estimate)."""
    rng = np.random.default_rng(seed)
    frame = pd.DataFrame({
        "age": rng.integers(18, 80, n).astype(float),
        "sex": rng.choice(["female", "male"], n),
        "diabetes": rng.integers(0, 2, n).astype(float),
        "donor_type": rng.choice(["deceased", "living"], n, p=[0.7, 0.3]),
        "donor_age": rng.uniform(5, 85, n).round(1),
        "bmi": rng.normal(26, 4, n).round(1),
        "region": rng.choice(["north", "south", "west"], n).astype(object),
        "cold_hours": rng.gamma(4, 3, n).round(1),
        "era": rng.choice(["early", "late"], n),
    })
    for column, share in (("age", 0.05), ("diabetes", 0.1), ("bmi", 0.1), ("region", 0.08)):
        frame.loc[rng.random(n) < share, column] = None
    return frame


@pytest.fixture(scope="module")
def ref() -> pd.DataFrame:
    return _reference()


@pytest.fixture(scope="module")
def design(ref: pd.DataFrame) -> Design:
    return Design.fit(ref, _spec())


def test_columns_and_groups(design: Design) -> None:
    assert design.columns == (
        "age", "age:missing", "sex[male]", "diabetes", "diabetes:missing", "donor_type[living]",
        "donor_age:spline1", "donor_age:spline2", "donor_age:spline3", "bmi",
        "region[missing]", "region[south]", "region[west]", "cold",
    )
    assert design.groups == (
        "age", "age", "sex", "diabetes", "diabetes", "donor_type", "donor_age", "donor_age",
        "donor_age", "bmi", "region", "region", "region", "cold",
    )
    assert design.strata_levels == ("early", "late")


def test_transform_against_patsy_and_numpy(design: Design, ref: pd.DataFrame) -> None:
    X = pd.DataFrame(design.transform(ref), columns=design.columns)
    assert X.shape == (len(ref), 14) and X.to_numpy().dtype == np.float64
    # Treatment (dummy) coding with the declared reference: patsy 1.0 C(..., Treatment(...)).
    sex = patsy.dmatrix("C(sex, Treatment('female')) - 1", ref, return_type="dataframe")
    np.testing.assert_array_equal(X["sex[male]"], sex["C(sex, Treatment('female'))[male]"])
    # missing = "category": missing values become a level of their own.
    region = patsy.dmatrix("C(region, Treatment('north')) - 1", ref.fillna({"region": "missing"}),
                           return_type="dataframe")
    for level in ("missing", "south", "west"):
        patsy_col = region[f"C(region, Treatment('north'))[{level}]"]
        np.testing.assert_array_equal(X[f"region[{level}]"], patsy_col)
    # Missing values: indicator = isna; fill = numpy median of the observed reference values.
    np.testing.assert_array_equal(X["age:missing"], ref["age"].isna())
    np.testing.assert_array_equal(X["age"], ref["age"].fillna(np.nanmedian(ref["age"])))
    np.testing.assert_array_equal(X["diabetes"], ref["diabetes"].fillna(0.0))
    np.testing.assert_array_equal(X["bmi"], ref["bmi"].fillna(np.nanmedian(ref["bmi"])))
    np.testing.assert_array_equal(X["cold"], ref["cold_hours"])  # no missing: no indicator
    assert "cold:missing" not in design.columns
    # Spline: first column is the value itself; knots at the documented quantiles.
    np.testing.assert_array_equal(X["donor_age:spline1"], ref["donor_age"])
    spline = next(t for t in design.terms if t.name == "donor_age")
    np.testing.assert_array_equal(spline.knots, np.quantile(ref["donor_age"],
                                                            [0.05, 0.35, 0.65, 0.95]))


def test_spline_spans_the_same_space_as_patsy_cr(design: Design, ref: pd.DataFrame) -> None:
    """Natural cubic spline on the same knots: our basis plus a constant spans patsy's cr()."""
    knots = np.array(next(t for t in design.terms if t.name == "donor_age").knots)
    x = np.concatenate([ref["donor_age"].to_numpy(), [-10.0, 0.0, 100.0, 130.0]])  # and beyond
    ours = np.column_stack([np.ones_like(x), natural_spline_basis(x, knots)])
    # patsy 1.0 cr(): natural cubic regression spline; inner knots plus the two bounds.
    theirs = np.asarray(patsy.dmatrix(
        "cr(x, knots=inner, lower_bound=lo, upper_bound=hi) - 1",
        {"x": x, "inner": knots[1:-1], "lo": knots[0], "hi": knots[-1]},
    ))
    assert theirs.shape == ours.shape
    for a, b in ((ours, theirs), (theirs, ours)):
        coef = np.linalg.lstsq(a, b, rcond=None)[0]
        np.testing.assert_allclose(a @ coef, b, atol=1e-8 * np.abs(b).max())


def test_raw_scale_reproduces_the_rossi_columns() -> None:
    """No centring: the design of lifelines' rossi data is the data itself."""
    rossi = lifelines("lifelines.datasets").load_rossi()
    names = ["fin", "age", "race", "wexp", "mar", "paro", "prio"]
    kinds = {n: {"kind": "binary" if rossi[n].isin([0, 1]).all() else "numeric"} for n in names}
    design = Design.fit(rossi, _spec(kinds, strata=None))
    assert design.columns == tuple(names)
    np.testing.assert_array_equal(design.transform(rossi), rossi[names].to_numpy(float))
    assert design.strata(rossi) is None


def test_json_round_trip_gives_identical_matrices(design: Design, ref: pd.DataFrame) -> None:
    text = json.dumps(design.to_dict(), allow_nan=False)
    again = Design.from_dict(json.loads(text))
    assert again == design
    np.testing.assert_array_equal(again.transform(ref), design.transform(ref))
    np.testing.assert_array_equal(again.strata(ref), design.strata(ref))
    assert again.to_dict() == design.to_dict()


def test_new_cohort_levels_ranges_and_strata(design: Design, ref: pd.DataFrame) -> None:
    cohort = ref.head(4).copy()
    cohort.loc[0, "donor_type"] = "domino"  # unseen: declared other = "deceased"
    cohort.loc[1, "donor_age"] = 99.0  # beyond the reference maximum
    X = pd.DataFrame(design.transform(cohort), columns=design.columns)
    assert X.loc[0, "donor_type[living]"] == 0.0
    out = design.out_of_range(cohort)
    assert list(out.columns) == ["age", "donor_age", "bmi", "cold"]
    assert out["donor_age"].tolist() == [False, True, False, False]
    assert not out.drop(columns="donor_age").any().any()
    assert design.strata(cohort).tolist() == cohort["era"].tolist()
    # A Records or Cohort object works as well as its frame.
    np.testing.assert_array_equal(design.transform(SimpleNamespace(frame=cohort)), X)


def _broken(ref: pd.DataFrame, **changes: object) -> pd.DataFrame:
    frame = ref.head(5).copy()
    for column, (row, value) in changes.items():
        frame[column] = frame[column].astype(object)
        frame.loc[row, column] = value
    return frame


@pytest.mark.parametrize(
    ("changes", "message"),
    [
        ({"sex": (2, "unknown")}, r"covariate sex \(column 'sex'\) has a level the reference "
         r"population does not have: 'unknown' in row 3\. Known levels: female, male\. Recode "
         r"them, or declare `other"),
        ({"cold_hours": (1, None)}, r"covariate cold \(column 'cold_hours'\) is missing in row "
         r"2, and the reference population had no missing values of it"),
        ({"donor_age": (0, "old")}, r"covariate donor_age \(column 'donor_age'\) is not a "
         r"number in row 1 \(for example 'old'\)"),
        ({"diabetes": (4, 2.0)}, r"covariate diabetes \(column 'diabetes'\) is not 0 or 1 in "
         r"row 5"),
        ({"era": (3, "middle")}, r"strata column 'era' has labels the reference population "
         r"does not have: 'middle' in row 4; known: early, late"),
        ({"era": (0, None)}, r"strata column 'era' is missing in row 1; every recipient needs"),
    ],
)
def test_transform_errors(design: Design, ref: pd.DataFrame, changes: dict,
                          message: str) -> None:
    frame = _broken(ref, **changes)
    with pytest.raises(InputError, match=message):
        design.transform(frame)
        design.strata(frame)


def test_every_covariate_problem_is_listed_at_once(design: Design, ref: pd.DataFrame) -> None:
    frame = _broken(ref, sex=(2, "unknown"), cold_hours=(1, None), era=(3, "middle"))
    with pytest.raises(InputError, match=r"2 covariates cannot be encoded .*\(1\) covariate sex "
                       r".*fit the reference model again.*\(2\) covariate cold "):
        design.transform(frame)
    problems = design.problems(frame)
    assert [p.split(" ")[:2] for p in problems] == [
        ["covariate", "sex"], ["covariate", "cold"], ["strata", "column"]]
    assert design.problems(ref) == []


def test_missing_column_and_exclude_policy(design: Design, ref: pd.DataFrame) -> None:
    with pytest.raises(InputError, match=r"covariate cold needs column 'cold_hours', which the "
                                         r"data lack \(closest: 'cold_hour'\)"):
        design.transform(ref.rename(columns={"cold_hours": "cold_hour"}))
    strict = Design.fit(ref, _spec({"sex": {"kind": "categorical"}}, strata=None))
    with pytest.raises(InputError, match=r"is missing in row 1, and its missing policy is "
                                         r"\"exclude\""):
        strict.transform(_broken(ref, sex=(0, None)))


@pytest.mark.parametrize(
    ("covariates", "error", "message"),
    [
        ({"sex": {"kind": "categorical", "reference": "Female"}}, SpecError,
         r"'covariates.sex.reference' = 'Female' does not occur in the reference population "
         r"\(closest: 'female'.*\); its levels are female, male"),
        ({"sex": {"kind": "categorical", "other": "other"}}, SpecError,
         r"'covariates.sex.other' = 'other' does not occur"),
        ({"flat": {"kind": "numeric"}}, InputError,
         r"covariate flat \(column 'flat'\) is 3 for everyone in the reference population"),
        ({"one": {"kind": "categorical"}}, InputError,
         r"covariate one \(column 'one'\) has only the level 'x' in the reference population"),
        ({"few": {"kind": "spline", "knots": 5}}, InputError,
         r"covariate few \(column 'few'\): 5 spline knots at the reference quantiles .* are not "
         r"distinct .*use fewer knots"),
        ({"clash": {"kind": "categorical", "missing": "category"}}, SpecError,
         r"covariate clash already has a level 'missing'"),
    ],
)
def test_fit_errors(ref: pd.DataFrame, covariates: dict, error: type, message: str) -> None:
    frame = ref.assign(flat=3.0, one="x", few=np.resize([1.0, 2.0, 2.0, 2.0, 3.0], len(ref)),
                       clash=np.resize(["missing", "a", None], len(ref)))
    with pytest.raises(error, match=message):
        Design.fit(frame, _spec(covariates, strata=None))


def test_default_reference_is_the_most_frequent_level(ref: pd.DataFrame) -> None:
    design = Design.fit(ref, _spec({"donor_type": {"kind": "categorical"}}, strata=None))
    assert ref["donor_type"].value_counts().idxmax() == "deceased"
    assert design.columns == ("donor_type[living]",)


def test_empty_and_bad_model_content(ref: pd.DataFrame, design: Design) -> None:
    with pytest.raises(InputError, match=r"the reference population has no recipients"):
        Design.fit(ref.head(0), _spec())
    with pytest.raises(ModelFileError, match=r"design has format 99; this casemix reads format 1"):
        Design.from_dict({**design.to_dict(), "format": 99})
    bad = design.to_dict()
    bad["terms"][0]["colour"] = "blue"
    with pytest.raises(ModelFileError, match=r"design content is malformed .*unknown term keys"):
        Design.from_dict(bad)
