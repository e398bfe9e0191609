"""Figures that answer the practitioner's questions.

References: the fed-batch volume balance dV/dt = sum_j F_j (standard fed-batch mass
balances, see the README's "Balances"), so the volumes the pumps delivered add up to
the change in broth volume; the problem files themselves for the limits drawn (150
mmol/L/h OTR ceiling, 1.5 kW heat removal in configs/fast_microbe.yaml); the check
job's own judgment for where a limit is broken (the figure must shade what check
reports); Python's own -X importtime for what importing the command line costs.
The drawings are inspected through matplotlib: each is replayed onto matplotlib's
axes (``Canvas.matplotlib``, what ``--png`` saves), whose API reads the lines back;
tests/test_canvas.py checks that the SVG written from the same record places
everything where matplotlib does.
"""

from __future__ import annotations

import subprocess
import sys

import numpy as np
import pytest

import optfeed
from optfeed.model import build_model
from optfeed.report import canvas as C
from optfeed.report import figures as F

from conftest import CONFIGS, ROOT


@pytest.fixture(scope="module")
def fast():
    r = optfeed.check(CONFIGS / "fast_microbe.yaml", CONFIGS / "fast_microbe_plan.csv")
    model = build_model(r.problem)
    # stand-in solver points: every 40th sample of the run (only their drawing is tested here)
    points = {"t": r.trajectory.t[::40], "x": r.trajectory.x[::40]}
    drawings = {d.name: d for d in F.run_drawings(model, r.trajectory, points=points)}
    yield r, model, drawings


def mpl(drawing):
    """The drawing replayed onto a matplotlib Figure."""
    return drawing.figure.matplotlib()


def axes_titled(fig, text):
    found = [ax for ax in fig.axes if text in ax.get_title(loc="left")]
    assert len(found) == 1, [ax.get_title(loc="left") for ax in fig.axes]
    return found[0]


def test_each_limited_quantity_has_its_own_panel_in_absolute_units(fast):
    r, model, d = fast
    fig = mpl(d["figure-limits"])
    shown = [rep for rep in r.limits if rep.kind != "pump"]
    visible = [ax for ax in fig.axes if ax.get_visible()]
    assert len(visible) == len(shown) + 1  # plus the use panel
    ox = axes_titled(fig, "OTR ceiling")
    heat = axes_titled(fig, "heat-removal ceiling")
    assert ox.get_ylabel() == "mmol/L/h" and heat.get_ylabel() == "kW"
    # the ceilings as written in configs/fast_microbe.yaml
    assert any(np.allclose(line.get_ydata(), 150.0) for line in ox.get_lines())
    assert any(np.allclose(line.get_ydata(), 1.5) for line in heat.get_lines())
    # the drawn OUR peaks where check says: peak use 129.8 % of 150 mmol/L/h
    our = max(ox.get_lines(), key=lambda line: len(line.get_ydata()))
    peak = next(rep.peak_use for rep in r.limits if rep.name == "OTR ceiling")
    assert our.get_ydata().max() == pytest.approx(peak / 100 * 150.0, rel=1e-9)


def test_broken_windows_are_shaded_where_check_finds_them(fast):
    r, _, d = fast
    fig = mpl(d["figure-limits"])
    for name, title in (("OTR ceiling", "OTR ceiling"), ("heat removal", "heat-removal ceiling")):
        rep = next(x for x in r.limits if x.name == name)
        ax = axes_titled(fig, title)
        spans = [p for p in ax.patches if p.get_label() == "broken" or p.get_alpha() == F.SHADE_ALPHA]
        assert spans, name
        x0 = min(p.get_x() for p in spans)
        # the figure places a window's edge by straight lines between samples, check
        # by integrating again between them: they agree to well within a sample
        assert x0 == pytest.approx(rep.first_violation, abs=1e-3)
    # a limit that is never broken has no shading
    ax = axes_titled(fig, "acetate ceiling")
    assert not ax.patches


def test_broken_windows_of_known_data():
    t = np.linspace(0, 10, 11)
    y = np.array([0, 1, 3, 3, 1, 0, 0, 3, 3, 3, 0], float)
    # edges where the straight line between two samples crosses the bound
    got = F.broken_windows(t, y, None, 2.0, 1e-9)
    assert np.allclose(got, [(1.5, 3.5), (6 + 2 / 3, 9 + 1 / 3)], atol=1e-8)
    got = F.broken_windows(t, y, 0.5, None, 1e-9)
    assert np.allclose(got, [(0.0, 0.5), (4.5, 6 + 0.5 / 3), (9 + 2.5 / 3, 10.0)], atol=1e-8)


