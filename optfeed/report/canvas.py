"""Figures drawn by optfeed itself: a canvas of panels, written as SVG.

The figures of a run (``figures.py``) draw on :class:`Panel` objects. A panel
records each call (its name and arguments are matplotlib's, for the few calls the
figures use) and :meth:`Canvas.svg` writes the record as one ``<svg>`` element
without importing matplotlib: a run's figures cost milliseconds, not the second
that importing and rendering with matplotlib took. When a PNG is asked for,
:meth:`Canvas.matplotlib` replays the same record onto matplotlib's axes, so each
figure's code exists once.

Coordinates: a canvas is ``width`` x ``height`` inches; panels are placed by their
box in inches from the canvas's top-left corner; the SVG's unit is the point
(1/72 inch). Fonts are the viewer's sans-serif; text widths are estimated (about
0.62 of the font size per character), which is what the layout of legends and
tick labels needs.
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass, field
from html import escape as _escape

import numpy as np

PT = 72.0  # points per inch
FONT = "DejaVu Sans, Helvetica, Arial, sans-serif"
CHAR = 0.62  # mean character width / font size (estimate; DejaVu Sans digits are 0.64)
TICK, TICK_PAD = 3.5, 2.5  # tick length and gap to its label, pt
TITLE_SIZE, LABEL_SIZE, TICK_SIZE, LEGEND_SIZE = 9.0, 8.0, 7.5, 7.0
GRID = "#b0b0b0"
GRID_OPACITY = 0.28
DEFAULT_COLOR = "#1f77a8"
MARGIN = 0.05  # of the data range, added on each side of an axis scaled to its data
TINY = 1e-200  # values all smaller than this are drawn as zero (tick arithmetic fails near 1e-308)

# colour maps: eleven evenly spaced anchors each, interpolated linearly
# (cividis and the reversed ColorBrewer RdBu, both open colour maps)
COLORMAPS = {
    "cividis": ("#00224e", "#083370", "#35456c", "#4f576c", "#666970", "#7d7c78", "#948e77", "#aea371",
                "#c8b866", "#e5cf52", "#fee838"),
    "RdBu_r": ("#053061", "#2065ab", "#4393c3", "#90c4dd", "#d1e5f0", "#f7f6f6", "#fddbc7", "#f3a481",
               "#d6604d", "#b1182b", "#67001f"),
}

# matplotlib's settings that give a replayed canvas the look of its SVG
MATPLOTLIB_LOOK = {
    "font.size": LABEL_SIZE, "axes.titlesize": TITLE_SIZE, "axes.titlelocation": "left", "axes.titley": 1.02,
    "axes.titlepad": 2.0, "axes.labelsize": LABEL_SIZE, "xtick.labelsize": TICK_SIZE,
    "ytick.labelsize": TICK_SIZE, "legend.fontsize": LEGEND_SIZE, "axes.grid": True,
    "grid.alpha": GRID_OPACITY, "grid.linewidth": 0.6, "axes.spines.top": False, "axes.spines.right": False,
    "axes.xmargin": MARGIN, "axes.ymargin": MARGIN, "path.simplify": True,
}

# the keyword arguments each recorded call accepts (a misspelt one is an error here,
# as it would be in matplotlib)
_STYLE = {"color", "lw", "ls", "alpha", "zorder", "label"}
_ACCEPTS = {
    "plot": _STYLE | {"marker", "ms", "mfc", "mec", "mew"},
    "step": _STYLE | {"where"},
    "axhline": _STYLE,
    "axvline": _STYLE,
    "axvspan": _STYLE,
    "fill_between": _STYLE,
    "hlines": _STYLE,
    "errorbar": _STYLE | {"yerr", "fmt", "ms", "ecolor", "elinewidth", "capsize"},
    "text": {"transform", "ha", "va", "color", "fontsize"},
    "imshow": {"origin", "aspect", "cmap", "vmin", "vmax"},
    "set_title": set(), "set_xlabel": set(), "set_ylabel": set(), "set_xlim": set(), "set_ylim": set(),
    "set_xticks": {"rotation", "ha"}, "set_yticks": {"rotation", "ha"},
    "grid": {"axis", "visible"},
    "legend": {"loc", "ncol"},
}


class _AxesFraction:
    """Stands for matplotlib's ``ax.transAxes``: text placed in fractions of the panel."""


@dataclass
class Image:
    """What :meth:`Panel.imshow` returns (for :meth:`Canvas.colorbar`)."""

    values: np.ndarray
    cmap: str
    vmin: float
    vmax: float

    def color(self, v: float) -> str | None:
        if not np.isfinite(v):
            return None
        span = self.vmax - self.vmin
        return colormap(self.cmap, 0.5 if span <= 0 else (v - self.vmin) / span)


def colormap(name: str, f: float) -> str:
    """The colour at ``f`` (0-1, clipped) of a colour map in :data:`COLORMAPS`."""
    anchors = COLORMAPS[name]
    f = min(max(float(f), 0.0), 1.0) * (len(anchors) - 1)
    i = min(int(f), len(anchors) - 2)
    a, b = _rgb(anchors[i]), _rgb(anchors[i + 1])
    w = f - i
    return "#" + "".join(f"{round(x + (y - x) * w):02x}" for x, y in zip(a, b))


def _rgb(hex_: str) -> tuple[int, int, int]:
    return int(hex_[1:3], 16), int(hex_[3:5], 16), int(hex_[5:7], 16)


