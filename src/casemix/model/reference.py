"""The reference model: a frozen design plus a Cox fit of the reference population, saved as JSON.

The model file is plain JSON (never pickle): loading it reads numbers and strings and executes
nothing. Its layout is documented in models/README.md. ``format_version`` is checked before
anything else is read, and a sha256 ``checksum`` over the rest of the content refuses a file
that was edited by hand.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import warnings
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np

import casemix
from casemix._io import write_json
from casemix.data.cohort import Cohort, build_cohort
from casemix.data.design import Design
from casemix.data.records import Records
from casemix.data.spec import Spec, load_spec, spec_from_dict
from casemix.errors import InputError, ModelFileError, ModelVersionWarning, plural
from casemix.survival import BaselineHazard, ChiSquareTest, CoxFit, concordance, fit_cox

__all__ = [
    "FORMAT_VERSION",
    "MODEL_KIND",
    "PATH_NODES",
    "ReferenceData",
    "ReferenceModel",
    "fit_reference",
    "group_terms",
    "model_from_dict",
    "path_contributions",
    "reference_data",
    "resolve_analysis",
]

FORMAT_VERSION = 2
"""2: ``casemix_reference`` holds the follow-up weighted anchor (``anchor``); 1 held per-group
log-mean-exp values, which are not the reference population's mean risk and are refused."""
MODEL_KIND = "casemix reference model"
PATH_NODES = 32


@dataclass(frozen=True, eq=False)
class ReferenceData:
    """What a reference fit is computed from.

    Attributes
    ----------
    cohort : Cohort
        The reference population with its follow-up (time, event).
    design : Design
    X : ndarray, shape (n, p)
        Design matrix, columns ``design.columns``.
    time, event : ndarray, shape (n,)
    strata : ndarray, shape (n,) or None
    """

    cohort: Cohort
    design: Design
    X: np.ndarray
    time: np.ndarray
    event: np.ndarray
    strata: np.ndarray | None

    def fingerprint(self) -> str:
        """Return the sha256 of the fitting data (time, event, design matrix, strata, columns)."""
        digest = hashlib.sha256()
        digest.update(json.dumps(list(self.design.columns)).encode())
        for array in (self.time, self.event.astype(np.int8), self.X):
            digest.update(np.ascontiguousarray(array, dtype=array.dtype))  # no bytes copy
        if self.strata is not None:
            digest.update(json.dumps([str(s) for s in self.strata]).encode())
        return digest.hexdigest()


def reference_data(
    records: Records,
    spec: Spec,
    outcome: str,
    horizon_days: int,
    cutoff,
    window=None,
    design: Design | None = None,
) -> ReferenceData:
    """Build the reference population's follow-up and design matrix.

    ``design=None`` learns the encoding from these records; pass a model's design to reuse it.
    """
    cohort = build_cohort(records, outcome, horizon_days, cutoff, window)
    if design is None:
        design = Design.fit(cohort.frame, spec)
    return ReferenceData(
        cohort=cohort,
        design=design,
        X=design.transform(cohort.frame),
        time=cohort.frame["time"].to_numpy(dtype=float),
        event=cohort.frame["event"].to_numpy(dtype=np.int8),
        strata=design.strata(cohort.frame),
    )


