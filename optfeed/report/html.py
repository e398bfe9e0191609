"""The shareable report: one self-contained HTML file per run folder.

A report is a :class:`Page`: a headline (the status in plain words), a message, and
:class:`Section` objects assembled from a result by the builders below
(:func:`check_page`, :func:`optimize_page`, :func:`sweep_page`, :func:`recipe_page`,
:func:`fit_page`).
The section helpers (:func:`limits_section`, :func:`figures_section`, ...) take plain
result fields, so a new job assembles its page from the same parts.

The file needs nothing outside itself: figures are inline SVG, the style sheet is
inline, there is no script and no address to fetch. It prints to PDF from a browser
(print rules keep figures and table rows whole and repeat table headers).
"""

from __future__ import annotations

import html
from dataclasses import dataclass, field

from .. import __version__
from .text import CAUTION, METHOD_WORDS, fmt

GOOD, WARN, BAD = "good", "warn", "bad"

# status word -> (plain words, tone)
STATUS_WORDS = {
    "optimal, verified": ("Optimal and verified", GOOD),
    "converged, not verified": ("Converged, but not verified: not an answer to use", WARN),
    "infeasible": ("No feed profile meets every limit", BAD),
    "iteration limit": ("Stopped before the solver converged: no answer", WARN),
    "time limit": ("Stopped at the time limit: the search did not finish", WARN),
    "valid": ("The files are valid", GOOD),
    "failed": ("The solver failed: no answer", BAD),
    "within limits": ("Within every limit", GOOD),
    "limit broken": ("A limit is broken", BAD),
    "simulation failed": ("The simulation failed", BAD),
    "fitted": ("Fitted", GOOD),
    "not converged": ("The fit did not settle: no estimates to use", WARN),
}


def headline(status: str, broken: int = 0) -> tuple[str, str]:
    """(plain words, tone) for a status word; an unknown status is shown as it is."""
    if status == "limit broken" and broken > 1:
        return f"{broken} limits are broken", BAD
    return STATUS_WORDS.get(status, (status[:1].upper() + status[1:], WARN))


@dataclass(frozen=True)
class Section:
    """A part of a page: ``body`` is HTML built by this module (data escaped)."""

    key: str
    title: str
    body: str


@dataclass(frozen=True)
class Page:
    """A whole report.

    Attributes
    ----------
    job : str
        'check', 'optimize', 'sweep', 'recipe' ...
    name : str
        The problem's (or sweep's) name.
    headline : str
        The status in plain words: the page's main heading.
    tone : str
        'good', 'warn' or 'bad'.
    status : str
        The status word as the text report and summary.json give it.
    message : str
    sections : tuple of Section
        In page order; the cautions come first, always.
    created : str
        When the result was made (UTC), for the page's first line.
    """

    job: str
    name: str
    headline: str
    tone: str
    status: str
    message: str
    sections: tuple = field(default_factory=tuple)
    created: str = ""


def esc(value) -> str:
    return html.escape("" if value is None else str(value), quote=True)


def num(value, digits: int = 4) -> str:
    """A number for a table cell: 4 significant digits, '-' for none."""
    if value is None or (isinstance(value, float) and value != value):
        return "-"
    if isinstance(value, bool):
        return "yes" if value else "no"
    if isinstance(value, (int, float)):
        return fmt(value, digits)
    return str(value)


def table(header, rows, numeric=None, row_class=None, caption: str = "") -> str:
    """An HTML table; cells are escaped. ``numeric``: column indices aligned right
    (default: every column whose cells are all numbers or empty)."""
    if numeric is None:
        numeric = {i for i in range(len(header))
                   if all(r[i] is None or (isinstance(r[i], (int, float)) and not isinstance(r[i], bool))
                          for r in rows)}
    out = ['<div class="table-wrap"><table>']
    if caption:
        out.append(f"<caption>{esc(caption)}</caption>")
    out.append("<thead><tr>" + "".join(f'<th scope="col"{" class=num" if i in numeric else ""}>{esc(h)}</th>'
                                        for i, h in enumerate(header)) + "</tr></thead><tbody>")
    for k, row in enumerate(rows):
        cls = row_class(k) if row_class else ""
        cells = []
        for i, v in enumerate(row):
            text = num(v) if isinstance(v, (int, float)) or v is None else esc(v)
            cells.append(f'<td class="num">{text}</td>' if i in numeric else f"<td>{text}</td>")
        out.append(f'<tr{f" class={cls}" if cls else ""}>' + "".join(cells) + "</tr>")
    out.append("</tbody></table></div>")
    return "".join(out)


# ------------------------------------------------------------------ sections


def caution_section() -> Section:
    text = " ".join(line.strip() for line in CAUTION.splitlines())
    if text.lower().startswith("caution:"):
        text = text[len("caution:"):].strip()
        text = text[:1].upper() + text[1:]
    return Section("cautions", "Cautions", f'<p class="caution">{esc(text)}</p>')


