"""optfeed's own SVG figures against matplotlib.

Reference: matplotlib (a general-purpose plotting library). The same recorded
drawing is replayed onto matplotlib's axes; the SVG that optfeed writes must put
each panel where matplotlib puts the axes, scale each axis to the same limits as
matplotlib's autoscaling (5 % margins set in both), and place every data point at
the same spot (matplotlib's data-to-display transform at 72 dpi, i.e. in points).
Colour maps: matplotlib's cividis and RdBu_r. Tick steps of 1, 2, 2.5 and 5 times a
power of ten: common practice for chart axes.
"""

from __future__ import annotations

import xml.etree.ElementTree as ET

import numpy as np
import pytest

from optfeed.report import canvas as C

NS = "{http://www.w3.org/2000/svg}"


def _sample_canvas():
    cv = C.Canvas(6.0, 3.0)
    ax = cv.panel(0.8, 0.5, 4.6, 2.0)
    t = np.linspace(0.0, 30.0, 61)
    ax.plot(t, 2.0 + 1.5 * np.sin(t / 5.0), color="#17364a", lw=1.5, label="simulated")
    ax.axhline(4.2, color="#b3362c", ls="--", lw=1.1, label="maximum 4.2 L")
    ax.fill_between(t, 1.0 + 0.1 * t, 1.5 + 0.1 * t, color="#4f7ea8", alpha=0.3, lw=0, label="band")
    ax.set_title("a panel & its <title>")
    ax.set_ylabel("L")
    ax.legend(loc="best")
    return cv, ax, t


def _polylines(root):
    out = []
    for el in root.iter(f"{NS}polyline"):
        pts = np.array([[float(v) for v in p.split(",")] for p in el.get("points").split()])
        out.append((el, pts))
    return out


def test_limits_and_placement_match_matplotlib():
    cv, ax, t = _sample_canvas()
    fig = cv.matplotlib()
    mpl_ax = fig.axes[0]
    frame = C._Frame(ax, *(v * C.PT for v in ax.box))
    # autoscaled limits: matplotlib's, data and the axhline and the band included
    assert frame.xlim == pytest.approx(mpl_ax.get_xlim(), rel=1e-12, abs=1e-12)
    assert frame.ylim == pytest.approx(mpl_ax.get_ylim(), rel=1e-12, abs=1e-12)
    # data points: where matplotlib's transform puts them, in points from the top
    root = ET.fromstring(cv.svg())
    line = next(pts for el, pts in _polylines(root) if len(pts) == len(t))
    fig.set_dpi(72)
    disp = mpl_ax.transData.transform(np.column_stack([t, 2.0 + 1.5 * np.sin(t / 5.0)]))
    expected = np.column_stack([disp[:, 0], cv.height * C.PT - disp[:, 1]])
    assert np.abs(line - expected).max() < 0.01  # written to 0.01 pt


def test_svg_is_well_formed_and_text_is_escaped():
    cv, _, _ = _sample_canvas()
    root = ET.fromstring(cv.svg("p-"))
    texts = [el.text for el in root.iter(f"{NS}text")]
    assert "a panel & its <title>" in texts
    assert "maximum 4.2 L" in texts and "simulated" in texts  # the legend
    assert all(c.get("id").startswith("p-") for c in root.iter(f"{NS}clipPath"))
    assert root.get("viewBox") == f"0 0 {6 * 72:.2f} {3 * 72:.2f}"


def test_the_legend_keeps_off_the_data():
    """A line through the upper right corner: the legend goes where no line passes
    (matplotlib's 'best' does the same; here checked directly on the points)."""
    cv = C.Canvas(5.0, 3.0)
    ax = cv.panel(0.8, 0.4, 4.0, 2.2)
    x = np.linspace(0, 10, 101)
    ax.plot(x, x, color="#000000", label="rising line")
    ax.legend(loc="best")
    root = ET.fromstring(cv.svg())
    box = next(r for r in root.iter(f"{NS}rect") if r.get("stroke") == "#cccccc")
    x0, y0 = float(box.get("x")), float(box.get("y"))
    x1, y1 = x0 + float(box.get("width")), y0 + float(box.get("height"))
    line = next(pts for el, pts in _polylines(root) if len(pts) == 101)
    dense = np.column_stack([np.interp(np.linspace(0, 100, 2001), np.arange(101), line[:, k]) for k in (0, 1)])
    inside = (dense[:, 0] >= x0) & (dense[:, 0] <= x1) & (dense[:, 1] >= y0) & (dense[:, 1] <= y1)
    assert not inside.any()


def test_nice_ticks_worked_examples():
    # hand-worked: 0-40 in at most 6 ticks -> step 10; 2-4 in at most 5 -> step 0.5
    assert C.nice_ticks(-1.0, 41.0, 6) == pytest.approx([0, 10, 20, 30, 40])
    assert C.nice_ticks(1.9, 4.1, 5) == pytest.approx([2.0, 2.5, 3.0, 3.5, 4.0])
    assert C.tick_labels(C.nice_ticks(1.9, 4.1, 5)) == ["2.0", "2.5", "3.0", "3.5", "4.0"]
    assert C.tick_labels([0.0, 0.025, 0.05]) == ["0.000", "0.025", "0.050"]
    assert C.tick_labels([-10.0, 0.0, 10.0]) == ["\u221210", "0", "10"]
    rng = np.random.default_rng(5)
    for _ in range(200):
        lo = rng.uniform(-1e3, 1e3)
        hi = lo + 10 ** rng.uniform(-4, 4)
        most = int(rng.integers(2, 9))
        ticks = C.nice_ticks(lo, hi, most)
        assert 1 <= len(ticks) <= most and all(lo - 1e-9 * abs(lo) <= v <= hi + 1e-9 * abs(hi) for v in ticks)
        if len(ticks) > 1:
            step = ticks[1] - ticks[0]
            mantissa = step / 10 ** np.floor(np.log10(step))
            assert min(abs(mantissa - m) for m in (1, 2, 2.5, 5, 10)) < 1e-6


