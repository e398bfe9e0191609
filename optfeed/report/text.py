"""Human-readable reports."""

from __future__ import annotations

from ..limits import REL_TOL, bound_scale
from ..marginals import binding_sides

# CVODES' multistep methods as the reports name them (see optfeed.simulate.cheaper_method)
METHOD_WORDS = {"bdf": "CVODES' BDF method", "adams": "CVODES' Adams method, less work than BDF on the nominal run"}

CAUTION = (
    "Caution: a model-based feed profile is a hypothesis, not a release for manufacturing.\n"
    "Verify it at small scale first. Overfilling can foam out, wet exhaust filters and break\n"
    "sterility; oxygen-enriched aeration raises fire risk; pressure vessels have their own\n"
    "rated limits; under-estimated heat load or oxygen demand harms the culture. Local codes,\n"
    "site safety and biosafety rules, licensed practice and, for regulated products, the\n"
    "quality system govern what is run."
)


def fmt(value, digits: int = 4) -> str:
    """A number for people: 4 significant digits, no trailing noise."""
    if value is None:
        return "-"
    if value == 0:
        return "0"
    return f"{value:.{digits}g}"


def unit_words(unit: str) -> str:
    """A limit's unit for people: '' (a bound written as a bare number on an expression
    whose dimension cannot be inferred) reads 'internal units'."""
    return unit or "internal units"


def tidy(value, report):
    """``value`` (a slack or an excess of the limit ``report``, its unit) with anything
    within the check tolerance of zero shown as 0: a slack of -3.7e-8 L on a 4 L
    bound is 'on the bound', as the check itself judges it."""
    if value is None:
        return None
    if abs(value) <= REL_TOL * bound_scale(report.lower, report.upper):
        return 0.0
    return value


def table_lines(rows) -> list[str]:
    """Rows of strings (the first a header) as aligned text lines, a rule under the header."""
    widths = [max(len(row[i]) for row in rows) for i in range(len(rows[0]))]
    out = []
    for k, row in enumerate(rows):
        out.append("  " + "  ".join(c.ljust(w) for c, w in zip(row, widths)).rstrip())
        if k == 0:
            out.append("  " + "  ".join("-" * w for w in widths))
    return out


def limits_table(reports) -> list[str]:
    rows = [("limit", "range", "smallest slack", "at (h)", "peak use", "first broken (h)")]
    for r in reports:
        unit = unit_words(r.unit)
        rng = f"{fmt(r.lower) if r.lower is not None else ''}..{fmt(r.upper) if r.upper is not None else ''} {unit}"
        rows.append((
            r.name + (" (end)" if r.at_end else ""),
            rng,
            f"{fmt(tidy(r.min_slack, r))} {unit} ({r.side})",
            fmt(r.time_min_slack),
            "-" if r.peak_use is None else f"{r.peak_use:.1f} %",
            "-" if r.first_violation is None else f"{fmt(r.first_violation)}  BROKEN by up to {fmt(r.worst_violation)} {unit}",
        ))
    return table_lines(rows)


def phase_lines(result) -> list[str]:
    """The phases a run went through and the additions applied (none: no lines)."""
    lines = []
    if result.phases:
        rows = [("phase", "start (h)", "end (h)", "ended by")]
        rows += [(r.name, fmt(r.start), fmt(r.end), r.how) for r in result.phases]
        lines += ["Phases:"] + table_lines(rows) + [""]
    if result.additions:
        rows = [("time (h)", "addition", "volume (mL)", "adds")]
        for a in result.additions:
            adds = ", ".join(f"{k} {fmt(v)}" for k, v in a.amounts.items()) or "-"
            rows.append((fmt(a.time), a.kind, fmt(a.volume), adds))
        lines += ["Additions:"] + table_lines(rows) + [""]
    return lines


def outcome_lines(outcome) -> list[str]:
    out = []
    for f in outcome.finals:
        out.append(f"  {f.label:<14} {fmt(f.value, 5)} {unit_words(f.unit)}")
    if outcome.objective is not None:
        o = outcome.objective
        out.append(f"  objective      {fmt(o.value, 6)} {unit_words(o.unit)}  ({o.label})")
    return out


