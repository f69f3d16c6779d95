"""The study spec: which columns hold what, the outcomes, the covariates, the analysis window
and the study plan (the analyses of a periodic evaluation).

A spec is written in TOML (format documented in ``docs/spec.md``) and read into a frozen
:class:`Spec`. :meth:`Spec.to_dict` gives a plain JSON-able dict that
:func:`spec_from_dict` turns back into an equal :class:`Spec`; saved reference models store it.
Every key is checked: an unknown key, an unknown kind or an option that does not belong to a
kind is a :class:`~casemix.errors.SpecError` that names the key and, where one is close, the
key that was probably meant.
"""

from __future__ import annotations

import datetime as dt
import difflib
import sys
from collections.abc import Iterable, Mapping
from dataclasses import dataclass, field
from pathlib import Path
from types import MappingProxyType
from typing import Any

from casemix.errors import SpecError

if sys.version_info >= (3, 11):
    import tomllib
else:  # pragma: no cover - Python 3.10 only
    import tomli as tomllib

__all__ = [
    "DEFAULT_COHORT_DAYS",
    "DEFAULT_MISSING_TOKENS",
    "KINDS",
    "MISSING_POLICIES",
    "SPLINE_KNOT_QUANTILES",
    "Analysis",
    "Columns",
    "Covariate",
    "Outcome",
    "PlanAnalysis",
    "Spec",
    "closest",
    "load_spec",
    "spec_from_dict",
]

KINDS = ("numeric", "binary", "categorical", "spline")
MISSING_POLICIES = ("exclude", "indicator", "category", "median")

#: Reference-population quantiles at which spline knots are placed, by number of knots: the
#: placement usually recommended for restricted (natural) cubic splines (Harrell, Regression
#: Modeling Strategies, 2nd ed., 2015, section 2.4.6).
SPLINE_KNOT_QUANTILES: Mapping[int, tuple[float, ...]] = MappingProxyType(
    {
        3: (0.10, 0.50, 0.90),
        4: (0.05, 0.35, 0.65, 0.95),
        5: (0.05, 0.275, 0.50, 0.725, 0.95),
        6: (0.05, 0.23, 0.41, 0.59, 0.77, 0.95),
        7: (0.025, 0.1833, 0.3417, 0.50, 0.6583, 0.8167, 0.975),
    }
)

_TOP_KEYS = ("columns", "outcomes", "covariates", "strata", "analysis", "analyses", "records")
_COLUMN_KEYS = ("recipient", "program", "transplant_date", "last_seen")
_COVARIATE_KEYS = ("kind", "missing", "reference", "knots", "lower", "upper", "column", "other")
_ANALYSIS_KEYS = ("cutoff", "horizon_days", "cohort_from", "cohort_to")
_PLAN_KEYS = ("outcome", "horizon_days", "cohort_from", "cohort_to", "reference_from",
              "reference_to")
_PLAN_DATES = _PLAN_KEYS[2:]
#: Characters an analysis name may hold: it names a folder of the study's output.
_NAME_CHARS = frozenset("abcdefghijklmnopqrstuvwxyzABCDEFGHIJKLMNOPQRSTUVWXYZ0123456789_-")
#: Length in days of a plan analysis' default cohort window (two years: our choice, see
#: docs/spec.md "The study plan").
DEFAULT_COHORT_DAYS = 730
_RECORDS_KEYS = ("date_format", "delimiter", "decimal", "missing", "normalise_programs")

#: Cell texts read as an empty cell (after stripping spaces), unless ``[records] missing``
#: gives another list. Matched exactly: "none", "-", "?" or "." are not in it.
DEFAULT_MISSING_TOKENS = ("", "NA", "N/A", "n/a", "NULL", "null", "NaN", "nan", "#N/A")
# Options that only make sense for some kinds; giving them elsewhere is a mistake to report.
_KIND_OPTIONS = {
    "reference": ("categorical",),
    "other": ("categorical",),
    "knots": ("spline",),
    "lower": ("numeric", "spline"),
    "upper": ("numeric", "spline"),
}
_POLICY_KINDS = {
    "exclude": KINDS,
    "indicator": KINDS,
    "category": ("categorical",),
    "median": ("numeric", "spline"),
}
# Characters that would make design column names such as ``age:spline2`` ambiguous.
_RESERVED_NAME_CHARS = "[]:"


