"""The report's block on a competing event: cumulative incidence beside 1 - Kaplan-Meier.

Shown only for an outcome whose follow-up ends at ``censor_at`` dates (death-censored graft
failure) and where such ends happened; the numbers come from ``programs.csv``
(``competing_events``, ``cumulative_incidence``, ``observed_survival``).
"""

from __future__ import annotations

import pandas as pd
from markupsafe import Markup

from casemix.evaluation.evaluate import Evaluation
from casemix.report.page import Section, table_html
from casemix.report.sections import ReportOptions, counts_text

__all__ = ["competing_section"]

_EXPLAIN = (
    "Follow-up of this outcome ends without an event at {ends}; such an end competes with "
    "the event, since a recipient who has died can no longer lose the graft. One minus "
    "Kaplan-Meier treats those ends as ordinary censoring, so it estimates the share who "
    "would fail if nobody died first, and it overstates the share who actually fail. The "
    "cumulative incidence (Aalen-Johansen) counts only failures that happen while the "
    "recipient is alive: it is the share who actually fail by {horizon} days. O and E are "
    "not affected: both count events during the follow-up each recipient had."
)


def competing_section(data: Evaluation, options: ReportOptions) -> Section | None:
    """The block, or None when the outcome has no competing end or none happened."""
    programs = data.programs
    if "competing_events" not in programs or not (programs["competing_events"] > 0).any():
        return None
    definition = str(data.run.get("outcome_definition", ""))
    ends = definition.split("ends without an event at ", 1)[-1].split(" (", 1)[0]
    table = pd.DataFrame(
        {
            "program": programs["program"],
            "competing": counts_text(programs["competing_events"], options),
            "km": 1 - programs["observed_survival"],
            "aj": programs["cumulative_incidence"],
        }
    )
    html = table_html(
        table,
        headers={"program": "Program", "competing": "Competing ends (deaths)",
                 "km": f"1 - Kaplan-Meier at {data.run['horizon_days']} days",
                 "aj": "Cumulative incidence (Aalen-Johansen)"},
        formats={"km": "{:.3f}", "aj": "{:.3f}"},
        numeric=("competing",),
    )
    text = _EXPLAIN.format(ends=ends or "a competing date", horizon=data.run["horizon_days"])
    body = Markup("<p>{}</p>{}").format(text, Markup(html))
    return Section("Failure with a competing event", body, anchor="competing")
