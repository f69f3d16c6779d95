"""The invented Lorran Valley Transplant Network: a seeded demo scenario with a known truth.

Everything here is made up: sixteen adult kidney programs coded ``LV01`` .. ``LV16``, a
reference population transplanted 2017-2021 (complete to 2022-12-31) and an evaluation cohort
transplanted 2022-2024 (complete to 2025-06-30). Covariates follow plausible distributions and
correlations; graft failure is drawn from a known Weibull proportional-hazards model whose
covariate effects are :data:`TRUE_LOG_HAZARD_RATIOS`, times a per-program hazard ratio
(``truth.true_hr`` in the cohort, a milder ``truth.reference_hr`` in the reference
population). A few records are broken on purpose (``DemoNetwork.planted``) so that the
validation story shows. One program's hazard rises part-way through the cohort period
(:data:`RISE`), for the monitoring story: from the rise date on, its recipients carry an
extra graft-loss hazard on top of the one drawn with everyone else's, drawn from a generator
of its own, so that every other record is the same as without the rise. Another program's
graft losses become more frequent late after the transplant (:data:`LATE`), for the study
plan: from one year after each transplant its recipients carry an extra graft-loss hazard
(drawn the same way, from a generator of its own), so it is like the others at 30 days and
at one year and has excess failures at three years.

Graft failure is the earliest of graft loss, re-transplant and death with a working graft.
The failure time comes from the all-cause hazard and its cause is drawn afterwards (older
recipients more often die with a working graft), so the all-cause graft-failure hazard is
exactly proportional. After a graft loss a recipient may be re-transplanted and may die later;
those dates are recorded as well, so ``death_date`` also serves the patient-death outcome.

The sampler is hand-written with numpy (vectorised; no library simulates this scenario):
``generate()`` takes well under a second.
"""

from __future__ import annotations

import datetime as dt
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from importlib import resources
from pathlib import Path
from types import MappingProxyType

import numpy as np
import pandas as pd
from scipy.special import expit

from casemix._io import atomic_write_text
from casemix.errors import InputError

__all__ = [
    "COHORT_CUTOFF",
    "COHORT_WINDOW",
    "COLUMNS",
    "LATE",
    "REFERENCE_CUTOFF",
    "REFERENCE_WINDOW",
    "RISE",
    "TRUE_LOG_HAZARD_RATIOS",
    "WEIBULL_SCALE_DAYS",
    "WEIBULL_SHAPE",
    "DemoNetwork",
    "generate",
    "write_demo",
]

REFERENCE_WINDOW = (dt.date(2017, 1, 1), dt.date(2021, 12, 31))
REFERENCE_CUTOFF = dt.date(2022, 12, 31)
COHORT_WINDOW = (dt.date(2022, 1, 1), dt.date(2024, 12, 31))
COHORT_CUTOFF = dt.date(2025, 6, 30)

#: Columns of both extracts, in file order.
COLUMNS = (
    "recipient_id",
    "program",
    "transplant_date",
    "last_seen_date",
    "graft_loss_date",
    "retransplant_date",
    "death_date",
    "recipient_age",
    "recipient_sex",
    "bmi",
    "diabetes",
    "dialysis_years",
    "previous_transplant",
    "cpra",
    "donor_type",
    "donor_age",
    "cold_ischaemia_hours",
    "hla_mismatches",
)
_DATE_COLUMNS = COLUMNS[2:7]
_EVENT_COLUMNS = COLUMNS[4:7]

#: True log hazard ratios of graft failure, per unit of each term. Numeric terms are per year,
#: kg/m2, point, hour or mismatch; ``donor_age_over_50`` is ``max(donor_age - 50, 0)``, so the
#: donor-age effect steepens from 0.008 to 0.033 per year above 50.
TRUE_LOG_HAZARD_RATIOS: Mapping[str, float] = MappingProxyType(
    {
        "recipient_age": 0.012,
        "recipient_sex[male]": 0.06,
        "bmi": 0.025,
        "diabetes": 0.35,
        "dialysis_years": 0.05,
        "previous_transplant": 0.30,
        "cpra": 0.005,
        "donor_type[living]": -0.40,
        "donor_age": 0.008,
        "donor_age_over_50": 0.025,
        "cold_ischaemia_hours": 0.012,
        "hla_mismatches": 0.06,
    }
)
# Values the terms are centred at, so that the Weibull baseline describes a typical recipient.
_CENTRE = MappingProxyType(
    {"recipient_age": 52.0, "bmi": 27.0, "dialysis_years": 3.0, "cpra": 10.0,
     "donor_age": 45.0, "cold_ischaemia_hours": 10.0, "hla_mismatches": 3.0}
)