def range_text(lower, upper, unit: str) -> str:
    """'0 – 120 mL/h', '≤ 4 L', '≥ 0.2 g/L' (no line breaks inside)."""
    nb = "\u00a0"
    if lower is not None and upper is not None:
        text = f"{fmt(lower)}{nb}\u2013{nb}{fmt(upper)}"
    elif upper is not None:
        text = f"\u2264{nb}{fmt(upper)}"
    elif lower is not None:
        text = f"\u2265{nb}{fmt(lower)}"
    else:
        text = "-"
    return f"{text}{nb}{unit}" if unit else text


def limit_verdict(r) -> str:
    if r.first_violation is not None:
        return f"broken from {fmt(r.first_violation)} h, by up to {fmt(r.worst_violation)} {r.unit}".rstrip()
    return "within"


def marginal_text(v, objective_unit: str, objective_value) -> str:
    """What relaxing a limit is worth at the optimum, in words."""
    tiny = 1e-9 * max(1.0, abs(objective_value or 1.0))
    unit = objective_unit or "(objective)"
    lim_unit = v.report.unit or "unit"
    parts = []
    if abs(v.marginal_max) > tiny:
        parts.append(f"{fmt(v.marginal_max)} {unit} per 1 {lim_unit} more on its maximum")
    if abs(v.marginal_min) > tiny and v.report.kind != "pump":
        parts.append(f"{fmt(v.marginal_min)} {unit} per 1 {lim_unit} less on its minimum")
    if not parts and v.report.kind == "pump" and abs(v.marginal_min) > tiny:
        return "only its minimum (zero flow) binds"
    return "; ".join(parts) if parts else "0 (does not hold the optimum back)"


def limits_section(reports, values=None, objective_unit: str = "", objective_value=None,
                   title: str = "Limits") -> Section:
    """The limit table: range, smallest margin and when, peak use, whether broken;
    with ``values`` (optimize's LimitValue per report) also active and marginal values."""
    header = ["limit", "range", "smallest margin", "at (h)", "peak use", "verdict"]
    if values is not None:
        header += ["at the optimum", "worth of relaxing it"]
    rows = []
    for k, r in enumerate(reports):
        row = [r.name + (" (at the end)" if r.at_end else ""), range_text(r.lower, r.upper, r.unit),
               f"{fmt(r.min_slack)} {r.unit} (to its {'minimum' if r.side == 'min' else 'maximum'})",
               r.time_min_slack, "-" if r.peak_use is None else f"{r.peak_use:.1f} %", limit_verdict(r)]
        if values is not None:
            v = values[k]
            row += ["on the limit" if v.active else "clear of it", marginal_text(v, objective_unit, objective_value)]
        rows.append(row)
    if not reports:
        return Section("limits", title, "<p>No limit was judged: there is no simulated run.</p>")
    body = table(header, rows, numeric={3, 4}, row_class=lambda k: "broken" if reports[k].violated else "")
    note = ("<p class=note>Margin: the smallest distance to the nearest bound over the run, in the limit's "
            "unit (negative: broken). Peak use: the largest value in % of the maximum.")
    if values is not None:
        note += (" Worth of relaxing it: the marginal value from the solver's multipliers, the gain in the "
                 "objective per unit the limit is relaxed.")
    return Section("limits", title, body + note + "</p>")


def figures_section(drawings, svgs, note: str = "", subfolder: str = "") -> Section:
    """Inline SVG figures with captions; ``svgs`` is the SVG text of each drawing;
    ``subfolder``: where the files are within the run folder ('' for the folder itself)."""
    if not drawings:
        return Section("figures", "Figures", f"<p>{esc(note or 'No figures were drawn.')}</p>")
    parts = []
    for d, svg in zip(drawings, svgs):
        parts.append(f'<figure id="{esc(d.name)}">{svg}<figcaption>{esc(d.caption)} '
                     f'<span class=file>({esc(subfolder + "/" + d.name + ".svg" if subfolder else d.name + ".svg in the folder")})'
                     '</span></figcaption></figure>')
    return Section("figures", "Figures", "".join(parts) + (f"<p class=note>{esc(note)}</p>" if note else ""))


def schedule_section(schedule, problem, title: str = "Pump schedule") -> Section:
    from ..frames import schedule_table

    header, rows = schedule_table(schedule, problem)
    if not rows:
        return Section("schedule", title, "<p>There is no schedule.</p>")
    mode = ("Each rate holds until the next row (a growth rate makes the segment exponential)."
            if schedule.interpolation == "constant" else "Rates change linearly from one row to the next.")
    return Section("schedule", title, table(header, rows) + f"<p class=note>{esc(mode)} Written to schedule.csv "
                   "where the run produced it; <code>optfeed check PROBLEM --schedule schedule.csv</code> "
                   "reads it.</p>")


_RECORD_WORDS = {
    "problem_file": "problem file", "schedule_file": "schedule file", "problem_digest": "problem digest (SHA-256)",
    "optfeed": "optfeed version", "casadi": "CasADi version", "python": "Python version",
    "created_utc": "written (UTC)", "settings": "solver settings", "backoff": "limits backed off",
    "end_time_marginal_per_h": "worth of 1 h longer run (objective unit per h)",
}