def closest(name: str, choices: Iterable[str]) -> str:
    """Return a ``" (closest: 'a', 'b')"`` hint for messages, or ``""`` if nothing is close.

    Parameters
    ----------
    name : str
        The name that was not found.
    choices : iterable of str
        The names that exist.
    """
    matches = difflib.get_close_matches(name, [str(c) for c in choices], n=3, cutoff=0.6)
    if not matches:
        return ""
    return " (closest: " + ", ".join(repr(m) for m in matches) + ")"


@dataclass(frozen=True)
class Columns:
    """Names of the record columns with a fixed role.

    Attributes
    ----------
    recipient : str
        Unique id of one transplant.
    program : str
        The program the recipient belongs to.
    transplant_date : str
        Date of the transplant (start of follow-up).
    last_seen : str
        Last date the recipient was known alive (a follow-up contact of any kind, or the
        death date); see docs/spec.md for what it implies for each outcome.
    death : str or None, default None
        The date of death, when the file has one: records with a contact or an event after
        it are excluded (``casemix.data.cohort``).
    """

    recipient: str
    program: str
    transplant_date: str
    last_seen: str
    death: str | None = None


@dataclass(frozen=True)
class Outcome:
    """An outcome: the event is the earliest of ``dates`` (names of date columns).

    ``censor_at`` names dates that end follow-up without counting (for example the death
    date in death-censored graft failure); an event dated on or before the earliest of them
    still counts.
    """

    name: str
    dates: tuple[str, ...]
    censor_at: tuple[str, ...] = ()

    def definition(self, death: str | None = None) -> str:
        """The outcome in plain words, for reports.

        Parameters
        ----------
        death : str, optional
            The spec's death column, to say how death is handled.
        """
        text = f"{self.name.replace('_', ' ')} = the earliest of {', '.join(self.dates)}"
        if self.censor_at:
            text += f"; follow-up ends without an event at {', '.join(self.censor_at)}"
        if death is not None and death in self.dates and len(self.dates) > 1:
            text += " (a death counts as an event: all-cause)"
        elif death is not None and death in self.censor_at:
            text += " (death-censored: a death ends follow-up and competes with the event)"
        return text


@dataclass(frozen=True)
class Covariate:
    """One covariate of the case-mix model.

    Attributes
    ----------
    name : str
        Name used in design column names and reports.
    column : str
        Source column in the records file (defaults to ``name``).
    kind : {"numeric", "binary", "categorical", "spline"}
    missing : {"exclude", "indicator", "category", "median"}, default "exclude"
        What to do with a missing value: exclude the recipient, add a ``name:missing``
        indicator column, treat missing as its own level (categorical only) or fill the
        reference median (numeric and spline only).
    reference : str or None
        Reference level of a categorical covariate (default: its most frequent level in the
        reference population).
    knots : int, default 4
        Number of spline knots (3 to 7); spline only.
    lower, upper : float or None
        Plausible bounds (inclusive); a value outside them excludes the recipient.
    other : str or None
        Level that categorical levels unseen in the reference population are mapped to.
    """

    name: str
    column: str
    kind: str
    missing: str = "exclude"
    reference: str | None = None
    knots: int = 4
    lower: float | None = None
    upper: float | None = None
    other: str | None = None


@dataclass(frozen=True)
class Analysis:
    """Analysis settings; each may be overridden by the caller (all optional).

    Attributes
    ----------
    cutoff : datetime.date or None
        Data are complete to this day (inclusive).
    horizon_days : int or None
        Follow-up that counts, in days.
    cohort_from, cohort_to : datetime.date or None
        Inclusive transplant-date window of the evaluation cohort.
    """

    cutoff: dt.date | None = None
    horizon_days: int | None = None
    cohort_from: dt.date | None = None
    cohort_to: dt.date | None = None

    @property
    def window(self) -> tuple[dt.date | None, dt.date | None]:
        """The transplant-date window ``(cohort_from, cohort_to)``."""
        return (self.cohort_from, self.cohort_to)


