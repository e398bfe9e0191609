"""Figures of a run, of a fit and of a sweep, drawn once and saved as SVG (PNG on request).

Every function here returns :class:`Drawing` objects (a :class:`~.canvas.Canvas`
with a file name and a caption). :func:`svg_text` gives the drawing as SVG, which
goes both into the run folder (:func:`save_svg`) and inline into the HTML report,
so the folder and the report always show the same drawing. :func:`save_png`
replays the same drawing onto matplotlib for a PNG file, when one is asked for
(``--png``); only then is matplotlib imported.

Colours are chosen so that the meaning never depends on a shade a limit also uses:
the simulated run is :data:`INK`, a limit's bound is :data:`LIMIT` (its broken
stretches shaded in the same colour, faintly), the solver's collocation points are
hollow :data:`POINTS` circles drawn under the simulated line, and the 100 % line of
the use panel is :data:`REFERENCE`, which is in no limit's :data:`PALETTE`.
"""

from __future__ import annotations

import math
import re
import textwrap
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .canvas import Canvas

INK = "#17364a"        # simulated run
POINTS = "#d9822b"     # solver's collocation points (hollow)
LIMIT = "#b3362c"      # a bound, and (faint) where it is broken
REFERENCE = "#111111"  # the 100 % line; the zero-margin line of sweeps
MUTED = "#7d8a93"      # secondary lines (dilution rate)
PALETTE = ("#1f77a8", "#5b8c2a", "#8a4f9e", "#c7962b", "#2a9d8f", "#7a5c3a", "#4b5fb0", "#8fa33b",
           "#a05195", "#3f7f7f")
SHADE_ALPHA = 0.14

# named rates drawn as specific rates, by default: mu, mu_X, ... (growth, 1/h) and
# q_S, qP, q_O2, ... (specific uptake and production rates)
GROWTH_RATE = re.compile(r"^mu(_\w*)?$", re.IGNORECASE)
SPECIFIC_RATE = re.compile(r"^q_?[A-Za-z0-9]\w*$")
MAX_RATE_PANELS = 6


@dataclass
class Drawing:
    """A figure ready to save: ``name`` is its file stem, ``caption`` says what it shows."""

    name: str
    caption: str
    figure: Canvas


# margins around the panels, inches: room for tick labels and an axis label on the
# left, a title above each panel, the time axis below
LEFT, RIGHT, TOP, BOTTOM, GAP_W, GAP_H = 0.78, 0.2, 0.55, 0.5, 0.85, 0.62


def _figure(nrow: int, ncol: int, width: float = 5.0, height: float = 2.7, left=LEFT):
    """A canvas of nrow x ncol panels placed with fixed margins, and its panels (a
    flat object array, row by row); panels of a run share their time range through
    :func:`_finish`."""
    fig_w, fig_h = width * ncol, height * nrow
    fig = Canvas(fig_w, fig_h)
    ax_w = (fig_w - left - RIGHT - GAP_W * (ncol - 1)) / ncol
    ax_h = (fig_h - TOP - BOTTOM - GAP_H * (nrow - 1)) / nrow
    axes = np.empty(nrow * ncol, dtype=object)
    for r in range(nrow):
        for c in range(ncol):
            axes[r * ncol + c] = fig.panel(left + c * (ax_w + GAP_W), TOP + r * (ax_h + GAP_H), ax_w, ax_h)
    return fig, axes


def svg_text(drawing: Drawing, prefix: str = "") -> str:
    """The figure as one ``<svg>`` element (a file of its own, or inline in HTML), ids
    prefixed with ``prefix`` so several figures can share a page."""
    return drawing.figure.svg(prefix)


def save_svg(drawing: Drawing, folder, text: str | None = None) -> Path:
    """Write ``<folder>/<name>.svg`` (``text``: the drawing's SVG, if already made)
    and return its path."""
    path = Path(folder) / f"{drawing.name}.svg"
    path.write_text(text if text is not None else svg_text(drawing), encoding="utf-8")
    return path


def save_png(drawing: Drawing, folder, dpi: int = 110) -> Path:
    """Write ``<folder>/<name>.png``, the drawing replayed onto matplotlib, and
    return its path."""
    path = Path(folder) / f"{drawing.name}.png"
    drawing.figure.matplotlib().savefig(path, dpi=dpi, metadata={"Software": None})
    return path


# ------------------------------------------------------------------ one run