def provenance_section(record: dict, extra: dict | None = None) -> Section:
    """Where the result came from: files, the problem's digest, settings, versions."""
    items = dict(extra or {})
    items.update(record or {})
    rows = []
    for k, v in items.items():
        label = _RECORD_WORDS.get(k, k.replace("_", " "))
        if isinstance(v, dict):
            text = "; ".join(f"{kk} = {_plain(vv)}" for kk, vv in v.items())
        else:
            text = _plain(v)
        cls = ' class="mono"' if k == "problem_digest" else ""
        rows.append(f"<dt>{esc(label)}</dt><dd{cls}>{esc(text)}</dd>")
    return Section("provenance", "Where this came from", "<dl>" + "".join(rows) + "</dl>")


def _plain(v) -> str:
    if isinstance(v, dict):
        return ", ".join(f"{k} {_plain(x)}" for k, x in v.items())
    if isinstance(v, float):
        return fmt(v, 6)
    return str(v)


def uncertainty_section(mc, uncertain=(), title: str = "Over the uncertain values (Monte Carlo)",
                        what: str = "the schedule") -> Section:
    """How often each limit is broken over a Monte Carlo sample (an
    :class:`~optfeed.montecarlo.MonteCarloResult`), with 95 % Wilson intervals; the
    objective's spread; the uncertain values (``uncertain``: the problem's
    ``uncertainty.values``) and their distributions. The page's status stays the
    nominal run's; this section says so."""
    from ..units import factor_to
    from .text import percent

    def interval(r):
        return "-" if r.low is None else f"{percent(r.low)} \u2013 {percent(r.high)}"

    def nominal(r):
        return "-" if r.nominal_broken is None else ("broken" if r.nominal_broken else "within")

    rows, broken = [], []
    shown = [r for r in mc.limits if r.kind != "pump"] + [mc.any_limit]
    for r in shown:
        margin = "-" if r.margin_p5 is None else (f"{fmt(r.margin_p5)} / {fmt(r.margin_p50)} {r.unit}").strip()
        rows.append([r.name, f"{r.broken} of {r.judged}", percent(r.probability), interval(r), nominal(r), margin])
        broken.append(bool(r.broken))
    lo, hi = mc.failed_interval
    tried = mc.judged + mc.failed
    rows.append(["simulation failed", f"{mc.failed} of {tried}", percent(mc.failed / tried if tried else None),
                 f"{percent(lo)} \u2013 {percent(hi)}", "failed" if mc.nominal_status == "simulation failed" else "-",
                 "-"])
    broken.append(bool(mc.failed))
    body = [f"<p>{esc(what[:1].upper() + what[1:])} was simulated for {mc.samples} independent random samples of the "
            f"uncertain values (seed {mc.seed}) and each run judged as the nominal one is. The status at the top "
            "is the nominal run's; here is how often each limit is broken over the samples.</p>"]
    if mc.not_run:
        body.append(f"<p><b>{mc.not_run} of the {mc.samples} samples were not simulated: the time limit came first."
                    "</b> They are left out of every fraction below.</p>")
    body.append(table(["limit", "broken in", "probability", "95 % interval", "nominal run",
                       "smallest margin: 5th percentile / median"], rows,
                      row_class=lambda k: "broken" if broken[k] else ""))
    body.append("<p class=note>Probability: the fraction of the samples simulated to the end that break the limit; "
                "95 % interval: the Wilson score interval of that fraction (Wilson, 1927). The pumps follow the "
                "schedule in every sample and are not listed.</p>")
    if mc.objective is not None:
        o, unit = mc.objective, mc.objective_unit
        body.append(table(["", "mean", "5th percentile", "median", "95th percentile", "nominal run"],
                          [[f"{mc.objective_label} ({unit})" if unit else mc.objective_label, o["mean"], o["p5"],
                            o["p50"], o["p95"], o["nominal"]]], caption="The objective over the samples."))
    if uncertain:
        vrows = []
        for v, text in zip(uncertain, mc.distributions):
            f = factor_to(v.unit) if v.unit else 1.0
            vrows.append([v.name, f"{fmt(v.nominal * f)} {v.unit}".strip(), text, v.key])
        body.append(table(["uncertain value", "in the problem file", "distribution", "where"], vrows,
                          caption="The uncertain values (a normal or lognormal value has the file's value as its "
                                  "mean)."))
    body.append(f"<p class=note>{mc.samples} samples in {esc(fmt(mc.seconds, 3))} s on {mc.workers} process(es) "
                f"({esc(fmt(mc.samples_per_second, 3))} samples/s; integrated with {esc(METHOD_WORDS[mc.integration_method])}); "
                f"every sample in montecarlo.csv.</p>")
    failed = [r for r in mc.runs if r.status == "simulation failed"][:5]
    if failed:
        body.append("<ul class=cases>" + "".join(f"<li>sample {r.index + 1}: {esc(r.message)}</li>" for r in failed)
                    + "</ul>")
    return Section("uncertainty", title, "".join(body))