#: Shape of the Weibull baseline (below 1: the hazard is highest soon after the transplant).
WEIBULL_SHAPE = 0.7
#: Scale of the Weibull baseline in days: cumulative hazard ``(t / scale) ** shape`` at the
#: centre of every term.
WEIBULL_SCALE_DAYS = 21_000.0

# The reference log hazard ratio of a program is this fraction of its cohort one, re-centred
# so that the network's reference population averages to 1 (the reference is everyone).
_REFERENCE_FRACTION = 0.4
_LOST_RATE = 0.03  # share of recipients lost to follow-up well before the cut-off
_REPORT_LAG_DAYS = 45  # the last routine contact falls up to this many days before the cut-off
_MISSING_RATE = MappingProxyType({"bmi": 0.03, "diabetes": 0.02, "cold_ischaemia_hours": 0.04})


@dataclass(frozen=True)
class _Profile:
    """How a program's recipients and donors differ from the network's."""

    age_shift: float = 0.0  # years added to the mean recipient age
    diabetes_shift: float = 0.0  # log-odds of diabetes
    living_shift: float = 0.0  # log-odds of a living donor
    donor_age_shift: float = 0.0  # years added to the mean deceased-donor age
    dialysis_factor: float = 1.0  # multiplies the years on dialysis
    previous_factor: float = 1.0  # multiplies the chance of a previous transplant


_TYPICAL = _Profile()
_HARD = _Profile(8.0, 0.8, -1.1, 7.0, 1.3, 1.4)
_EASY = _Profile(-12.0, -1.2, 1.8, -4.0, 0.6, 0.8)
_DIALYSIS_MISSING = 0.04
_DIALYSIS_MISSING_HIGH = 0.15


@dataclass(frozen=True)
class _Program:
    code: str
    n_reference: int
    n_cohort: int
    true_hr: float
    story: str
    profile: _Profile = _TYPICAL
    dialysis_missing: float = _DIALYSIS_MISSING


_NEAR = "typical case mix; true hazard ratio near 1"
_PROGRAMS = (
    _Program("LV01", 2750, 700, 1.00, "large program; " + _NEAR),
    _Program(
        "LV02", 1600, 380, 0.90,
        "typical case mix; true hazard ratio 0.9 until mid-2023, then graft failures twice "
        "as frequent from 2023-07-01: a rise part-way through the cohort period that the "
        "evaluation of the whole cohort hardly shows and monitoring picks up",
    ),
    _Program(
        "LV03", 1900, 460, 1.00,
        "hard case mix: older and diabetic recipients, older donors, few living donors; "
        "poor raw survival that the case mix explains (true hazard ratio 1.0)",
        _HARD,
    ),
    _Program(
        "LV04", 2200, 560, 0.60,
        "clearly favorable: about 40% fewer graft failures than its case mix predicts",
    ),
    _Program(
        "LV05", 2500, 650, 1.60,
        "easy case mix hides a real excess: young recipients, many living donors; raw "
        "survival close to the network's although the true hazard ratio is 1.6",
        _EASY,
    ),
    _Program("LV06", 1250, 300, 1.10, _NEAR),
    _Program(
        "LV07", 1000, 240, 0.85, _NEAR + "; years on dialysis often not recorded",
        dialysis_missing=_DIALYSIS_MISSING_HIGH,
    ),
    _Program(
        "LV08", 1700, 420, 1.05,
        "typical case mix; true hazard ratio 1.05 in the first year after the transplant, "
        "then graft losses four times as frequent: fine at 30 days and at one year, excess "
        "failures at three years",
    ),
    _Program(
        "LV09", 260, 62, 1.40,
        "small program (about 60 cohort recipients): a raised true hazard ratio that the data "
        "can hardly show; shrinkage matters",
    ),
    _Program("LV10", 1300, 330, 1.20, _NEAR),
    _Program("LV11", 750, 180, 0.95, _NEAR),
    _Program(
        "LV12", 1050, 260, 1.15, _NEAR + "; years on dialysis often not recorded",
        dialysis_missing=_DIALYSIS_MISSING_HIGH,
    ),
    _Program("LV13", 600, 150, 0.90, _NEAR),
    _Program(
        "LV14", 330, 78, 1.00,
        "small program (under 80 cohort recipients) with a true hazard ratio of 1: its raw "
        "O/E swings by chance; shrinkage matters",
    ),
    _Program("LV15", 480, 120, 1.10, _NEAR),
    _Program("LV16", 430, 110, 0.88, _NEAR),
)