def run_drawings(model, traj, points=None, title: str = "") -> list[Drawing]:
    """The figures of one simulated run.

    Parameters
    ----------
    model : Model
    traj : Trajectory
        The simulated (or re-simulated) run.
    points : dict, optional
        The optimizer's collocation points ('t' in h, 'x' internal units), drawn
        as hollow circles under the simulated line.
    title : str
        Put above each figure.

    Returns
    -------
    list of Drawing
        ``figure-limits`` (each limited quantity on its own panel with its bound,
        broken stretches shaded; and the use of every limit in % of its maximum),
        ``figure-culture`` (species and volume; mu and the specific rates the model
        names), ``figure-feeds`` (pump rates within their range; cumulative volume
        and amounts fed).
    """
    idx = plot_indices(traj.t, traj.u)
    return [_limits_figure(model, traj, idx, title), _culture_figure(model, _thin(traj, idx), points, title),
            _feeds_figure(model, traj, idx, title)]


def plot_indices(t, u, max_points: int = 1500) -> np.ndarray:
    """Samples to draw: all of them up to ``max_points``, else evenly spread ones
    plus the two samples on either side of every pump change (so steps stay sharp)."""
    n = len(t)
    if n <= max_points:
        return np.arange(n)
    keep = set(np.linspace(0, n - 1, max_points).astype(int).tolist())
    change = np.nonzero(np.any(np.diff(np.asarray(u), axis=0) != 0, axis=1))[0]
    if len(change) <= max_points // 2:
        keep.update(change.tolist())
        keep.update((change + 1).tolist())
    return np.array(sorted(keep))


def _thin(traj, idx):
    import dataclasses

    return dataclasses.replace(traj, t=traj.t[idx], x=traj.x[idx], u=traj.u[idx],
                               piece=None if traj.piece is None else traj.piece[idx],
                               phase=None if traj.phase is None else traj.phase[idx])


def _limit_values(model, traj):
    from ..limits import build_limits, evaluate

    limits = build_limits(model)
    return limits, evaluate(model, limits, traj)


def broken_windows(t, values, lower, upper, tol) -> list[tuple[float, float]]:
    """Time windows (h) where ``values`` lie beyond ``lower``/``upper`` by more than
    ``tol`` (all in one unit), as (start, end) pairs; each edge between two samples
    is placed where the straight line between them crosses the limit."""
    t = np.asarray(t, dtype=float)
    values = np.asarray(values, dtype=float)
    excess = np.full(len(t), -np.inf)
    if upper is not None:
        excess = np.maximum(excess, values - (upper + tol))
    if lower is not None:
        excess = np.maximum(excess, (lower - tol) - values)
    bad = excess > 0

    def edge(a, b):  # crossing between sample a (one side) and sample b (the other)
        if t[b] == t[a] or not np.isfinite(excess[a]) or not np.isfinite(excess[b]):
            return float(t[b])
        return float(t[a] + (t[b] - t[a]) * (0 - excess[a]) / (excess[b] - excess[a]))

    out = []
    i = 0
    while i < len(t):
        if bad[i]:
            j = i
            while j + 1 < len(t) and bad[j + 1]:
                j += 1
            start = edge(i - 1, i) if i > 0 else float(t[i])
            end = edge(j + 1, j) if j + 1 < len(t) else float(t[j])
            out.append((start, end))
            i = j + 1
        else:
            i += 1
    return out


def _bound_panel(ax, t, y, lower, upper, unit, tol, at_end=False, label="simulated", idx=None):
    """Draw a quantity with its bounds; shade where it is broken (judged on every
    sample; ``idx``: the samples to draw). Returns the windows."""
    shown = slice(None) if idx is None else idx
    ax.plot(t[shown], y[shown], color=INK, lw=1.5, zorder=3, label=label)
    windows = []
    for bound, word in ((upper, "maximum"), (lower, "minimum")):
        if bound is None:
            continue
        text = f"{word} {_num(bound)} {unit}".strip()
        if at_end:
            ax.plot([t[-1]], [bound], marker="_", ms=18, mew=2, color=LIMIT, zorder=4, label=f"end {text}")
        else:
            ax.axhline(bound, color=LIMIT, ls="--", lw=1.1, zorder=2, label=text)
    if at_end:
        if (upper is not None and y[-1] > upper + tol) or (lower is not None and y[-1] < lower - tol):
            ax.plot([t[-1]], [y[-1]], "x", color=LIMIT, ms=8, mew=2, zorder=5, label="broken at the end")
            windows = [(float(t[-1]), float(t[-1]))]
    else:
        windows = broken_windows(t, y, lower, upper, tol)
        for k, (a, b) in enumerate(windows):
            if b <= a:  # a single sample: give it a visible width
                span = (t[-1] - t[0]) * 0.002
                a, b = a - span, b + span
            ax.axvspan(a, b, color=LIMIT, alpha=SHADE_ALPHA, lw=0, zorder=1,
                       label="broken" if k == 0 else None)
    ax.set_ylabel(unit or "-")
    return windows