def outcome_section(outcome, title: str = "At the end of the run") -> Section:
    if outcome is None:
        return Section("outcome", title, "<p>No values: there is no simulated run to its end.</p>")
    rows = [[f.label, f.value, f.unit] for f in outcome.finals]
    return Section("outcome", title, table(["quantity", "value", "unit"], rows, numeric={1}))


# ------------------------------------------------------------------ pages of the jobs


def phases_section(result) -> Section | None:
    """The phases a run went through (start, end, what ended each) and the additions
    applied; None for a problem with neither."""
    body = ""
    if result.phases:
        body += table(["phase", "start (h)", "end (h)", "ended by"],
                      [[r.name, r.start, r.end, r.how] for r in result.phases], numeric={1, 2})
    if result.additions:
        rows = [[a.time, a.kind, a.volume, ", ".join(f"{k} {fmt(v)}" for k, v in a.amounts.items()) or "-"]
                for a in result.additions]
        body += table(["time (h)", "addition", "volume (mL)", "adds"], rows, numeric={0, 2})
    if not body:
        return None
    return Section("phases", "Phases and additions", body)


def check_page(result, drawings=(), svgs=(), figure_note: str = "") -> Page:
    """The page of a :class:`~optfeed.check.CheckResult`."""
    words, tone = headline(result.status, len(result.violations))
    sections = [caution_section()]
    if result.outcome is not None and result.outcome.objective is not None:
        o = result.outcome.objective
        sections.append(Section("objective", "Objective",
                                f'<p class="figure-big">{esc(fmt(o.value, 6))} {esc(o.unit)}</p>'
                                f"<p>{esc(o.label)}, over a run of {esc(fmt(result.end_time))} h.</p>"))
    phased = phases_section(result) if result.outcome is not None else None
    if phased is not None:
        sections.append(phased)
    sections.append(limits_section(result.limits))
    if result.uncertainty is not None:
        sections.append(uncertainty_section(result.uncertainty, result.problem.uncertainty.values))
    sections.append(figures_section(drawings, svgs, figure_note))
    sections.append(outcome_section(result.outcome))
    sections.append(schedule_section(result.schedule, result.problem, "The schedule checked"))
    sections.append(provenance_section(result.record, {"run length (h)": result.end_time}))
    return Page("check", result.problem.name, words, tone, result.status, result.message, tuple(sections),
                result.record.get("created_utc", ""))


def optimize_page(result, drawings=(), svgs=(), figure_note: str = "") -> Page:
    """The page of an :class:`~optfeed.optimize.OptimizeResult`."""
    from ..frames import starts_table

    words, tone = headline(result.status)
    unit = result.objective_unit
    sections = [caution_section()]
    body = []
    if result.objective_sim is not None or result.objective_nlp is not None:
        body.append(f'<p class="figure-big">{esc(fmt(result.objective_sim, 6))} {esc(unit)}</p>')
        body.append(f"<p>{esc(result.objective_label)}: re-simulated {esc(fmt(result.objective_sim, 7))} "
                    f"{esc(unit)}; the optimizer's own value {esc(fmt(result.objective_nlp, 7))} {esc(unit)}")
        if result.end_time is not None:
            free = " (free, chosen by the optimizer)" if result.problem.horizon.free else ""
            body.append(f"; run length {esc(fmt(result.end_time, 6))} h{esc(free)}")
        body.append(".</p>")
    else:
        body.append(f"<p>No objective value: {esc(result.message)}</p>")
    if result.starts:
        header, rows = starts_table(result)
        spread = "" if result.spread is None else f" Spread over the converged starts: {result.spread:.2%} of the best."
        body.append(table(header, rows, caption="Every start of the solver, best first.") +
                    f"<p class=note>{esc(spread)}</p>")
    sections.append(Section("objective", "Objective", "".join(body)))
    reports = [v.report for v in result.limits]
    phased = phases_section(result) if result.trajectory is not None else None
    if phased is not None:
        sections.append(phased)
    sections.append(limits_section(reports, list(result.limits), unit, result.objective_nlp,
                                   "Limits at the optimum (re-simulated)"))
    if result.record.get("scenarios"):
        sections.append(scenarios_section(result))
    if result.uncertainty is not None:
        sections.append(uncertainty_section(result.uncertainty, result.problem.uncertainty.values,
                                            what="the schedule found"))
    sections.append(figures_section(drawings, svgs, figure_note))
    sections.append(outcome_section(result.outcome, "At the end of the run (re-simulated)"))
    sections.append(schedule_section(result.schedule, result.problem, "The pump schedule found"))
    sections.append(provenance_section(result.record, {"solver time (s)": round(result.seconds, 2)}))
    return Page("optimize", result.problem.name, words, tone, result.status, result.message, tuple(sections),
                result.record.get("created_utc", ""))