def warning_lines(problem) -> list[str]:
    """The problem's unit warnings (see optfeed.dimensions), or nothing."""
    if not problem.warnings:
        return []
    return ["Warnings (the file is valid, but these units look wrong):"] + [f"  {w}" for w in problem.warnings] + [""]


def percent(p) -> str:
    """A probability for people: '18.7 %', '0 %', '-' for none."""
    if p is None:
        return "-"
    if p == 0 or p == 1:
        return f"{100 * p:.0f} %"
    return f"{100 * p:.3g} %" if 100 * p < 0.1 else f"{100 * p:.1f} %"


def risk_row(r) -> tuple:
    """(limit, 'k of n', probability, 95 % interval, nominal run) of a LimitRisk."""
    nominal = "-" if r.nominal_broken is None else ("broken" if r.nominal_broken else "within")
    interval = "-" if r.low is None else f"{percent(r.low)} .. {percent(r.high)}"
    return (r.name, f"{r.broken} of {r.judged}", percent(r.probability), interval, nominal)


def uncertainty_lines(mc, problem) -> list[str]:
    """The Monte Carlo block of a text report (a :class:`~optfeed.montecarlo.MonteCarloResult`)."""
    late = f", {mc.not_run} not run (the time limit came first)" if mc.not_run else ""
    lines = [f"Over the uncertain values (Monte Carlo: {mc.samples} independent samples, seed {mc.seed}; "
             f"{mc.judged} simulated to the end, {mc.failed} failed{late}):",
             "  The status above is the nominal run's. Here: the fraction of samples that break each limit,",
             "  with its 95 % Wilson interval (the pumps follow the schedule in every sample)."]
    rows = [("limit", "broken in", "probability", "95 % interval", "nominal run")]
    rows += [risk_row(r) for r in mc.limits if r.kind != "pump"] + [risk_row(mc.any_limit)]
    lo, hi = mc.failed_interval
    tried = mc.judged + mc.failed
    rows.append(("simulation failed", f"{mc.failed} of {tried}", percent(mc.failed / tried if tried else None),
                 f"{percent(lo)} .. {percent(hi)}", "failed" if mc.nominal_status == "simulation failed" else "-"))
    lines += table_lines(rows)
    margins = [r for r in mc.limits if r.margin_p5 is not None and r.kind != "pump"]
    if margins:
        lines.append("  Smallest margin over the run (5th percentile / median of the samples; negative: broken):")
        for r in margins:
            lines.append(f"    {r.name:<24} {fmt(tidy(r.margin_p5, r))} / "
                         f"{fmt(tidy(r.margin_p50, r))} {unit_words(r.unit)}")
    if mc.objective is not None:
        o, unit = mc.objective, unit_words(mc.objective_unit)
        lines.append(f"  Objective ({mc.objective_label}): mean {fmt(o['mean'], 6)}, P5 {fmt(o['p5'], 6)}, "
                     f"median {fmt(o['p50'], 6)}, P95 {fmt(o['p95'], 6)} {unit} (nominal {fmt(o['nominal'], 6)})")
    lines.append("  Uncertain values (around the value in the problem file):")
    for v, text in zip(problem.uncertainty.values, mc.distributions):
        lines.append(f"    {v.name:<24} {text}")
    rate = mc.samples_per_second
    lines.append(f"  {mc.samples} samples in {mc.seconds:.1f} s on {mc.workers} process(es) "
                 f"({rate:.3g} samples/s; integrated with {METHOD_WORDS[mc.integration_method]}).")
    failed = [r for r in mc.runs if r.status == "simulation failed"][:3]
    for r in failed:
        lines.append(f"  sample {r.index + 1} failed: {r.message}")
    return lines + [""]


