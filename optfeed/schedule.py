"""Feed schedules: what each pump does over the run.

A schedule gives, per feed, rows ``(time, rate, growth)``. Between one row and the next
the rate is

* ``interpolation: constant`` (the default): ``rate * exp(growth * (t - time))``, a
  step or an exponential segment (growth 0 for a plain step);
* ``interpolation: linear``: a straight line to the next row's rate (no growth).

After the last row the last law goes on to the end of the run (a step holds, an
exponential segment keeps growing, a linear table holds its last rate). The first row
must be at time 0; times must increase.

Files
-----
CSV (``.csv``): comment lines start with ``#``; ``# interpolation: linear`` switches
the mode. The header names the columns with units in brackets::

    # interpolation: constant
    time [h], glucose [L/h], glucose growth [1/h]
    0, 0, 0
    4, 0.01, 0.15

One rate column per feed; a ``<feed> growth`` column is optional (empty cell = 0).

YAML (``.yaml``/``.yml``)::

    interpolation: constant
    feeds:
      glucose:
        - {time: 0 h, rate: 0 L/h}
        - {time: 4 h, rate: 10 mL/h, growth: 0.15 1/h}

Internally a schedule is a list of :class:`Segment` objects over which every pump
follows ``F_j(t) = (a_j + b_j * (t - start)) * exp(k_j * (t - start))``; the
integrator never steps across a segment boundary.
"""

from __future__ import annotations

import bisect
import collections
import csv
import difflib
import io
import math
import re
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from .errors import InputError, Issue
from .problem.yamlio import key_text, read_text, read_yaml
from .units import factor_to, parse_quantity, to_internal

_LOG_LARGEST = math.log(sys.float_info.max)  # ~709.8: exp() of more overflows
_HEADER_RE = re.compile(r"^\s*(?P<name>[^\[\]]+?)\s*(?:\[(?P<unit>[^\]]*)\])?\s*$")


@dataclass(frozen=True)
class Segment:
    """One stretch of the run over which every pump follows a smooth law.

    start, end : float, h. a, b, k : tuples per feed: F_j = (a_j + b_j*tau)*exp(k_j*tau),
    tau = t - start (a in L/h, b in L/h^2, k in 1/h).
    """

    start: float
    end: float
    a: tuple
    b: tuple
    k: tuple

    def rates(self, t) -> np.ndarray:
        """Pump rates (L/h) at times ``t`` (array) within the segment; shape (len(t), nfeeds)."""
        tau = np.asarray(t, dtype=float)[:, None] - self.start
        a, b, k = (np.asarray(v, dtype=float)[None, :] for v in (self.a, self.b, self.k))
        return (a + b * tau) * np.exp(k * tau)


class ScheduleOverflow(ArithmeticError):
    """A pump rate past any finite number (an exponential segment run too long).

    Attributes: feed (str), time (float, h)."""

    def __init__(self, feed: str, time: float):
        self.feed, self.time = feed, time
        super().__init__(f"the rate of feed {feed!r} grows past any finite number by {time:.6g} h")

    def __reduce__(self):
        return (type(self), (self.feed, self.time))


@dataclass(frozen=True)
class FeedRows:
    """One feed's table: times (h), rates (L/h), growth (1/h)."""

    times: tuple
    rates: tuple
    growth: tuple


@dataclass(frozen=True)
class Schedule:
    """A feed schedule for all pumps.

    Attributes
    ----------
    feeds : dict of str -> FeedRows
    interpolation : 'constant' or 'linear'
    source : str
        File it came from ('' if built in code).
    """

    feeds: dict
    interpolation: str = "constant"
    source: str = ""

    def segments(self, feed_names, end_time: float) -> list[Segment]:
        """Split [0, end_time] at every row time of every feed.

        Raises
        ------
        ScheduleOverflow
            When an exponential segment's rate is past any finite number at the
            start of a segment (a schedule longer than the one it was checked for).
        """
        cuts = {0.0, float(end_time)}
        for rows in self.feeds.values():
            cuts.update(t for t in rows.times if 0 < t < end_time)
        cuts = sorted(cuts)
        out = []
        for t0, t1 in zip(cuts[:-1], cuts[1:]):
            a, b, k = [], [], []
            for name in feed_names:
                ai, bi, ki = self._law(name, self.feeds[name], t0)
                a.append(ai), b.append(bi), k.append(ki)
            out.append(Segment(t0, t1, tuple(a), tuple(b), tuple(k)))
        return out

    def _law(self, name: str, rows: FeedRows, t0: float):
        i = max(bisect.bisect_right(rows.times, t0 + 1e-12) - 1, 0)  # the last row at or before t0
        if self.interpolation == "linear" and i + 1 < len(rows.times):
            slope = (rows.rates[i + 1] - rows.rates[i]) / (rows.times[i + 1] - rows.times[i])
            return rows.rates[i] + slope * (t0 - rows.times[i]), slope, 0.0
        if self.interpolation == "linear":
            return rows.rates[i], 0.0, 0.0
        k = rows.growth[i]
        if rows.rates[i] == 0.0:  # an exponential of zero stays zero
            return 0.0, 0.0, 0.0
        try:
            return rows.rates[i] * math.exp(k * (t0 - rows.times[i])), 0.0, k
        except OverflowError:
            raise ScheduleOverflow(name, t0) from None

    def last_time(self) -> float:
        return max(rows.times[-1] for rows in self.feeds.values())