def scenarios_section(result) -> Section:
    """A scenario solve: each scenario's values and objective, and the answer beside
    the nominal optimum over the same Monte Carlo sample."""
    from .text import robustness_rows

    sc = result.record["scenarios"]
    unit = result.objective_unit
    names = list(sc.get("values", {}))
    rows = [[label, sc["weights"][k], *(sc["values"][n][k] for n in names), sc["objective_resimulated"][k],
             "yes" if sc["verified"][k] else "NO"] for k, label in enumerate(sc["labels"])]
    words = {"mean": "the mean", "worst": "the worst", "mean_std": f"the mean less {fmt(sc.get('k'))} standard "
             "deviations"}.get(sc["objective_over_scenarios"], sc["objective_over_scenarios"])
    body = [f"<p>One pump profile for {sc['count']} scenarios of the uncertain values (the nominal one first), "
            f"chosen for {esc(words)} of the objective over them, with every limit held in each scenario.</p>",
            table(["scenario", "weight", *names, f"objective ({unit})", "verified"], rows,
                  row_class=lambda k: "" if sc["verified"][k] else "broken")]
    cmp = robustness_rows(result)
    if cmp is not None:
        header, crow = cmp
        body.append(table(header, crow, caption=f"What robustness costs and buys: both schedules judged over the same "
                                                f"{result.uncertainty.samples} Monte Carlo samples. The nominal "
                                                "optimum is in nominal-schedule.csv."))
    return Section("scenarios", "Over the scenarios", "".join(body))


def sweep_page(sweep, rows, best, drawings=(), svgs=(), figure_note: str = "", top: int = 10) -> Page:
    """The page of a sweep folder: how many cases answered, the best ones, every
    case with each limit's smallest margin, the figures, the schedule checked (or the
    best case's), and where it came from."""
    from ..frames import case_schedule, cases_table

    good_word = "within every limit" if sweep.job == "check" else "optimal and verified"
    good = {"within limits", "optimal, verified"}
    n = len(rows)
    counts = {}
    for r in rows:
        counts[r["status"]] = counts.get(r["status"], 0) + 1
    left = counts.get("queued", 0) + counts.get("running", 0)
    n_good = sum(v for k, v in counts.items() if k in good)
    if left:
        words, tone, status = f"Stopped with {left} of {n} cases still to run", WARN, "stopped"
    elif n_good == n:
        words, tone, status = f"All {n} cases {good_word}", GOOD, "finished"
    else:
        words, tone, status = f"{n_good} of {n} cases {good_word}", (BAD if n_good == 0 else WARN), "finished"
    message = f"{sweep.job} sweep: " + ", ".join(f"{v} {k}" for k, v in sorted(counts.items(), key=lambda kv: -kv[1]))
    if left:
        message += ". Run the same command again to resume."
    sections = [caution_section()]
    unit = next((r.get("objective_unit") for r in best if r.get("objective_unit")), "")
    if best:
        ranked_rows = [[i, r["objective"], r["label"]] for i, r in enumerate(best[:top], 1)]
        sections.append(Section("best", "Best cases",
                                table(["rank", f"objective ({unit})" if unit else "objective", "case"], ranked_rows)))
    else:
        sections.append(Section("best", "Best cases", "<p>No case has an answer to rank yet.</p>"))
    header, table_rows = cases_table(rows, list(sweep.varied))
    nv = len(sweep.varied)
    keep = [i for i, h in enumerate(header) if 3 <= i < 3 + nv or h == "status" or h.startswith(("objective",
                                                                                                    "margin: "))]
    if any(r["values"].get("problem") != rows[0]["values"].get("problem") for r in rows):
        keep.insert(0, 2)  # several base problems: say which
    bad_rows = {k for k, r in enumerate(rows) if r["status"] not in good}
    body = table([header[i] for i in keep], [[row[i] for i in keep] for row in table_rows],
                 row_class=lambda k: "broken" if k in bad_rows else "")
    body += ("<p class=note>Margin: the smallest distance of the limit to its nearest bound over the run, in the "
             "limit's unit (negative: broken). Each case's own report is cases/&lt;key&gt;/report.html; "
             "summary.csv has every column.</p>")
    notes = [f"<li><b>{esc(r['label'])}</b>: {esc(r['status'])} - {esc(r.get('message') or '')}</li>"
             for k, r in enumerate(rows) if k in bad_rows and r["status"] not in ("queued", "running")]
    if notes:
        body += "<p>Cases that are not " + esc(good_word) + ":</p><ul class=cases>" + "".join(notes) + "</ul>"
    sections.append(Section("cases", "Every case", body))
    sections.append(figures_section(drawings, svgs, figure_note, subfolder="figures"))
    if sweep.schedule_text:
        sections.append(Section("schedule", "The schedule checked",
                                f"<pre>{esc(sweep.schedule_text)}</pre>"))
    if sweep.job != "check" and best:
        header, srows = case_schedule(best[0])
        if srows:
            sections.append(Section("schedule", "The pump schedule of the best case", table(header, srows)))
    sections.append(provenance_section({"sweep file": sweep.source, "job": sweep.job,
                                        "time limit per case (s)": sweep.time_limit, "cases": n,
                                        "varied": ", ".join(sweep.varied), "optfeed version": __version__}))
    return Page("sweep", sweep.name, words, tone, status, message, tuple(sections))