_LIMIT_TITLES = {
    "volume": "broth volume against the working volume",
    "oxygen": "oxygen uptake (OUR) against the OTR ceiling",
    "heat": "heat load against the heat-removal ceiling",
}


def _limits_figure(model, traj, idx, title):
    limits, g = _limit_values(model, traj)
    bounds = {b.name: b for b in model.problem.bounds}
    shown = [(i, lim) for i, lim in enumerate(limits) if lim.kind != "pump"]
    n = len(shown) + 1
    ncol = 2 if n > 1 else 1
    nrow = math.ceil(n / ncol)
    fig, axes = _figure(nrow, ncol)
    for ax, (i, lim) in zip(axes, shown):
        f = lim.factor
        y = g[:, i] * f
        lower = None if lim.lower is None else lim.lower * f
        upper = None if lim.upper is None else lim.upper * f
        _bound_panel(ax, traj.t, y, lower, upper, lim.unit, lim.tolerance() * f, lim.at_end, idx=idx)
        what = _LIMIT_TITLES.get(lim.kind)
        if what is None:
            expr = bounds[lim.name].expression.text if lim.name in bounds else ""
            what = f"{lim.name}: {expr}" + (" (bound at the end)" if lim.at_end else "")
        ax.set_title(what)
        ax.legend(loc="best")
    ax = axes[len(shown)]
    k = 0
    for i, lim in enumerate(limits):
        if lim.upper is None or lim.upper <= 0 or lim.at_end:
            continue
        ax.plot(traj.t[idx], 100.0 * g[idx, i] / lim.upper, color=PALETTE[k % len(PALETTE)], lw=1.3,
                label=lim.name)
        k += 1
    ax.axhline(100.0, color=REFERENCE, ls=(0, (6, 3)), lw=1.2, zorder=4, label="100 % (the limit)")
    ax.set_title("use of each limit, % of its maximum")
    ax.set_ylabel("%")
    ax.legend(loc="best", ncol=2)
    _finish(fig, axes, len(shown) + 1, ncol, title, traj.t)
    return Drawing("figure-limits", "Each limited quantity against its limit (dashed); shaded where the limit "
                   "is broken. Last panel: the use of every limit in % of its maximum.", fig)


def specific_rates(model) -> tuple[list[str], list[str]]:
    """Names of the model's growth rates (mu...) and specific rates (q_...), in the
    order the problem defines them."""
    names = [name for name, _ in model.problem.rates]
    return [n for n in names if GROWTH_RATE.match(n)], [n for n in names if SPECIFIC_RATE.match(n)]


def _named_values(model, traj, names):
    from ..phases import named_values

    if not names:
        return {}
    return dict(zip(names, named_values(model, traj, names)))