@dataclass(frozen=True)
class _Rise:
    """A program whose graft-failure hazard is multiplied by ``factor`` from ``start`` on."""

    program: str
    start: dt.date
    factor: float
    stream: int  # second seed word of the rise's own generator: [seed, stream]


#: The cohort program whose hazard doubles part-way through the cohort period.
RISE = _Rise("LV02", dt.date(2023, 7, 1), 2.0, 2)


@dataclass(frozen=True)
class _Late:
    """A program whose graft-failure hazard is multiplied by ``factor`` from ``after_days``
    days after each transplant on."""

    program: str
    after_days: int
    factor: float
    stream: int  # second seed word of its own generator: [seed, stream]


#: The cohort program whose graft losses become four times as frequent after the first year.
LATE = _Late("LV08", 365, 4.0, 3)

_ROLES = ("reference", "cohort")
_EPOCH = dt.date(1970, 1, 1)


@dataclass(frozen=True, eq=False)
class DemoNetwork:
    """The generated demo network (invented data).

    Attributes
    ----------
    reference : pandas.DataFrame, shape (about 20 100, 18)
        The reference-population extract, one row per recipient, columns :data:`COLUMNS`.
        Dates are ``datetime64`` (``NaT`` when none), ``diabetes`` is nullable ``Int64``.
    cohort : pandas.DataFrame, shape (about 5 000, 18)
        The evaluation-cohort extract, same columns; recipient ids continue the reference's.
    truth : pandas.DataFrame, shape (16, 10)
        Per program: ``program``, ``true_hr`` (cohort hazard ratio against the network),
        ``recipients_reference``, ``recipients_cohort`` (rows in each file), ``story``,
        ``reference_hr`` (the milder hazard ratio used in the reference population),
        ``rise_from`` (the day the program's hazard rises, ``None`` for most) and
        ``rise_factor`` (how much it rises by; 1 for most), ``late_from_day`` (the day after
        each transplant from which the :data:`LATE` program's hazard is raised, ``None`` for
        the others) and ``late_factor`` (by how much; 1 for most).
    planted : pandas.DataFrame
        The records broken on purpose: ``role`` (``reference`` / ``cohort``),
        ``recipient_id``, ``problem`` and ``handling`` (``excluded`` or ``kept, warned``).
    spec_text, rules_text : str
        The study spec and the verdict rules (TOML) that fit these extracts.
    reference_window, cohort_window : tuple of datetime.date
        Inclusive transplant-date windows.
    reference_cutoff, cohort_cutoff : datetime.date
        The dates each extract is complete to.
    seed : int
        The seed it was generated from.
    """

    reference: pd.DataFrame
    cohort: pd.DataFrame
    truth: pd.DataFrame
    planted: pd.DataFrame
    spec_text: str
    rules_text: str
    reference_window: tuple[dt.date, dt.date]
    cohort_window: tuple[dt.date, dt.date]
    reference_cutoff: dt.date
    cohort_cutoff: dt.date
    seed: int


def generate(seed: int = 2026) -> DemoNetwork:
    """Generate the Lorran Valley demo network.

    Parameters
    ----------
    seed : int, default 2026
        Seed of the numpy random Generator; the same seed gives the same data, byte for byte.

    Returns
    -------
    DemoNetwork

    Raises
    ------
    InputError
        ``seed`` is not a non-negative whole number.
    """
    _check_seed(seed)
    rng = np.random.default_rng(seed)
    profiles = _program_profiles(rng)
    frames, planted = {}, []
    first_id = 1
    for role in _ROLES:
        frame, eta = _simulate(rng, role, profiles, first_id)
        first_id += len(frame)
        frames[role], marks = _plant_problems(rng, frame, role)
        planted.append(marks)
    cohort = _raise_hazard(frames["cohort"], eta, planted[-1], seed, RISE.program,
                           RISE.factor, RISE.stream, lambda tx: np.maximum(_day(RISE.start) - tx,
                                                                           0.0))
    frames["cohort"] = _raise_hazard(cohort, eta, planted[-1], seed, LATE.program, LATE.factor,
                                     LATE.stream, lambda tx: np.full(tx.shape,
                                                                     float(LATE.after_days)))
    return DemoNetwork(
        reference=frames["reference"],
        cohort=frames["cohort"],
        truth=_truth_table(frames),
        planted=pd.concat(planted, ignore_index=True),
        spec_text=_data_text("lorran_valley_spec.toml"),
        rules_text=_data_text("lorran_valley_rules.toml"),
        reference_window=REFERENCE_WINDOW,
        cohort_window=COHORT_WINDOW,
        reference_cutoff=REFERENCE_CUTOFF,
        cohort_cutoff=COHORT_CUTOFF,
        seed=int(seed),
    )