@dataclass(frozen=True)
class PlanAnalysis:
    """One analysis of the study plan (``[analyses.NAME]``; see docs/spec.md).

    Attributes
    ----------
    name : str
        The user's name of the analysis (letters, digits, ``_`` and ``-``: it names a folder).
    outcome : str
        An outcome of the spec.
    horizon_days : int
        Follow-up that counts, in days.
    cohort_from, cohort_to : datetime.date or None
        Inclusive transplant-date window of the evaluation cohort; ``None`` takes the
        default of :meth:`cohort_window`.
    reference_from, reference_to : datetime.date or None
        Inclusive transplant-date window of the reference population; ``None`` is open.
    """

    name: str
    outcome: str
    horizon_days: int
    cohort_from: dt.date | None = None
    cohort_to: dt.date | None = None
    reference_from: dt.date | None = None
    reference_to: dt.date | None = None

    @property
    def reference_window(self) -> tuple[dt.date | None, dt.date | None]:
        """The reference population's transplant-date window ``(from, to)`` (open ends None)."""
        return (self.reference_from, self.reference_to)

    def cohort_window(self, cutoff: dt.date) -> tuple[dt.date, dt.date]:
        """The cohort window at the evaluation cut-off, defaults filled in.

        ``cohort_to`` defaults to ``horizon_days`` days before the cut-off (every cohort
        recipient could have been followed for the whole horizon), ``cohort_from`` to
        :data:`DEFAULT_COHORT_DAYS` days before the window's end (inclusive: a window of
        that many days).

        Raises
        ------
        SpecError
            The window ends after the cut-off or starts after it ends (naming the analysis).
        """
        key = f"analyses.{self.name}"
        end = self.cohort_to or cutoff - dt.timedelta(days=self.horizon_days)
        start = self.cohort_from or end - dt.timedelta(days=DEFAULT_COHORT_DAYS - 1)
        if end > cutoff:
            raise SpecError(
                f"analysis '{self.name}': '{key}.cohort_to' ({end}) is after the cut-off "
                f"{cutoff}: transplants after the cut-off cannot be evaluated; end the window "
                "on or before the cut-off."
            )
        if start > end:
            given = "given" if self.cohort_to else f"{self.horizon_days} days before the cut-off"
            raise SpecError(
                f"analysis '{self.name}': the cohort window starts {start} ('{key}.cohort_from')"
                f" after it ends {end} ({given}); move cohort_from earlier or set cohort_to."
            )
        return (start, end)

    def check_reference(self, cutoff: dt.date) -> None:
        """Refuse a reference window that cannot support the horizon at this cut-off.

        Raises
        ------
        SpecError
            The reference window ends after the cut-off, or no reference recipient could be
            followed to the horizon (its first transplant day plus the horizon is after the
            cut-off); the message names the analysis.
        """
        key = f"analyses.{self.name}"
        start, end = self.reference_window
        if end is not None and end > cutoff:
            raise SpecError(
                f"analysis '{self.name}': '{key}.reference_to' ({end}) is after the reference "
                f"cut-off {cutoff}; end the reference window on or before the cut-off."
            )
        if start is not None and start + dt.timedelta(days=self.horizon_days) > cutoff:
            raise SpecError(
                f"analysis '{self.name}': a horizon of {self.horizon_days} days cannot be "
                f"supported by a reference population transplanted from {start} with data "
                f"complete to {cutoff}: no reference recipient can have been followed that "
                "long. Choose an earlier reference_from, a shorter horizon or a later cut-off."
            )