def _culture_figure(model, traj, points, title):
    from ..units import factor_to

    p = model.problem
    panels = [(s.name, s.unit, f"{s.name} - {s.description}" if s.description else s.name) for s in p.species]
    panels.append(("V", p.vessel.unit, "V - broth volume"))
    growth, specific = specific_rates(model)
    specific = specific[:MAX_RATE_PANELS]
    values = _named_values(model, traj, growth + specific + ["D"])
    n = len(panels) + (1 if growth else 0) + len(specific)
    ncol = 3 if n > 6 else 2
    nrow = math.ceil(n / ncol)
    fig, axes = _figure(nrow, ncol, width=4.4 if ncol == 3 else 5.0)
    for k, (ax, (name, unit, label)) in enumerate(zip(axes, panels)):
        f = factor_to(unit)
        i = model.index(name)
        ax.plot(traj.t, traj.x[:, i] * f, color=INK, lw=1.5, zorder=3, label="simulated")
        if points is not None and len(points.get("t", ())):
            ax.plot(points["t"], np.asarray(points["x"])[:, i] * f, "o", ms=3.2, mfc="none", mec=POINTS, mew=0.7,
                    zorder=2, label="solver's points")
        ax.set_title(label)
        ax.set_ylabel(unit)
        if k == 0 and points is not None:
            ax.legend(loc="best")
    k = len(panels)
    if growth:
        ax = axes[k]
        for j, name in enumerate(growth):
            ax.plot(traj.t, values[name], color=INK if j == 0 else PALETTE[j % len(PALETTE)], lw=1.5, label=name)
        ax.plot(traj.t, values["D"], color=MUTED, ls="--", lw=1.0, label="D = F/V (dilution)")
        ax.set_title("specific growth rate")
        ax.set_ylabel("1/h")
        ax.legend(loc="best")
        k += 1
    for name in specific:
        ax = axes[k]
        ax.plot(traj.t, values[name], color=INK, lw=1.5)
        ax.set_title(f"{name} - specific rate")
        ax.set_ylabel("internal units")
        k += 1
    _finish(fig, axes, n, ncol, title, traj.t)
    return Drawing("figure-culture", "The culture: every species and the volume (the simulated run; hollow "
                   "circles: the optimizer's collocation points, where there are some), the specific growth "
                   "rate against the dilution rate, and the model's specific rates (in optfeed's internal "
                   "units: g, L, h, mmol).", fig)


def cumulative(t, rate) -> np.ndarray:
    """Running integral of ``rate`` over ``t`` (trapezoids; repeated times add nothing)."""
    t = np.asarray(t, dtype=float)
    rate = np.asarray(rate, dtype=float)
    return np.concatenate([[0.0], np.cumsum(0.5 * (rate[1:] + rate[:-1]) * np.diff(t))])


def _feeds_figure(model, traj, idx, title):
    from ..outcome import extensive_unit
    from ..units import factor_to

    p = model.problem
    fed = [n for n in model.state_names if n.startswith("fed_")]
    n = len(p.feeds) + 1 + (1 if fed else 0)
    ncol = 2 if n > 1 else 1
    nrow = math.ceil(n / ncol)
    fig, axes = _figure(nrow, ncol)
    for ax, f in zip(axes, p.feeds):
        c = factor_to(f.unit)
        rate = traj.feed(f.name) * c
        lower = f.min_rate * c if f.min_rate > 0 else None
        _bound_panel(ax, traj.t, rate, lower, f.max_rate * c, f.unit, 1e-6 * f.max_rate * c + 1e-12, label="rate",
                     idx=idx)
        ax.set_title(f"pump {f.name}" + (f" - {f.description}" if f.description else ""))
        ax.legend(loc="best")
    ax = axes[len(p.feeds)]
    vunit = p.vessel.unit
    cv = factor_to(vunit)
    for j, f in enumerate(p.feeds):
        ax.plot(traj.t[idx], cumulative(traj.t, traj.feed(f.name))[idx] * cv, color=PALETTE[j % len(PALETTE)],
                lw=1.5, label=f.name)
    ax.set_title("volume fed so far")
    ax.set_ylabel(vunit)
    ax.legend(loc="best")
    if fed:
        ax = axes[len(p.feeds) + 1]
        units = set()
        for j, name in enumerate(fed):
            s = p.species_by_name(name[4:])
            unit = extensive_unit(s.unit)
            units.add(unit or "internal units")
            ax.plot(traj.t[idx], traj.state(name)[idx] * (factor_to(unit) if unit else 1.0),
                    color=PALETTE[j % len(PALETTE)], lw=1.5, label=s.name)
        ax.set_title("amount fed so far, per species")
        ax.set_ylabel(", ".join(sorted(units)))
        ax.legend(loc="best")
    _finish(fig, axes, n, ncol, title, traj.t)
    return Drawing("figure-feeds", "The pumps: each rate within its range (dashed: the pump's limits), the volume "
                   "each pump has delivered, and the amount of each species fed.", fig)


def _finish(fig, axes, n, ncol, title, t):
    """Remove unused panels, give every panel the run's time range and the bottom
    ones a time label, and put the title on top."""
    for ax in axes[n:]:
        ax.remove()
    span = float(t[-1] - t[0]) or 1.0
    for ax in axes[:n]:
        ax.set_xlim(t[0] - 0.02 * span, t[-1] + 0.02 * span)
    for ax in axes[max(0, n - ncol):n]:
        ax.set_xlabel("time (h)")
    if title:
        fig.suptitle(title, fontsize=10, y=1 - 0.08 / fig.get_figheight(), va="top")