def write_demo(folder: str | Path, seed: int = 2026) -> dict[str, Path]:
    """Generate the demo network and write its four input files into ``folder``.

    Parameters
    ----------
    folder : str or pathlib.Path
        Created if missing; existing files of the same names are replaced (atomically).
    seed : int, default 2026

    Returns
    -------
    dict of str to pathlib.Path
        ``{"reference": .../reference.csv, "cohort": .../cohort.csv, "spec": .../spec.toml,
        "rules": .../rules.toml}``.

    Raises
    ------
    InputError
        ``folder`` is an existing file or cannot be created, or ``seed`` is invalid.
    """
    folder = _make_folder(Path(folder))
    network = generate(seed)
    texts = {
        "reference": ("reference.csv", _csv_text(network.reference)),
        "cohort": ("cohort.csv", _csv_text(network.cohort)),
        "spec": ("spec.toml", network.spec_text),
        "rules": ("rules.toml", network.rules_text),
    }
    paths = {}
    for role, (name, text) in texts.items():
        paths[role] = folder / name
        atomic_write_text(paths[role], text)
    return paths


def _check_seed(seed: object) -> None:
    if isinstance(seed, bool) or not isinstance(seed, (int, np.integer)) or seed < 0:
        raise InputError(
            f"demo seed must be a non-negative whole number, not {seed!r}; "
            "pass for example seed=2026."
        )


def _make_folder(folder: Path) -> Path:
    if folder.exists() and not folder.is_dir():
        raise InputError(
            f"demo output folder '{folder}' is an existing file; give the path of a folder "
            "(it is created if missing)."
        )
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise InputError(
            f"demo output folder '{folder}' cannot be created ({exc.strerror}); "
            "choose a writable location."
        ) from None
    return folder


def _data_text(name: str) -> str:
    return resources.files("casemix").joinpath("data", name).read_text(encoding="utf-8")


def _csv_text(frame: pd.DataFrame) -> str:
    return frame.to_csv(index=False, date_format="%Y-%m-%d", lineterminator="\n")


# --- simulation ---------------------------------------------------------------------------


def _day(date: dt.date) -> int:
    return (date - _EPOCH).days


def _program_profiles(rng: np.random.Generator) -> dict[str, np.ndarray]:
    """Per program (16,): its story profile plus a small random spread, as arrays."""
    jitter_sd = {"age_shift": 2.0, "diabetes_shift": 0.15, "living_shift": 0.3,
                 "donor_age_shift": 2.0}
    out = {}
    for name in _Profile.__dataclass_fields__:
        base = np.array([getattr(p.profile, name) for p in _PROGRAMS])
        spread = rng.normal(0.0, jitter_sd.get(name, 0.0), size=len(_PROGRAMS))
        out[name] = base + spread
    return out


def _simulate(
    rng: np.random.Generator, role: str, profiles: dict[str, np.ndarray], first_id: int
) -> pd.DataFrame:
    """One extract (reference or cohort), sorted by transplant date, ids from ``first_id``,
    and each row's true log relative hazard (program included) in the same order."""
    cohort = role == "cohort"
    sizes = [p.n_cohort if cohort else p.n_reference for p in _PROGRAMS]
    program = np.repeat(np.arange(len(_PROGRAMS)), sizes)
    start, end = COHORT_WINDOW if cohort else REFERENCE_WINDOW
    cutoff = COHORT_CUTOFF if cohort else REFERENCE_CUTOFF
    transplant = rng.integers(_day(start), _day(end) + 1, size=program.size).astype(float)
    row_profile = {name: values[program] for name, values in profiles.items()}
    covariates = _draw_recipients(rng, row_profile)
    covariates.update(_draw_donors(rng, covariates, row_profile))
    log_hr = np.log([p.true_hr for p in _PROGRAMS] if cohort else _reference_hr())
    eta = _linear_predictor(covariates) + log_hr[program]
    dates = _draw_outcomes(rng, transplant, eta, covariates["recipient_age"], _day(cutoff))
    _blank_missing(rng, covariates, program)
    frame = _assemble(program, transplant, dates, covariates)
    order = np.lexsort((program, transplant))  # by date, then program; stable
    frame = frame.iloc[order].reset_index(drop=True)
    ids = [f"R{i:06d}" for i in range(first_id, first_id + len(frame))]
    return frame.assign(recipient_id=ids)[list(COLUMNS)], eta[order]