def piecewise_constant(feed_names, times, rates, source: str = "") -> Schedule:
    """Schedule from common step times (h) and a rate array (L/h), shape (len(times), nfeeds)."""
    rates = np.asarray(rates, dtype=float).reshape(len(times), len(feed_names))
    feeds = {
        name: FeedRows(tuple(map(float, times)), tuple(map(float, rates[:, j])), (0.0,) * len(times))
        for j, name in enumerate(feed_names)
    }
    return Schedule(feeds, "constant", source)


def write_schedule_csv(schedule: Schedule, path, feed_units: dict | None = None, note: str = "") -> None:
    """Write ``schedule`` as CSV in the format :func:`load_schedule` reads.

    Rates are written in ``feed_units[name]`` (default L/h) with full precision.
    """
    path = Path(path)
    path.write_text(schedule_csv_text(schedule, feed_units, note))


def schedule_csv_text(schedule: Schedule, feed_units: dict | None = None, note: str = "") -> str:
    feed_units = feed_units or {}
    names = list(schedule.feeds)
    times = sorted({t for rows in schedule.feeds.values() for t in rows.times})
    buf = io.StringIO()
    for line in note.splitlines():
        buf.write(f"# {line}\n")
    buf.write(f"# interpolation: {schedule.interpolation}\n")
    header = ["time [h]"]
    growth = any(any(g != 0 for g in r.growth) for r in schedule.feeds.values())
    for name in names:
        header.append(f"{name} [{feed_units.get(name, 'L/h')}]")
        if growth:
            header.append(f"{name} growth [1/h]")
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    columns = []  # per feed: (values, growth) at every time, in one pass each
    for name in names:
        rows = schedule.feeds[name]
        f = factor_to(feed_units.get(name, "L/h"))
        if schedule.interpolation == "linear":
            values = [float(v) * f for v in np.interp(times, rows.times, rows.rates)]
            gs = [0.0] * len(times)
        else:
            values, gs = [], []
            for t in times:
                i = max(bisect.bisect_right(rows.times, t + 1e-12) - 1, 0)
                g = rows.growth[i]
                values.append((rows.rates[i] * math.exp(g * (t - rows.times[i])) if rows.rates[i] else 0.0) * f)
                gs.append(g)
        columns.append((values, gs))
    for j, t in enumerate(times):
        row = [repr(float(t))]
        for values, gs in columns:
            row.append(repr(values[j]))
            if growth:
                row.append(repr(gs[j]))
        w.writerow(row)
    return buf.getvalue()


# ------------------------------------------------------------------ loading


def load_schedule(path, feed_names, end_time: float | None = None) -> Schedule:
    """Read a schedule file (CSV or YAML) for a problem with ``feed_names``.

    Every feed must be scheduled; times must start at 0, increase, and (if
    ``end_time`` is given, h) lie before it; rates must be numbers in a flow unit.

    Raises
    ------
    InputError
        Naming the file, line and column or key.
    """
    path = str(path)
    end = math.inf if end_time is None else float(end_time)
    if Path(path).suffix.lower() in (".yaml", ".yml"):
        return _load_yaml(path, feed_names, end)
    return _load_csv(path, feed_names, end)