@dataclass(frozen=True)
class Spec:
    """A study spec (see ``docs/spec.md``).

    Attributes
    ----------
    columns : Columns
    outcomes : Mapping[str, Outcome]
        Read-only mapping, in the order of the file.
    covariates : tuple of Covariate
        In the order of the file (this is the order of the design columns).
    strata : str or None
        Column whose levels get separate baseline hazards.
    analysis : Analysis
    analyses : Mapping[str, PlanAnalysis]
        The study plan, in the order of the file (read-only; empty without ``[analyses]``).
    date_format : str or None
        ``strftime`` format of the date columns; ``None`` means ISO 8601.
    delimiter : str
        Field separator of a CSV file (one character), default ``","``.
    decimal : str
        Decimal mark of numbers in a CSV file, ``"."`` (default) or ``","``.
    missing_tokens : tuple of str
        Cell texts read as empty (default :data:`DEFAULT_MISSING_TOKENS`).
    normalise_programs : bool
        Upper-case program codes and remove their spaces before use (default False).
    path : pathlib.Path or None
        File the spec was read from; not part of equality or of :meth:`to_dict`.
    """

    columns: Columns
    outcomes: Mapping[str, Outcome]
    covariates: tuple[Covariate, ...] = ()
    strata: str | None = None
    analysis: Analysis = field(default_factory=Analysis)
    date_format: str | None = None
    path: Path | None = field(default=None, compare=False)
    delimiter: str = ","
    decimal: str = "."
    missing_tokens: tuple[str, ...] = DEFAULT_MISSING_TOKENS
    normalise_programs: bool = False
    analyses: Mapping[str, PlanAnalysis] = field(default_factory=lambda: MappingProxyType({}))

    @property
    def where(self) -> str:
        """``"spec file 'x.toml'"`` or ``"the spec"``, for messages."""
        return f"spec file '{self.path}'" if self.path is not None else "the spec"

    def covariate(self, name: str) -> Covariate:
        """Return the covariate called ``name`` (SpecError naming the closest if absent)."""
        for cov in self.covariates:
            if cov.name == name:
                return cov
        names = [c.name for c in self.covariates]
        raise SpecError(
            f"{self.where} has no covariate '{name}'{closest(name, names)}; "
            f"declare it as [covariates.{name}]."
        )

    def outcome(self, name: str) -> Outcome:
        """Return the outcome called ``name`` (SpecError naming the closest if absent)."""
        if name in self.outcomes:
            return self.outcomes[name]
        raise SpecError(
            f"{self.where} has no outcome '{name}'{closest(name, self.outcomes)}; "
            f"declared outcomes: {', '.join(self.outcomes)}. Add [outcomes.{name}] with "
            "`dates = [...]` or choose a declared one."
        )

    @property
    def event_columns(self) -> tuple[str, ...]:
        """Every date column used by any outcome (events, then ends of follow-up), each once."""
        dates = [d for o in self.outcomes.values() for d in (*o.dates, *o.censor_at)]
        return tuple(dict.fromkeys(dates))

    @property
    def date_columns(self) -> tuple[str, ...]:
        """Transplant date, last seen, the outcome date columns and the death date, each once."""
        death = (self.columns.death,) if self.columns.death else ()
        cols = (self.columns.transplant_date, self.columns.last_seen, *self.event_columns, *death)
        return tuple(dict.fromkeys(cols))

    @property
    def required_columns(self) -> tuple[str, ...]:
        """Every column the records file must have, each once."""
        role = (self.columns.recipient, self.columns.program)
        cov = tuple(c.column for c in self.covariates)
        strata = (self.strata,) if self.strata else ()
        return tuple(dict.fromkeys((*role, *self.date_columns, *cov, *strata)))

    def to_dict(self) -> dict[str, Any]:
        """Return a plain JSON-able dict in the TOML layout (dates as ISO strings).

        ``spec_from_dict(spec.to_dict()) == spec`` and the dict round trip is exact.
        """
        out: dict[str, Any] = {
            "columns": {k: getattr(self.columns, k) for k in _COLUMN_KEYS},
            "outcomes": {n: _outcome_dict(o) for n, o in self.outcomes.items()},
            # A list, so that the order (the design's column order) survives JSON writers
            # that sort keys; spec_from_dict reads both this and the TOML table form.
            "covariates": [{"name": c.name, **_covariate_dict(c)} for c in self.covariates],
        }
        if self.columns.death is not None:
            out["columns"]["death"] = self.columns.death
        if self.strata is not None:
            out["strata"] = {"column": self.strata}
        analysis = {k: getattr(self.analysis, k) for k in _ANALYSIS_KEYS}
        analysis = {
            k: (v.isoformat() if isinstance(v, dt.date) else v)
            for k, v in analysis.items()
            if v is not None
        }
        if analysis:
            out["analysis"] = analysis
        if self.analyses:
            # A list, like the covariates, so that the plan's order survives sorted JSON.
            out["analyses"] = [_plan_dict(a) for a in self.analyses.values()]
        records = {
            "date_format": self.date_format,
            "delimiter": None if self.delimiter == "," else self.delimiter,
            "decimal": None if self.decimal == "." else self.decimal,
            "missing": (None if self.missing_tokens == DEFAULT_MISSING_TOKENS
                        else list(self.missing_tokens)),
            "normalise_programs": self.normalise_programs or None,
        }
        records = {k: v for k, v in records.items() if v is not None}
        if records:
            out["records"] = records
        return out


def _outcome_dict(outcome: Outcome) -> dict[str, Any]:
    """The keys of one outcome table (``censor_at`` only when it is used)."""
    out: dict[str, Any] = {"dates": list(outcome.dates)}
    if outcome.censor_at:
        out["censor_at"] = list(outcome.censor_at)
    return out


