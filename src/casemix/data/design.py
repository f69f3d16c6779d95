"""Covariates to a numeric matrix: an encoding learnt once on the reference population.

:meth:`Design.fit` learns, from the reference population, the levels and reference level of
each categorical covariate, the spline knots, the medians used to fill missing values and the
observed range of each numeric covariate; the result is frozen and serialises to JSON
(:meth:`Design.to_dict` / :meth:`Design.from_dict`). :meth:`Design.transform` gives the same
columns, in the same order, for any cohort.

Columns, per covariate in spec order:

* numeric and binary: the value itself, raw scale (no centring: the Cox fit centres
  internally, and a coefficient stays "per unit");
* categorical: one 0/1 column ``name[level]`` per level other than the reference, levels in
  sorted order;
* spline: a natural (restricted) cubic spline basis, ``name:spline1`` = the value itself, then
  ``name:spline2`` ... ``name:spline{K-1}`` for K knots placed at the reference-population
  quantiles :data:`casemix.data.spec.SPLINE_KNOT_QUANTILES` (``numpy.quantile``, linear
  interpolation). With ``c(u) = max(u, 0)^3``, non-linear column j = 1..K-2 is
  ``[c(x-t_j) - c(x-t_{K-1}) (t_K-t_j)/(t_K-t_{K-1}) + c(x-t_K) (t_{K-1}-t_j)/(t_K-t_{K-1})]
  / (t_K-t_1)^2``: cubic between the knots, linear beyond the outer ones, and divided by the
  squared knot span so it is on the scale of ``x``;
* missing values: ``missing = "indicator"`` adds ``name:missing`` (1 if missing) and fills the
  value with the reference median (numeric, spline), 0 (binary) or the reference level
  (categorical); ``"category"`` adds a level ``missing``; ``"median"`` fills the reference
  median. An indicator or a ``missing`` level exists only if the reference population had
  missing values: a cohort with missing values the reference never had is an error.

The basis is hand-written (a few lines of numpy) because patsy and formulaic are not
run-time dependencies and their column order and parametrisation differ from the one above.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from casemix.data.records import clean_text, format_rows, is_text_column
from casemix.data.spec import SPLINE_KNOT_QUANTILES, Covariate, Spec, closest
from casemix.errors import InputError, ModelFileError, SpecError, plural

__all__ = ["FORMAT_VERSION", "MISSING_LEVEL", "Design", "Term", "natural_spline_basis"]

FORMAT_VERSION = 1
#: Level that ``missing = "category"`` gives to missing values.
MISSING_LEVEL = "missing"


def natural_spline_basis(x: np.ndarray, knots: np.ndarray) -> np.ndarray:
    """Natural cubic spline basis with the linear part first (formula in the module docstring).

    Parameters
    ----------
    x : numpy.ndarray, shape (n,)
    knots : numpy.ndarray, shape (K,)
        Strictly increasing, K >= 3.

    Returns
    -------
    numpy.ndarray, shape (n, K - 1)
        Column 0 is ``x``; columns 1..K-2 are the scaled non-linear terms.
    """
    x = np.asarray(x, dtype=float)
    t = np.asarray(knots, dtype=float)
    last, prev = t[-1], t[-2]

    def cube(u: np.ndarray) -> np.ndarray:
        return np.maximum(u, 0.0) ** 3

    tail_last, tail_prev = cube(x - last), cube(x - prev)
    columns = [x]
    for tj in t[:-2]:
        term = cube(x - tj) - tail_prev * (last - tj) / (last - prev)
        columns.append((term + tail_last * (prev - tj) / (last - prev)) / (last - t[0]) ** 2)
    return np.column_stack(columns)


@dataclass(frozen=True)
class Term:
    """The learnt encoding of one covariate.

    Attributes
    ----------
    name, column, kind, missing : str
        As in the spec's :class:`~casemix.data.spec.Covariate`.
    levels : tuple of str
        Categorical only: the reference level first, then the other levels sorted.
    other : str or None
        Categorical only: the level unseen levels are mapped to.
    knots : tuple of float
        Spline only.
    fill : float or None
        Value that replaces a missing value (numeric, spline, binary).
    indicator : bool
        Whether a ``name:missing`` column exists.
    minimum, maximum : float or None
        Observed range in the reference population (numeric and spline).
    """

    name: str
    column: str
    kind: str
    missing: str
    levels: tuple[str, ...] = ()
    other: str | None = None
    knots: tuple[float, ...] = ()
    fill: float | None = None
    indicator: bool = False
    minimum: float | None = None
    maximum: float | None = None

    @property
    def columns(self) -> tuple[str, ...]:
        """Design column names of this covariate."""
        if self.kind == "categorical":
            names = [f"{self.name}[{level}]" for level in self.levels[1:]]
        elif self.kind == "spline":
            names = [f"{self.name}:spline{j}" for j in range(1, len(self.knots))]
        else:
            names = [self.name]
        return (*names, *([f"{self.name}:missing"] if self.indicator else []))

    def encode(self, frame: pd.DataFrame) -> np.ndarray:
        """Columns of this covariate for ``frame``, shape (n, len(self.columns))."""
        series = _column(frame, self.column, self.name)
        if self.kind == "categorical":
            position, missing = self._levels_of(series)
            block = position[:, None] == np.arange(1, len(self.levels))[None, :]
        else:
            x = _numbers(series, self)
            missing = np.isnan(x)
            self._check_missing(series, missing, self.fill is not None)
            x = np.where(missing, self.fill if self.fill is not None else 0.0, x)
            block = natural_spline_basis(x, np.array(self.knots)) if self.knots else x[:, None]
        block = block.astype(float)
        if self.indicator:
            block = np.column_stack([block, missing.astype(float)])
        return block

    def _levels_of(self, series: pd.Series) -> tuple[np.ndarray, np.ndarray]:
        """Position in ``levels`` of each row's level (missing: the reference, 0; a level
        outside ``levels``: -1) and which rows are missing. Worked out once per distinct cell."""
        codes, text = _distinct_text(series)
        gone = np.array([t is None for t in text], dtype=bool)
        if self.missing == "category" and MISSING_LEVEL in self.levels:
            text = text.copy()
            text[gone] = MISSING_LEVEL
            gone = np.zeros(len(text), dtype=bool)
        missing = gone[codes]
        self._check_missing(series, missing, False)
        known = {level: i for i, level in enumerate(self.levels)}
        new = np.array([t is not None and t not in known for t in text], dtype=bool)
        unseen = new[codes]
        if unseen.any() and self.other is None:
            found = sorted(set(text[new]))
            raise InputError(
                f"covariate {self.name} (column '{self.column}') has "
                f"{'a level' if len(found) == 1 else 'levels'} the reference population does "
                f"not have: {', '.join(repr(v) for v in found[:5])} in "
                f"{format_rows(series.index[unseen])}. Known levels: "
                f"{', '.join(self.levels)}. Recode them, or declare "
                f"`other = \"...\"` in [covariates.{self.name}] and fit the reference model "
                "again (a fitted model keeps the spec it was fitted with)."
            )
        level = [self.other if n else (self.levels[0] if t is None else t)
                 for t, n in zip(text, new, strict=True)]
        position = np.array([known.get(v, -1) for v in level], dtype=np.int64)
        return position[codes], missing

    def _check_missing(self, series: pd.Series, missing: np.ndarray, filled: bool) -> None:
        if not missing.any() or self.indicator or filled:
            return
        why = (
            "its missing policy is \"exclude\" (read the data with read_records, which "
            "excludes such recipients)"
            if self.missing == "exclude"
            else "the reference population had no missing values of it, so the model has no "
            "term for them"
        )
        raise InputError(
            f"covariate {self.name} (column '{self.column}') is missing in "
            f"{format_rows(series.index[missing])}, and {why}. Fill the values or change "
            f"`missing` in [covariates.{self.name}] and fit the reference model again."
        )


@dataclass(frozen=True)
class Design:
    """A frozen covariate encoding (see the module docstring).

    Attributes
    ----------
    terms : tuple of Term
        One per covariate, in spec order.
    strata_column : str or None
    strata_levels : tuple of str
        Sorted strata labels seen in the reference population (empty without strata).
    """

    terms: tuple[Term, ...]
    strata_column: str | None = None
    strata_levels: tuple[str, ...] = ()

    @property
    def columns(self) -> tuple[str, ...]:
        """Design column names, shape (p,)."""
        return tuple(name for term in self.terms for name in term.columns)

    @property
    def groups(self) -> tuple[str, ...]:
        """Covariate name of each design column, shape (p,)."""
        return tuple(term.name for term in self.terms for _ in term.columns)

    @classmethod
    def fit(cls, frame: pd.DataFrame | Any, spec: Spec) -> Design:
        """Learn the encoding from the reference population.

        Parameters
        ----------
        frame : pandas.DataFrame, or Records / Cohort (their ``.frame`` is used)
            The reference population, covariates as :func:`~casemix.data.records.read_records`
            leaves them.
        spec : Spec

        Raises
        ------
        SpecError
            A declared reference or ``other`` level that does not occur.
        InputError
            No rows, a missing column, a covariate that does not vary, too few distinct
            values for the spline knots.
        """
        frame = getattr(frame, "frame", frame)
        if len(frame) == 0:
            raise InputError("the reference population has no recipients; nothing to fit.")
        terms = tuple(_fit_term(frame, cov, spec) for cov in spec.covariates)
        levels: tuple[str, ...] = ()
        if spec.strata is not None:
            labels = _strata_labels(frame, spec.strata)
            levels = tuple(sorted(labels.unique()))
        return cls(terms=terms, strata_column=spec.strata, strata_levels=levels)

    def transform(self, frame: pd.DataFrame | Any) -> np.ndarray:
        """The design matrix of ``frame``, shape (n, p), float64, columns :attr:`columns`.

        Raises
        ------
        InputError
            A missing column, a value that is not a number or not 0/1, a level unseen in the
            reference (without ``other``), a missing value the design has no term for.
        """
        frame = getattr(frame, "frame", frame)
        blocks, problems = self._encode(frame)
        if problems:
            raise InputError(_all_problems(problems))
        if not blocks:
            return np.zeros((len(frame), 0))
        return _side_by_side(blocks)

    def problems(self, frame: pd.DataFrame | Any) -> list[str]:
        """Every reason :meth:`transform` or :meth:`strata` would refuse ``frame``, one per
        covariate (and strata), so that a cohort's problems are all listed at once."""
        frame = getattr(frame, "frame", frame)
        problems = self._encode(frame)[1]
        try:
            self.strata(frame)
        except InputError as exc:
            problems.append(str(exc))
        return problems

    def _encode(self, frame: pd.DataFrame) -> tuple[list[np.ndarray], list[str]]:
        blocks, problems = [], []
        for term in self.terms:
            try:
                blocks.append(term.encode(frame))
            except InputError as exc:
                problems.append(str(exc))
        return blocks, problems

    def strata(self, frame: pd.DataFrame | Any) -> np.ndarray | None:
        """Stratum label of each row, shape (n,), object array of str; None without strata.

        Raises
        ------
        InputError
            A missing label, or one not seen in the reference population.
        """
        if self.strata_column is None:
            return None
        frame = getattr(frame, "frame", frame)
        labels = _strata_labels(frame, self.strata_column)
        unseen = ~labels.isin(self.strata_levels)
        if unseen.any():
            found = sorted(labels[unseen].unique())
            raise InputError(
                f"strata column '{self.strata_column}' has labels the reference population "
                f"does not have: {', '.join(repr(v) for v in found[:5])} in "
                f"{format_rows(labels.index[unseen.to_numpy()])}; known: "
                f"{', '.join(self.strata_levels)}. There is no baseline hazard for them."
            )
        return labels.to_numpy(dtype=object)

    def out_of_range(self, frame: pd.DataFrame | Any) -> pd.DataFrame:
        """Whether each numeric or spline value lies outside the reference min/max.

        Returns
        -------
        pandas.DataFrame of bool, shape (n, number of numeric and spline covariates)
            One column per such covariate (named after it), index of ``frame``; missing
            values count as in range.
        """
        frame = getattr(frame, "frame", frame)
        out = {}
        for term in self.terms:
            if term.kind in ("numeric", "spline"):
                x = _numbers(_column(frame, term.column, term.name), term)
                with np.errstate(invalid="ignore"):
                    out[term.name] = (x < term.minimum) | (x > term.maximum)
        return pd.DataFrame(out, index=frame.index, dtype=bool)

    def to_dict(self) -> dict[str, Any]:
        """Plain JSON-able dict; :meth:`from_dict` gives back an equal Design."""
        return {
            "format": FORMAT_VERSION,
            "terms": [_term_dict(term) for term in self.terms],
            "strata": {"column": self.strata_column, "levels": list(self.strata_levels)},
        }

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> Design:
        """Rebuild a Design from :meth:`to_dict` output.

        Raises
        ------
        ModelFileError
            Unknown format version or malformed content.
        """
        if not isinstance(d, Mapping) or d.get("format") != FORMAT_VERSION:
            found = d.get("format") if isinstance(d, Mapping) else d
            raise ModelFileError(
                f"design has format {found!r}; this casemix reads format {FORMAT_VERSION}. "
                "Fit the reference model again with this version."
            )
        try:
            terms = tuple(_term_from_dict(t) for t in d["terms"])
            strata = d["strata"]
            return cls(
                terms=terms,
                strata_column=strata["column"],
                strata_levels=tuple(str(v) for v in strata["levels"]),
            )
        except (KeyError, TypeError, ValueError) as exc:
            raise ModelFileError(
                f"design content is malformed ({type(exc).__name__}: {exc}); the model file "
                "was edited or damaged. Fit the reference model again."
            ) from None