class Panel:
    """One set of axes: records the drawing calls made on it.

    The methods take matplotlib's names and arguments (``plot(x, y, "o", color=...,
    lw=..., ls="--", label=...)``, ``axhline``, ``axvspan``, ``fill_between``,
    ``legend(loc="best")``...), for the subset listed in :data:`_ACCEPTS`.
    """

    transAxes = _AxesFraction()  # noqa: N815 - matplotlib's name

    def __init__(self, canvas: Canvas, box: tuple[float, float, float, float]):
        self.canvas = canvas
        self.box = box  # left, top, width, height in inches from the canvas's top-left
        self.calls: list[tuple[str, tuple, dict]] = []
        self.removed = False

    def _record(self, name, args, kw):
        unknown = set(kw) - _ACCEPTS[name]
        if unknown:
            raise TypeError(f"{name}() got unexpected keyword argument(s) {sorted(unknown)}")
        self.calls.append((name, args, kw))

    def plot(self, x, y, fmt=None, **kw):
        self._record("plot", (x, y) if fmt is None else (x, y, fmt), kw)

    def step(self, x, y, **kw):
        if kw.get("where", "pre") != "post":
            raise ValueError("optfeed's canvas draws steps held until the next x only: where='post'")
        self._record("step", (x, y), kw)

    def axhline(self, y, **kw):
        self._record("axhline", (y,), kw)

    def axvline(self, x, **kw):
        self._record("axvline", (x,), kw)

    def axvspan(self, a, b, **kw):
        self._record("axvspan", (a, b), kw)

    def fill_between(self, x, y1, y2, **kw):
        self._record("fill_between", (x, y1, y2), kw)

    def hlines(self, y, xmin, xmax, **kw):
        self._record("hlines", (y, xmin, xmax), kw)

    def errorbar(self, x, y, **kw):
        if kw.get("fmt") != "o":
            raise ValueError("optfeed's canvas draws error bars on circles without a line only: fmt='o'")
        self._record("errorbar", (x, y), kw)

    def text(self, x, y, s, **kw):
        self._record("text", (x, y, s), kw)

    def imshow(self, z, **kw) -> Image:
        self._record("imshow", (z,), kw)
        values = np.ma.filled(np.ma.masked_invalid(np.asarray(z, dtype=float)), np.nan)
        finite = values[np.isfinite(values)]
        lo = kw.get("vmin", float(finite.min()) if finite.size else 0.0)
        hi = kw.get("vmax", float(finite.max()) if finite.size else 1.0)
        if hi <= lo:  # one value: a range around it, as matplotlib's colour scale takes
            lo, hi = (lo - 0.1 * abs(lo), hi + 0.1 * abs(hi)) if lo else (-0.1, 0.1)
        image = Image(values, kw.get("cmap", "cividis"), lo, hi)
        self.calls[-1] = ("imshow", (z,), kw, image)
        return image

    def set_title(self, text):
        self._record("set_title", (text,), {})

    def set_xlabel(self, text):
        self._record("set_xlabel", (text,), {})

    def set_ylabel(self, text):
        self._record("set_ylabel", (text,), {})

    def set_xlim(self, lo, hi):
        self._record("set_xlim", (lo, hi), {})

    def set_ylim(self, lo, hi):
        self._record("set_ylim", (lo, hi), {})

    def set_xticks(self, ticks, labels=None, **kw):
        self._record("set_xticks", (ticks,) if labels is None else (ticks, labels), kw)

    def set_yticks(self, ticks, labels=None, **kw):
        self._record("set_yticks", (ticks,) if labels is None else (ticks, labels), kw)

    def grid(self, visible=None, **kw):
        self._record("grid", () if visible is None else (visible,), kw)

    def legend(self, **kw):
        self._record("legend", (), kw)

    def remove(self):
        self.removed = True

    def set_visible(self, visible: bool):
        self.removed = not visible


@dataclass
class Canvas:
    """A figure: ``width`` x ``height`` inches holding panels, a title and colour bars."""

    width: float
    height: float
    panels: list = field(default_factory=list)
    title: tuple | None = None  # (text, fontsize, y fraction from the bottom, va)
    colorbars: list = field(default_factory=list)  # (Image, Panel, label)

    def panel(self, left: float, top: float, width: float, height: float) -> Panel:
        """A new panel with its box in inches from the top-left corner."""
        p = Panel(self, (left, top, width, height))
        self.panels.append(p)
        return p

    def get_figheight(self) -> float:
        return self.height

    def suptitle(self, text: str, fontsize: float = 10, y: float = 0.98, va: str = "top"):
        self.title = (text, fontsize, y, va)

    def colorbar(self, image: Image, ax: Panel, label: str = ""):
        self.colorbars.append((image, ax, label))

    # ------------------------------------------------------------ output

    def svg(self, prefix: str = "") -> str:
        """The canvas as one ``<svg>`` element (standalone file or inline in HTML);
        element ids start with ``prefix``, so several can share a page."""
        return _SvgWriter(self, prefix).write()

    def matplotlib(self):
        """The same drawing as a matplotlib Figure in the canvas's look (imports
        matplotlib)."""
        import matplotlib

        with matplotlib.rc_context(MATPLOTLIB_LOOK):
            return self._replay()

    def _replay(self):
        from matplotlib.figure import Figure

        fig = Figure(figsize=(self.width, self.height))
        images, axes_of = {}, {}
        for p in self.panels:
            if p.removed:
                continue
            left, top, w, h = p.box
            ax = fig.add_axes((left / self.width, 1 - (top + h) / self.height, w / self.width, h / self.height))
            axes_of[id(p)] = ax
            for call in p.calls:
                name, args, kw = call[:3]
                kw = {k: (ax.transAxes if isinstance(v, _AxesFraction) else v) for k, v in kw.items()}
                out = getattr(ax, name)(*args, **kw)
                if name == "imshow":
                    images[id(call[3])] = out
        for image, p, label in self.colorbars:
            fig.colorbar(images[id(image)], ax=axes_of[id(p)], label=label)
        if self.title:
            text, size, y, va = self.title
            fig.suptitle(text, fontsize=size, y=y, va=va)
        return fig