def _reference_hr() -> np.ndarray:
    """Per program (16,): milder hazard ratios whose reference-weighted log mean is 0."""
    log_hr = _REFERENCE_FRACTION * np.log([p.true_hr for p in _PROGRAMS])
    weights = np.array([p.n_reference for p in _PROGRAMS], dtype=float)
    return np.exp(log_hr - np.average(log_hr, weights=weights))


def _draw_recipients(rng: np.random.Generator, prof: dict[str, np.ndarray]) -> dict:
    """Recipient covariates, each an array (n,), already rounded as recorded."""
    n = prof["age_shift"].size
    age = np.clip(np.rint(rng.normal(52.0 + prof["age_shift"], 13.0)), 18, 79)
    male = rng.random(n) < 0.62
    diabetes = rng.random(n) < expit(-1.3 + 0.045 * (age - 52.0) + prof["diabetes_shift"])
    bmi = np.round(np.clip(rng.normal(26.5 + 1.8 * diabetes, 4.3), 16.0, 45.0), 1)
    previous = rng.random(n) < 0.09 * prof["previous_factor"]
    # Sensitisation: mostly unsensitised; previous transplants and pregnancies raise it.
    sensitised = rng.random(n) < 0.28 + 0.45 * previous + 0.08 * ~male
    level = np.where(previous, rng.beta(2.5, 1.2, n), rng.beta(1.2, 2.0, n))
    cpra = np.where(sensitised, np.rint(100.0 * level), 0.0)
    return {"recipient_age": age, "male": male, "diabetes": diabetes.astype(float),
            "bmi": bmi, "previous_transplant": previous, "cpra": cpra}


def _draw_donors(rng: np.random.Generator, rec: dict, prof: dict[str, np.ndarray]) -> dict:
    """Donor and transplant covariates (n,), correlated with the recipient's."""
    age, n = rec["recipient_age"], rec["recipient_age"].size
    living_logit = -0.9 - 0.04 * (age - 52.0) - 0.8 * rec["previous_transplant"]
    living = rng.random(n) < expit(living_logit + prof["living_shift"])
    pre_emptive = living & (rng.random(n) < 0.35)  # living-donor transplants before dialysis
    dialysis = rng.gamma(np.where(living, 1.5, 2.0), np.where(living, 0.9, 1.9))
    dialysis = np.minimum(dialysis * prof["dialysis_factor"], 25.0)
    dialysis = np.where(pre_emptive, 0.0, np.round(dialysis, 1))
    # Deceased donors are allocated roughly by age: older recipients get older donors.
    deceased_age = rng.normal(46.0 + 0.35 * (age - 52.0) + prof["donor_age_shift"], 15.0)
    donor_age = np.where(
        living, np.clip(np.rint(rng.normal(42.0, 10.0, n)), 20, 72),
        np.clip(np.rint(deceased_age), 2, 85),
    )
    cold = np.where(
        living, np.clip(np.exp(rng.normal(np.log(2.2), 0.35, n)), 0.5, 8.0),
        np.clip(np.exp(rng.normal(np.log(13.0), 0.4, n)), 1.0, 40.0),
    )
    hla = np.where(living, rng.binomial(6, 0.42, n), rng.binomial(6, 0.58, n))
    return {"living": living, "dialysis_years": dialysis, "donor_age": donor_age,
            "cold_ischaemia_hours": np.round(cold, 1), "hla_mismatches": hla.astype(float)}


def _linear_predictor(cov: dict) -> np.ndarray:
    """Per recipient (n,): the true log relative hazard of graft failure (program excluded)."""
    beta = TRUE_LOG_HAZARD_RATIOS
    eta = (
        beta["recipient_sex[male]"] * cov["male"]
        + beta["diabetes"] * cov["diabetes"]
        + beta["previous_transplant"] * cov["previous_transplant"]
        + beta["donor_type[living]"] * cov["living"]
        + beta["donor_age_over_50"] * np.maximum(cov["donor_age"] - 50.0, 0.0)
    )
    for name, centre in _CENTRE.items():
        eta = eta + beta[name] * (cov[name] - centre)
    return eta