def _side_by_side(blocks: list[np.ndarray], rows: int = 16_384) -> np.ndarray:
    """``numpy.column_stack(blocks)`` as C-ordered float64, copied a band of rows at a time
    (each band of the output stays in cache while its columns are written: about three times
    faster than column by column at 10^6 rows)."""
    n = blocks[0].shape[0]
    out = np.empty((n, sum(block.shape[1] for block in blocks)))
    for start in range(0, n, rows):
        stop, j = start + rows, 0
        for block in blocks:
            out[start:stop, j : j + block.shape[1]] = block[start:stop]
            j += block.shape[1]
    return out


_TERM_FIELDS = ("name", "column", "kind", "missing", "levels", "other", "knots", "fill",
                "indicator", "minimum", "maximum")


def _term_dict(term: Term) -> dict[str, Any]:
    out = {key: getattr(term, key) for key in _TERM_FIELDS}
    out["levels"] = list(term.levels)
    out["knots"] = list(term.knots)
    return out


def _term_from_dict(d: Mapping[str, Any]) -> Term:
    unknown = set(d) - set(_TERM_FIELDS)
    if unknown:
        raise ValueError(f"unknown term keys {sorted(unknown)}")
    values = {key: d[key] for key in _TERM_FIELDS}
    values["levels"] = tuple(str(v) for v in values["levels"])
    values["knots"] = tuple(float(v) for v in values["knots"])
    return Term(**values)


