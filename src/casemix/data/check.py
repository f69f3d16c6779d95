"""What ``casemix check`` tells about an extract before anything is fitted or evaluated.

:func:`check_extract` takes validated :class:`~casemix.data.records.Records` and reports, up
front: every exclusion (the records' own, plus transplants outside the window), every
correction, the checks that could not run (no cut-off, no model), exclusion shares above
:data:`EXCLUDED_SHARE_WARNING`, declared reference levels that do not occur, and, against a
fitted model, every covariate the model cannot encode (all at once) and values outside the
reference range. Bookkeeping only (pandas); nothing is computed by hand.
"""

from __future__ import annotations

from dataclasses import dataclass

import pandas as pd

from casemix.data.cohort import apply_window
from casemix.data.records import Records, count_by_kind
from casemix.errors import plural

__all__ = ["EXCLUDED_SHARE_WARNING", "CheckResult", "check_extract", "reason_warnings"]

#: A warning is given when more than this share of the records read is excluded, in all or
#: for one reason: 20%, our choice (an extract losing a fifth of its records for one reason
#: usually has a wrong cut-off, window, column or format rather than bad records).
EXCLUDED_SHARE_WARNING = 0.20


@dataclass(frozen=True, repr=False, eq=False)
class CheckResult:
    """The findings of :func:`check_extract`.

    Attributes
    ----------
    records : Records
    exclusions : pandas.DataFrame
        The records' exclusions plus transplants outside the cut-off or window (as in
        ``Records.exclusions``), sorted by row.
    corrections : pandas.DataFrame
        Corrections of the records left (``row``, ``recipient``, ``program``, ``kind``).
    by_reason : pandas.DataFrame
        ``reason``, ``records``: :func:`~casemix.data.records.count_by_kind` of the exclusions
        (adds up to the records excluded).
    skipped : tuple of str
        Checks that did not run, and why.
    warnings : tuple of str
        Problems that leave the extract usable but need a look.
    problems : tuple of str
        Reasons the extract cannot be evaluated with the model (empty without a model).
    """

    records: Records
    exclusions: pd.DataFrame
    corrections: pd.DataFrame
    by_reason: pd.DataFrame
    skipped: tuple[str, ...]
    warnings: tuple[str, ...]
    problems: tuple[str, ...]

    @property
    def n_kept(self) -> int:
        """Records left: ``records.n_read - len(exclusions)``."""
        return self.records.n_read - len(self.exclusions)

    @property
    def usable(self) -> bool:
        """Whether nothing prevents fitting or evaluating with this extract."""
        return not self.problems and self.n_kept > 0

    def __repr__(self) -> str:
        return (
            f"<CheckResult '{self.records.source}': {self.records.n_read} read, {self.n_kept} "
            f"kept, {len(self.exclusions)} excluded; {len(self.warnings)} warnings, "
            f"{len(self.problems)} problems>"
        )


def reason_warnings(exclusions: pd.DataFrame, n_read: int,
                    threshold: float = EXCLUDED_SHARE_WARNING) -> list[str]:
    """Warnings for exclusion shares above ``threshold``: in all, then per single reason.

    A record excluded for several reasons counts under each of them here (the question is
    how much one reason removes), unlike :func:`~casemix.data.records.count_by_kind`.
    """
    if n_read == 0 or exclusions.empty:
        return []
    out = []
    share = len(exclusions) / n_read
    if share > threshold:
        out.append(
            f"{len(exclusions)} of {plural(n_read, 'record')} ({share:.1%}) are excluded, "
            f"more than "
            f"{threshold:.0%}; check the cut-off, the window and the spec before using the "
            "results."
        )
    kinds = exclusions["kind"].str.split("; ").explode().value_counts().sort_index()
    for kind, n in kinds.items():
        if n / n_read > threshold:
            out.append(
                f"{n} of {plural(n_read, 'record')} ({n / n_read:.1%}) are excluded as "
                f"\"{kind}\", more "
                f"than {threshold:.0%} for one reason."
            )
    return out


def check_extract(records: Records, *, window: tuple[object, object] | None = None,
                  model=None) -> CheckResult:
    """Check an extract up front: exclusions, corrections, skipped checks, model problems.

    Parameters
    ----------
    records : Records
        From :func:`~casemix.data.records.read_records` (its cut-off is used).
    window : (date-like or None, date-like or None), optional
        Inclusive transplant-date window; transplants outside it are excluded with a reason.
    model : ReferenceModel, optional
        Check the records left against this model: categorical levels it has never seen,
        missing values it has no term for, strata it has no baseline for (all listed at
        once), and values outside its reference range.

    Returns
    -------
    CheckResult
    """
    exclusions, kept = apply_window(records, records.cutoff, window)
    frame = records.frame.loc[kept]
    corrections = records.corrections[records.corrections["row"].isin(kept + 1)]
    skipped = []
    if records.cutoff is None:
        skipped.append(
            "no cut-off given (--cutoff, or [analysis] cutoff in the spec): transplants and "
            "last-seen dates after the cut-off were not checked (dates after today "
            f"{records.today:%Y-%m-%d} were)."
        )
    warnings = reason_warnings(exclusions, records.n_read)
    problems: list[str] = []
    if model is None:
        skipped.append(
            "no model given (--model): categorical levels unseen in the reference population "
            "and values outside its range were not checked."
        )
        warnings += _unused_reference_levels(records, frame)
    else:
        problems = model.design.problems(frame)
        warnings += [] if problems else _out_of_range(model, frame)
    return CheckResult(
        records=records,
        exclusions=exclusions,
        corrections=corrections.reset_index(drop=True),
        by_reason=count_by_kind(exclusions),
        skipped=tuple(skipped),
        warnings=tuple(warnings),
        problems=tuple(problems),
    )


def _unused_reference_levels(records: Records, frame: pd.DataFrame) -> list[str]:
    out = []
    for cov in records.spec.covariates:
        if cov.kind != "categorical" or cov.reference is None:
            continue
        if not frame[cov.column].eq(cov.reference).any():
            out.append(
                f"covariate {cov.name} (column '{cov.column}'): the reference level "
                f"'{cov.reference}' declared in the spec does not occur in the records kept, "
                "so `casemix fit` on them would refuse it; correct `reference` in "
                f"[covariates.{cov.name}] or the values."
            )
    return out


def _out_of_range(model, frame: pd.DataFrame) -> list[str]:
    outside = model.design.out_of_range(frame)
    terms = {term.name: term for term in model.design.terms}
    out = []
    for name in outside.columns:
        n = int(outside[name].sum())
        if n:
            term = terms[name]
            out.append(
                f"covariate {name} (column '{term.column}'): "
                f"{plural(n, 'recipient', ('lies', 'lie'))} outside the "
                f"reference range {term.minimum:g} to {term.maximum:g}; their expected events "
                "are extrapolated."
            )
    return out
