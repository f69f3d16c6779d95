"""The audit as one self-contained HTML page, and the plot of scaled Schoenfeld residuals.

The page is built from the report's shared blocks (``casemix.report.page``); the plot shows,
per covariate, the scaled residuals plus the coefficient (an estimate of beta(t)) against
time, a lowess smooth (statsmodels) and the constant coefficient the model assumes. A flat
smooth on the line means proportional hazards. Figures are made with ``Figure`` directly (no
pyplot, so no global backend state) and rendered to SVG.
"""

from __future__ import annotations

import math

import numpy as np
from matplotlib.figure import Figure

from casemix.audit._optional import available, require
from casemix.report.page import Markup, Section, figure_svg, render_page, table_html

__all__ = ["PLOT_POINTS", "audit_html", "schoenfeld_figure"]

# residuals drawn per panel at most (a seeded subsample beyond that keeps the SVG small)
PLOT_POINTS = 2000
_COLUMNS = 4

_SECTIONS = (
    ("Proportional hazards", ("ph",)),
    ("Discrimination", ("concordance",)),
    (
        "Calibration",
        ("calibration_risk", "calibration_regression", "calibration_horizon", "calibration_size"),
    ),
    ("Overdispersion", ("overdispersion", "dispersion_programs")),
    ("Prior sensitivity", ("prior_verdicts",)),
    ("Uncertainty of the reference model", ("bootstrap", "bootstrap_coefficients")),
    ("Own-data influence", ("influence",)),
    ("Independent cross-check", ("crosscheck",)),
    ("Multiplicity", ("fdr",)),
)

CAUTIONS = (
    "These checks describe the reference model and the spread of programs; they are "
    "statistical diagnostics, not findings about any program's care.",
    "With registry-sized data, small departures from the model's assumptions become "
    "statistically significant; judge their size as well as their p-value.",
)


def schoenfeld_figure(schoenfeld, coef, names, *, seed: int = 0) -> Figure:
    """Smoothed scaled Schoenfeld residuals against time, one panel per covariate.

    Parameters
    ----------
    schoenfeld : DataFrame
        From :func:`casemix.audit.schoenfeld_residuals` (scaled, coefficient not added).
    coef : ndarray, shape (p,)
    names : sequence of str, length p
    seed : int, default 0
        Seed of the subsample drawn when there are more than ``PLOT_POINTS`` events.

    Returns
    -------
    matplotlib.figure.Figure
    """
    rows = math.ceil(len(names) / _COLUMNS)
    # fixed margins: a constrained layout costs seconds per render with many panels
    fig = Figure(figsize=(3.0 * min(len(names), _COLUMNS), 2.4 * rows))
    fig.subplots_adjust(
        left=0.07, right=0.98, bottom=0.1 / rows, top=1 - 0.08 / rows, hspace=0.55, wspace=0.3
    )
    time = schoenfeld["time"].to_numpy()
    keep = np.arange(time.size)
    if time.size > PLOT_POINTS:
        keep = np.sort(np.random.default_rng(seed).choice(time.size, PLOT_POINTS, replace=False))
    lowess = (
        require("statsmodels.nonparametric.smoothers_lowess", "the smoothed plot").lowess
        if available("statsmodels")
        else None
    )
    for j, name in enumerate(names):
        ax = fig.add_subplot(rows, min(len(names), _COLUMNS), j + 1)
        beta_t = schoenfeld[name].to_numpy()[keep] + coef[j]
        # rasterised points keep the SVG small and quick to write
        ax.scatter(
            time[keep], beta_t, s=3, alpha=0.25, color="#999999", linewidths=0, rasterized=True
        )
        if lowess is not None:
            smooth = lowess(beta_t, time[keep], frac=0.4, return_sorted=True)
            ax.plot(smooth[:, 0], smooth[:, 1], color="#0072B2", linewidth=1.5)
        ax.axhline(coef[j], color="#D55E00", linewidth=1, linestyle="--")
        low, high = np.quantile(beta_t, [0.02, 0.98])
        ax.set_ylim(low, high)
        ax.set_title(name, fontsize=8)
        ax.tick_params(labelsize=7)
    fig.supxlabel("time (days)", fontsize=8)
    fig.supylabel("beta(t)", fontsize=8)
    return fig


def audit_html(audit) -> str:
    """Render an :class:`~casemix.audit.Audit` as one HTML document."""
    findings = Markup("<ul>{}</ul>").format(
        Markup("").join(Markup("<li>{}</li>").format(f) for f in audit.findings)
    )
    sections = [Section("Findings", findings)]
    for title, names in _SECTIONS:
        parts = [
            Markup("<h3>{}</h3>{}").format(
                name.replace("_", " "), Markup(table_html(audit.tables[name]))
            )
            for name in names
            if name in audit.tables
        ]
        if title == "Proportional hazards":
            coefficients = audit.tables["coefficients"]
            fig = schoenfeld_figure(
                audit.schoenfeld, coefficients["coef"].to_numpy(), list(coefficients["term"])
            )
            alt = "Smoothed scaled Schoenfeld residuals against time, one panel per covariate"
            parts.append(Markup(figure_svg(fig, alt=alt)))
        if parts:
            sections.append(Section(title, Markup("").join(parts)))
    return render_page("Statistical audit", sections, cautions=list(CAUTIONS), cautions_at=1)