def _all_problems(problems: list[str]) -> str:
    if len(problems) == 1:
        return problems[0]
    listed = " ".join(f"({i}) {text}" for i, text in enumerate(problems, start=1))
    return (f"{plural(len(problems), 'covariate')} cannot be encoded with the reference "
            f"model: {listed}")


def _column(frame: pd.DataFrame, column: str, name: str) -> pd.Series:
    if column not in frame.columns:
        raise InputError(
            f"covariate {name} needs column '{column}', which the data lack"
            f"{closest(column, map(str, frame.columns))}; rename the column or fix "
            f"[covariates.{name}] in the spec."
        )
    return frame[column]


def _numbers(series: pd.Series, term: Term | Covariate) -> np.ndarray:
    """Float values of a numeric, spline or binary covariate (NaN where missing)."""
    if isinstance(series.dtype, np.dtype) and series.dtype.kind == "f":
        # As read_records leaves the column: nothing to parse, NaN is missing.
        values = series.to_numpy(dtype=float)
        bad = np.zeros(len(values), dtype=bool)
    else:
        parsed = (series.astype(float) if pd.api.types.is_bool_dtype(series)
                  else pd.to_numeric(series, errors="coerce").astype(float))
        values = parsed.to_numpy(dtype=float)
        bad = np.isnan(values) & series.notna().to_numpy()
    if term.kind == "binary":
        bad |= ~np.isnan(values) & (values != 0.0) & (values != 1.0)
    if bad.any():
        what = "0 or 1" if term.kind == "binary" else "a number"
        raise InputError(
            f"covariate {term.name} (column '{term.column}') is not {what} in "
            f"{format_rows(series.index[bad])} (for example "
            f"{series[bad].iloc[0]!r}); read the data with read_records, which checks types."
        )
    return values


