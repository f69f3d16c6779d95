"""The public release against an attacker who has only its folder.

The attacker reads every file of the public folder (CSV tables, run.json with the prior and
the model facts, report.html) and tries each derivation a reader could make to recover a
hidden count exactly or to within one: O from E x O/E, from the O/E limits (Garwood, scipy
chi2), from the hazard ratio, its interval, median and P(HR > 1) under the published prior
(scipy gamma), from the exact Poisson p-values (scipy poisson), from observed survival and
the numbers at risk, from the distance to another verdict and from the verdict itself; n
from the numbers at risk, the follow-up days and E with expected survival; every hidden
number at risk from the drop of the Kaplan-Meier curve; and every published total minus the
cells shown. Each derivation claims a range of whole numbers; it succeeds when the range
spans at most 2 (a guess sure to be within one) and holds the true count, which the test
takes from the internal folder. A deliberately naive release (the counts replaced by "<11"
and nothing else, as casemix used to publish) shows the attacker finds those leaks.
"""

from __future__ import annotations

import json
import re
import shutil
from html import unescape
from pathlib import Path

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from casemix import demo
from casemix._io import write_csv
from casemix.evaluation.evaluate import Evaluation, evaluate
from casemix.report import render_report, write_public_release
from casemix.report.disclosure import KEPT_COLUMNS, PRIOR_DIGITS
from casemix.report.public import exclusions_by_reason
from casemix.report.suppress import suppress_counts
from casemix.stats.shrinkage import Prior, posterior
from casemix.stats.verdict import assign_verdicts, rules_from_dict

N = 11  # common practice in health statistics: no cell from 1 to 10 is published
ROOT = Path(__file__).resolve().parents[2]
MODEL = ROOT / "models" / "lorran_valley_graft_failure_365.json"
SMALL = f"<{N}"


# --- the attacker ---------------------------------------------------------------------------


def _num(value) -> float | None:
    try:
        out = float(value)
    except (TypeError, ValueError):
        return None
    return None if np.isnan(out) else out


def _hidden(value) -> bool:
    return isinstance(value, str) and not value.strip().isdigit()


def _invert(target: float | None, function, top: int, tol: float = 1e-6) -> tuple | None:
    """The whole numbers o in 0..top with function(o) equal to target (to tol)."""
    if target is None:
        return None
    values = np.array([function(o) for o in range(top + 1)], float)
    hits = np.flatnonzero(np.abs(values - target) <= tol * max(1.0, abs(target)))
    return (int(hits.min()), int(hits.max())) if hits.size else None


def _near(estimate: float | None) -> tuple | None:
    """An approximate derivation: the attacker claims the count is within one of it."""
    if estimate is None or not np.isfinite(estimate):
        return None
    return (round(estimate) - 1, round(estimate) + 1)


def _report_facts(html: str) -> dict[str, dict]:
    """Per program, the numbers its block in the report states (rounded as printed)."""
    facts = {}
    for code, line in re.findall(r'<div class="program" id="[^"]+"><h3>(.*?)</h3><p>(.*?)</p>',
                                 html):
        text = unescape(re.sub(r"<[^>]+>", "", line))
        m = re.search(r"(?P<n>\S+) recipients · observed (?P<o>\S+) · expected (?P<e>\S+) · "
                      r"O/E (?P<oe>\S+).*? · hazard ratio (?P<hr>\S+)", text)
        facts[unescape(code)] = {"n": m["n"], "o": m["o"], "e": _num(m["e"]),
                                 "oe": _num(m["oe"]), "hr": _num(m["hr"])}
    return facts


def _funnel_claims(html: str, programs: pd.DataFrame) -> list[dict]:
    """O from a program's point in the funnel plot, read off the page's SVG.

    The points are matched to the programs whose E is published by the order of E (the
    axis is linear); the programs with a published O/E fix the pixel scale of each axis,
    and a program with a hidden count whose point is drawn gets O = E x (O/E read off).
    """
    figure = re.search(r'aria-label="Funnel plot.*?PathCollection_1">(.*?)</g>\s*</g>\s*<g',
                       html, re.S)
    if figure is None:
        return []
    points = np.array([(float(x), float(y)) for x, y in
                       re.findall(r'<use [^>]*x="([-\d.]+)" y="([-\d.]+)"', figure[1])])
    e = pd.to_numeric(programs["expected"], errors="coerce")
    oe = pd.to_numeric(programs["oe_ratio"], errors="coerce")
    drawn = programs.index[e > 0]
    assert len(points) == len(drawn), "a point is drawn for a program whose E is withheld"
    order = drawn[np.argsort(e[drawn].to_numpy(), kind="stable")]
    points = points[np.argsort(points[:, 0], kind="stable")]
    known = oe[order].notna().to_numpy()
    if known.sum() < 2 or known.all():
        return []
    slope, intercept = np.polyfit(oe[order].to_numpy()[known], points[known, 1], 1)
    return [{"cell": ("observed", programs.loc[i, "program"]), "derivation": "funnel point",
             "range": _near(e[i] * (y - intercept) / slope)}
            for i, y in zip(order[~known], points[~known, 1], strict=True)]