def _check_rows(path, name, times, rates, growth, lines, interpolation, end_time):
    issues = []
    if not times:
        issues.append(Issue(path, None, name, "has no rows"))
        return issues
    if times[0] != 0:
        issues.append(Issue(path, lines[0], name, f"the first row must be at time 0, got {times[0]:g} h"))
    for i in range(len(times)):
        if times[i] < 0:
            issues.append(Issue(path, lines[i], name, f"time {times[i]:g} h is negative"))
        if i and times[i] <= times[i - 1]:
            issues.append(Issue(path, lines[i], name,
                                f"time {times[i]:g} h does not come after {times[i - 1]:g} h "
                                "(rows overlap or are out of order)"))
        if times[i] >= end_time:
            issues.append(Issue(path, lines[i], name, f"a row at {times[i]:g} h lies at or after the end "
                                                      f"of the run ({end_time:g} h)"))
        if rates[i] < 0:
            issues.append(Issue(path, lines[i], name, f"rate {rates[i]:g} L/h is negative"))
        if growth[i] != 0 and interpolation == "linear":
            issues.append(Issue(path, lines[i], name, "growth is only allowed with interpolation: constant"))
        if not math.isfinite(rates[i]):
            issues.append(Issue(path, lines[i], name, "rate is not a finite number"))
        elif growth[i] != 0 and interpolation != "linear":
            until = times[i + 1] if i + 1 < len(times) else end_time
            if rates[i] == 0:
                issues.append(Issue(path, lines[i], name,
                                    f"growth {growth[i]:g} 1/h on a rate of 0 keeps the pump off (an exponential "
                                    "of zero stays zero); give a starting rate above zero, or growth 0"))
            elif rates[i] > 0 and math.isfinite(until) and \
                    math.log(rates[i]) + growth[i] * (until - times[i]) > _LOG_LARGEST:
                issues.append(Issue(path, lines[i], name,
                                    f"rate {rates[i]:g} L/h growing at {growth[i]:g} 1/h passes any finite number "
                                    f"before {until:g} h"))
    return issues


def _missing(path, feed_names, given, line):
    issues = []
    for name in feed_names:
        if name not in given:
            issues.append(Issue(path, line, name, "feed has no schedule (every feed needs one; give 0 to leave it off)"))
    for name in given:
        if name not in feed_names:
            close = difflib.get_close_matches(name, feed_names, n=3)
            hint = f"; did you mean {', '.join(map(repr, close))}?" if close else f"; feeds are {', '.join(feed_names)}"
            issues.append(Issue(path, line, name, f"{name!r} is not a feed of this problem{hint}"))
    return issues


def _load_csv(path, feed_names, end_time) -> Schedule:
    text = read_text(path)
    interpolation = "constant"
    rows = []
    for lineno, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            m = re.match(r"#\s*interpolation\s*:\s*(\S+)", stripped)
            if m:
                interpolation = m.group(1).lower()
                if interpolation not in ("constant", "linear"):
                    raise InputError.one(path, lineno, "interpolation",
                                         f"expected 'constant' or 'linear', got {m.group(1)!r}")
            continue
        try:
            cells = next(csv.reader([line]))
        except csv.Error as exc:
            raise InputError.one(path, lineno, "", f"CSV error: {exc}") from None
        rows.append((lineno, [c.strip() for c in cells]))
    if not rows:
        raise InputError.one(path, None, "", "no header row")
    header_line, header = rows[0]
    most = 1 + 2 * len(feed_names)
    if len(header) > most + 10:  # a few stray columns get their own message below
        raise InputError.one(path, header_line, "", f"the header has {len(header)} columns; a schedule for "
                                                    f"{len(feed_names)} feed(s) has at most {most} (time, and a rate "
                                                    "and a growth column per feed)")
    columns = []  # (feed name, 'rate'|'growth'|'time', factor)
    issues = []
    for c, cell in enumerate(header):
        m = _HEADER_RE.match(cell)
        if not m or not m.group("unit"):
            issues.append(Issue(path, header_line, cell or f"column {c + 1}",
                                "header cells name a column and its unit in brackets, e.g. 'glucose [L/h]'"))
            continue
        name, unit = m.group("name").strip(), m.group("unit").strip()
        if c == 0:
            kind, role = "time", "time"
            if name.lower() != "time":
                issues.append(Issue(path, header_line, cell, "the first column must be 'time [h]' (any time unit)"))
        elif name.endswith(" growth"):
            kind, role, name = "specific_rate", "growth", name[: -len(" growth")].strip()
        else:
            kind, role = "flow", "rate"
        try:
            q = parse_quantity(f"1 {unit}", kind)
            factor = to_internal(q)
        except ValueError as exc:
            msg = str(exc).replace("'1 ", "'", 1) if str(exc).startswith("'1 ") else str(exc)
            issues.append(Issue(path, header_line, cell, f"unit {msg}" if msg.startswith("'") else msg))
            continue
        columns.append((name, role, factor, cell))
    if issues:
        raise InputError(issues)
    given = [n for n, role, _, _ in columns if role == "rate"]
    dup = {n for n, count in collections.Counter(given).items() if count > 1}
    if dup:
        raise InputError.one(path, header_line, sorted(dup)[0], "column appears twice")
    given_set = set(given)
    for n, role, _, cell in columns:
        if role == "growth" and n not in given_set:
            raise InputError.one(path, header_line, cell, f"growth column for {n!r} without its rate column")
    issues = _missing(path, feed_names, given, header_line)
    if issues:
        raise InputError(issues)
    times, lines = [], []
    data = {n: ([], []) for n in feed_names}
    for lineno, cells in rows[1:]:
        if len(cells) != len(header):
            raise InputError.one(path, lineno, "", f"row has {len(cells)} cells, the header has {len(header)}")
        growth_seen = {n: 0.0 for n in feed_names}
        rate_row = {}
        for (name, role, factor, cell), text_value in zip(columns, cells):
            if role == "growth" and text_value == "":
                continue
            try:
                if not text_value.isascii():  # float() would read fullwidth digits as numbers
                    raise ValueError
                value = float(text_value)
                if not math.isfinite(value):
                    raise ValueError
            except ValueError:
                raise InputError.one(path, lineno, cell, f"expected a number, got {text_value!r}") from None
            if role == "time":
                t = value * factor
            elif role == "rate":
                rate_row[name] = value * factor
            else:
                growth_seen[name] = value * factor
        times.append(t)
        lines.append(lineno)
        for n in feed_names:
            data[n][0].append(rate_row[n])
            data[n][1].append(growth_seen[n])
    issues = []
    feeds = {}
    for n in feed_names:
        rates, growth = data[n]
        issues += _check_rows(path, n, times, rates, growth, lines, interpolation, end_time)
        feeds[n] = FeedRows(tuple(times), tuple(rates), tuple(growth))
    if issues:
        # a bad time shows up once per feed column: report it once
        unique = {(i.line, i.message): i for i in reversed(issues)}
        raise InputError(sorted(unique.values(), key=lambda i: (i.line or 0)))
    return Schedule(feeds, interpolation, path)