def _num(v) -> str:
    if v is None:
        return ""
    return "0" if v == 0 else f"{v:.4g}"


# ------------------------------------------------------------------ over uncertain values

FAN = "#4f7ea8"  # the P5-P95 band of the samples (a lighter shade of INK's family)
FAN_REFERENCE = "#d9822b"  # a second fan drawn for comparison (outline only)


def fan_drawing(bands, title: str = "", name: str = "figure-fan", reference=None,
                label: str = "samples", reference_label: str = "reference") -> Drawing:
    """Each limited quantity over a Monte Carlo sample: the band between the 5th and
    95th percentiles of the samples at each time, their median, the nominal run, and
    the limit.

    Parameters
    ----------
    bands : sequence of optfeed.montecarlo.Band
        One panel each, in order.
    title : str
        Put above the figure.
    name : str
        The drawing's file stem.
    reference : sequence of Band, optional
        Another sample's bands with the same names (another schedule, say), drawn
        as an outlined band for comparison.
    label, reference_label : str
        What the two fans are, for the legends.
    """
    bands = list(bands)
    ref = {b.name: b for b in reference or ()}
    n = max(1, len(bands))
    ncol = 2 if n > 1 else 1
    nrow = math.ceil(n / ncol)
    fig, axes = _figure(nrow, ncol)
    for ax, b in zip(axes, bands):
        ax.fill_between(b.t, b.p5, b.p95, color=FAN, alpha=0.28, lw=0, zorder=1,
                        label=f"5-95 % of the {label}")
        ax.plot(b.t, b.p50, color=FAN, lw=1.0, ls=(0, (4, 2)), zorder=2, label=f"median of the {label}")
        broken = () if b.broken is None else b.broken
        for k, y in enumerate(broken):
            ax.plot(b.t, y, color=LIMIT, lw=0.6, alpha=0.45, zorder=2,
                    label=f"{label} that break it" if k == 0 else None)
        if b.name in ref:
            r = ref[b.name]
            for k, y in enumerate((r.p5, r.p95)):
                ax.plot(r.t, y, color=FAN_REFERENCE, lw=1.0, zorder=2,
                        label=f"5-95 % of the {reference_label}" if k == 0 else None)
        if np.any(np.isfinite(b.nominal)):
            ax.plot(b.t, b.nominal, color=INK, lw=1.5, zorder=3, label="nominal run")
        for bound, word in ((b.upper, "maximum"), (b.lower, "minimum")):
            if bound is None:
                continue
            text = f"{word} {_num(bound)} {b.unit}".strip()
            if b.at_end:
                ax.plot([b.t[-1]], [bound], marker="_", ms=18, mew=2, color=LIMIT, zorder=4,
                        label=f"end {text}")
            else:
                ax.axhline(bound, color=LIMIT, ls="--", lw=1.1, zorder=2, label=text)
        what = _LIMIT_TITLES.get(b.kind, b.name + (" (bound at the end)" if b.at_end else ""))
        ax.set_title(what)
        ax.set_ylabel(b.unit or "-")
        ax.legend(loc="best")
    t = bands[0].t if bands else np.array([0.0, 1.0])
    _finish(fig, axes, n, ncol, title, t)
    return Drawing(name, f"Each limited quantity over the {label}: shaded, where 90 % of the {label} lie at each "
                   "time (5th to 95th percentile); dashed, their median; solid, the nominal run; red dashed, the "
                   f"limit; thin red lines, {label} that break it (the first twenty).", fig)


# ------------------------------------------------------------------ sweeps


def objective_against(path: str, xunit: str, xs, ys, unit: str, bad_xs=()) -> Drawing:
    """Objective of each answered case against one swept value; ``bad_xs``: values
    of cases without an answer (drawn as thin vertical lines)."""
    fig, axes = _figure(1, 1, width=6.0, height=3.8)
    ax = axes[0]
    ax.plot(xs, ys, "o", color=INK, ms=5)
    for k, x in enumerate(bad_xs):
        ax.axvline(x, color=LIMIT, lw=0.8, alpha=0.6, label="no answer" if k == 0 else None)
    ax.set_xlabel(f"{path} ({xunit})" if xunit else path)
    ax.set_ylabel(f"objective ({unit})" if unit else "objective")
    ax.set_title(f"objective against {path}")
    if len(bad_xs):
        ax.legend(loc="best")
    return Drawing(f"objective_vs_{_safe(path)}", f"The objective of every answered case against {path}.", fig)