def _mixture_derivations(row: pd.Series, prior: dict, rules, e: float, level: float, top: int,
                         out: dict) -> Prior:
    """HR and P(HR > margin) inverted under the published mixture prior; returns that prior."""
    mixture = Prior(shape=float(prior["shape"]), rate=float(prior["rate"]),
                    method="hierarchical",
                    components=tuple(tuple(c) for c in prior["components"]))
    candidates = np.arange(top + 1)
    exact = posterior(candidates, np.full(candidates.size, e), mixture, level=level,
                      upper_margin=rules.upper_margin, lower_margin=rules.lower_margin)
    for column, name in (("hr_mean", "HR given the prior"), ("p_above", "P(HR > margin)")):
        values = exact[column].to_numpy(float)
        out[name] = _invert(_num(row.get(column)), lambda o, v=values: v[o], top)
    return mixture


def _verdict_derivations(row: pd.Series, e: float, prior: Prior, rules, top: int,
                         out: dict) -> None:
    """The counts whose verdict and distances to another verdict match the row's."""
    candidates = np.arange(top + 1)
    table = assign_verdicts(candidates, np.full(candidates.size, e), prior, rules)
    for column in ("events_to_excess", "events_to_favorable"):
        if (k := _num(row.get(column))) is not None:
            hits = candidates[table[column].astype(float).to_numpy() == k]
            out[column] = (int(hits.min()), int(hits.max())) if hits.size else None
    if row.get("verdict") in set(table["verdict"]):
        hits = candidates[(table["verdict"] == row["verdict"]).to_numpy()]
        hits = hits[(hits >= 1) & (hits < N)] if row["observed"] == SMALL else hits
        out["verdict"] = (int(hits.min()), int(hits.max())) if hits.size else None


def _o_derivations(row: pd.Series, run: dict, curve: pd.DataFrame, n: float | None):
    prior, rules = run["prior"], rules_from_dict(run["rules"])
    a, b = float(prior["shape"]), float(prior["rate"])
    e = _num(row.get("expected"))
    top = int(n) if n is not None else 500
    level = float(run.get("credible_level", 0.95))
    alpha = 1 - level
    out = {}
    if e is not None and e > 0:
        if (oe := _num(row.get("oe_ratio"))) is not None:
            out["E x O/E"] = _near(e * oe)
        out["O/E lower limit"] = _invert(
            _num(row.get("oe_lower")),
            lambda o: 0.0 if o == 0 else stats.chi2.ppf(0.025, 2 * o) / (2 * e), top)
        out["O/E upper limit"] = _invert(
            _num(row.get("oe_upper")), lambda o: stats.chi2.ppf(0.975, 2 * o + 2) / (2 * e), top)
        out["exact p more"] = _invert(_num(row.get("p_more_exact")),
                                      lambda o: stats.poisson.sf(o - 1, e), top)
        out["exact p fewer"] = _invert(_num(row.get("p_fewer_exact")),
                                       lambda o: stats.poisson.cdf(o, e), top)
    if e is not None:
        def post(o):
            return stats.gamma(a + o, scale=1 / (b + e))
        if (hr := _num(row.get("hr_mean"))) is not None:
            out["HR given the prior"] = _near(hr * (b + e) - a)
        out["HR lower"] = _invert(_num(row.get("hr_lower")), lambda o: post(o).ppf(alpha / 2),
                                  top)
        out["HR upper"] = _invert(_num(row.get("hr_upper")),
                                  lambda o: post(o).ppf(1 - alpha / 2), top)
        out["HR median"] = _invert(_num(row.get("hr_median")), lambda o: post(o).median(), top)
        out["P(HR > margin)"] = _invert(_num(row.get("p_above")),
                                        lambda o: post(o).sf(rules.upper_margin), top)
        verdict_prior = Prior(shape=a, rate=b, method="fixed")
        if prior.get("components"):  # a mixture prior, published whole: use it exactly
            verdict_prior = _mixture_derivations(row, prior, rules, e, level, top, out)
        _verdict_derivations(row, e, verdict_prior, rules, top, out)
    if n is not None and (s := _num(row.get("observed_survival"))) is not None:
        out["n x (1 - observed survival)"] = _near(n * (1 - s))
    if len(curve):
        c = curve.sort_values("time")
        r = pd.to_numeric(c["at_risk"], errors="coerce").to_numpy()
        s = c["observed"].to_numpy(float)
        drops = r[1:] * (1 - s[1:] / np.where(s[:-1] > 0, s[:-1], np.nan))
        if np.isfinite(drops).all():
            out["curve steps"] = _near(float(np.nansum(drops)))
    return out