def _draw_outcomes(
    rng: np.random.Generator, transplant: np.ndarray, eta: np.ndarray, age: np.ndarray,
    cutoff: int,
) -> dict[str, np.ndarray]:
    """Event and last-seen days (n,) (NaN when none); only events before follow-up ends."""
    n = transplant.size
    # Inverse of the Weibull cumulative hazard (t / scale)^shape * exp(eta) at an Exp(1) draw.
    failure = transplant + np.floor(
        WEIBULL_SCALE_DAYS * (rng.exponential(size=n) * np.exp(-eta)) ** (1.0 / WEIBULL_SHAPE)
    )
    cause = rng.random(n)
    dies = cause < expit(-1.0 + 0.07 * (age - 52.0))  # death with a working graft
    regrafted = ~dies & (cause > 0.97)  # re-transplant without a recorded graft loss
    lost = ~dies & ~regrafted
    frailty = np.exp(0.05 * (age - 52.0))
    after = {  # days from graft failure to later events, by rate per year
        "death_after_loss": _waiting_days(rng, 0.08 * frailty),
        "regraft_after_loss": _waiting_days(rng, 0.12 * np.ones(n)),
        "death_after_regraft": _waiting_days(rng, 0.02 * frailty),
    }
    death_after = np.where(lost, after["death_after_loss"], after["death_after_regraft"])
    death = failure + np.where(dies, 0.0, death_after)
    regraft_after_loss = np.where(
        after["regraft_after_loss"] < after["death_after_loss"], after["regraft_after_loss"],
        np.nan,
    )
    regraft = np.where(regrafted, failure, np.where(lost, failure + regraft_after_loss, np.nan))
    loss = np.where(lost, failure, np.nan)
    end = _followup_end(rng, transplant, cutoff)
    recorded = {
        name: np.where(days <= end, days, np.nan)
        for name, days in (("graft_loss_date", loss), ("retransplant_date", regraft),
                           ("death_date", death))
    }
    recorded["last_seen_date"] = np.where(np.isnan(recorded["death_date"]), end, death)
    return recorded


def _waiting_days(rng: np.random.Generator, rate_per_year: np.ndarray) -> np.ndarray:
    return np.ceil(365.25 * rng.exponential(size=rate_per_year.size) / rate_per_year)


def _followup_end(rng: np.random.Generator, transplant: np.ndarray, cutoff: int) -> np.ndarray:
    """Day follow-up ends (n,): last routine contact, or well before the cut-off if lost."""
    n = transplant.size
    routine = cutoff - rng.integers(0, _REPORT_LAG_DAYS + 1, size=n)
    lost = rng.random(n) < _LOST_RATE
    # Lost recipients are last seen at least 90 days before the cut-off.
    lost_at = transplant + np.floor(rng.uniform(0.03, 1.0, n) * (cutoff - transplant - 90))
    return np.where(lost, lost_at, routine)


def _blank_missing(rng: np.random.Generator, cov: dict, program: np.ndarray) -> None:
    """Blank covariates completely at random (dialysis years more often in two programs)."""
    rates = dict(_MISSING_RATE)
    rates["dialysis_years"] = np.array([p.dialysis_missing for p in _PROGRAMS])[program]
    for name, rate in rates.items():
        values = cov[name].astype(float)
        values[rng.random(program.size) < rate] = np.nan
        cov[name] = values


def _dates(days: np.ndarray) -> np.ndarray:
    """Whole days since 1970-01-01 (float, NaN for no date) as datetimes, NaT for NaN.

    No float-to-datetime cast: pandas runs that one under ``np.errstate(over="raise")``, where
    a floating-point flag left over from earlier work can raise a FloatingPointError. The unit
    is the one pandas gives dates it parses (ns in pandas 2, us in pandas 3), as before.
    """
    days = np.asarray(days, dtype=float)
    missing = np.isnan(days)
    out = np.where(missing, 0, days).astype(np.int64).astype("datetime64[D]")
    out = out.astype(f"datetime64[{pd.DatetimeIndex(['1970-01-01']).unit}]")
    out[missing] = np.datetime64("NaT")
    return out