# ---------------------------------------------------------------- scales


def nice_ticks(lo: float, hi: float, most: int) -> list[float]:
    """At most ``most`` tick values in [lo, hi], a step of 1, 2, 2.5 or 5 times a
    power of ten (common practice for chart axes)."""
    if not (np.isfinite(lo) and np.isfinite(hi)) or hi <= lo:
        return [lo] if np.isfinite(lo) else []
    most = max(most, 2)
    raw = (hi - lo) / (most - 1)
    mag = 10.0 ** math.floor(math.log10(raw))
    for m in (1.0, 2.0, 2.5, 5.0, 10.0, 20.0):
        step = m * mag
        first = math.ceil(lo / step - 1e-9)
        last = math.floor(hi / step + 1e-9)
        if last - first + 1 <= most:
            break
    return [k * step for k in range(first, last + 1)]


def tick_labels(ticks: list[float]) -> list[str]:
    """Tick values as text, all with the decimals their step needs."""
    if not ticks:
        return []
    if len(ticks) == 1:
        return [_short(ticks[0])]
    step = abs(ticks[1] - ticks[0])
    big = max(abs(t) for t in ticks)
    if big >= 1e6 or step < 1e-4:  # significant digits, as many as tell the ticks apart
        for digits in range(3, 16):
            labels = [_short(t, digits) for t in ticks]
            if len(set(labels)) == len(labels):
                return labels
        return labels
    decimals = 0
    while decimals < 8 and abs(round(step, decimals) - step) > 1e-9 * step:
        decimals += 1
    return [_fixed(t, decimals) for t in ticks]


def _fixed(v: float, decimals: int) -> str:
    text = f"{v:.{decimals}f}"
    return text[1:] if text.startswith("-") and float(text) == 0 else text.replace("-", "\u2212")


def _short(v: float, digits: int = 3) -> str:
    return "0" if v == 0 else f"{v:.{digits}g}".replace("-", "\u2212")


_CONTROL = re.compile("[\x00-\x08\x0b\x0c\x0e-\x1f]")  # not allowed in XML 1.0


def escape(text: str) -> str:
    """Text for an SVG element's content (&, < and > escaped; html's escape is light
    to import, xml.sax's pulls in urllib)."""
    return _escape(_CONTROL.sub("\ufffd", text), quote=False)


def _finite(values) -> np.ndarray:
    a = np.ma.filled(np.ma.masked_invalid(np.asarray(values, dtype=float)), np.nan).ravel()
    return a[np.isfinite(a)]


def _dash(ls, lw: float) -> str | None:
    """An SVG dash array for a matplotlib line style (dashes scale with the width)."""
    if ls in (None, "-", "solid"):
        return None
    if ls in ("--", "dashed"):
        seq = (3.7, 1.6)
    elif ls in (":", "dotted"):
        seq = (1.0, 1.65)
    elif ls in ("-.", "dashdot"):
        seq = (6.4, 1.6, 1.0, 1.6)
    elif isinstance(ls, tuple) and len(ls) == 2:
        seq = ls[1]
    else:
        raise ValueError(f"line style {ls!r} is not drawn by optfeed's canvas")
    return ",".join(f"{s * lw:.2f}" for s in seq)


def _text_width(text: str, size: float) -> float:
    return CHAR * size * len(text)


# ---------------------------------------------------------------- SVG


class _Frame:
    """A panel's data limits and its mapping to the canvas (points)."""

    def __init__(self, panel: Panel, x0, y0, w, h):
        self.x0, self.y0, self.w, self.h = x0, y0, w, h  # pt, from the top-left
        xs, ys, x_tight, y_tight = [], [], False, False
        self.xlim = self.ylim = None
        self.xticks = self.yticks = None
        self.image = None
        for call in panel.calls:
            name, args, kw = call[:3]
            if name in ("plot", "step"):
                xs.append(_finite(args[0]))
                ys.append(_finite(args[1]))
            elif name == "axhline":
                ys.append(_finite([args[0]]))
            elif name in ("axvline", "axvspan"):
                xs.append(_finite(args[:2] if name == "axvspan" else args[:1]))
            elif name == "fill_between":
                xs.append(_finite(args[0]))
                ys.append(_finite(np.concatenate([np.ravel(args[1]), np.ravel(args[2])])))
            elif name == "hlines":
                ys.append(_finite(args[0]))
                xs.append(_finite(np.concatenate([np.ravel(args[1]), np.ravel(args[2])])))
            elif name == "errorbar":
                y, err = np.asarray(args[1], float), np.asarray(kw.get("yerr", 0.0), float)
                xs.append(_finite(args[0]))
                ys.append(_finite(np.concatenate([y - err, y + err])))
            elif name == "imshow":
                nr, nc = np.shape(args[0])
                xs.append(np.array([-0.5, nc - 0.5]))
                ys.append(np.array([-0.5, nr - 0.5]))
                x_tight = y_tight = True
                self.image = (call[3], kw.get("origin", "upper"), kw.get("aspect", "equal"))
            elif name == "set_xlim":
                self.xlim = (float(args[0]), float(args[1]))
            elif name == "set_ylim":
                self.ylim = (float(args[0]), float(args[1]))
            elif name == "set_xticks":
                self.xticks = (list(args[0]), None if len(args) < 2 else list(args[1]), kw)
            elif name == "set_yticks":
                self.yticks = (list(args[0]), None if len(args) < 2 else list(args[1]), kw)
        self.xlim = _limits(xs, x_tight) if self.xlim is None else self.xlim
        self.ylim = _limits(ys, y_tight) if self.ylim is None else self.ylim
        if self.xlim[0] == self.xlim[1]:  # set_xlim(a, a): a run that ends where it starts
            self.xlim = _widened(*self.xlim)
        if self.ylim[0] == self.ylim[1]:
            self.ylim = _widened(*self.ylim)
        if self.image is not None and self.image[1] == "upper":
            self.ylim = (self.ylim[1], self.ylim[0])

    def x(self, v):
        lo, hi = self.xlim
        return self.x0 + (np.asarray(v, dtype=float) - lo) / (hi - lo) * self.w

    def y(self, v):
        lo, hi = self.ylim
        return self.y0 + self.h - (np.asarray(v, dtype=float) - lo) / (hi - lo) * self.h