def _n_derivations(row: pd.Series, run: dict, curve: pd.DataFrame, followup: pd.Series | None):
    out = {}
    if len(curve):
        first = curve.sort_values("time").iloc[0]
        if not _hidden(first["at_risk"]):
            out["at risk at day 0"] = _near(_num(first["at_risk"]))
    if followup is not None:
        if not _hidden(followup.get("recipients")):
            out["follow-up table"] = _near(_num(followup.get("recipients")))
        if (days := _num(followup.get("potential_days"))) is not None:
            out["potential days / horizon"] = _near(days / float(run["horizon_days"]))
    e, s = _num(row.get("expected")), _num(row.get("expected_survival"))
    if e is not None and s is not None and s < 1:
        out["E / (1 - expected survival)"] = _near(e / (1 - s))
    return out


def _total_ranges(total, cells: list) -> dict:
    """Bounds of each hidden cell from a published total and the cells shown."""
    hidden = [i for i, c in enumerate(cells) if _hidden(c)]
    if total is None or _hidden(total) or not hidden:
        return {}
    rest = float(total) - sum(float(c) for c in cells if not _hidden(c))
    low = {i: (1.0 if cells[i] == SMALL else 0.0) for i in hidden}
    high = {i: (N - 1.0 if cells[i] == SMALL else np.inf) for i in hidden}
    out = {}
    for i in hidden:
        lo = max(low[i], rest - sum(high[j] for j in hidden if j != i))
        hi = min(high[i], rest - sum(low[j] for j in hidden if j != i))
        out[i] = (lo, hi)
    return out


def _at_risk_claims(code: str, curve: pd.DataFrame) -> list[dict]:
    """A hidden number at risk from the drop of the curve at the same time (one event)."""
    c = curve.sort_values("time")
    out = []
    for k in range(1, len(c)):
        prev, now = c["observed"].iloc[k - 1], c["observed"].iloc[k]
        if _hidden(c["at_risk"].iloc[k]) and prev > now > 0:
            out.append({"cell": ("at_risk", code, float(c["time"].iloc[k])),
                        "derivation": "curve drop", "range": _near(1 / (1 - now / prev))})
    return out


def attack(public: Path) -> list[dict]:
    """Every claim the attacker makes from the files of ``public``: cell, derivation, range."""
    run = json.loads((public / "run.json").read_text(encoding="utf-8"))
    programs = pd.read_csv(public / "programs.csv", dtype={"program": str})
    curves = pd.read_csv(public / "curves.csv", dtype={"program": str})
    followup = pd.read_csv(public / "followup.csv", dtype={"program": str}).set_index("program")
    reasons = pd.read_csv(public / "exclusions_by_reason.csv", dtype=str)
    report = public / "report.html"
    facts = _report_facts(report.read_text(encoding="utf-8")) if report.is_file() else {}
    claims = []

    def claim(cell, derivation, bounds):
        if bounds is not None:
            claims.append({"cell": cell, "derivation": derivation, "range": bounds})

    for _, row in programs.iterrows():
        code = row["program"]
        curve = curves[curves["program"] == code]
        shown_n = None if _hidden(row["recipients"]) else float(row["recipients"])
        fu = followup.loc[code] if code in followup.index else None
        if _hidden(row["observed"]):
            n = shown_n
            if n is None:
                found = [b for b in _n_derivations(row, run, curve, fu).values() if b]
                n = float(found[0][1]) if found else None
            for name, bounds in _o_derivations(row, run, curve, n).items():
                claim(("observed", code), name, bounds)
            fact = facts.get(code)
            if fact and fact["e"] is not None and fact["oe"] is not None:
                claim(("observed", code), "report: E x O/E", _near(fact["e"] * fact["oe"]))
            if fact and fact["e"] is not None and fact["hr"] is not None:
                prior = run["prior"]
                claim(("observed", code), "report: HR given the prior",
                      _near(fact["hr"] * (prior["rate"] + fact["e"]) - prior["shape"]))
        if _hidden(row["recipients"]):
            for name, bounds in _n_derivations(row, run, curve, fu).items():
                claim(("recipients", code), name, bounds)
        claims += _at_risk_claims(code, curve)
    if report.is_file():
        claims += _funnel_claims(report.read_text(encoding="utf-8"), programs)
    return claims + _total_claims(run, programs, reasons)