def _distinct_text(series: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Each row's code and the cleaned text of each code (``clean_text``; None if missing).

    The cells of a text column are cleaned once per distinct cell (the last code stands for
    the missing cells); other columns are cleaned whole first, so that 1 and 1.0 stay apart.
    """
    if is_text_column(series):
        codes, distinct = pd.factorize(series)
        cleaned = clean_text(pd.Series(np.asarray(distinct, dtype=object), dtype=object))
    else:
        codes, distinct = pd.factorize(clean_text(series))
        cleaned = pd.Series(np.asarray(distinct, dtype=object), dtype=object)
    text = np.append(cleaned.to_numpy(dtype=object), None)
    return np.where(codes < 0, len(text) - 1, codes), text


def _strata_labels(frame: pd.DataFrame, column: str) -> pd.Series:
    labels = clean_text(_column(frame, column, f"strata ({column})"))
    if labels.isna().any():
        raise InputError(
            f"strata column '{column}' is missing in "
            f"{format_rows(labels.index[labels.isna().to_numpy()])}; every recipient needs a "
            "stratum (read_records excludes such recipients)."
        )
    return labels


def _fit_term(frame: pd.DataFrame, cov: Covariate, spec: Spec) -> Term:
    series = _column(frame, cov.column, cov.name)
    if cov.kind == "categorical":
        return _fit_categorical(series, cov, spec)
    x = _numbers(series, cov)
    seen = x[~np.isnan(x)]
    if seen.size == 0 or np.ptp(seen) == 0:
        raise InputError(
            f"covariate {cov.name} (column '{cov.column}') "
            f"{'has no values' if seen.size == 0 else f'is {seen[0]:g} for everyone'} in the "
            "reference population, so its effect cannot be estimated; remove it from the spec."
        )
    has_missing = bool(np.isnan(x).any())
    indicator = cov.missing == "indicator" and has_missing
    fill = None
    if cov.missing == "median" or indicator:
        fill = 0.0 if cov.kind == "binary" else float(np.median(seen))
    numeric = cov.kind != "binary"
    return Term(
        name=cov.name, column=cov.column, kind=cov.kind, missing=cov.missing,
        knots=_knots(seen, cov) if cov.kind == "spline" else (),
        fill=fill, indicator=indicator,
        minimum=float(seen.min()) if numeric else None,
        maximum=float(seen.max()) if numeric else None,
    )  # fmt: skip


def _knots(seen: np.ndarray, cov: Covariate) -> tuple[float, ...]:
    knots = np.quantile(seen, SPLINE_KNOT_QUANTILES[cov.knots])
    if np.any(np.diff(knots) <= 0):
        raise InputError(
            f"covariate {cov.name} (column '{cov.column}'): {cov.knots} spline knots at the "
            f"reference quantiles {SPLINE_KNOT_QUANTILES[cov.knots]} are not distinct "
            f"({', '.join(f'{k:g}' for k in knots)}); use fewer knots or kind = \"numeric\"."
        )
    return tuple(float(k) for k in knots)


def _fit_categorical(series: pd.Series, cov: Covariate, spec: Spec) -> Term:
    codes, text = _distinct_text(series)
    cells = np.bincount(codes, minlength=len(text))
    gone = np.array([t is None for t in text], dtype=bool)
    has_missing = bool(cells[gone].any())
    if cov.missing == "category" and has_missing:
        if MISSING_LEVEL in set(text[cells > 0]):
            raise SpecError(
                f"{spec.where}: covariate {cov.name} already has a level '{MISSING_LEVEL}', "
                f"so missing = \"category\" would merge missing values into it; recode that "
                "level or use missing = \"indicator\"."
            )
        text = text.copy()
        text[gone] = MISSING_LEVEL
    counts: dict[str, int] = {}
    for level, n in zip(text, cells.tolist(), strict=True):
        if level is not None and n:
            counts[level] = counts.get(level, 0) + n
    found = sorted(counts)
    if len(found) < 2:
        raise InputError(
            f"covariate {cov.name} (column '{cov.column}') has "
            f"{'no levels' if not found else f'only the level {found[0]!r}'} in the reference "
            "population, so its effect cannot be estimated; remove it from the spec."
        )
    for key in ("reference", "other"):
        level = getattr(cov, key)
        if level is not None and level not in counts:
            raise SpecError(
                f"{spec.where}: 'covariates.{cov.name}.{key}' = {level!r} does not occur in "
                f"the reference population{closest(level, found)}; its levels are "
                f"{', '.join(found)}."
            )
    # Default reference: the most frequent level (ties broken alphabetically), a stable base.
    reference = cov.reference or min(found, key=lambda v: (-counts[v], v))
    return Term(
        name=cov.name, column=cov.column, kind="categorical", missing=cov.missing,
        levels=(reference, *[v for v in found if v != reference]), other=cov.other,
        indicator=cov.missing == "indicator" and has_missing,
    )  # fmt: skip