@dataclass(frozen=True, repr=False, eq=False)
class ReferenceModel:
    """A fitted reference model: everything needed to compute expected events for a cohort.

    Attributes
    ----------
    spec : Spec
    design : Design
    fit : CoxFit
        Its baselines are at x = ``fit.center`` (the reference population's means).
    outcome : str
    horizon_days : int
    cutoff : datetime.date
    window : tuple of (date or None, date or None)
    fingerprint : str
        sha256 of the fitting data (see :meth:`ReferenceData.fingerprint`).
    concordance : float
        Harrell's C of the linear predictor on the fitting data.
    casemix_version : str
        Version that fitted the model.
    group_offsets : tuple of float
        Per covariate group (in the order of first appearance in ``design.groups``), the
        case-mix anchor: the group's share (by `path_contributions`) of the reference
        population's own follow-up weighted log mean relative risk,
        log(sum_i H_i exp(lp_i) / sum_i H_i) with H_i the baseline cumulative hazard at
        recipient i's own follow-up. They sum to that log mean risk, so the reference
        population as a whole has a case-mix factor of exactly 1, and every group's
        contribution for it is 0 (see casemix.evaluation.explain).
    """

    spec: Spec
    design: Design
    fit: CoxFit
    outcome: str
    horizon_days: int
    cutoff: dt.date
    window: tuple
    fingerprint: str
    concordance: float
    casemix_version: str
    group_offsets: tuple[float, ...]

    def __repr__(self) -> str:
        fit = self.fit
        return (
            f"<ReferenceModel {self.outcome} at {self.horizon_days} days: {len(fit.names)} "
            f"terms, {plural(fit.n, 'recipient')}, {plural(fit.n_events, 'event')}, cut-off "
            f"{self.cutoff.isoformat()}, fingerprint {self.fingerprint[:12]}>"
        )

    def matrices(self, cohort: Cohort) -> tuple[np.ndarray, np.ndarray | None]:
        """Return the design matrix and strata of a cohort under this model's frozen design."""
        return self.design.transform(cohort.frame), self.design.strata(cohort.frame)

    def expected_events(self, cohort: Cohort) -> np.ndarray:
        """Return each recipient's expected events at his or her own follow-up time."""
        X, strata = self.matrices(cohort)
        return self.fit.expected_events(cohort.frame["time"].to_numpy(dtype=float), X, strata)

    def to_dict(self) -> dict[str, Any]:
        """Return the JSON content of the model file (without its checksum)."""
        return {
            "format_version": FORMAT_VERSION,
            "kind": MODEL_KIND,
            "casemix_version": self.casemix_version,
            "outcome": self.outcome,
            "horizon_days": self.horizon_days,
            "cutoff": self.cutoff.isoformat(),
            "window": [None if d is None else d.isoformat() for d in self.window],
            "spec": self.spec.to_dict(),
            "design": self.design.to_dict(),
            "coefficients": _coefficients_dict(self.fit),
            "baseline": [
                _baseline_dict(s, b)
                for s, b in zip(self.fit.strata_levels, self.fit.baselines, strict=True)
            ],
            "fit": _facts_dict(self.fit, self.concordance),
            "casemix_reference": {
                "groups": list(dict.fromkeys(self.design.groups)),
                "anchor": list(self.group_offsets),
                "of": "per group, its path share of log(sum H exp(lp) / sum H) over the "
                "reference population (H: baseline cumulative hazard at own follow-up)",
            },
            "fingerprint": {
                "sha256": self.fingerprint,
                "of": "time, event, design matrix and strata of the fitting data",
            },
        }

    def save(self, path: str | Path) -> Path:
        """Write the model as JSON (atomic), with a checksum over its content."""
        content = self.to_dict()
        content["checksum"] = _checksum(content)
        return write_json(path, content)

    @classmethod
    def load(cls, path: str | Path) -> ReferenceModel:
        """Read a model file written by :meth:`save`.

        Raises
        ------
        ModelFileError
            Unreadable file, unknown ``format_version``, a checksum that does not match (the
            file was edited), or missing fields.
        """
        path = Path(path)
        content = _read_json(path)
        return model_from_dict(content, where=str(path))


def group_terms(design: Design, fit: CoxFit, X: np.ndarray) -> tuple[list[str], np.ndarray]:
    """Split each row's log relative risk (x - center) . beta over covariate groups.

    Returns
    -------
    groups : list of str
        Covariate groups in the order of first appearance in ``design.groups``.
    terms : ndarray, shape (n, len(groups))
        Row sums equal (x - center) . beta.
    """
    groups = list(dict.fromkeys(design.groups))
    member = np.array([[g == name for g in design.groups] for name in groups], dtype=float)
    # (x - center) . (coef per group), without an n x p temporary
    weights = fit.coef[:, None] * member.T
    terms = X @ weights
    terms -= fit.center @ weights
    return groups, terms


def path_contributions(hazard: np.ndarray, terms: np.ndarray) -> np.ndarray:
    """Split log(sum_i H_i exp(lp_i) / sum_i H_i) over covariate groups (Aumann-Shapley).

    With lp_i = sum_g terms_ig, group g's share is the integral from s = 0 to 1 of the
    H_i exp(s lp_i)-weighted mean of terms_ig; the shares are symmetric in the groups and sum
    to the log ratio exactly. The integral is taken by Gauss-Legendre quadrature with
    ``PATH_NODES`` nodes (error far below 1e-10 for this smooth integrand). Adding a constant
    c_g to a group's terms adds c_g to its share (the weights do not change).

    Parameters
    ----------
    hazard : ndarray, shape (n,)
        H_i >= 0, not all 0.
    terms : ndarray, shape (n, groups)

    Returns
    -------
    ndarray, shape (groups,)

    References
    ----------
    Aumann, R. J. & Shapley, L. S. (1974). Values of Non-Atomic Games. Princeton University
    Press (the path value used for the split).
    """
    nodes, weights = np.polynomial.legendre.leggauss(PATH_NODES)
    nodes, weights = (nodes + 1) / 2, weights / 2
    lp = terms.sum(axis=1)
    share = np.zeros(terms.shape[1])
    for node, weight in zip(nodes, weights, strict=True):  # one node at a time: O(n) memory
        exponent = node * lp
        path = hazard * np.exp(exponent - exponent.max())
        share += weight * (path @ terms) / path.sum()
    return share