def test_the_100_percent_line_has_a_colour_no_limit_uses(fast):
    from matplotlib.colors import to_hex

    _, _, d = fast
    ax = axes_titled(mpl(d["figure-limits"]), "use of each limit")
    lines = ax.get_lines()
    ref = [line for line in lines if np.allclose(line.get_ydata(), 100.0)]
    assert len(ref) == 1
    others = {to_hex(line.get_color()) for line in lines if line is not ref[0]}
    assert to_hex(ref[0].get_color()) not in others
    assert F.REFERENCE not in F.PALETTE and F.LIMIT not in F.PALETTE


def test_solver_points_do_not_hide_the_simulated_line(fast):
    _, _, d = fast
    ax = axes_titled(mpl(d["figure-culture"]), "X - biomass")
    sim = next(line for line in ax.get_lines() if line.get_label() == "simulated")
    pts = next(line for line in ax.get_lines() if line.get_label() == "solver's points")
    assert pts.get_markerfacecolor() == "none" and pts.get_linestyle() == "None"
    assert pts.get_zorder() < sim.get_zorder()


def test_growth_and_specific_rates_of_the_model(fast):
    r, model, d = fast
    growth, specific = F.specific_rates(model)
    assert growth == ["mu"] and specific == ["q_S", "q_ov", "q_P", "q_O2"]  # as named in fast_microbe.yaml
    fig = mpl(d["figure-culture"])
    ax = axes_titled(fig, "specific growth rate")
    mu = next(line for line in ax.get_lines() if line.get_label() == "mu")
    # mu = Y_XS * (q_S - q_ov - m_S) by the problem file; at t = 0: S = 5 g/L, below the overflow onset?
    q_s0 = 1.4 * 5 / (0.05 + 5)  # Monod with q_S_max 1.4 g/g/h, K_s 0.05 g/L
    q_ov0 = max(q_s0 - 0.9, 0.0)
    assert mu.get_ydata()[0] == pytest.approx(0.5 * (q_s0 - q_ov0 - 0.03), rel=1e-3)
    for name in specific:
        axes_titled(fig, f"{name} - specific rate")


def test_rates_are_found_by_their_names_not_by_a_fixed_list(write):
    path = write("p.yaml", (CONFIGS / "inhibited_product.yaml").read_text()
                 .replace("mu:", "mu_X:").replace("mu * X", "mu_X * X").replace("(mu,", "(mu_X,")
                 .replace("q_O2", "qOxy"))
    model = build_model(optfeed.load_problem(path))
    assert F.specific_rates(model) == (["mu_X"], ["q_P", "q_S", "qOxy"])


def test_volume_fed_adds_up_to_the_change_in_volume():
    r = optfeed.check(CONFIGS / "animal_cell.yaml", CONFIGS / "animal_cell_plan.csv")
    traj = r.trajectory
    fed = sum(F.cumulative(traj.t, traj.feed(n))[-1] for n in traj.feed_names)
    assert fed == pytest.approx(traj.state("V")[-1] - traj.state("V")[0], rel=1e-9)


def test_ranking_labels_are_not_cut_off():
    """Every wrapped label of the ranking lies inside the canvas: its right end at
    the tick, its left end (the estimated width of its longest line) at x >= 0."""
    import xml.etree.ElementTree as ET

    labels = [f"fast_microbe vessel.oxygen.transfer_max={v} mmol/L/h feeds.glucose.max_rate={w} L/h "
              f"parameters.mu_max=0.{k}5 1/h" for k, (v, w) in enumerate([(120, 1.5), (150, 2.0), (180, 2.5)])]
    d = F.ranking(labels, [900.0, 880.0, 870.0], "g")
    root = ET.fromstring(F.svg_text(d))
    ns = "{http://www.w3.org/2000/svg}"
    found = 0
    for text in root.iter(f"{ns}text"):
        lines = [t.text for t in text.iter(f"{ns}tspan")] or [text.text]
        if not any("mu_max" in (line or "") for line in lines):
            continue
        found += 1
        assert text.get("text-anchor") == "end"
        size = float(text.get("font-size"))
        assert float(text.get("x")) - max(len(line) for line in lines) * C.CHAR * size >= 0, lines
    assert found == 3