def _plan_dict(plan: PlanAnalysis) -> dict[str, Any]:
    """The keys of one analysis of the plan, with a ``name`` key (unset windows left out)."""
    out: dict[str, Any] = {"name": plan.name, "outcome": plan.outcome,
                           "horizon_days": plan.horizon_days}
    for key in _PLAN_DATES:
        value = getattr(plan, key)
        if value is not None:
            out[key] = value.isoformat()
    return out


def _covariate_dict(cov: Covariate) -> dict[str, Any]:
    """The keys of one covariate table, with only the options that apply to its kind."""
    out: dict[str, Any] = {"kind": cov.kind, "missing": cov.missing, "column": cov.column}
    for key in ("reference", "lower", "upper", "other"):
        value = getattr(cov, key)
        if value is not None:
            out[key] = value
    if cov.kind == "spline":
        out["knots"] = cov.knots
    return out


def load_spec(path: str | Path) -> Spec:
    """Read a study spec from a TOML file.

    Parameters
    ----------
    path : str or pathlib.Path
        The ``.toml`` file.

    Returns
    -------
    Spec
        With ``path`` set to the file read.

    Raises
    ------
    SpecError
        The file is missing, is not valid TOML, or its content is not a valid spec.
    """
    path = Path(path)
    try:
        with path.open("rb") as handle:
            data = tomllib.load(handle)
    except FileNotFoundError:
        raise SpecError(f"spec file '{path}' does not exist; check the path.") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise SpecError(f"spec file '{path}' cannot be read ({exc}).") from None
    except tomllib.TOMLDecodeError as exc:
        raise SpecError(f"spec file '{path}' is not valid TOML: {exc}. Fix the syntax.") from None
    return spec_from_dict(data, path=path)


def spec_from_dict(d: Mapping[str, Any], *, path: str | Path | None = None) -> Spec:
    """Build a :class:`Spec` from a dict in the TOML layout (as parsed, or from to_dict).

    Parameters
    ----------
    d : mapping
        Tables ``columns``, ``outcomes``, ``covariates`` and optional ``strata``,
        ``analysis``, ``analyses``, ``records``. Dates may be ``datetime.date`` or ISO strings.
    path : str or pathlib.Path, optional
        Where the dict was read from, for messages.

    Raises
    ------
    SpecError
        Naming the offending key.
    """
    where = f"spec file '{path}'" if path is not None else "the spec"
    _check_keys(_table(d, "", where), _TOP_KEYS, "", where)
    for required in ("columns", "outcomes"):
        if required not in d:
            raise SpecError(f"{where} has no [{required}] table; add it (see docs/spec.md).")
    outcomes = _outcomes(_table(d["outcomes"], "outcomes", where), where)
    analysis = _analysis(_table(d.get("analysis", {}), "analysis", where), where)
    spec = Spec(
        columns=_columns(_table(d["columns"], "columns", where), where),
        outcomes=outcomes,
        covariates=_covariates(d.get("covariates", {}), where),
        strata=_strata(d.get("strata"), where),
        analysis=analysis,
        analyses=_plan(d.get("analyses", {}), outcomes, analysis.cutoff, where),
        path=None if path is None else Path(path),
        **_records_format(_table(d.get("records", {}), "records", where), where),
    )
    _check_roles(spec, where)
    return spec


def _table(value: Any, key: str, where: str) -> Mapping[str, Any]:
    if not isinstance(value, Mapping):
        raise SpecError(f"{where}: '{key}' must be a table ([{key}]), not {value!r}.")
    return value


def _check_keys(table: Mapping[str, Any], allowed: Iterable[str], key: str, where: str) -> None:
    allowed = tuple(allowed)
    for name in table:
        if name not in allowed:
            full = f"{key}.{name}" if key else name
            raise SpecError(
                f"{where}: unknown key '{full}'{closest(name, allowed)}; "
                f"allowed keys{' in [' + key + ']' if key else ''}: {', '.join(allowed)}."
            )


def _text(value: Any, key: str, where: str) -> str:
    if not isinstance(value, str) or not value.strip():
        raise SpecError(f"{where}: '{key}' must be a non-empty string, not {value!r}.")
    return value