def test_colormaps_match_matplotlib():
    import matplotlib
    from matplotlib.colors import to_rgb

    for name in C.COLORMAPS:
        ref = matplotlib.colormaps[name]
        for f in np.linspace(0, 1, 41):
            ours = np.array(to_rgb(C.colormap(name, f)))
            theirs = np.array(ref(f)[:3])
            assert np.abs(ours - theirs).max() < 0.03, (name, f)


def test_a_call_the_canvas_does_not_know_is_an_error():
    ax = C.Canvas(4.0, 3.0).panel(0.5, 0.5, 3.0, 2.0)
    with pytest.raises(TypeError, match="linewidth"):
        ax.plot([0, 1], [0, 1], linewidth=2)


def test_images_and_colour_bars_replay_and_draw():
    cv = C.Canvas(5.0, 4.0)
    ax = cv.panel(0.8, 0.4, 3.8, 3.0)
    z = np.array([[1.0, np.nan], [-0.5, 0.25]])
    im = ax.imshow(z, cmap="RdBu_r", vmin=-1.0, vmax=1.0)
    cv.colorbar(im, ax=ax, label="correlation")
    root = ET.fromstring(cv.svg())
    cells = [r for r in root.iter(f"{NS}rect") if r.get("clip-path")]
    assert len(cells) == 3  # the NaN cell is left blank
    fills = {r.get("fill") for r in cells}
    assert C.colormap("RdBu_r", 1.0) in fills and C.colormap("RdBu_r", 0.25) in fills
    fig = cv.matplotlib()
    assert len(fig.axes) == 2  # the panel and its colour bar


def test_tick_labels_tell_every_tick_apart():
    for lo, hi in ((1e6, 1.005e6), (0.2, 0.2003), (5.0, 5.00004)):
        labels = C.tick_labels(C.nice_ticks(lo, hi, 6))
        assert len(labels) >= 2 and len(set(labels)) == len(labels), labels


def test_a_line_flat_up_to_rounding_gets_a_range_around_its_value():
    for y in ([2.0, 2.0000000000000004], [0.0, 1e-300], [7.0, 7.0]):
        cv = C.Canvas(4.0, 3.0)
        ax = cv.panel(0.5, 0.5, 3.0, 2.0)
        ax.plot([0.0, 1.0], y)
        lo, hi = C._Frame(ax, 36, 36, 216, 144).ylim
        assert lo < min(y) and hi > max(y) and hi - lo >= 0.09 * max(abs(v) for v in y + [1.0]) - 1e-12
    ax = C.Canvas(4.0, 3.0).panel(0.5, 0.5, 3.0, 2.0)
    ax.plot([0.0, 1.0], [1.0, 2.0])
    ax.set_xlim(3.0, 3.0)  # a run that ends where it starts
    assert np.all(np.isfinite(C._Frame(ax, 36, 36, 216, 144).x([3.0])))


def test_missing_values_draw_nothing_and_break_a_band():
    """NaN positions draw nothing (matplotlib's rule); a band with a gap is two
    polygons, as matplotlib's fill_between leaves the gap open."""
    cv = C.Canvas(4.0, 3.0)
    ax = cv.panel(0.5, 0.5, 3.0, 2.0)
    x = np.arange(10.0)
    lo = np.where((x > 3) & (x < 6), np.nan, x)
    ax.fill_between(x, lo, lo + 1.0, color="#4f7ea8", alpha=0.3)
    ax.axhline(float("nan"), color="#000000")
    ax.axvline(float("nan"), color="#000000")
    ax.hlines([1.0, np.nan], 0.0, [2.0, 3.0], color="#000000")
    ax.text(float("nan"), 1.0, "nowhere")
    svg = cv.svg()
    root = ET.fromstring(svg)
    assert len(list(root.iter(f"{NS}polygon"))) == 2
    assert "nan" not in svg.lower()


def test_text_with_control_characters_still_parses():
    cv = C.Canvas(4.0, 3.0)
    ax = cv.panel(0.5, 0.5, 3.0, 2.0)
    ax.plot([0, 1], [0, 1])
    ax.set_title("batch\x01 run & <2>")
    texts = [el.text for el in ET.fromstring(cv.svg()).iter(f"{NS}text")]
    assert "batch\ufffd run & <2>" in texts


def test_one_value_image_is_the_middle_of_its_colour_bar():
    """A heat map whose answered cells all hold one value (matplotlib widens such a
    colour scale around the value): the cell takes the bar's middle colour."""
    cv = C.Canvas(5.0, 4.0)
    ax = cv.panel(0.8, 0.4, 3.8, 3.0)
    im = ax.imshow(np.array([[2.0, np.nan]]), cmap="cividis")
    assert im.vmin < 2.0 < im.vmax and im.color(2.0) == C.colormap("cividis", 0.5)