def recipe_page(result, drawings=(), svgs=(), figure_note: str = "", max_rows: int = 300) -> Page:
    """The page of a :class:`~optfeed.recipe.RecipeResult`: the rounded recipe as
    the check job judged it, and its setpoint table."""
    words, tone = headline(result.status, len(result.check.violations))
    if result.status == "within limits":
        words = "The rounded recipe stays within every limit"
    sections = [caution_section()]
    res = ", ".join(f"{n}: {fmt(v)} {result.units[n]}" for n, v in result.resolution.items())
    rnd = ", ".join(f"{n}: {fmt(v)} {result.units[n]}" for n, v in result.largest_rounding.items())
    body = [f"<p>Setpoints every {esc(result.record.get('step', ''))}, each the mean rate of the run's schedule over "
            f"its step, rounded to {esc(res)}. Largest change from stepping and rounding: {esc(rnd)}.</p>"]
    if result.objective_difference is not None:
        o = result.check.outcome.objective
        body.append(f'<p class="figure-big">{esc(fmt(o.value, 6))} {esc(o.unit)} '
                    f'<span class=note>({result.objective_relative:+.3%} against the run\'s own schedule, '
                    f"{esc(fmt(result.reference.outcome.objective.value, 6))} {esc(o.unit)})</span></p>"
                    f"<p>{esc(o.label)}.</p>")
    sections.append(Section("objective", "The rounded recipe", "".join(body)))
    sections.append(limits_section(result.check.limits, title="Limits of the rounded recipe"))
    sections.append(figures_section(drawings, svgs, figure_note))
    shown = result.rows[:max_rows]
    more = "" if len(result.rows) <= max_rows else f" The first {max_rows} of {len(result.rows)} rows are shown."
    sections.append(Section("schedule", "Setpoints", table(result.header, shown) +
                            f"<p class=note>A row wherever a setpoint changes; each holds until the next row. "
                            f"The whole table is recipe.csv; schedule.csv is the same recipe for "
                            f"<code>optfeed check</code>.{esc(more)}</p>"))
    sections.append(provenance_section(result.record, {"run length (h)": result.end_time}))
    return Page("recipe", result.problem.name, words, tone, result.status, result.message, tuple(sections),
                result.record.get("created_utc", ""))


def fit_page(result, drawings=(), svgs=(), figure_note: str = "") -> Page:
    """The page of a :class:`~optfeed.fit.FitResult`: the estimates with their
    intervals, the goodness of fit, what the data cannot tell, the figures, the
    starts, and where it came from."""
    r = result
    words, tone = headline(r.status)
    if r.status == "fitted" and r.flags:
        words, tone = "Fitted, with warnings about what the data can tell", WARN
    s = r.statistics
    sections = [caution_section()]
    if r.estimates:
        profile = any(e.profile_low is not None or e.profile_high is not None for e in r.estimates)
        header = ["parameter", "estimate", "unit", "standard error", "95 % confidence interval"]
        header += ["95 % profile likelihood"] if profile else []
        header += ["range searched"]
        rows = []
        for e in r.estimates:
            row = [e.name, e.value, e.unit or "internal units", e.se,
                   range_text(e.ci_low, e.ci_high, "")]
            if profile:
                row.append("beyond the range searched" if e.profile_low is None and e.profile_high is None
                           else range_text(e.profile_low, e.profile_high, ""))
            row.append(range_text(e.lower, e.upper, ""))
            rows.append(row)
        note = (f"Confidence intervals: estimate ± t × standard error, t = {fmt(s.t_quantile, 5)} (Student's t, "
                f"{s.dof} degrees of freedom), from the Gauss-Newton covariance"
                + ("" if r.runs.trusted else " scaled by the residual variance") + ".")
        if profile:
            note += (" Profile likelihood: the values where chi-square, the others re-estimated, has risen by "
                     "3.84 (a one-sided end '≤'/'≥' lies beyond the range searched).")
        sections.append(Section("estimates", "Estimates", table(header, rows, numeric={1, 3}) +
                                f"<p class=note>{esc(note)} The problem file with these values written in is "
                                "fitted.yaml: <code>optfeed optimize fitted.yaml</code> runs it; their covariance "
                                "is covariance.csv.</p>"))
        res_rows = [[d["run"], d["quantity"], d["unit"], d["count"], d["mean"], d["rms"]] for d in r.residuals]
        body = (f"<p>{esc(r.verdict[:1].upper() + r.verdict[1:])}.</p>" +
                table(["run", "quantity", "unit", "samples", "mean weighted residual", "RMS weighted residual"],
                      res_rows, numeric={3, 4, 5}) +
                "<p class=note>Weighted residual: (fitted - measured) / sigma, from the runs re-simulated at the "
                "estimates. Under the stated measurement error its mean is near 0 and its RMS near 1.</p>")
        sections.append(Section("fit", "Goodness of fit", body))
        names = [e.name for e in r.estimates]
        body = []
        if r.flags:
            body.append("<ul class=cases>" + "".join(f"<li>{esc(f)}</li>" for f in r.flags) + "</ul>")
        else:
            body.append("<p>No warning: every parameter is fixed by the data to within its own size, and no pair "
                        "is correlated above 0.95.</p>")
        if len(names) > 1:
            body.append(table([""] + names, [[n] + [None if v != v else round(float(v), 3) for v in s.correlation[i]]
                                             for i, n in enumerate(names)], caption="Correlation of the estimates."))
        terms = " ".join(f"{c:+.2f} log {n}" for c, n in zip(s.weakest, names) if abs(c) > 0.05).lstrip("+")
        body.append(f"<p class=note>Condition number of the scaled information matrix: {esc(fmt(s.condition, 3))}. "
                    f"The combination of parameters the data fix least: {esc(terms)}.</p>")
        sections.append(Section("identifiability", "What the data can tell", "".join(body)))
    sections.append(figures_section(drawings, svgs, figure_note))
    if r.starts:
        rows = [[st_["from"], st_["status"], st_.get("chi2"), st_.get("iterations"), st_.get("seconds")]
                for st_ in r.starts]
        spread = "" if r.spread is None else f" Spread over the converged starts: {r.spread:.2%} of the best."
        sections.append(Section("starts", "Starts", table(["from", "status", "chi-square (NLP)", "iterations",
                                                           "seconds"], rows) +
                                f"<p class=note>Each start is one solve of the calibration NLP; the best is then "
                                f"polished on the re-simulated runs.{esc(spread)}</p>"))
    sections.append(provenance_section(r.record, {"runs file": r.runs.source, "fit time (s)": round(r.seconds, 2)}))
    return Page("fit", r.problem.name, words, tone, r.status, r.message, tuple(sections),
                r.record.get("created_utc", ""))