def _assemble(
    program: np.ndarray, transplant: np.ndarray, dates: dict, cov: dict
) -> pd.DataFrame:
    codes = np.array([p.code for p in _PROGRAMS], dtype=object)
    columns = {
        "program": codes[program],
        "transplant_date": _dates(transplant),
        **{name: _dates(dates[name]) for name in _DATE_COLUMNS[1:]},
        "recipient_age": cov["recipient_age"].astype(np.int64),
        "recipient_sex": np.where(cov["male"], "male", "female"),
        "bmi": cov["bmi"],
        "diabetes": pd.array(cov["diabetes"], dtype="Int64"),
        "dialysis_years": cov["dialysis_years"],
        "previous_transplant": cov["previous_transplant"].astype(np.int64),
        "cpra": cov["cpra"].astype(np.int64),
        "donor_type": np.where(cov["living"], "living", "deceased"),
        "donor_age": cov["donor_age"].astype(np.int64),
        "cold_ischaemia_hours": cov["cold_ischaemia_hours"],
        "hla_mismatches": cov["hla_mismatches"].astype(np.int64),
    }
    return pd.DataFrame(columns)


def _raise_hazard(
    frame: pd.DataFrame, eta: np.ndarray, planted: pd.DataFrame, seed: int, program: str,
    factor: float, stream: int, begins: Callable[[np.ndarray], np.ndarray],
) -> pd.DataFrame:
    """Give a program's recipients an extra graft loss from a day on (:data:`RISE`, :data:`LATE`).

    ``begins(tx)`` gives, per recipient (transplant day ``tx``), the day after the transplant
    the extra hazard starts. The extra hazard, (factor - 1) times the recipient's own, from
    that day on, competes with the failure already drawn: the earlier of the two is the
    failure, so the hazard from then on is ``factor`` times the one before. The draws come
    from a generator of their own (seeded ``[seed, stream]``), one per row of the program, and
    only the graft-loss dates of the program's recipients (planted records left alone) can
    change.
    """
    if factor == 1.0:
        return frame
    rng = np.random.default_rng([int(seed), stream])
    mine = (frame["program"] == program).to_numpy() & ~frame["recipient_id"].isin(
        planted["recipient_id"]
    ).to_numpy()
    draw = rng.exponential(size=int(mine.sum()))
    tx = _days_since_epoch(frame.loc[mine, "transplant_date"])
    start = begins(tx)
    # (u / scale)^shape - (start / scale)^shape = draw / ((factor - 1) exp(eta)), solved for u
    scaled = draw * np.exp(-eta[mine]) / (factor - 1.0) + (
        start / WEIBULL_SCALE_DAYS
    ) ** WEIBULL_SHAPE
    extra = tx + np.floor(WEIBULL_SCALE_DAYS * scaled ** (1.0 / WEIBULL_SHAPE))
    rows = frame.loc[mine]
    seen = _days_since_epoch(rows["last_seen_date"])
    earliest = _days_since_epoch(rows[list(_EVENT_COLUMNS)].min(axis=1))
    sooner = (extra <= seen) & (np.isnan(earliest) | (extra < earliest))
    frame = frame.copy()
    frame.loc[rows.index[sooner], "graft_loss_date"] = pd.to_datetime(extra[sooner], unit="D")
    return frame


def _days_since_epoch(dates: pd.Series) -> np.ndarray:
    return ((dates - pd.Timestamp(_EPOCH)) / pd.Timedelta(days=1)).to_numpy(dtype=float)


# --- planted problems ---------------------------------------------------------------------

# problem, how the records stage handles it, count in the reference, count in the cohort
_PROBLEMS = (
    ("event_before_transplant", "excluded", 1, 3),
    ("last_seen_before_transplant", "excluded", 1, 2),
    ("missing_program", "excluded", 1, 2),
    ("implausible_age", "excluded", 1, 2),
    ("transplant_after_cutoff", "excluded", 1, 2),
    ("death_after_last_seen", "kept, warned", 1, 3),
    ("last_seen_after_cutoff", "kept, warned", 1, 1),
)


def _plant_problems(
    rng: np.random.Generator, frame: pd.DataFrame, role: str
) -> tuple[pd.DataFrame, pd.DataFrame]:
    """Break a few records on purpose; return the frame and one row per broken record."""
    cutoff = pd.Timestamp(COHORT_CUTOFF if role == "cohort" else REFERENCE_CUTOFF)
    frame = frame.copy()
    used = np.zeros(len(frame), dtype=bool)
    marks = []
    for problem, handling, n_reference, n_cohort in _PROBLEMS:
        eligible = _ELIGIBLE.get(problem, _event_free)(frame, cutoff) & ~used
        rows = np.sort(rng.choice(np.flatnonzero(eligible), size=n_cohort if role == "cohort"
                                  else n_reference, replace=False))
        used[rows] = True
        _PLANT[problem](frame, rows, rng, cutoff)
        marks += [(role, frame.at[r, "recipient_id"], problem, handling) for r in rows]
    return frame, pd.DataFrame(marks, columns=["role", "recipient_id", "problem", "handling"])