def _columns(table: Mapping[str, Any], where: str) -> Columns:
    _check_keys(table, (*_COLUMN_KEYS, "death"), "columns", where)
    missing = [k for k in _COLUMN_KEYS if k not in table]
    if missing:
        raise SpecError(
            f"{where}: [columns] lacks {', '.join(missing)}; name the records column for "
            f"each of {', '.join(_COLUMN_KEYS)}."
        )
    death = table.get("death")
    return Columns(
        **{k: _text(table[k], f"columns.{k}", where) for k in _COLUMN_KEYS},
        death=None if death is None else _text(death, "columns.death", where),
    )


def _outcomes(table: Mapping[str, Any], where: str) -> Mapping[str, Outcome]:
    if not table:
        raise SpecError(f"{where}: [outcomes] is empty; declare at least one [outcomes.NAME].")
    out = {}
    for name, body in table.items():
        key = f"outcomes.{name}"
        body = _table(body, key, where)
        _check_keys(body, ("dates", "censor_at"), key, where)
        dates = body.get("dates")
        if not isinstance(dates, (list, tuple)) or not dates:
            raise SpecError(
                f"{where}: '{key}.dates' must be a non-empty list of date column names, "
                f"for example dates = [\"death_date\"]."
            )
        names = tuple(_text(v, f"{key}.dates", where) for v in dates)
        censor = body.get("censor_at", [])
        if not isinstance(censor, (list, tuple)):
            raise SpecError(
                f"{where}: '{key}.censor_at' must be a list of date column names, for example "
                f"censor_at = [\"death_date\"]."
            )
        ends = tuple(dict.fromkeys(_text(v, f"{key}.censor_at", where) for v in censor))
        both = sorted(set(ends) & set(names))
        if both:
            raise SpecError(
                f"{where}: {', '.join(both)} is in both '{key}.dates' and '{key}.censor_at'; "
                "a date either counts as the event or ends follow-up without counting."
            )
        out[name] = Outcome(name=name, dates=tuple(dict.fromkeys(names)), censor_at=ends)
    return MappingProxyType(out)


def _covariates(value: Any, where: str) -> tuple[Covariate, ...]:
    """Covariates from ``[covariates.NAME]`` tables or a list of tables with a ``name`` key."""
    if isinstance(value, Mapping):
        return tuple(_covariate(name, body, where) for name, body in value.items())
    if not isinstance(value, (list, tuple)):
        raise SpecError(f"{where}: 'covariates' must be a table ([covariates.NAME]), not "
                        f"{value!r}.")
    out = []
    for i, body in enumerate(value):
        body = dict(_table(body, f"covariates[{i}]", where))
        name = _text(body.pop("name", None), f"covariates[{i}].name", where)
        if any(c.name == name for c in out):
            raise SpecError(f"{where}: covariate '{name}' is declared twice; keep one.")
        out.append(_covariate(name, body, where))
    return tuple(out)


def _covariate(name: str, body: Any, where: str) -> Covariate:
    key = f"covariates.{name}"
    if any(ch in name for ch in _RESERVED_NAME_CHARS):
        raise SpecError(f"{where}: covariate name '{name}' may not contain any of '[', ']', ':'.")
    body = _table(body, key, where)
    _check_keys(body, _COVARIATE_KEYS, key, where)
    kind = _choice(body.get("kind"), KINDS, f"{key}.kind", where)
    missing = _choice(body.get("missing", "exclude"), MISSING_POLICIES, f"{key}.missing", where)
    for option, kinds in _KIND_OPTIONS.items():
        if option in body and kind not in kinds:
            raise SpecError(
                f"{where}: '{key}.{option}' applies only to kind {' or '.join(kinds)}, "
                f"not '{kind}'; remove it."
            )
    if kind not in _POLICY_KINDS[missing]:
        raise SpecError(
            f"{where}: '{key}.missing' = \"{missing}\" applies only to kind "
            f"{' or '.join(_POLICY_KINDS[missing])}; use \"indicator\" or \"exclude\"."
        )
    lower = _bound(body.get("lower"), f"{key}.lower", where)
    upper = _bound(body.get("upper"), f"{key}.upper", where)
    if lower is not None and upper is not None and lower >= upper:
        raise SpecError(f"{where}: '{key}.lower' ({lower}) must be below '{key}.upper' ({upper}).")
    return Covariate(
        name=name,
        column=_text(body.get("column", name), f"{key}.column", where),
        kind=kind,
        missing=missing,
        reference=_optional_level(body.get("reference"), f"{key}.reference", where),
        knots=_knots(body.get("knots", 4), f"{key}.knots", where),
        lower=lower,
        upper=upper,
        other=_optional_level(body.get("other"), f"{key}.other", where),
    )