# ------------------------------------------------------------------ rendering


def render(page: Page) -> str:
    """The page as one self-contained HTML document."""
    contents = "".join(f'<li><a href="#{esc(s.key)}">{esc(s.title)}</a></li>' for s in page.sections)
    sections = "".join(f'<section id="{esc(s.key)}"><h2>{esc(s.title)}</h2>{s.body}</section>'
                       for s in page.sections)
    when = f" &middot; {esc(page.created)}" if page.created else ""
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        f"<title>{esc(page.name)} - optfeed {esc(page.job)}: {esc(page.status)}</title>"
        f"<style>{STYLE}</style></head><body>"
        f'<header class="banner tone-{esc(page.tone)}"><p class="job">optfeed {esc(page.job)} &middot; '
        f"{esc(page.name)}{when}</p>"
        f'<h1 id="status">{esc(page.headline)}</h1>'
        f'<p class="message"><span class="word">{esc(page.status)}</span> {esc(page.message)}</p></header>'
        f'<nav class="contents" aria-label="contents"><ol>{contents}</ol></nav>'
        f"<main>{sections}</main>"
        f"<footer>Written by optfeed. This file is complete in itself: it needs no network and no "
        f"script, and prints to PDF from a browser.</footer></body></html>\n"
    )


STYLE = """
:root{--ink:#17364a;--text:#22292e;--faint:#5f6b73;--rule:#d5dadd;--paper:#fbfaf7;
--good:#2f6d4f;--good-bg:#e6f0ea;--warn:#8a6100;--warn-bg:#f6eedb;--bad:#a3342a;--bad-bg:#f6e4e1}
*{box-sizing:border-box}
html{background:var(--paper)}
body{margin:0 auto;max-width:70rem;padding:1.2rem 1.6rem 2rem;color:var(--text);
font:15px/1.45 "Noto Sans","DejaVu Sans","Segoe UI",Helvetica,Arial,sans-serif}
.banner{border-left:.55rem solid var(--faint);padding:.7rem 1.1rem .8rem;margin:0 0 1rem;background:#eef0f1}
.banner .job{margin:0;color:var(--faint);font-size:.85rem;letter-spacing:.02em}
.banner h1{margin:.15rem 0 .3rem;font-size:1.75rem;line-height:1.2;color:var(--ink)}
.banner .message{margin:0}
.banner .word{display:inline-block;font-size:.78rem;text-transform:uppercase;letter-spacing:.06em;
padding:.05rem .45rem;margin-right:.4rem;border:1px solid currentColor;border-radius:.2rem}
.tone-good{border-color:var(--good);background:var(--good-bg)} .tone-good .word,.tone-good h1{color:var(--good)}
.tone-warn{border-color:var(--warn);background:var(--warn-bg)} .tone-warn .word,.tone-warn h1{color:var(--warn)}
.tone-bad{border-color:var(--bad);background:var(--bad-bg)} .tone-bad .word,.tone-bad h1{color:var(--bad)}
nav.contents ol{list-style:none;margin:0 0 .6rem;padding:0;display:flex;flex-wrap:wrap;gap:.3rem 1.1rem;
font-size:.85rem}
nav.contents a{color:var(--ink)}
h2{color:var(--ink);font-size:1.15rem;margin:1.6rem 0 .5rem;padding-bottom:.2rem;border-bottom:2px solid var(--ink)}
#cautions{border:1px dashed var(--warn);padding:.1rem .9rem .2rem;background:#fffdf6}
#cautions h2{border:0;margin:.5rem 0 .1rem;font-size:1rem;color:var(--warn)}
.caution{margin:.2rem 0 .5rem}
.figure-big{font-size:1.6rem;margin:.2rem 0;color:var(--ink);font-variant-numeric:tabular-nums}
.table-wrap{overflow-x:auto}
table{border-collapse:collapse;font-size:.86rem;margin:.3rem 0;min-width:50%}
caption{caption-side:top;text-align:left;color:var(--faint);font-size:.82rem;padding:.2rem 0}
th,td{padding:.28rem .6rem;border-bottom:1px solid var(--rule);text-align:left;vertical-align:top}
th{color:var(--ink);border-bottom:1.5px solid var(--ink);font-weight:600;vertical-align:bottom}
th.num{white-space:normal}
td.num,th.num{text-align:right;font-variant-numeric:tabular-nums;white-space:nowrap}
tr.broken td{background:var(--bad-bg)} tr.broken td:first-child{box-shadow:inset .3rem 0 0 var(--bad)}
.note{color:var(--faint);font-size:.82rem}
figure{margin:.8rem 0 1.2rem}
figure svg{display:block;width:100%;height:auto;max-width:62rem}
figcaption{font-size:.85rem;color:var(--faint);margin-top:.2rem}
.file{white-space:nowrap}
dl{display:grid;grid-template-columns:max-content 1fr;gap:.2rem 1rem;font-size:.86rem}
dt{color:var(--faint)} dd{margin:0;overflow-wrap:anywhere}
.mono,code{font-family:"DejaVu Sans Mono",Menlo,Consolas,monospace;font-size:.82rem}
footer{margin-top:2rem;color:var(--faint);font-size:.8rem;border-top:1px solid var(--rule);padding-top:.5rem}
@page{size:A4;margin:14mm 12mm}
@media print{
html,body{background:#fff}
body{max-width:none;padding:0;font-size:9.5pt}
.banner,tr.broken td,#cautions{-webkit-print-color-adjust:exact;print-color-adjust:exact}
nav.contents{display:none}
h2{break-after:avoid}
figure,tr,.banner,#cautions,dl{break-inside:avoid}
thead{display:table-header-group}
table{font-size:7.5pt} th,td{padding:.15rem .35rem}
figure svg{max-height:235mm}
.table-wrap{overflow:visible}
a{color:inherit;text-decoration:none}
}
"""