def _total_claims(run: dict, programs: pd.DataFrame, reasons: pd.DataFrame) -> list[dict]:
    """Hidden cells from each published total minus the cells shown."""
    claims, counts = [], run["counts"]

    def claim(cell, derivation, bounds):
        claims.append({"cell": cell, "derivation": derivation, "range": bounds})

    for i, bounds in _total_ranges(counts.get("kept"), list(programs["recipients"])).items():
        claim(("recipients", programs["program"].iloc[i]), "total kept minus shown", bounds)
    network = run.get("network") or {}
    for i, bounds in _total_ranges(network.get("observed"), list(programs["observed"])).items():
        claim(("observed", programs["program"].iloc[i]), "network total minus shown", bounds)
    for i, bounds in _total_ranges(counts.get("excluded"), list(reasons["records"])).items():
        claim(("exclusions", reasons["reason"].iloc[i]), "total excluded minus shown", bounds)
    read, kept = counts.get("read"), counts.get("kept")
    if read is not None and kept is not None and not _hidden(read) and not _hidden(kept):
        for i, bounds in _total_ranges(float(read) - float(kept),
                                       list(reasons["records"])).items():
            claim(("exclusions", reasons["reason"].iloc[i]), "read minus kept minus shown",
                  bounds)
    return claims


def truth(internal: Path) -> dict:
    """The hidden cells' true values, from the internal folder."""
    programs = pd.read_csv(internal / "programs.csv", dtype={"program": str})
    out = {}
    for _, row in programs.iterrows():
        out[("observed", row["program"])] = row["observed"]
        out[("recipients", row["program"])] = row["recipients"]
    recipients = pd.read_csv(internal / "recipients.csv", dtype={"program": str})
    for code, group in recipients.groupby("program"):
        for t in range(0, 400):
            out[("at_risk", code, float(t))] = int((group["time"] >= t).sum())
    exclusions = pd.read_csv(internal / "exclusions.csv", dtype=str)
    for _, row in exclusions_by_reason(exclusions).iterrows():
        out[("exclusions", row["reason"])] = row["records"]
    return out


def successes(public: Path, internal: Path) -> list[dict]:
    """The claims that recover a hidden count to within one."""
    known = truth(internal)
    found = []
    for item in attack(public):
        lo, hi = item["range"]
        value = known.get(item["cell"])
        if value is not None and hi - lo <= 2 and lo - 1e-9 <= value <= hi + 1e-9:
            found.append(item)
    return found


# --- the releases ---------------------------------------------------------------------------


def naive_release(folder: Path, out: Path) -> Path:
    """The release casemix used to write: count cells replaced by "<11", nothing else."""
    out.mkdir(parents=True)
    counts = {"programs.csv": ["recipients", "observed"],
              "followup.csv": ["recipients", "lost_to_followup"], "curves.csv": ["at_risk"]}
    for name, columns in counts.items():
        frame = pd.read_csv(folder / name, dtype={"program": str})
        write_csv(out / name, suppress_counts(frame, columns, N))
    reasons = exclusions_by_reason(pd.read_csv(folder / "exclusions.csv", dtype=str))
    write_csv(out / "exclusions_by_reason.csv", suppress_counts(reasons, ["records"], N))
    shutil.copy(folder / "run.json", out / "run.json")
    # its report hid the count cells only: O/E, E and the hazard ratio are those of the
    # internal report (the attacker reads only those numbers from the page)
    (out / "report.html").write_text(render_report(Evaluation.load(folder)), encoding="utf-8")
    return out