def check_text(result) -> str:
    """The text report of a :class:`~optfeed.check.CheckResult`."""
    p = result.problem
    lines = [
        f"optfeed check: {p.name}",
        f"  problem   {result.record.get('problem_file', '')}",
        f"  schedule  {result.record.get('schedule_file', '')}",
        f"  run       0 .. {fmt(result.end_time)} h",
        "",
        f"STATUS: {result.status.upper()} - {result.message}",
        "",
    ] + warning_lines(p)
    if result.outcome is None:
        lines += ["No trajectory: the simulation did not reach the end of the run.", ""]
    else:
        lines += phase_lines(result)
        lines += ["Limits:"] + limits_table(result.limits) + [""]
        lines += ["At the end of the run:"] + outcome_lines(result.outcome) + [""]
    if result.uncertainty is not None:
        lines += uncertainty_lines(result.uncertainty, p)
    lines.append(CAUTION)
    return "\n".join(lines) + "\n"


def optimize_text(result) -> str:
    """The text report of an :class:`~optfeed.optimize.OptimizeResult`."""
    p = result.problem
    unit = unit_words(result.objective_unit)
    lines = [
        f"optfeed optimize: {p.name}",
        f"  problem   {result.record.get('problem_file', '')}",
        f"  grid      {p.settings.pump_steps} pump steps x {p.settings.elements_per_step} elements, "
        f"Radau degree {p.settings.degree}; {p.settings.starts} starts",
        "",
        f"STATUS: {result.status.upper()} - {result.message}",
        "",
    ] + warning_lines(p)
    if result.objective_nlp is not None:
        lines += [
            f"Objective ({result.objective_label}):",
            f"  from the NLP        {fmt(result.objective_nlp, 7)} {unit}",
            f"  re-simulated        {fmt(result.objective_sim, 7)} {unit}",
        ]
        if result.end_time is not None:
            lines.append(f"  end time            {fmt(result.end_time, 6)} h"
                         + (" (free)" if p.horizon.free else ""))
        if "end_time_marginal_per_h" in result.record:
            lines.append(f"  1 h longer run      {fmt(result.record['end_time_marginal_per_h'])} {unit} more")
        lines.append("")
    lines += scenario_lines(result)
    if result.starts:
        lines.append("Starts (best first):")
        for s in result.starts:
            val = "-" if s.objective is None else fmt(s.objective, 7)
            lines.append(f"  {val:>12} {unit}  {s.status:<16} {s.iterations:>5} it  {s.seconds:6.2f} s  from {s.label}")
        if result.spread is not None:
            lines.append(f"  spread over converged starts: {result.spread:.2%} of the best")
        lines.append("")
    if result.limits:
        lines += phase_lines(result)
        chosen = result.record.get("chosen_amounts")
        if chosen:
            lines += ["Amounts optimize chose for the additions (written into planned.yaml; check the answer with",
                      "'optfeed check planned.yaml --schedule schedule.csv'):"]
            lines += [f"  {c['addition']} at {fmt(c['time_h'])} h: {c['species']} {fmt(c['amount'], 6)} "
                      f"(range {fmt(c['min'])}..{fmt(c['max'])}, internal units)" for c in chosen] + [""]
        lines += ["Limits at the optimum (re-simulated):"] + limits_table([v.report for v in result.limits]) + [""]
        lines.append(f"Marginal values (gain in objective, {unit}, per unit relaxation of a limit;")
        lines.append("ACTIVE = it holds the optimum back, its marginal value is not zero):")
        kept = result.record.get("backoff", {})
        for v in result.limits:
            up, low = binding_sides(v.report, v.marginal_max, v.marginal_min, result.objective_nlp)
            lu = unit_words(v.report.unit)
            parts = []
            if up:
                parts.append(f"+1 {lu} on its maximum: {fmt(v.marginal_max)}")
            if low and v.report.kind != "pump":
                parts.append(f"-1 {lu} on its minimum: {fmt(v.marginal_min)}")
            if low and v.report.kind == "pump" and not parts:
                parts.append("only its minimum (zero flow) binds")
            if v.name in kept:
                parts.append(f"kept {fmt(kept[v.name]['amount'], 3)} {unit_words(kept[v.name]['unit'])} clear (back-off)")
            state = "ACTIVE" if v.active else "slack "
            lines.append(f"  {state} {v.name:<24} " + ("; ".join(parts) if parts else "0 (does not hold the optimum back)"))
        lines.append("")
    if result.outcome is not None:
        lines += ["At the end of the run (re-simulated):"] + outcome_lines(result.outcome) + [""]
    lines += robustness_lines(result)
    if result.uncertainty is not None:
        lines += uncertainty_lines(result.uncertainty, p)
    lines.append(CAUTION)
    return "\n".join(lines) + "\n"