def write_report(folder, page_of, draw=None, no_figures_note: str = "No figures: there is no simulated run.",
                 figure_folder=None, png: bool = False) -> None:
    """Write ``folder/report.html``, with the figures of ``draw()`` (a list of
    Drawing) saved as SVG in ``figure_folder`` (default: ``folder``), and as PNG
    too if ``png``, and shown inline as SVG (the same text as the files).

    ``page_of(drawings, svgs, note)`` builds the :class:`Page`. Figures are a
    convenience: if drawing fails, the report says so (and figure-not-drawn.txt),
    and everything else is still written. The file appears whole or not at all
    (written beside, then renamed).
    """
    import os
    from pathlib import Path

    folder = Path(folder)
    fig_folder = Path(figure_folder) if figure_folder is not None else folder
    drawings, svgs, note = [], [], ("" if draw is not None else no_figures_note)
    if draw is not None:
        from .figures import save_png, save_svg, svg_text

        try:
            drawings = draw()
            fig_folder.mkdir(parents=True, exist_ok=True)
            for d in drawings:
                # ids named after the drawing: unique on the page, and two runs' files
                # pasted into one page clash only for the same figure
                svgs.append(svg_text(d, f"{d.name}-"))
                save_svg(d, fig_folder, svgs[-1])
                if not png:  # a folder written again (a sweep's figures/): no stale copy
                    (fig_folder / f"{d.name}.png").unlink(missing_ok=True)
            (fig_folder / "figure-not-drawn.txt").unlink(missing_ok=True)
        except Exception as exc:  # noqa: BLE001 - the numbers are the record, the figures a convenience
            note = f"The figures could not be drawn: {exc}"
            fig_folder.mkdir(parents=True, exist_ok=True)
            (fig_folder / "figure-not-drawn.txt").write_text(note + "\n")
            for d in drawings:
                (fig_folder / f"{d.name}.svg").unlink(missing_ok=True)
                (fig_folder / f"{d.name}.png").unlink(missing_ok=True)
            drawings, svgs = [], []
        if png and drawings:
            try:
                for d in drawings:
                    save_png(d, fig_folder)
            except Exception as exc:  # noqa: BLE001 - the SVG files stand; only the PNG copies are missing
                for d in drawings:
                    (fig_folder / f"{d.name}.png").unlink(missing_ok=True)
                note = f"The PNG copies of the figures could not be written: {exc}"
                (fig_folder / "figure-not-drawn.txt").write_text(note + "\n")
    try:
        text = render(page_of(drawings, svgs, note))
    except Exception as exc:  # noqa: BLE001 - never lose a run's numbers for its report
        (folder / "report-not-written.txt").write_text(f"report.html could not be built: "
                                                       f"{type(exc).__name__}: {exc}\n")
        return
    tmp = folder / ".report.html.tmp"
    tmp.write_text(text, encoding="utf-8")
    os.replace(tmp, folder / "report.html")
