"""Figures: states, feeds and limit use over time (matplotlib, no screen needed)."""

from __future__ import annotations

import math

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402

from ..units import factor_to  # noqa: E402


def run_figure(model, traj, use: dict, path, title: str = "", points=None) -> None:
    """One PNG: a panel per species, volume, pump rates, and % use of each limit.

    ``points`` (dict with 't', 'x' in internal units) overlays the NLP's collocation
    points on the simulated curves, to show where the two agree."""
    p = model.problem
    panels = [(s.name, traj.state(s.name) * factor_to(s.unit), s.unit, s.description) for s in p.species]
    panels.append(("V", traj.state("V") * factor_to(p.vessel.unit), p.vessel.unit, "volume"))
    n = len(panels) + 2
    ncol = 3 if n > 6 else 2
    nrow = math.ceil(n / ncol)
    fig, axes = plt.subplots(nrow, ncol, figsize=(5.2 * ncol, 3.0 * nrow), sharex=True, squeeze=False)
    axes = axes.ravel()
    for ax, (name, y, unit, desc) in zip(axes, panels):
        ax.plot(traj.t, y, color="#1f5f8b", lw=1.6, label="simulated")
        if points is not None:
            i = model.index(name)
            f = factor_to(p.vessel.unit) if name == "V" else factor_to(p.species_by_name(name).unit)
            ax.plot(points["t"], points["x"][:, i] * f, ".", ms=2.5, color="#d68910", label="NLP points")
        ax.set_title(f"{name}" + (f" - {desc}" if desc else ""), fontsize=9, loc="left")
        ax.set_ylabel(unit, fontsize=8)
        if name == "V":
            ax.axhline(p.vessel.working_volume * factor_to(p.vessel.unit), color="#b03a2e", ls="--", lw=1,
                       label="working volume")
        if name == "V" or (points is not None and ax is axes[0]):
            ax.legend(fontsize=7, loc="lower right")
    ax = axes[len(panels)]
    for f in p.feeds:
        line, = ax.plot(traj.t, traj.feed(f.name) * factor_to(f.unit), lw=1.6, label=f.name)
        ax.axhline(f.max_rate * factor_to(f.unit), color=line.get_color(), ls=":", lw=1)
    units = sorted({f.unit for f in p.feeds})
    ax.set_title("feeds (dotted: pump maximum)", fontsize=9, loc="left")
    ax.set_ylabel(", ".join(units), fontsize=8)
    ax.legend(fontsize=7)
    ax = axes[len(panels) + 1]
    for name, pct in use.items():
        ax.plot(traj.t, pct, lw=1.4, label=name)
    ax.axhline(100, color="#b03a2e", lw=1.2)
    ax.set_title("use of each limit (% of its maximum)", fontsize=9, loc="left")
    ax.set_ylabel("%", fontsize=8)
    ax.legend(fontsize=7, ncol=2)
    for ax in axes[n:]:
        ax.set_visible(False)
    for ax in axes[:n]:
        ax.grid(alpha=0.3)
        ax.tick_params(labelsize=8)
    for ax in axes[max(0, n - ncol):n]:
        ax.set_xlabel("time (h)", fontsize=8)
        ax.xaxis.set_tick_params(labelbottom=True)
    if title:
        fig.suptitle(title, fontsize=11)
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)