def margins_against(path: str, xunit: str, limits: list) -> Drawing:
    """Each limit's smallest margin (its unit; below zero: broken) against one swept
    value. ``limits``: list of (name, unit, xs, margins)."""
    n = len(limits)
    ncol = 2 if n > 1 else 1
    nrow = max(1, math.ceil(n / ncol))
    fig, axes = _figure(nrow, ncol, width=5.0, height=2.8)
    for ax, (name, unit, xs, ms) in zip(axes, limits):
        xs, ms = np.asarray(xs, float), np.asarray(ms, float)
        broken = ms < 0
        ax.plot(xs[~broken], ms[~broken], "o", color=INK, ms=4.5, label="inside")
        if broken.any():
            ax.plot(xs[broken], ms[broken], "o", color=LIMIT, ms=5, label="broken")
        ax.axhline(0.0, color=REFERENCE, ls=(0, (6, 3)), lw=1.1, label="the limit (no margin)")
        ax.set_title(f"{name}: smallest margin")
        ax.set_ylabel(unit or "-")
        ax.legend(loc="best")
    for ax in axes[n:]:
        ax.set_visible(False)
    for ax in axes[:n]:
        ax.set_xlabel(f"{path} ({xunit})" if xunit else path)
    return Drawing(f"margins_vs_{_safe(path)}", f"The smallest margin of each limit over the run against {path} "
                   "(distance to the nearest bound; below zero the limit is broken).", fig)


def ranking(labels, values, unit: str, width_chars: int = 46) -> Drawing:
    """Horizontal bars of the best cases, best at the top; long labels are wrapped,
    and the layout makes room for them."""
    wrapped = [textwrap.fill(str(s), width_chars) for s in labels]
    lines = sum(w.count("\n") + 1 for w in wrapped)
    longest = max((len(line) for w in wrapped for line in w.splitlines()), default=10)
    left = 0.35 + 0.068 * longest  # inches for the labels (7.5 pt characters are ~0.06 in wide)
    fig, axes = _figure(1, 1, width=left + 4.5, height=0.26 * lines + 0.3 * len(labels) + 1.2, left=left)
    ax = axes[0]
    pos = np.arange(len(values))[::-1]
    # dots, not bars: close objectives stay apart without a cut-off axis
    ax.hlines(pos, min(values), values, color=PALETTE[0], lw=0.8, alpha=0.5)
    ax.plot(values, pos, "o", color=INK, ms=6)
    ax.set_yticks(pos, wrapped)
    ax.grid(axis="y", visible=False)
    ax.set_xlabel(f"objective ({unit})" if unit else "objective")
    ax.set_title("ranking of the answered cases (best at the top)")
    return Drawing("ranking", "The best cases, ranked by their objective.", fig)


def heatmap(p1: str, p2: str, v1, v2, z, unit: str) -> Drawing:
    """The objective over a two-way grid (``z[j, i]`` at ``v1[i]``, ``v2[j]``; NaN blank)."""
    fig, axes = _figure(1, 1, width=6.2, height=4.6)
    ax = axes[0]
    im = ax.imshow(z, origin="lower", aspect="auto", cmap="cividis")
    ax.set_xticks(range(len(v1)), [_num(v) for v in v1])
    ax.set_yticks(range(len(v2)), [_num(v) for v in v2])
    ax.grid(False)
    ax.set_xlabel(p1)
    ax.set_ylabel(p2)
    fig.colorbar(im, ax=ax, label=f"objective ({unit})" if unit else "objective")
    ax.set_title("objective over the grid (blank: no answer)")
    return Drawing("heatmap", f"The objective over the grid of {p1} and {p2}.", fig)


def feed_profile(label: str, t, columns: dict) -> Drawing:
    """Step plot of a schedule: ``columns`` header -> rates (held until the next row)."""
    fig, axes = _figure(1, 1, width=7.0, height=3.4)
    ax = axes[0]
    for j, (name, rates) in enumerate(columns.items()):
        ax.step(t, rates, where="post", color=PALETTE[j % len(PALETTE)], lw=1.5, label=name)
    ax.set_xlabel("time (h)")
    ax.set_title(textwrap.shorten(f"feed profile of the best case: {label}", 110))
    ax.legend(loc="best")
    return Drawing("best_feed", "The pump schedule of the best case.", fig)