@pytest.fixture(scope="module")
def demo_folder(tmp_path_factory) -> Path:
    """The demo network evaluated with the bundled model (the same as `casemix demo`)."""
    root = tmp_path_factory.mktemp("demo")
    paths = demo.write_demo(root)
    result = evaluate(paths["cohort"], MODEL, paths["rules"], cutoff=demo.COHORT_CUTOFF,
                      window=demo.COHORT_WINDOW)
    return result.save(root / "results")


@pytest.fixture(scope="module")
def small_network(demo_folder, tmp_path_factory) -> Path:
    """An invented network of 40 programs, most of them small (seeded reassignment of the
    demo cohort's recipients, so the outcomes keep a realistic case mix)."""
    root = tmp_path_factory.mktemp("small")
    cohort = pd.read_csv(demo_folder.parent / "cohort.csv", dtype=str)
    rng = np.random.default_rng(20261203)
    sizes = np.r_[rng.integers(4, 40, 30), rng.integers(60, 200, 10)]
    codes = np.repeat([f"SN{i + 1:02d}" for i in range(sizes.size)], sizes)
    rows = rng.choice(len(cohort), size=codes.size, replace=False)
    records = cohort.iloc[np.sort(rows)].assign(program=rng.permutation(codes))
    path = root / "cohort.csv"
    records.to_csv(path, index=False)
    result = evaluate(path, MODEL, demo_folder.parent / "rules.toml",
                      cutoff=demo.COHORT_CUTOFF, window=demo.COHORT_WINDOW)
    return result.save(root / "results")


def test_the_attacker_recovers_counts_from_a_naive_release(demo_folder, small_network,
                                                           tmp_path):
    for name, folder in (("demo", demo_folder), ("small", small_network)):
        found = successes(naive_release(folder, tmp_path / name), folder)
        cells = {f["cell"][:2] for f in found if f["cell"][0] == "observed"}
        hidden = pd.read_csv(folder / "programs.csv")["observed"].between(1, N - 1).sum()
        assert len(cells) == hidden > 0, name  # every hidden event count comes back
        ways = {f["derivation"] for f in found}
        assert {"E x O/E", "HR given the prior", "O/E upper limit", "P(HR > margin)",
                "n x (1 - observed survival)", "curve steps", "report: E x O/E",
                "report: HR given the prior"} <= ways, (name, ways)
    assert any(f["cell"][0] == "at_risk" for f in found)  # from the drops of the curve


def test_the_attacker_reads_hidden_counts_off_the_funnel_plot(demo_folder, tmp_path):
    # a release that blanks every derived figure of the hidden programs but E, and keeps the
    # internal figures: the points of the funnel plot give the counts back
    naive = naive_release(demo_folder, tmp_path / "naive")
    programs = pd.read_csv(naive / "programs.csv", dtype={"program": str})
    hidden = programs["observed"] == SMALL
    blank = [c for c in programs.columns if c not in (*KEPT_COLUMNS, "expected")]
    programs[blank] = programs[blank].astype(object)  # some are true/false columns
    programs.loc[hidden, blank] = np.nan
    write_csv(naive / "programs.csv", programs)
    claims = [c for c in successes(naive, demo_folder) if c["derivation"] == "funnel point"]
    assert {c["cell"][1] for c in claims} == set(programs.loc[hidden, "program"])


def _one_small_program(folder: Path, out: Path) -> Path:
    """The demo folder with LV09 cut to 8 recipients in programs.csv and in the total kept."""
    shutil.copytree(folder, out)
    programs = pd.read_csv(out / "programs.csv", dtype={"program": str})
    at = programs["program"] == "LV09"
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    run["counts"]["kept"] += 8 - int(programs.loc[at, "recipients"].item())
    programs.loc[at, "recipients"] = 8
    write_csv(out / "programs.csv", programs)
    (out / "run.json").write_text(json.dumps(run), encoding="utf-8")
    return out


def test_a_total_gives_back_a_single_hidden_cell_unless_withheld(demo_folder, tmp_path):
    folder = _one_small_program(demo_folder, tmp_path / "edited")
    found = successes(naive_release(folder, tmp_path / "naive"), folder)
    assert {"cell": ("recipients", "LV09"), "derivation": "total kept minus shown",
            "range": (8.0, 8.0)} in found
    public = write_public_release(folder, N, tmp_path / "public")
    assert successes(public, folder) == []
    run = json.loads((public / "run.json").read_text(encoding="utf-8"))
    assert run["counts"]["kept"] is None and run["counts"]["read"] is None
    page = unescape((public / "report.html").read_text(encoding="utf-8"))
    assert "withheld under the disclosure rule: records read; recipients kept" in page