def _limits(parts, tight: bool) -> tuple[float, float]:
    """Data limits with :data:`MARGIN` on each side (none for an image); a single
    value gets a range around it."""
    values = np.concatenate(parts) if parts else np.array([])
    if values.size == 0:
        return (0.0, 1.0)
    lo, hi = float(values.min()), float(values.max())
    if not np.isfinite(hi - lo):  # beyond what a float spans: the finite middle part
        lo, hi = np.percentile(values, [1, 99])
    if hi - lo <= 1e-12 * max(abs(lo), abs(hi)) or max(abs(lo), abs(hi)) < TINY:
        return _widened(lo, hi)  # constant, up to rounding
    if tight:
        return (lo, hi)
    pad = MARGIN * (hi - lo)
    return (lo - pad, hi + pad)


def _widened(lo: float, hi: float) -> tuple[float, float]:
    """A range around one value: 5 % of it on each side (0.05 around zero)."""
    mid = 0.5 * (lo + hi)
    d = 0.05 * abs(mid) if abs(mid) > TINY else 0.05
    return (mid - d, mid + d)


def _attrs(**kw) -> str:
    return " ".join(f'{k.replace("_", "-")}="{v}"' for k, v in kw.items() if v is not None)


def _points(xs, ys) -> str:
    """'x,y x,y ...' to 0.01 pt (one formatting of the whole array: a line has up to
    1500 points)."""
    flat = np.column_stack([np.asarray(xs, float), np.asarray(ys, float)]).ravel()
    return ("%.2f,%.2f " * (len(flat) // 2) % tuple(flat.tolist())).rstrip()


class _SvgWriter:
    def __init__(self, canvas: Canvas, prefix: str):
        self.c = canvas
        self.prefix = prefix
        self.out: list[str] = []
        self.clips = 0

    def write(self) -> str:
        c = self.c
        W, H = c.width * PT, c.height * PT
        self.out.append(f'<svg xmlns="http://www.w3.org/2000/svg" style="max-width:{W:.0f}pt" width="{W:.0f}pt" '
                        f'height="{H:.0f}pt" viewBox="0 0 {W:.2f} {H:.2f}" font-family="{FONT}">')
        self.out.append(f'<rect width="{W:.2f}" height="{H:.2f}" fill="#ffffff"/>')
        bars = {id(p): (im, label) for im, p, label in c.colorbars}
        for p in c.panels:
            if p.removed:
                continue
            left, top, w, h = (v * PT for v in p.box)
            bar = bars.get(id(p))
            if bar is not None:  # the colour bar takes a fifth of the panel's width (as matplotlib's)
                full = w
                w = 0.8 * full
            frame = _Frame(p, left, top, w, h)
            if frame.image is not None and frame.image[2] == "equal":
                frame = self._square(p, frame)
            self.panel(p, frame)
            if bar is not None:
                self.colorbar(bar[0], bar[1], frame.x0 + frame.w + 0.05 * full, frame.y0, frame.h)
        if c.title:
            text, size, y, va = c.title
            base = (1 - y) * H + (0.8 * size if va == "top" else 0)
            self.text(W / 2, base, text, size, anchor="middle")
        self.out.append("</svg>")
        return "\n".join(self.out)

    def _square(self, p, frame):
        """Shrink the box of an image panel so that its cells are square (centred)."""
        nx = abs(frame.xlim[1] - frame.xlim[0])
        ny = abs(frame.ylim[1] - frame.ylim[0])
        scale = min(frame.w / nx, frame.h / ny)
        w, h = nx * scale, ny * scale
        return _Frame(p, frame.x0 + (frame.w - w) / 2, frame.y0 + (frame.h - h) / 2, w, h)

    # ------------------------------------------------------------ pieces

    def text(self, x, y, text, size, anchor="start", color="#000000", rotate=None):
        """Text with its baseline at ``y`` (a text of several lines: the first line's
        baseline, the others below it)."""
        extra = _attrs(text_anchor=None if anchor == "start" else anchor,
                       fill=None if color == "#000000" else color,
                       transform=f"rotate({rotate:g} {x:.2f} {y:.2f})" if rotate else None)
        lines = str(text).split("\n")
        body = escape(lines[0]) if len(lines) == 1 else "".join(
            f'<tspan x="{x:.2f}" dy="{0 if k == 0 else 1.2 * size:g}">{escape(line)}</tspan>'
            for k, line in enumerate(lines))
        self.out.append(f'<text x="{x:.2f}" y="{y:.2f}" font-size="{size:g}"{" " + extra if extra else ""}>'
                        f'{body}</text>')

    def line(self, xs, ys, color, lw, ls=None, alpha=None, clip=None):
        self.out.append(f'<polyline points="{_points(xs, ys)}" '
                        f'{_attrs(fill="none", stroke=color, stroke_width=f"{lw:g}", stroke_dasharray=_dash(ls, lw), stroke_opacity=alpha, clip_path=clip, stroke_linejoin="round")}/>')

    def rect(self, x, y, w, h, fill, alpha=None, clip=None, stroke=None, sw=None):
        self.out.append(f'<rect x="{x:.2f}" y="{y:.2f}" width="{max(w, 0):.2f}" height="{max(h, 0):.2f}" '
                        f'{_attrs(fill=fill, fill_opacity=alpha, stroke=stroke, stroke_width=sw, clip_path=clip)}/>')

    def markers(self, xs, ys, marker, ms, face, edge, mew, alpha=None, clip=None):
        r = ms / 2
        flat = tuple(np.column_stack([np.asarray(xs, float), np.asarray(ys, float)]).ravel().tolist())
        n = len(flat) // 2
        fill = "none" if marker != "o" or face in (None, "none") else face
        group = _attrs(fill=fill, stroke=edge, stroke_width=f"{mew:g}", opacity=alpha, clip_path=clip)
        if marker == "o":  # circles; a cross and a bar as one path, each relative to its point
            self.out.append(f"<g {group}>" + f'<circle cx="%.2f" cy="%.2f" r="{r:.2f}"/>' * n % flat + "</g>")
            return
        shape = {"x": f"m{-r:.2f},{-r:.2f}l{2 * r:.2f},{2 * r:.2f}m{-2 * r:.2f},0l{2 * r:.2f},{-2 * r:.2f}",
                 "_": f"m{-r:.2f},0h{2 * r:.2f}"}.get(marker)
        if shape is None:
            raise ValueError(f"marker {marker!r} is not drawn by optfeed's canvas")
        self.out.append(f'<path d="{("M%.2f,%.2f" + shape) * n % flat}" {group}/>')

    # ------------------------------------------------------------ a panel

    def panel(self, p: Panel, f: _Frame):
        self.clips += 1
        cid = f"{self.prefix}clip{self.clips}"
        clip = f"url(#{cid})"
        self.out.append(f'<clipPath id="{cid}"><rect x="{f.x0:.2f}" y="{f.y0:.2f}" width="{f.w:.2f}" '
                        f'height="{f.h:.2f}"/></clipPath>')
        grid_x = grid_y = True
        title = xlabel = ylabel = None
        legend = None
        for call in p.calls:
            name, args, kw = call[:3]
            if name == "grid":
                visible = bool(args[0]) if args else kw.get("visible", True)
                axis = kw.get("axis", "both")
                if axis in ("x", "both"):
                    grid_x = visible
                if axis in ("y", "both"):
                    grid_y = visible
            elif name == "set_title":
                title = args[0]
            elif name == "set_xlabel":
                xlabel = args[0]
            elif name == "set_ylabel":
                ylabel = args[0]
            elif name == "legend":
                legend = kw
        xt, xl, xkw = self._ticks(f.xticks, f.xlim, max(2, int(f.w / 45) + 1))
        yt, yl, ykw = self._ticks(f.yticks, f.ylim, max(2, int(f.h / 24) + 1))
        if f.image is None:
            for v in xt if grid_x else ():
                self.line([f.x(v)] * 2, [f.y0, f.y0 + f.h], GRID, 0.6, alpha=GRID_OPACITY)
            for v in yt if grid_y else ():
                self.line([f.x0, f.x0 + f.w], [f.y(v)] * 2, GRID, 0.6, alpha=GRID_OPACITY)
        handles = []
        drawn = [c for c in p.calls if c[0] in _DRAWN]
        order = sorted(range(len(drawn)), key=lambda k: (drawn[k][2].get("zorder", _ZORDER[drawn[k][0]]), k))
        for k in order:
            entry = self.draw(f, drawn[k], clip)
            if entry is not None:
                handles.append((k, entry))
        handles.sort()
        self.axes(f, xt, xl, xkw, yt, yl, ykw, title, xlabel, ylabel)
        if legend is not None and handles:
            self.legend(f, [h for _, h in handles], legend.get("ncol", 1), p)

    def _ticks(self, given, lim, most):
        lo, hi = min(lim), max(lim)
        if given is not None:
            ticks, labels, kw = given
            ticks = [float(t) for t in ticks]
            labels = [str(s) for s in labels] if labels is not None else tick_labels(ticks)
            keep = [k for k, t in enumerate(ticks) if lo - 1e-9 * (hi - lo) <= t <= hi + 1e-9 * (hi - lo)]
            return [ticks[k] for k in keep], [labels[k] for k in keep], kw
        ticks = nice_ticks(lo, hi, most)
        return ticks, tick_labels(ticks), {}

    def axes(self, f, xt, xl, xkw, yt, yl, ykw, title, xlabel, ylabel):
        bottom = f.y0 + f.h
        spine = 'stroke="#000000" stroke-width="0.8"'
        self.out.append(f'<path d="M{f.x0:.2f},{f.y0:.2f}V{bottom:.2f}H{f.x0 + f.w:.2f}" fill="none" {spine}/>')
        ticks = "".join(f"M{f.x(v):.2f},{bottom:.2f}v{TICK}" for v in xt)
        ticks += "".join(f"M{f.x0:.2f},{f.y(v):.2f}h{-TICK}" for v in yt)
        if ticks:
            self.out.append(f'<path d="{ticks}" fill="none" {spine}/>')
        rotation = float(xkw.get("rotation", 0) or 0)
        deepest = TICK_SIZE
        for v, s in zip(xt, xl):
            x = float(f.x(v))
            if rotation:
                y = bottom + TICK + TICK_PAD + 0.7 * TICK_SIZE
                self.text(x, y, s, TICK_SIZE, anchor="end" if xkw.get("ha") == "right" else "middle",
                          rotate=-rotation)
                deepest = max(deepest, _text_width(s, TICK_SIZE) * math.sin(math.radians(rotation)) + TICK_SIZE)
            else:
                self.text(x, bottom + TICK + TICK_PAD + 0.8 * TICK_SIZE, s, TICK_SIZE, anchor="middle")
        widest = 0.0
        for v, s in zip(yt, yl):
            lines = s.split("\n")
            y = float(f.y(v)) + 0.35 * TICK_SIZE - 0.6 * TICK_SIZE * (len(lines) - 1)
            self.text(f.x0 - TICK - TICK_PAD, y, s, TICK_SIZE, anchor="end")
            widest = max([widest] + [_text_width(line, TICK_SIZE) for line in lines])
        if title:
            self.text(f.x0, f.y0 - 0.02 * f.h - 2.0 - 0.2 * TITLE_SIZE, title, TITLE_SIZE)
        if xlabel:
            self.text(f.x0 + f.w / 2, bottom + TICK + TICK_PAD + deepest + 3.0 + 0.8 * LABEL_SIZE, xlabel,
                      LABEL_SIZE, anchor="middle")
        if ylabel:
            x = f.x0 - TICK - TICK_PAD - widest - 4.0 - 0.2 * LABEL_SIZE
            self.text(x, f.y0 + f.h / 2, ylabel, LABEL_SIZE, anchor="middle", rotate=-90)

    # ------------------------------------------------------------ one call

    def draw(self, f: _Frame, call, clip):
        """Draw one recorded call; return its legend entry (label, kind, style) or None."""
        name, args, kw = call[:3]
        color = kw.get("color", DEFAULT_COLOR)
        alpha = kw.get("alpha")
        lw = float(kw.get("lw", 1.5))
        label = kw.get("label")
        entry = None
        if name in ("plot", "step"):
            x, y = np.asarray(args[0], float), np.asarray(args[1], float)
            fmt = args[2] if len(args) > 2 else None
            marker = kw.get("marker") or (fmt if fmt in ("o", "x") else None)
            if fmt is not None and fmt not in ("o", "x", "-"):
                raise ValueError(f"format {fmt!r} is not drawn by optfeed's canvas")
            joined = fmt in (None, "-")  # a format naming a marker alone draws no line
            if name == "step":
                x, y = _held(x, y)
            style = {"color": color, "lw": lw, "ls": kw.get("ls"), "alpha": alpha}
            if joined:
                for xs, ys in _runs(f.x(x), f.y(y)):
                    self.line(xs, ys, color, lw, kw.get("ls"), alpha, clip)
            if marker is not None:
                ms = float(kw.get("ms", 6.0))
                mec = kw.get("mec", color)
                mfc = kw.get("mfc", color)
                mew = float(kw.get("mew", 1.0))
                ok = np.isfinite(x) & np.isfinite(y)
                self.markers(f.x(x[ok]), f.y(y[ok]), marker, ms, mfc, mec, mew, alpha, clip)
                style.update(marker=marker, ms=ms, mfc=mfc, mec=mec, mew=mew, line=joined)
            entry = ("line", style)
        elif name in ("axhline", "axvline", "axvspan", "text") and not all(
                np.isfinite(float(v)) for v in args[:1 if name in ("axhline", "axvline") else 2]):
            return None  # nothing to draw where a position is missing (as matplotlib)
        elif name == "axhline":
            self.line([f.x0, f.x0 + f.w], [f.y(args[0])] * 2, color, lw, kw.get("ls"), alpha, clip)
            entry = ("line", {"color": color, "lw": lw, "ls": kw.get("ls"), "alpha": alpha})
        elif name == "axvline":
            self.line([f.x(args[0])] * 2, [f.y0, f.y0 + f.h], color, lw, kw.get("ls"), alpha, clip)
            entry = ("line", {"color": color, "lw": lw, "ls": kw.get("ls"), "alpha": alpha})
        elif name == "axvspan":
            a, b = sorted((float(f.x(args[0])), float(f.x(args[1]))))
            self.rect(a, f.y0, b - a, f.h, color, alpha, clip)
            entry = ("patch", {"color": color, "alpha": alpha})
        elif name == "fill_between":
            x, y1, y2 = (np.asarray(a, float) for a in args)
            y1, y2 = np.broadcast_to(y1, x.shape), np.broadcast_to(y2, x.shape)
            for a, b in _stretches(np.isfinite(x) & np.isfinite(y1) & np.isfinite(y2)):  # a polygon each
                xs, top, low = f.x(x[a:b]), f.y(y2[a:b]), f.y(y1[a:b])
                pts = _points(np.concatenate([xs, xs[::-1]]), np.concatenate([top, low[::-1]]))
                self.out.append(f'<polygon points="{pts}" {_attrs(fill=color, fill_opacity=alpha, clip_path=clip)}/>')
            entry = ("patch", {"color": color, "alpha": alpha})
        elif name == "hlines":
            ys = np.atleast_1d(np.asarray(args[0], float))
            x1 = np.broadcast_to(np.asarray(args[1], float), ys.shape)
            x2 = np.broadcast_to(np.asarray(args[2], float), ys.shape)
            ok = np.isfinite(ys) & np.isfinite(x1) & np.isfinite(x2)
            ys, x1, x2 = ys[ok], x1[ok], x2[ok]
            d = "".join(f"M{a:.2f},{c:.2f}H{b:.2f}" for a, b, c in zip(f.x(x1), f.x(x2), f.y(ys)))
            self.out.append(f'<path d="{d}" {_attrs(fill="none", stroke=color, stroke_width=f"{lw:g}", stroke_opacity=alpha, clip_path=clip)}/>')
            entry = ("line", {"color": color, "lw": lw, "alpha": alpha})
        elif name == "errorbar":
            x, y = np.asarray(args[0], float), np.asarray(args[1], float)
            err = np.broadcast_to(np.asarray(kw.get("yerr", 0.0), float), y.shape)
            ecolor = kw.get("ecolor", color)
            ew = float(kw.get("elinewidth", lw))
            cap = float(kw.get("capsize", 0.0))
            ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(err)
            xs, lo, hi = f.x(x[ok]), f.y(y[ok] - err[ok]), f.y(y[ok] + err[ok])
            d = "".join(f"M{a:.2f},{b:.2f}V{c:.2f}" for a, b, c in zip(xs, lo, hi))
            if cap:
                d += "".join(f"M{a - cap:.2f},{b:.2f}h{2 * cap:.2f}M{a - cap:.2f},{c:.2f}h{2 * cap:.2f}"
                             for a, b, c in zip(xs, lo, hi))
            self.out.append(f'<path d="{d}" {_attrs(fill="none", stroke=ecolor, stroke_width=f"{ew:g}", clip_path=clip)}/>')
            ms = float(kw.get("ms", 6.0))
            self.markers(xs, f.y(y[ok]), "o", ms, color, color, 1.0, alpha, clip)
            entry = ("errorbar", {"color": color, "ecolor": ecolor, "ms": ms, "lw": ew})
        elif name == "text":
            x, y, s = args
            if isinstance(kw.get("transform"), _AxesFraction):
                px, py = f.x0 + float(x) * f.w, f.y0 + (1 - float(y)) * f.h
            else:
                px, py = float(f.x(x)), float(f.y(y))
            size = float(kw.get("fontsize", TICK_SIZE))
            va = kw.get("va", "baseline")
            py += {"center": 0.35 * size, "top": 0.8 * size, "bottom": -0.2 * size}.get(va, 0.0)
            anchor = {"center": "middle", "right": "end"}.get(kw.get("ha", "left"), "start")
            self.text(px, py, s, size, anchor=anchor, color=kw.get("color", "#000000"))
        elif name == "imshow":
            image = call[3]
            z = image.values
            for i in range(z.shape[0]):
                for j in range(z.shape[1]):
                    fill = image.color(z[i, j])
                    if fill is None:
                        continue
                    xa, xb = sorted((float(f.x(j - 0.5)), float(f.x(j + 0.5))))
                    ya, yb = sorted((float(f.y(i - 0.5)), float(f.y(i + 0.5))))
                    self.rect(xa, ya, xb - xa + 0.3, yb - ya + 0.3, fill, clip=clip)
        if entry is None or not label or str(label).startswith("_"):
            return None
        return (str(label),) + entry

    def legend(self, f: _Frame, entries, ncol: int, p: Panel):
        size = LEGEND_SIZE
        pad, handle, gap, row = 0.4 * size, 2.0 * size, 0.8 * size, 1.25 * size
        ncol = max(1, min(int(ncol), len(entries)))
        nrow = math.ceil(len(entries) / ncol)
        cols = [entries[k * nrow:(k + 1) * nrow] for k in range(ncol)]
        widths = [max(_text_width(e[0], size) for e in col) + handle + gap for col in cols if col]
        w = sum(widths) + pad * 2 + 1.2 * size * (len(widths) - 1)
        h = nrow * row + pad * 2 - 0.25 * size
        x, y = _best_place(f, p, w, h, 0.5 * size)
        self.rect(x, y, w, h, "#ffffff", 0.8, stroke="#cccccc", sw="0.8")
        cx = x + pad
        for col, width in zip(cols, widths):
            for k, (label, kind, style) in enumerate(col):
                cy = y + pad + k * row + 0.5 * size
                self.handle(cx, cy, handle, kind, style)
                self.text(cx + handle + gap, cy + 0.35 * size, label, size)
            cx += width + 1.2 * size

    def handle(self, x, y, length, kind, style):
        if kind == "patch":
            self.rect(x, y - 0.35 * LEGEND_SIZE, length, 0.7 * LEGEND_SIZE, style["color"], style.get("alpha"))
        elif kind == "errorbar":
            self.line([x + length / 2] * 2, [y - 0.5 * LEGEND_SIZE, y + 0.5 * LEGEND_SIZE], style["ecolor"],
                      style["lw"])
            self.markers([x + length / 2], [y], "o", style["ms"], style["color"], style["color"], 1.0)
        else:
            if style.get("line", True):
                self.line([x, x + length], [y, y], style["color"], style["lw"], style.get("ls"), style.get("alpha"))
            if style.get("marker"):
                ms = min(style["ms"], 9.0)
                self.markers([x + length / 2], [y], style["marker"], ms, style.get("mfc"), style.get("mec"),
                             style.get("mew", 1.0))

    def colorbar(self, image: Image, label: str, x, y, h):
        w = min(h / 20.0, 14.0)
        gid = f"{self.prefix}bar{self.clips}"
        stops = "".join(f'<stop offset="{k / 10:.1f}" stop-color="{colormap(image.cmap, 1 - k / 10)}"/>'
                        for k in range(11))
        self.out.append(f'<linearGradient id="{gid}" x1="0" y1="0" x2="0" y2="1">{stops}</linearGradient>')
        self.rect(x, y, w, h, f"url(#{gid})", stroke="#000000", sw="0.8")
        ticks = nice_ticks(image.vmin, image.vmax, max(2, int(h / 24) + 1))
        span = (image.vmax - image.vmin) or 1.0
        d = ""
        for v, s in zip(ticks, tick_labels(ticks)):
            ty = y + h - (v - image.vmin) / span * h
            d += f"M{x + w:.2f},{ty:.2f}h{TICK}"
            self.text(x + w + TICK + TICK_PAD, ty + 0.35 * TICK_SIZE, s, TICK_SIZE)
        if d:
            self.out.append(f'<path d="{d}" fill="none" stroke="#000000" stroke-width="0.8"/>')
        if label:
            widest = max((_text_width(s, TICK_SIZE) for s in tick_labels(ticks)), default=0.0)
            lx = x + w + TICK + TICK_PAD + widest + 4.0 + 0.8 * LABEL_SIZE
            self.text(lx, y + h / 2, label, LABEL_SIZE, anchor="middle", rotate=-90)


_DRAWN = ("plot", "step", "axhline", "axvline", "axvspan", "fill_between", "hlines", "errorbar", "text", "imshow")
_ZORDER = {"plot": 2, "step": 2, "axhline": 2, "axvline": 2, "hlines": 2, "errorbar": 2, "axvspan": 1,
           "fill_between": 1, "imshow": 0, "text": 3}


def _stretches(ok) -> list[tuple[int, int]]:
    """(start, stop) of each run of True in the mask ``ok`` (NaN breaks a line or a band)."""
    edges = np.flatnonzero(np.diff(np.concatenate([[0], np.asarray(ok, dtype=int), [0]])))
    return list(zip(edges[::2], edges[1::2]))


def _runs(xs, ys):
    """The stretches of a line between missing values."""
    for a, b in _stretches(np.isfinite(xs) & np.isfinite(ys)):
        yield xs[a:b], ys[a:b]


def _held(x, y):
    """A step line's corners: each value held until the next x (where='post')."""
    return np.repeat(x, 2)[1:], np.repeat(y, 2)[:-1]


# the candidate places of a legend, in the order they are tried (first of the least covered wins)
_PLACES = ("upper right", "upper left", "lower left", "lower right", "center right", "center left",
           "lower center", "upper center", "center")


def _best_place(f: _Frame, p: Panel, w: float, h: float, inset: float) -> tuple[float, float]:
    """The top-left corner (pt) of a ``w`` x ``h`` legend where it covers the fewest
    points of the panel's lines (each line sampled every few points along its length)."""
    xs, ys = _covered_points(f, p)
    best, where = None, None
    for place in _PLACES:
        vert, horiz = place.split()[0], place.split()[-1]
        x = {"left": f.x0 + inset, "right": f.x0 + f.w - w - inset}.get(horiz, f.x0 + (f.w - w) / 2)
        y = {"upper": f.y0 + inset, "lower": f.y0 + f.h - h - inset}.get(vert, f.y0 + (f.h - h) / 2)
        n = int(np.count_nonzero((xs >= x) & (xs <= x + w) & (ys >= y) & (ys <= y + h))) if xs.size else 0
        if best is None or n < best:
            best, where = n, (x, y)
        if n == 0:
            break
    return where


def _covered_points(f: _Frame, p: Panel):
    xs, ys = [], []
    left, right, top, bottom = f.x0, f.x0 + f.w, f.y0, f.y0 + f.h
    for call in p.calls:
        name, args, kw = call[:3]
        if name in ("plot", "step", "fill_between", "errorbar"):
            px, py = f.x(np.asarray(args[0], float)), f.y(np.asarray(args[1], float))
            if name == "step":
                px, py = _held(px, py)
            if name == "fill_between":
                px = np.concatenate([px, px])
                py = np.concatenate([py, f.y(np.asarray(args[2], float))])
            elif name != "errorbar" and len(px) > 1 and (len(args) < 3 or args[2] == "-"):
                px, py = _along(px, py)
        elif name == "axhline":
            px = np.linspace(left, right, 60)
            py = np.full(60, float(f.y(args[0])))
        elif name == "axvline":
            py = np.linspace(top, bottom, 40)
            px = np.full(40, float(f.x(args[0])))
        elif name == "hlines":
            ys_ = np.atleast_1d(np.asarray(args[0], float))
            px = np.concatenate([np.linspace(float(a), float(b), 20) for a, b in zip(
                f.x(np.broadcast_to(args[1], ys_.shape)), f.x(np.broadcast_to(args[2], ys_.shape)))])
            py = np.repeat(f.y(ys_), 20)
        else:
            continue
        ok = np.isfinite(px) & np.isfinite(py)
        xs.append(px[ok])
        ys.append(py[ok])
    if not xs:
        return np.array([]), np.array([])
    return np.concatenate(xs), np.concatenate(ys)


def _along(px, py, spacing: float = 4.0):
    """Points along a polyline, at most ``spacing`` pt apart (so that a long straight
    segment still counts where it passes)."""
    ok = np.isfinite(px) & np.isfinite(py)
    px, py = px[ok], py[ok]
    if len(px) < 2:
        return px, py
    seg = np.hypot(np.diff(px), np.diff(py))
    n = np.minimum(np.ceil(seg / spacing).astype(int), 200) + 1  # points per segment, its start included
    i = np.repeat(np.arange(len(seg)), n)
    t = (np.arange(len(i)) - np.repeat(np.cumsum(n) - n, n)) / np.repeat(n, n)
    out_x = px[i] + (px[i + 1] - px[i]) * t
    out_y = py[i] + (py[i + 1] - py[i]) * t
    return np.append(out_x, px[-1]), np.append(out_y, py[-1])