def feeds_against(feeds, answer, answer_end: float, nominal, nominal_end: float, title: str = "") -> Drawing:
    """The pump profile of a scenario solve's answer against the nominal optimum's, one
    panel per feed, each in its own unit.

    Parameters
    ----------
    feeds : sequence of Feed
        The problem's feeds (name, unit).
    answer, nominal : Schedule
    answer_end, nominal_end : float
        Their run lengths, h.
    """
    from ..units import factor_to

    n = max(1, len(feeds))
    fig, axes = _figure(n, 1, width=7.0, height=2.6)
    names = [f.name for f in feeds]
    for ax, feed in zip(axes, feeds):
        k = names.index(feed.name)
        f = factor_to(feed.unit)
        for schedule, end, label, color, style in (
                (nominal, nominal_end, "the nominal optimum", FAN_REFERENCE, "--"),
                (answer, answer_end, "the answer over the scenarios", INK, "-")):
            pieces = [(sg, np.linspace(sg.start, sg.end, 20)) for sg in schedule.segments(names, end)]
            tt = np.concatenate([t for _, t in pieces])
            rr = np.concatenate([sg.rates(t)[:, k] for sg, t in pieces])
            ax.plot(tt, rr * f, color=color, ls=style, lw=1.4, label=label)
        ax.set_title(f"pump {feed.name}")
        ax.set_ylabel(feed.unit)
        ax.legend(loc="best")
    _finish(fig, axes, n, 1, title, np.array([0.0, max(answer_end, nominal_end)]))
    return Drawing("figure-robust-feeds", "The pump profile chosen over the scenarios (solid) against the "
                   "nominal problem's optimum (dashed).", fig)


def _safe(text: str) -> str:
    return re.sub(r"[^A-Za-z0-9_]+", "_", text)[:60]


# ------------------------------------------------------------------ a fit

MEASURED = "#1f77a8"    # a measured sample, with its error bar (one standard deviation)
RUNS_PER_FIGURE = 6


def fit_drawings(result) -> list[Drawing]:
    """The figures of a :class:`~optfeed.fit.FitResult` with estimates.

    Returns
    -------
    list of Drawing
        ``figure-fit`` (one row per run, one panel per measured quantity: the
        measured samples with error bars of one standard deviation, and the run
        re-simulated at the estimates; ``figure-fit-2``... for more than six runs),
        ``figure-residuals`` (the weighted residuals against time, per quantity, each
        run in its colour) and ``figure-correlation`` (the correlation matrix of the
        estimates).
    """
    out = _fit_figures(result)
    out.append(_residuals_figure(result))
    if len(result.estimates) > 1:
        out.append(_correlation_figure(result))
    return out


def _fit_figures(result):
    from ..fit.runs import fit_model
    from ..units import factor_to

    model = fit_model(result.problem)  # the courses' layout
    assert all(tuple(t.state_names) == tuple(model.state_names) for t in result.trajectories), \
        "a course in another layout"
    quantities = list(result.runs.quantities)
    units = {d["quantity"]: d["unit"] for d in result.residuals}
    runs = list(zip(result.runs.runs, result.trajectories))
    out = []
    for first in range(0, len(runs), RUNS_PER_FIGURE):
        chunk = runs[first:first + RUNS_PER_FIGURE]
        ncol = len(quantities)
        fig, axes = _figure(len(chunk), ncol, width=4.2 if ncol > 2 else 5.0, height=2.5)
        axes = axes.reshape(len(chunk), ncol)
        for row, (run, traj) in enumerate(chunk):
            named = [q for q in quantities if q not in model.state_names]
            values = _named_values(model, traj, named)
            for col, q in enumerate(quantities):
                ax = axes[row, col]
                unit = units.get(q, "")
                f = factor_to(unit) if unit else 1.0
                line = traj.state(q) if q in model.state_names else values[q]
                ax.plot(traj.t, line * f, color=INK, lw=1.4, zorder=3, label="fitted (re-simulated)")
                d = next((d for d in result.residuals if d["run"] == run.name and d["quantity"] == q), None)
                if d is not None and d["count"]:
                    ax.errorbar(d["times"], np.asarray(d["measured"]) * f, yerr=np.asarray(d["sigma"]) * f,
                                fmt="o", ms=3.5, color=MEASURED, ecolor=MEASURED, elinewidth=0.9, capsize=2,
                                zorder=4, label="measured ± 1 SD")
                else:
                    ax.text(0.5, 0.5, "not measured in this run", transform=ax.transAxes, ha="center",
                            va="center", color=MUTED)
                ax.set_title(f"{run.name}: {q}")
                ax.set_ylabel(unit or "internal units")
                ax.set_xlim(traj.t[0] - 0.02 * traj.t[-1], traj.t[-1] * 1.02)
                if row == 0 and col == 0:
                    ax.legend(loc="best")
        for ax in axes[-1]:
            ax.set_xlabel("time (h)")
        name = "figure-fit" if first == 0 else f"figure-fit-{first // RUNS_PER_FIGURE + 1}"
        title = f"{result.problem.name}: fit - {result.status}"
        fig.suptitle(title, fontsize=10, y=1 - 0.08 / fig.get_figheight(), va="top")
        out.append(Drawing(name, "Each run's measured samples (error bars: one standard deviation of the stated "
                           "measurement error) and the run re-simulated at the estimates, per measured "
                           "quantity.", fig))
    return out