def _choice(value: Any, choices: tuple[str, ...], key: str, where: str) -> str:
    if value is None:
        raise SpecError(f"{where}: '{key}' is required; one of {', '.join(choices)}.")
    if value not in choices:
        raise SpecError(
            f"{where}: '{key}' = {value!r} is not one of {', '.join(choices)}"
            f"{closest(str(value), choices)}."
        )
    return value


def _bound(value: Any, key: str, where: str) -> float | None:
    if value is None:
        return None
    if isinstance(value, bool) or not isinstance(value, (int, float)):
        raise SpecError(f"{where}: '{key}' must be a number, not {value!r}.")
    return float(value)


def _optional_level(value: Any, key: str, where: str) -> str | None:
    return None if value is None else _text(value, key, where)


def _knots(value: Any, key: str, where: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value not in SPLINE_KNOT_QUANTILES:
        raise SpecError(
            f"{where}: '{key}' must be a whole number from 3 to 7, not {value!r}."
        )
    return value


def _strata(value: Any, where: str) -> str | None:
    if value is None:
        return None
    table = _table(value, "strata", where)
    _check_keys(table, ("column",), "strata", where)
    if "column" not in table:
        raise SpecError(f"{where}: [strata] needs `column = \"...\"` (or remove [strata]).")
    return _text(table["column"], "strata.column", where)


def _date(value: Any, key: str, where: str) -> dt.date | None:
    if value is None:
        return None
    if isinstance(value, dt.datetime):
        raise SpecError(f"{where}: '{key}' must be a date such as 2025-06-30, without a time.")
    if isinstance(value, dt.date):
        return value
    if isinstance(value, str):
        try:
            return dt.date.fromisoformat(value)
        except ValueError:
            pass
    raise SpecError(f"{where}: '{key}' = {value!r} is not a date; write it as 2025-06-30.")


def _analysis(table: Mapping[str, Any], where: str) -> Analysis:
    _check_keys(table, _ANALYSIS_KEYS, "analysis", where)
    horizon = table.get("horizon_days")
    if horizon is not None and (
        isinstance(horizon, bool) or not isinstance(horizon, int) or horizon <= 0
    ):
        raise SpecError(
            f"{where}: 'analysis.horizon_days' must be a positive whole number of days, "
            f"not {horizon!r}."
        )
    analysis = Analysis(
        cutoff=_date(table.get("cutoff"), "analysis.cutoff", where),
        horizon_days=horizon,
        cohort_from=_date(table.get("cohort_from"), "analysis.cohort_from", where),
        cohort_to=_date(table.get("cohort_to"), "analysis.cohort_to", where),
    )
    start, end = analysis.window
    if start is not None and end is not None and start > end:
        raise SpecError(
            f"{where}: 'analysis.cohort_from' ({start}) is after 'analysis.cohort_to' ({end})."
        )
    return analysis


def _plan(value: Any, outcomes: Mapping[str, Outcome], cutoff: dt.date | None,
          where: str) -> Mapping[str, PlanAnalysis]:
    """The study plan from ``[analyses.NAME]`` tables or a list of tables with a ``name``."""
    if isinstance(value, Mapping):
        items = [(name, body) for name, body in value.items()]
    elif isinstance(value, (list, tuple)):
        items = []
        for i, body in enumerate(value):
            body = dict(_table(body, f"analyses[{i}]", where))
            items.append((_text(body.pop("name", None), f"analyses[{i}].name", where), body))
    else:
        raise SpecError(f"{where}: 'analyses' must be a table ([analyses.NAME]), not {value!r}.")
    out: dict[str, PlanAnalysis] = {}
    for name, body in items:
        if name in out:
            raise SpecError(f"{where}: analysis '{name}' is declared twice; keep one.")
        out[name] = _plan_analysis(name, body, outcomes, cutoff, where)
    return MappingProxyType(out)


def _plan_analysis(name: str, body: Any, outcomes: Mapping[str, Outcome],
                   cutoff: dt.date | None, where: str) -> PlanAnalysis:
    key = f"analyses.{name}"
    if not name or not set(name) <= _NAME_CHARS:
        raise SpecError(
            f"{where}: analysis name '{name}' may hold only letters, digits, '_' and '-' "
            "(it names the analysis' folder), for example [analyses.graft_1y]."
        )
    body = _table(body, key, where)
    _check_keys(body, _PLAN_KEYS, key, where)
    for required in ("outcome", "horizon_days"):
        if required not in body:
            raise SpecError(f"{where}: [{key}] lacks '{required}'; every analysis needs an "
                            "outcome and horizon_days.")
    outcome = _text(body["outcome"], f"{key}.outcome", where)
    if outcome not in outcomes:
        raise SpecError(
            f"{where}: '{key}.outcome' = {outcome!r} is not an outcome of the spec"
            f"{closest(outcome, outcomes)}; declared outcomes: {', '.join(outcomes)}."
        )
    horizon = body["horizon_days"]
    if isinstance(horizon, bool) or not isinstance(horizon, int) or horizon <= 0:
        raise SpecError(f"{where}: '{key}.horizon_days' must be a positive whole number of "
                        f"days, not {horizon!r}.")
    dates = {k: _date(body.get(k), f"{key}.{k}", where) for k in _PLAN_DATES}
    for side in ("cohort", "reference"):
        start, end = dates[f"{side}_from"], dates[f"{side}_to"]
        if start is not None and end is not None and start > end:
            raise SpecError(
                f"{where}: '{key}.{side}_from' ({start}) is after '{key}.{side}_to' ({end})."
            )
    plan = PlanAnalysis(name=name, outcome=outcome, horizon_days=horizon, **dates)
    if cutoff is not None:
        plan.cohort_window(cutoff)
        plan.check_reference(cutoff)
    return plan


def _records_format(table: Mapping[str, Any], where: str) -> dict[str, Any]:
    """The ``[records]`` table: how the file is written (see docs/spec.md)."""
    _check_keys(table, _RECORDS_KEYS, "records", where)
    delimiter = table.get("delimiter", ",")
    if not isinstance(delimiter, str) or len(delimiter) != 1 or delimiter in "\"\r\n":
        raise SpecError(
            f"{where}: 'records.delimiter' = {delimiter!r} must be one character such as "
            "\",\", \";\" or \"\\t\"."
        )
    decimal = table.get("decimal", ".")
    if decimal not in (".", ","):
        raise SpecError(f"{where}: 'records.decimal' = {decimal!r} must be \".\" or \",\".")
    if decimal == delimiter:
        raise SpecError(
            f"{where}: 'records.decimal' and 'records.delimiter' are both {decimal!r}; with a "
            "decimal comma the fields are usually separated by \";\"."
        )
    tokens = table.get("missing", DEFAULT_MISSING_TOKENS)
    if isinstance(tokens, str) or not all(isinstance(t, str) for t in tokens):
        raise SpecError(
            f"{where}: 'records.missing' must be a list of texts such as [\"\", \"NA\", \"-\"]."
        )
    normalise = table.get("normalise_programs", False)
    if not isinstance(normalise, bool):
        raise SpecError(f"{where}: 'records.normalise_programs' must be true or false.")
    return {
        "date_format": _date_format(table, where),
        "delimiter": delimiter,
        "decimal": decimal,
        "missing_tokens": tuple(dict.fromkeys(t.strip() for t in tokens)),
        "normalise_programs": normalise,
    }


def _date_format(table: Mapping[str, Any], where: str) -> str | None:
    value = table.get("date_format")
    if value is None:
        return None
    if "%" not in _text(value, "records.date_format", where):
        raise SpecError(
            f"{where}: 'records.date_format' = {value!r} has no strftime codes; "
            "write it like \"%d/%m/%Y\"."
        )
    return value


def _check_roles(spec: Spec, where: str) -> None:
    """One records column may play only one role (events may be shared between outcomes)."""
    uses: dict[str, list[str]] = {}
    for role in _COLUMN_KEYS:
        uses.setdefault(getattr(spec.columns, role), []).append(f"columns.{role}")
    for column in spec.event_columns:
        uses.setdefault(column, []).append("an outcome date")
    if spec.columns.death is not None and spec.columns.death not in spec.event_columns:
        uses.setdefault(spec.columns.death, []).append("columns.death")
    for cov in spec.covariates:
        uses.setdefault(cov.column, []).append(f"covariates.{cov.name}")
    if spec.strata is not None:
        uses.setdefault(spec.strata, []).append("strata.column")
    for column, roles in uses.items():
        if len(roles) > 1:
            raise SpecError(
                f"{where}: column '{column}' is used as {' and as '.join(roles)}; a column may "
                "have one role only (a stratified model cannot also estimate a coefficient "
                "for its strata column)."
            )