CALIBRATION_CAUTION = (
    "A calibrated model describes the runs it was fitted to; it extrapolates poorly to\n"
    "conditions those runs did not reach. Read its intervals before planning with it."
)


def fit_text(result) -> str:
    """The text report of a :class:`~optfeed.fit.FitResult`."""
    r = result
    p = r.problem
    lines = [
        f"optfeed fit: {p.name}",
        f"  problem   {r.record.get('problem_file', '')}",
        f"  runs      {r.runs.source} ({len(r.runs.runs)} run(s), {r.runs.n_samples} measured values)",
        "",
        f"STATUS: {r.status.upper()} - {r.message}",
        "",
    ] + warning_lines(p)
    s = r.statistics
    if r.estimates:
        profile = any(e.profile_low is not None or e.profile_high is not None for e in r.estimates)
        head = ["parameter", "estimate", "unit", "SE", "SE %", "95 % confidence interval"]
        if profile:
            head.append("95 % profile likelihood")
        head.append("range searched")
        rows = [tuple(head)]
        for e in r.estimates:
            rel = "-" if not e.value or e.se != e.se or e.se == float("inf") else f"{100 * e.se / abs(e.value):.3g}"
            row = [e.name, fmt(e.value, 6), e.unit or "(internal units)", fmt(e.se, 3), rel,
                   f"{fmt(e.ci_low)} .. {fmt(e.ci_high)}"]
            if profile:
                row.append(f"{fmt(e.profile_low)} .. {fmt(e.profile_high)}")
            row.append(f"{fmt(e.lower)} .. {fmt(e.upper)}")
            rows.append(tuple(row))
        lines += [f"Estimates (95 % intervals: t distribution with {s.dof} degrees of freedom"
                  + ("; a profile end shown '-' lies beyond the range searched" if profile else "") + "):"]
        lines += table_lines(rows) + [""]
        names = [e.name for e in r.estimates]
        if len(names) > 1:
            rows = [tuple([""] + names)]
            for i, n in enumerate(names):
                rows.append(tuple([n] + [f"{v:+.3f}" if v == v else "-" for v in s.correlation[i]]))
            lines += ["Correlation of the estimates:"] + table_lines(rows) + [""]
        terms = " ".join(f"{c:+.2f} log {n}" for c, n in zip(s.weakest, names) if abs(c) > 0.05).lstrip("+")
        lines += ["Identifiability:",
                  f"  condition number of the scaled information matrix: {fmt(s.condition, 3)}",
                  f"  the combination the data fix least: {terms}", ""]
        lines += ["Goodness of fit:", f"  {r.verdict}",
                  "  error model: " + ("the stated measurement error (trusted)" if r.runs.trusted else
                                       "scaled by the residuals"), ""]
    if r.flags:
        lines += ["Warnings about what the data can tell:"] + [f"  - {f}" for f in r.flags] + [""]
    if r.residuals:
        rows = [("run", "quantity", "unit", "samples", "mean", "RMS")]
        for d in r.residuals:
            rows.append((d["run"], d["quantity"], d["unit"], str(d["count"]), fmt(d["mean"], 3), fmt(d["rms"], 3)))
        lines += ["Residuals, weighted ((model - measured) / sigma, from the re-simulated runs; RMS near 1 is what",
                  "the stated measurement error expects):"] + table_lines(rows) + [""]
    if r.starts:
        rows = [("chi-square", "status", "iterations", "seconds", "from")]
        for st_ in r.starts:
            rows.append((fmt(st_.get("chi2"), 7), st_["status"], str(st_.get("iterations", "-")),
                         f"{st_.get('seconds', 0.0):.2f}", st_["from"]))
        lines += ["Starts of the NLP (chi-square of the collocation answer, before the polish):"] + table_lines(rows)
        if r.spread is not None:
            lines.append(f"  spread over converged starts: {r.spread:.2%} of the best")
        lines.append("")
    lines.append(CAUTION)
    lines.append(CALIBRATION_CAUTION)
    return "\n".join(lines) + "\n"