def _residuals_figure(result):
    quantities = list(result.runs.quantities)
    n = len(quantities)
    ncol = 2 if n > 1 else 1
    nrow = math.ceil(n / ncol)
    fig, axes = _figure(nrow, ncol, width=5.0, height=2.6)
    names = [run.name for run in result.runs.runs]
    t_end = max(run.end_time for run in result.runs.runs)
    for ax, q in zip(axes, quantities):
        for d in result.residuals:
            if d["quantity"] != q or not d["count"]:
                continue
            k = names.index(d["run"])
            w = (np.asarray(d["fitted"]) - np.asarray(d["measured"])) / np.asarray(d["sigma"])
            ax.plot(d["times"], w, "o", ms=3.5, color=PALETTE[k % len(PALETTE)], label=d["run"])
        ax.axhline(0.0, color=REFERENCE, lw=0.9)
        for level in (-2.0, 2.0):
            ax.axhline(level, color=MUTED, ls="--", lw=0.9, label="± 2" if level > 0 else None)
        ax.set_title(f"{q}: (fitted - measured) / sigma")
        ax.set_ylabel("dimensionless")
        ax.set_xlim(-0.02 * t_end, 1.02 * t_end)
        ax.legend(loc="best", ncol=2)
    for ax in axes[n:]:
        ax.remove()
    for ax in axes[max(0, n - ncol):n]:
        ax.set_xlabel("time (h)")
    fig.suptitle(f"{result.problem.name}: weighted residuals", fontsize=10, y=1 - 0.08 / fig.get_figheight(),
                 va="top")
    return Drawing("figure-residuals", "Weighted residuals (fitted - measured) / sigma of every sample against its "
                   "time, each run in its colour; about 95 % should lie between the dashed lines at ±2 if the "
                   "stated measurement error is right.", fig)


def _correlation_figure(result):
    names = [e.name for e in result.estimates]
    corr = np.asarray(result.statistics.correlation, dtype=float)
    n = len(names)
    size = 1.2 + 0.55 * n
    fig, axes = _figure(1, 1, width=size + 1.6, height=size + 0.6, left=0.35 + 0.07 * max(map(len, names)))
    ax = axes[0]
    im = ax.imshow(np.ma.masked_invalid(corr), cmap="RdBu_r", vmin=-1.0, vmax=1.0)
    ax.set_xticks(range(n), names, rotation=45, ha="right")
    ax.set_yticks(range(n), names)
    ax.grid(False)
    for i in range(n):
        for j in range(n):
            v = corr[i, j]
            ax.text(j, i, "-" if v != v else f"{v:+.2f}", ha="center", va="center", fontsize=7,
                    color="white" if v == v and abs(v) > 0.6 else REFERENCE)
    fig.colorbar(im, ax=ax, label="correlation")
    ax.set_title("correlation of the estimates")
    return Drawing("figure-correlation", "The correlation matrix of the estimates; |correlation| above 0.95 means "
                   "the data fix a combination of the two parameters better than either alone.", fig)