def _one_hidden_count(folder: Path, out: Path) -> Path:
    """The demo folder with every hidden event count but the first set to 0 (as if those
    programs had had no event), in programs.csv and in the network's total."""
    shutil.copytree(folder, out)
    programs = pd.read_csv(out / "programs.csv", dtype={"program": str})
    small = programs.index[programs["observed"].between(1, N - 1)
                           & (programs["recipients"] >= N)]
    assert len(small) >= 2
    programs.loc[small[1:], "observed"] = 0
    run = json.loads((out / "run.json").read_text(encoding="utf-8"))
    run["network"]["observed"] = int(programs["observed"].sum())
    write_csv(out / "programs.csv", programs)
    (out / "run.json").write_text(json.dumps(run), encoding="utf-8")
    return out


def test_the_network_total_gives_back_a_single_hidden_count_unless_withheld(demo_folder,
                                                                            tmp_path):
    folder = _one_hidden_count(demo_folder, tmp_path / "edited")
    found = successes(naive_release(folder, tmp_path / "naive"), folder)
    assert "network total minus shown" in {f["derivation"] for f in found}
    public = write_public_release(folder, N, tmp_path / "public")
    assert successes(public, folder) == []
    run = json.loads((public / "run.json").read_text(encoding="utf-8"))
    assert run["network"] is None
    withheld = pd.read_csv(public / "withheld.csv")
    assert withheld["figure"].str.contains("whole network").any()
    # the report says in words what its "–" for the network stands for
    page = unescape((public / "report.html").read_text(encoding="utf-8"))
    assert "withheld under the disclosure rule: " in page
    assert "the whole network's events, O/E and exact test" in page


@pytest.mark.parametrize("network", ["demo_folder", "small_network"])
def test_the_attacker_recovers_nothing_from_the_public_release(network, request, tmp_path):
    folder = request.getfixturevalue(network)
    public = write_public_release(folder, N, tmp_path / "public")
    assert successes(public, folder) == []
    # the attacker did get to work: hidden cells exist and every program block was read
    programs = pd.read_csv(public / "programs.csv", dtype=str)
    assert (programs["observed"] == SMALL).sum() >= 3
    facts = _report_facts((public / "report.html").read_text(encoding="utf-8"))
    assert set(programs["program"]) <= set(facts)
    assert any(f["hr"] is not None for f in facts.values())
    # the figures that depend on the shared prior are published at the printed precision
    shown = pd.read_csv(public / "programs.csv", dtype={"program": str})
    for column, digits in PRIOR_DIGITS.items():
        values = shown[column].dropna().to_numpy(float)
        assert values.size and np.allclose(values, np.round(values, digits), rtol=0,
                                           atol=1e-12), column
    prior = json.loads((public / "run.json").read_text(encoding="utf-8"))["prior"]
    assert all(prior[k] == float(f"{prior[k]:.2g}") for k in ("shape", "rate", "mean", "sd"))
    assert "components" not in prior and "log_marginal" not in prior


def test_public_files_hold_no_recipient_level_data(small_network, tmp_path):
    public = write_public_release(small_network, N, tmp_path / "public")
    recipients = pd.read_csv(small_network / "recipients.csv", dtype=str)
    ids = set(recipients["recipient"])
    run = json.loads((small_network / "run.json").read_text(encoding="utf-8"))
    allowed_dates = {run["cutoff"], *run["window"], run["model"]["reference_cutoff"],
                     *run["model"]["reference_window"]}
    cells = []
    for path in sorted(public.iterdir()):
        if path.suffix == ".csv":
            frame = pd.read_csv(path, dtype=str, keep_default_na=False)
            cells += [*frame.columns, *frame.to_numpy().ravel()]
        else:
            cells += re.split(r"[\s<>\"',;:()\[\]{}]+", path.read_text(encoding="utf-8"))
    assert cells and not ids & set(cells)  # no recipient id in any cell
    dates = {d for cell in cells for d in re.findall(r"\d{4}-\d{2}-\d{2}", str(cell))}
    assert dates <= allowed_dates  # no date but the run's cut-offs and windows
    assert not {"recipients.csv", "exclusions.csv"} & {p.name for p in public.iterdir()}
    curves = pd.read_csv(public / "curves.csv")
    assert set(curves["time"]) <= {0.0, 91.0, 182.0, 274.0, 365.0}  # no event placed on its day