def test_margins_against_swept_values_mark_broken_cases():
    d = F.margins_against("vessel.oxygen.transfer_max", "mmol/L/h",
                          [("OTR ceiling", "mmol/L/h", [6, 10], [-1.2, 0.8])])
    ax = mpl(d).axes[0]
    broken = next(line for line in ax.get_lines() if line.get_label() == "broken")
    assert list(broken.get_xdata()) == [6] and list(broken.get_ydata()) == [-1.2]
    assert any(np.allclose(line.get_ydata(), 0.0) for line in ax.get_lines())


def test_svg_and_png_come_from_the_same_drawing(tmp_path, fast):
    import xml.etree.ElementTree as ET

    _, _, d = fast
    drawing = d["figure-feeds"]
    png = F.save_png(drawing, tmp_path)
    assert png.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    svg = F.svg_text(drawing, "z-")
    assert svg.startswith("<svg") and "<?xml" not in svg and "href" not in svg  # nothing fetched
    root = ET.fromstring(svg)  # well-formed XML
    ns = "{http://www.w3.org/2000/svg}"
    clips = [c.get("id") for c in root.iter(f"{ns}clipPath")]
    assert clips and all(c.startswith("z-") for c in clips)
    # one clipped panel per axes of the PNG, with the same titles
    fig = mpl(drawing)
    assert len(clips) == len(fig.axes)
    texts = {t.text for t in root.iter(f"{ns}text")}
    assert {ax.get_title(loc="left") for ax in fig.axes} <= texts
    assert F.save_svg(drawing, tmp_path, svg).read_text(encoding="utf-8") == svg


def test_importing_the_command_line_does_not_import_matplotlib_or_pandas():
    proc = subprocess.run([sys.executable, "-X", "importtime", "-c", "import optfeed.cli, optfeed"],
                          capture_output=True, text=True, cwd=ROOT)
    assert proc.returncode == 0, proc.stderr[-500:]
    modules = {line.split("|")[-1].strip().split(".")[0] for line in proc.stderr.splitlines() if "|" in line}
    assert "optfeed" in modules
    assert "matplotlib" not in modules and "pandas" not in modules


def test_fan_draws_the_percentiles_the_limit_and_a_reference():
    """The fan of a Monte Carlo result: the shaded band spans the result's 5th to 95th
    percentiles, the bound is the problem file's (the 3 g/L substrate ceiling of
    tests/uncertain/monod_small.yaml), and a second fan is drawn for comparison."""
    from optfeed.montecarlo import monte_carlo

    mc = monte_carlo(ROOT / "tests" / "uncertain" / "monod_small.yaml",
                     ROOT / "tests" / "uncertain" / "monod_small_plan.csv", samples=8, workers=1)
    d = F.fan_drawing(mc.bands, "fan", reference=mc.bands, reference_label="other plan")
    fig = mpl(d)
    ax = axes_titled(fig, "substrate ceiling")
    band = next(b for b in mc.bands if b.name == "substrate ceiling")
    poly = ax.collections[0].get_paths()[0].vertices
    assert poly[:, 1].max() == pytest.approx(np.nanmax(band.p95)) and poly[:, 1].min() == pytest.approx(
        np.nanmin(band.p5))
    labels = ax.get_legend_handles_labels()[1]
    assert "5-95 % of the other plan" in labels and "nominal run" in labels and "maximum 3 g/L" in labels
    assert len(fig.axes) == len(mc.bands) == 2  # the pump is not drawn


def test_drawings_are_freed_once_dropped(tmp_path, fast):
    """Nothing keeps a figure alive once its drawing is dropped (no registry, no cache
    of canvases): the garbage collector frees it (matplotlib's figures hold cycles,
    so they are not cleared by hand: that rebuilt every panel's axes)."""
    import gc
    import weakref

    r, model, _ = fast
    drawings = F.run_drawings(model, r.trajectory)
    for d in drawings:
        F.save_png(d, tmp_path)
        F.svg_text(d)
    refs = [weakref.ref(d.figure) for d in drawings]
    del drawings, d
    gc.collect()
    assert all(ref() is None for ref in refs)