def _read_json(path: Path) -> dict:
    try:
        content = json.loads(path.read_text(encoding="utf-8"))
    except OSError as exc:
        raise ModelFileError(f"cannot read model file {path}: {exc.strerror}") from exc
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ModelFileError(
            f"model file {path} is not valid JSON ({exc}); give a file written by `casemix fit`"
        ) from exc
    if not isinstance(content, dict):
        raise ModelFileError(f"model file {path} does not hold a JSON object")
    return content


def model_from_dict(content: dict, *, where: str = "model") -> ReferenceModel:
    """Rebuild a :class:`ReferenceModel` from the JSON content of a model file."""
    version = content.get("format_version")
    if version != FORMAT_VERSION:
        raise ModelFileError(
            f"{where}: model format_version {version!r} is not supported by casemix "
            f"{casemix.__version__} (it reads format_version {FORMAT_VERSION}); refit the model "
            "with this version or install the casemix version that wrote it"
        )
    stored = content.get("checksum")
    body = {key: value for key, value in content.items() if key != "checksum"}
    if stored != _checksum(body):
        raise ModelFileError(
            f"{where}: the checksum does not match the content: the file was changed after "
            "it was written; refit the model instead of editing the file"
        )
    if body.get("casemix_version") != casemix.__version__:
        warnings.warn(
            f"{where} was written by casemix {body.get('casemix_version')}, this is "
            f"{casemix.__version__}; results should agree, but refit to be sure",
            ModelVersionWarning,
            stacklevel=3,
        )
    try:
        return _model(body)
    except (KeyError, TypeError, ValueError) as exc:
        raise ModelFileError(f"{where}: malformed model file ({exc!r}); refit the model") from exc


def _model(body: dict) -> ReferenceModel:
    coefficients = body["coefficients"]
    facts = body["fit"]
    baselines = body["baseline"]
    fit = CoxFit(
        coef=np.asarray(coefficients["coef"], dtype=float),
        cov=np.asarray(coefficients["cov"], dtype=float).reshape(len(coefficients["coef"]), -1),
        se=np.asarray(coefficients["se"], dtype=float),
        names=tuple(coefficients["names"]),
        center=np.asarray(coefficients["center"], dtype=float),
        loglik=float(facts["loglik"]),
        loglik_null=float(facts["loglik_null"]),
        n=int(facts["n"]),
        n_events=int(facts["events"]),
        n_iter=int(facts["n_iter"]),
        converged=bool(facts["converged"]),
        ties=str(facts["ties"]),
        wald_test=ChiSquareTest(**facts["wald_test"]),
        score_test=ChiSquareTest(**facts["score_test"]),
        lr_test=ChiSquareTest(**facts["lr_test"]),
        strata_levels=tuple(b["stratum"] for b in baselines),
        baselines=tuple(
            BaselineHazard(
                times=np.asarray(b["times"], dtype=float),
                cumhaz=np.asarray(b["cumhaz"], dtype=float),
                last_time=float(b["last_time"]),
            )
            for b in baselines
        ),
    )
    return ReferenceModel(
        spec=spec_from_dict(body["spec"]),
        design=Design.from_dict(body["design"]),
        fit=fit,
        outcome=str(body["outcome"]),
        horizon_days=int(body["horizon_days"]),
        cutoff=dt.date.fromisoformat(body["cutoff"]),
        window=tuple(None if d is None else dt.date.fromisoformat(d) for d in body["window"]),
        fingerprint=str(body["fingerprint"]["sha256"]),
        concordance=float(facts["concordance"]),
        casemix_version=str(body["casemix_version"]),
        group_offsets=tuple(float(v) for v in body["casemix_reference"]["anchor"]),
    )


def _checksum(body: dict) -> str:
    text = json.dumps(body, sort_keys=True, separators=(",", ":"), allow_nan=False)
    return hashlib.sha256(text.encode("utf-8")).hexdigest()


def _coefficients_dict(fit: CoxFit) -> dict[str, Any]:
    return {
        "names": list(fit.names),
        "coef": fit.coef.tolist(),
        "se": fit.se.tolist(),
        "cov": fit.cov.tolist(),
        "center": fit.center.tolist(),
    }


def _baseline_dict(stratum, baseline: BaselineHazard) -> dict[str, Any]:
    return {
        "stratum": stratum,
        "times": baseline.times.tolist(),
        "cumhaz": baseline.cumhaz.tolist(),
        "last_time": baseline.last_time,
        "at": "x = coefficients.center (the reference population's covariate means)",
    }