def _load_yaml(path, feed_names, end_time) -> Schedule:
    data, lines = read_yaml(path)
    if not isinstance(data, dict):
        raise InputError.one(path, lines.get(()), "", "expected a mapping with 'feeds' (and optionally 'interpolation')")
    unknown = set(data) - {"interpolation", "feeds", "description"}
    if unknown:
        k = sorted(unknown)[0]
        raise InputError.one(path, lines.get((k,)), k, "unknown key; expected interpolation, feeds, description")
    interpolation = data.get("interpolation", "constant")
    if interpolation not in ("constant", "linear"):
        raise InputError.one(path, lines.get(("interpolation",)), "interpolation",
                             f"expected 'constant' or 'linear', got {interpolation!r}")
    feeds_in = data.get("feeds")
    if not isinstance(feeds_in, dict):
        raise InputError.one(path, lines.get(("feeds",)), "feeds", "expected a mapping of feed name -> list of rows")
    issues = _missing(path, feed_names, list(feeds_in), lines.get(("feeds",)))
    if issues:
        raise InputError(issues)
    feeds = {}
    for name in feed_names:
        rows = feeds_in[name]
        if not isinstance(rows, list) or not rows:
            raise InputError.one(path, lines.get(("feeds", name)), f"feeds.{name}", "expected a list of rows")
        times, rates, growth, rowlines = [], [], [], []
        for i, row in enumerate(rows):
            loc = ("feeds", name, i)
            if not isinstance(row, dict):
                raise InputError.one(path, lines.get(loc), key_text(loc), "expected a row like {time: 0 h, rate: 0.1 L/h}")
            extra = set(row) - {"time", "rate", "growth"}
            if extra:
                k = sorted(extra)[0]
                raise InputError.one(path, lines.get(loc + (k,)), key_text(loc + (k,)),
                                     "unknown key; rows take time, rate, growth")
            for key in ("time", "rate"):
                if key not in row:
                    raise InputError.one(path, lines.get(loc), key_text(loc + (key,)), "required key is missing")
            got = []
            for key, kind in (("time", "time"), ("rate", "flow"), ("growth", "specific_rate")):
                try:
                    got.append(to_internal(parse_quantity(row.get(key, 0.0), kind)))
                except ValueError as exc:
                    raise InputError.one(path, lines.get(loc + (key,)), key_text(loc + (key,)), str(exc)) from None
            times.append(got[0]), rates.append(got[1]), growth.append(got[2]), rowlines.append(lines.get(loc))
        issues = _check_rows(path, f"feeds.{name}", times, rates, growth, rowlines, interpolation, end_time)
        if issues:
            raise InputError(issues)
        feeds[name] = FeedRows(tuple(times), tuple(rates), tuple(growth))
    return Schedule(feeds, interpolation, path)