def robustness_rows(result) -> tuple[list, list] | None:
    """The answer of a scenario solve beside the nominal optimum, both judged over the
    same Monte Carlo sample: header and rows of plain strings, or None when there is
    no such pair (an :class:`~optfeed.optimize.OptimizeResult`)."""
    nominal = result.nominal
    a, b = result.uncertainty, None if nominal is None else nominal.uncertainty
    if a is None or b is None:
        return None
    unit = unit_words(result.objective_unit)
    sc = result.record.get("scenarios", {})
    rows = [
        ("status", result.status, nominal.status),
        (f"objective, nominal model ({unit})", fmt(_scenario_nominal(result), 6), fmt(nominal.objective_sim, 6)),
        (f"objective over the {sc.get('count', '')} scenarios, {sc.get('objective_over_scenarios', '')} ({unit})",
         fmt(result.objective_sim, 6), "-"),
    ]
    if a.objective is not None and b.objective is not None:
        for key, words in (("mean", "mean"), ("p5", "5th percentile"), ("p50", "median"),
                           ("p95", "95th percentile")):
            rows.append((f"objective over the samples, {words} ({unit})", fmt(a.objective[key], 6),
                         fmt(b.objective[key], 6)))

    def risk(r):
        interval = "" if r.low is None else f" ({percent(r.low)} .. {percent(r.high)})"
        return f"{percent(r.probability)}{interval}"

    rows.append(("probability of breaking any limit (95 % interval)", risk(a.any_limit), risk(b.any_limit)))
    for ra, rb in zip(a.limits, b.limits):
        if ra.kind != "pump" and (ra.broken or rb.broken):
            rows.append((f"  {ra.name}", risk(ra), risk(rb)))
    header = ["", "this answer (over the scenarios)", "the nominal optimum"]
    return header, [list(r) for r in rows]


def _scenario_nominal(result):
    """The answer's objective on the nominal model (display unit): its first scenario's."""
    sims = result.record.get("scenarios", {}).get("objective_resimulated") or [None]
    return sims[0]


def robustness_lines(result) -> list[str]:
    """The text block comparing a scenario solve's answer with the nominal optimum."""
    table = robustness_rows(result)
    if table is None:
        return []
    header, rows = table
    n = result.uncertainty.samples
    lines = [f"What robustness costs and buys (both schedules judged over the same {n} Monte Carlo samples):"]
    lines += table_lines([header] + rows)
    lines.append("  The nominal optimum's schedule is nominal-schedule.csv; its samples montecarlo-nominal.csv.")
    return lines + [""]


def scenario_lines(result) -> list[str]:
    """Each scenario of a scenario solve: its uncertain values, objective (NLP and
    re-simulated) and verification."""
    sc = result.record.get("scenarios")
    if not sc:
        return []
    unit = unit_words(result.objective_unit)
    words = {"mean": "the mean", "worst": "the worst", "mean_std": f"the mean less {fmt(sc.get('k'))} std"}
    lines = [f"One pump profile for {sc['count']} scenarios of the uncertain values, objective {words.get(sc['objective_over_scenarios'], sc['objective_over_scenarios'])}"
             " over them; every limit held in each:"]
    names = list(sc.get("values", {}))
    rows = [["scenario", "weight", *names, f"objective ({unit})", "verified"]]
    for s_, label in enumerate(sc["labels"]):
        J = sc["objective_resimulated"][s_]
        rows.append([label, f"{sc['weights'][s_]:.3g}", *(fmt(sc["values"][n][s_]) for n in names),
                     fmt(J, 6), "yes" if sc["verified"][s_] else "NO"])
    lines += table_lines(rows)
    return lines + [""]