def _test_dict(test: ChiSquareTest) -> dict[str, Any]:
    return {"statistic": test.statistic, "df": test.df, "p_value": test.p_value}


def _facts_dict(fit: CoxFit, c_index: float) -> dict[str, Any]:
    return {
        "n": fit.n,
        "events": fit.n_events,
        "ties": fit.ties,
        "loglik": fit.loglik,
        "loglik_null": fit.loglik_null,
        "concordance": c_index,
        "converged": fit.converged,
        "n_iter": fit.n_iter,
        "lr_test": _test_dict(fit.lr_test),
        "wald_test": _test_dict(fit.wald_test),
        "score_test": _test_dict(fit.score_test),
    }


def _as_date(value, what: str) -> dt.date:
    if isinstance(value, dt.datetime):
        return value.date()
    if isinstance(value, dt.date):
        return value
    try:
        return dt.date.fromisoformat(str(value))
    except ValueError as exc:
        raise InputError(f"{what} {value!r} is not a date; write it as YYYY-MM-DD") from exc


def resolve_analysis(spec: Spec, horizon_days, cutoff, window) -> tuple[int, dt.date, tuple]:
    """Fill the horizon, cut-off and window from the spec's [analysis] table where not given."""
    horizon_days = horizon_days if horizon_days is not None else spec.analysis.horizon_days
    if horizon_days is None or int(horizon_days) <= 0:
        raise InputError(
            "no horizon: give horizon_days (e.g. 365) or set [analysis] horizon_days in the spec"
        )
    cutoff = cutoff if cutoff is not None else spec.analysis.cutoff
    if cutoff is None:
        raise InputError(
            "no cut-off: give the date data are complete to (e.g. --cutoff 2025-06-30) or set "
            "[analysis] cutoff in the spec"
        )
    if window is None:
        window = spec.analysis.window
    window = tuple(None if d is None else _as_date(d, "window date") for d in window)
    return int(horizon_days), _as_date(cutoff, "cut-off"), window


def _check_horizon_support(time: np.ndarray, horizon_days: int, records: Records) -> None:
    if len(time) and time.max() >= horizon_days:
        return
    longest = f"{time.max():g} days" if len(time) else "none (no recipient is left)"
    raise InputError(
        f"the reference population of '{records.source}' cannot support a horizon of "
        f"{horizon_days} days: its longest follow-up is {longest} and none of its "
        f"{plural(len(time), 'recipient')} was followed to day {horizon_days}, so the "
        f"baseline hazard "
        "would stop short of the horizon. Choose a horizon the reference follow-up reaches, "
        "or a reference population with longer follow-up (a later cut-off)."
    )


def fit_reference(
    records: Records,
    spec: Spec | str | Path | None = None,
    outcome: str = "graft_failure",
    horizon_days: int | None = None,
    cutoff=None,
    ties: str = "efron",
    window=None,
) -> ReferenceModel:
    """Fit the reference model on a reference population's records.

    Parameters
    ----------
    records : Records
        The reference population (from :func:`casemix.read_records`).
    spec : Spec or path, optional
        Default: the spec the records were read with.
    outcome : str
        An outcome named in the spec.
    horizon_days : int, optional
        Follow-up length that counts (default: the spec's [analysis] horizon_days).
    cutoff : date, optional
        Date the reference data are complete to (default: the spec's [analysis] cutoff).
    ties : {"efron", "breslow"}
    window : (date or None, date or None), optional
        Transplant-date window of the reference population.

    Raises
    ------
    InputError
        No reference recipient was followed to the horizon: the baseline hazard would stop
        short of it and every expected count at the horizon would be an extrapolation.
    """
    if spec is None:
        spec = records.spec
    elif not isinstance(spec, Spec):
        spec = load_spec(spec)
    spec.outcome(outcome)
    horizon_days, cutoff, window = resolve_analysis(spec, horizon_days, cutoff, window)
    data = reference_data(records, spec, outcome, horizon_days, cutoff, window)
    _check_horizon_support(data.time, horizon_days, records)
    fit = fit_cox(
        data.time, data.event, data.X, ties=ties, strata=data.strata, names=data.design.columns
    )
    c_index = concordance(data.time, data.event, fit.linear_predictor(data.X)).c
    _, terms = group_terms(data.design, fit, data.X)
    expected = fit.expected_events(data.time, data.X, data.strata)
    offsets = path_contributions(expected / np.exp(terms.sum(axis=1)), terms)
    return ReferenceModel(
        spec=spec,
        design=data.design,
        fit=fit,
        outcome=outcome,
        horizon_days=horizon_days,
        cutoff=cutoff,
        window=window,
        fingerprint=data.fingerprint(),
        concordance=float(c_index),
        casemix_version=casemix.__version__,
        group_offsets=tuple(float(v) for v in offsets),
    )