def _event_free(frame: pd.DataFrame, cutoff: pd.Timestamp) -> np.ndarray:
    return frame[list(_EVENT_COLUMNS)].isna().all(axis=1).to_numpy()


def _any_row(frame: pd.DataFrame, cutoff: pd.Timestamp) -> np.ndarray:
    return np.ones(len(frame), dtype=bool)


def _late_death(frame: pd.DataFrame, cutoff: pd.Timestamp) -> np.ndarray:
    survived = frame["death_date"] - frame["transplant_date"]
    return (survived > pd.Timedelta(days=90)).to_numpy()


def _seen_to_cutoff(frame: pd.DataFrame, cutoff: pd.Timestamp) -> np.ndarray:
    recent = frame["last_seen_date"] >= cutoff - pd.Timedelta(days=_REPORT_LAG_DAYS)
    return _event_free(frame, cutoff) & recent.to_numpy()


def _days(rng: np.random.Generator, low: int, high: int, size: int) -> pd.TimedeltaIndex:
    return pd.to_timedelta(rng.integers(low, high, size=size), unit="D")


def _event_before(frame, rows, rng, cutoff) -> None:
    shift = _days(rng, 3, 60, rows.size)
    frame.loc[rows, "graft_loss_date"] = frame.loc[rows, "transplant_date"] - shift


def _seen_before(frame, rows, rng, cutoff) -> None:
    shift = _days(rng, 1, 30, rows.size)
    frame.loc[rows, "last_seen_date"] = frame.loc[rows, "transplant_date"] - shift


def _no_program(frame, rows, rng, cutoff) -> None:
    frame.loc[rows, "program"] = np.nan  # what a CSV reader gives for an empty field


def _bad_age(frame, rows, rng, cutoff) -> None:
    frame.loc[rows, "recipient_age"] = np.resize([7, 130], rows.size)


def _after_cutoff(frame, rows, rng, cutoff) -> None:
    frame.loc[rows, "transplant_date"] = cutoff + _days(rng, 5, 90, rows.size)
    frame.loc[rows, "last_seen_date"] = frame.loc[rows, "transplant_date"]


def _death_after_seen(frame, rows, rng, cutoff) -> None:
    frame.loc[rows, "last_seen_date"] = frame.loc[rows, "death_date"] - _days(
        rng, 30, 90, rows.size
    )


def _seen_after_cutoff(frame, rows, rng, cutoff) -> None:
    frame.loc[rows, "last_seen_date"] = cutoff + _days(rng, 20, 60, rows.size)


_Plant = Callable[[pd.DataFrame, np.ndarray, np.random.Generator, pd.Timestamp], None]
_PLANT: Mapping[str, _Plant] = MappingProxyType(
    {
        "event_before_transplant": _event_before,
        "last_seen_before_transplant": _seen_before,
        "missing_program": _no_program,
        "implausible_age": _bad_age,
        "transplant_after_cutoff": _after_cutoff,
        "death_after_last_seen": _death_after_seen,
        "last_seen_after_cutoff": _seen_after_cutoff,
    }
)
_ELIGIBLE = MappingProxyType(
    {
        "missing_program": _any_row,
        "implausible_age": _any_row,
        "death_after_last_seen": _late_death,
        "last_seen_after_cutoff": _seen_to_cutoff,
    }
)


def _truth_table(frames: dict[str, pd.DataFrame]) -> pd.DataFrame:
    codes = [p.code for p in _PROGRAMS]
    counts = {
        role: frames[role]["program"].value_counts().reindex(codes, fill_value=0).to_numpy()
        for role in _ROLES
    }
    return pd.DataFrame(
        {
            "program": codes,
            "true_hr": [p.true_hr for p in _PROGRAMS],
            "recipients_reference": counts["reference"],
            "recipients_cohort": counts["cohort"],
            "story": [p.story for p in _PROGRAMS],
            "reference_hr": np.round(_reference_hr(), 4),
            "rise_from": [RISE.start.isoformat() if p.code == RISE.program else None
                          for p in _PROGRAMS],
            "rise_factor": [RISE.factor if p.code == RISE.program else 1.0 for p in _PROGRAMS],
            "late_from_day": [LATE.after_days if p.code == LATE.program else None
                              for p in _PROGRAMS],
            "late_factor": [LATE.factor if p.code == LATE.program else 1.0 for p in _PROGRAMS],
        }
    )
