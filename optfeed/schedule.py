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

Columns may also be separated by ``;`` (as spreadsheets write CSV where the decimal
mark is a comma); then numbers may use a decimal comma (``0,01``), but no thousands
separators. The header decides: ``;`` in it (outside the brackets) means ``;``.

One rate column per feed; a ``<feed> growth`` column is optional (empty cell = 0).

For a problem with phases a ``phase`` column (no unit) may name the phase each row's
step lies in, in the problem's order; a phase whose end the schedule chooses
(``until: {between: ...}``) ends at the time of the first row of a later phase::

    time [h], glucose [mL/h], phase
    0, 0, batch
    5, 4, growth
    12.5, 9, production

YAML (``.yaml``/``.yml``)::

    interpolation: constant
    feeds:
      glucose:
        - {time: 0 h, rate: 0 L/h}
        - {time: 4 h, rate: 10 mL/h, growth: 0.15 1/h}
    phases: {growth: 12.5 h}       # the end of each phase the schedule chooses

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
from dataclasses import dataclass, field, replace
from decimal import Decimal
from pathlib import Path

import numpy as np

from .errors import InputError, Issue
from .csvfile import header_cell, read_table, unit_factor
from .problem.yamlio import key_text, read_yaml
from .units import factor_to, parse_quantity, to_internal

_LOG_LARGEST = math.log(sys.float_info.max)  # ~709.8: exp() of more overflows


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
    switch_times : dict
        Phase name -> the time (h) it ends, for the phases whose end the schedule
        chooses (``until: {between: ...}``); see :meth:`optfeed.simulate.Simulator.run`.
    """

    feeds: dict
    interpolation: str = "constant"
    source: str = ""
    switch_times: dict = field(default_factory=dict)

    def segments(self, feed_names, end_time: float) -> list[Segment]:
        """Split [0, end_time] at every row time of every feed.

        Raises
        ------
        InputError
            If a feed of ``feed_names`` has no rows here.
        ScheduleOverflow
            When an exponential segment's rate is past any finite number at the
            start of a segment (a schedule longer than the one it was checked for).
        """
        if any(name not in self.feeds for name in feed_names):
            raise InputError(_missing(self.source or IN_CODE, list(feed_names), list(self.feeds), None))
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


IN_CODE = "schedule built in code"  # what messages name for a Schedule that has no file


def piecewise_constant(feed_names, times, rates, source: str = "") -> Schedule:
    """Schedule from common step times (h) and a rate array (L/h), shape (len(times), nfeeds).

    Raises InputError if ``rates`` does not hold one rate per feed and step time."""
    feed_names = [feed_names] if isinstance(feed_names, str) else list(feed_names)
    rates = np.asarray(rates, dtype=float)
    if rates.size != len(times) * len(feed_names):
        raise InputError.one(source or IN_CODE, None, "rates",
                             f"expected {len(times)} step time(s) x {len(feed_names)} feed(s) "
                             f"({', '.join(feed_names)}) = {len(times) * len(feed_names)} rates, got {rates.size}")
    rates = rates.reshape(len(times), len(feed_names))
    feeds = {
        name: FeedRows(tuple(map(float, times)), tuple(map(float, rates[:, j])), (0.0,) * len(times))
        for j, name in enumerate(feed_names)
    }
    return Schedule(feeds, "constant", source)


def round_schedule(schedule: Schedule, feeds, end_time: float | None = None, resolution: float = 1e-5,
                   off_below: float = 1e-5) -> Schedule:
    """The schedule as a file holds it and a pump is set: rates rounded, zeros exact.

    Each rate is rounded, in the unit its feed is written in (``Feed.unit``), to a
    step of ``resolution`` of the pump's maximum, taken down to a power of ten (so
    120 mL/h at 1e-5 rounds to 0.001 mL/h; the text a file holds is short and
    exact). A rate below ``off_below`` of the maximum is the pump off: exactly 0
    (unless the feed has a minimum rate). Rounding never leaves the pump's range.

    For steps (constant interpolation, no growth) the rounding error of each step
    is carried into the next, so the volume fed by every step boundary stays
    within half a rounding step (times that step's length) of the unrounded
    schedule's: rounding does not add up into a fuller vessel at the end.

    The result is what :func:`schedule_csv_text` writes and :func:`load_schedule`
    reads back bit for bit, so a schedule verified after rounding is exactly the
    schedule ``optfeed check`` judges from the file.

    The default resolution was measured (``benchmarks/schedule_rounding.py``): on
    the shipped and published problems, rounding their optima at 1e-4 left every
    limit within the check tolerance and moved the objective by at most 3e-6
    (relative), while 1e-3 broke limits on three of five; 1e-5 keeps a factor ten.

    Parameters
    ----------
    schedule : Schedule
    feeds : sequence of optfeed.problem.Feed
        The problem's feeds (name, unit, min_rate, max_rate).
    end_time : float, optional
        h; the length of the last step (for carrying its rounding error).
    resolution, off_below : float
        Relative to each pump's maximum rate.
    """
    by_name = {f.name: f for f in feeds}
    out = {}
    for name, rows in schedule.feeds.items():
        feed = by_name.get(name)
        if feed is None:
            out[name] = rows
            continue
        unit = feed.unit or "L/h"
        f_out, f_in = factor_to(unit), flow_factor(unit)
        top, low = feed.max_rate * f_out, feed.min_rate * f_out
        step = 10.0 ** math.floor(math.log10(top * resolution))
        exponent = round(math.log10(step))
        own = getattr(feed, "step", 0.0) * f_out  # the pump's own setting step, where it has one
        carry = 0.0  # volume (display unit x h) not yet fed because of rounding
        rates = []
        for i, rate in enumerate(rows.rates):
            shown = rate * f_out
            plain = schedule.interpolation != "constant" or rows.growth[i] != 0
            t_next = rows.times[i + 1] if i + 1 < len(rows.times) else end_time
            length = None if (plain or t_next is None) else t_next - rows.times[i]
            if shown < off_below * top and low == 0:
                text = "0"
                carry = 0.0
            else:
                target = shown + (carry / length if length else 0.0)
                if own:
                    n = round(target / own)
                    text = repr(float(Decimal(repr(own)) * int(n)))
                else:
                    n = round(target / step)
                    text = str(Decimal(int(n)).scaleb(exponent))
                value = float(text)
                if value > top or value < low:  # never outside the pump's range
                    text = repr(min(max(value, low), top))
                if length:
                    carry += (shown - float(text)) * length
            rates.append(float(text) * f_in)
        out[name] = FeedRows(tuple(rows.times), tuple(rates), tuple(rows.growth))
    return Schedule(out, schedule.interpolation, schedule.source, dict(schedule.switch_times))


def flow_factor(unit: str) -> float:
    """Internal value (L/h) of 1 ``unit``, computed as a schedule file's reader does."""
    return to_internal(parse_quantity(f"1 {unit}", "flow"))


def _exact_text(internal: float, f_out: float, f_in: float) -> str:
    """The shortest decimal text of ``internal * f_out`` that reads back (text times
    ``f_in``) as exactly ``internal``; 17 significant digits if none does."""
    if internal == 0:
        return "0"
    shown = internal * f_out
    for digits in range(1, 18):
        text = f"{shown:.{digits}g}"
        if float(text) * f_in == internal:
            return format(Decimal(text), "f") if "e" in text and 1e-6 <= abs(shown) < 1e15 else text
    return repr(shown)


def write_schedule_csv(schedule: Schedule, path, feed_units: dict | None = None, note: str = "",
                       phases=None, ends: dict | None = None) -> None:
    """Write ``schedule`` as CSV in the format :func:`load_schedule` reads.

    Rates are written in ``feed_units[name]`` (default L/h), each as the shortest
    text that reads back as exactly the same rate (see :func:`round_schedule`).
    ``phases`` (the problem's phase names, in order) adds a ``phase`` column when
    the schedule has ``switch_times``: rows are split at every switch time, so each
    lies in one phase; a row lies in the first phase whose switch time comes after
    it (a phase without a switch time gets no rows). ``ends`` (phase name -> h, e.g.
    a simulated run's ``Trajectory.switches``) adds ends to place rows by without
    splitting them (a phase ended by a condition).
    """
    path = Path(path)
    path.write_text(schedule_csv_text(schedule, feed_units, note, phases, ends))


def schedule_csv_text(schedule: Schedule, feed_units: dict | None = None, note: str = "", phases=None,
                      ends: dict | None = None) -> str:
    """The text :func:`write_schedule_csv` writes."""
    feed_units = feed_units or {}
    names = list(schedule.feeds)
    times = {t for rows in schedule.feeds.values() for t in rows.times}
    phase_names = list(phases or ())
    with_phase = bool(phase_names and (schedule.switch_times or ends))
    if with_phase:
        times |= {float(v) for v in schedule.switch_times.values()}
    switches = {**(ends or {}), **schedule.switch_times}
    times = sorted(times)
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
    if with_phase:
        header.append("phase")
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    columns = []  # per feed: (values, growth) at every time, in one pass each
    for name in names:
        rows = schedule.feeds[name]
        unit = feed_units.get(name, "L/h")
        f_out, f_in = factor_to(unit), flow_factor(unit)
        if schedule.interpolation == "linear":
            values = [_exact_text(float(v), f_out, f_in) for v in np.interp(times, rows.times, rows.rates)]
            gs = [0.0] * len(times)
        else:
            values, gs = [], []
            for t in times:
                i = max(bisect.bisect_right(rows.times, t + 1e-12) - 1, 0)
                g = rows.growth[i]
                value = rows.rates[i] * math.exp(g * (t - rows.times[i])) if rows.rates[i] else 0.0
                values.append(_exact_text(value, f_out, f_in))
                gs.append(g)
        columns.append((values, gs))
    for j, t in enumerate(times):
        row = [_exact_text(float(t), 1.0, 1.0)]
        for values, gs in columns:
            row.append(values[j])
            if growth:
                row.append(repr(float(gs[j])))
        if with_phase:
            row.append(_phase_at(t, phase_names, switches))
        w.writerow(row)
    return buf.getvalue()


def _phase_at(t: float, phase_names, switches) -> str:
    """The phase a row at ``t`` (h) lies in: the first with a switch time after ``t``
    (phases without one skipped), else the last."""
    for name in phase_names[:-1]:
        if name in switches and switches[name] > t:
            return name
    return phase_names[-1]


def checked_schedule(schedule: Schedule, feed_names, end_time: float | None = None, phases=()) -> Schedule:
    """Check a :class:`Schedule` built in code as strictly as a schedule file: a row
    table for every feed of ``feed_names`` and no other (a misspelt name is named,
    with the closest feed), times from 0 increasing and before ``end_time`` (h),
    rates finite and not negative; ``switch_times`` as :func:`load_schedule` checks
    a file's phase ends for a problem with ``phases`` (entries for phases that a
    fixed time or a condition ends, as a simulated run's switches hold, are not
    used and not checked).

    Raises
    ------
    InputError
        Naming the schedule's source (or "schedule built in code") and the feed.
    """
    where = schedule.source or IN_CODE
    if not isinstance(schedule.feeds, dict):
        raise InputError.one(where, None, "feeds", "expected a mapping of feed name -> FeedRows")
    if schedule.interpolation not in ("constant", "linear"):
        raise InputError.one(where, None, "interpolation",
                             f"expected 'constant' or 'linear', got {schedule.interpolation!r}")
    issues = _missing(where, list(feed_names), list(schedule.feeds), None)
    end = math.inf if end_time is None else float(end_time)
    for name in feed_names:
        rows = schedule.feeds.get(name)
        if rows is None:
            continue
        try:
            times, rates, growth = (tuple(float(v) for v in col) for col in (rows.times, rows.rates, rows.growth))
        except (AttributeError, TypeError, ValueError):
            issues.append(Issue(where, None, name, "expected FeedRows(times, rates, growth) of numbers"))
            continue
        if not len(times) == len(rates) == len(growth):
            issues.append(Issue(where, None, name, f"times, rates and growth differ in length "
                                                   f"({len(times)}, {len(rates)}, {len(growth)})"))
            continue
        if not all(math.isfinite(v) for v in times + rates + growth):
            issues.append(Issue(where, None, name, "times, rates and growth must be finite numbers"))
            continue
        issues += _check_rows(where, name, times, rates, growth, [None] * len(times), schedule.interpolation, end)
    kinds = {ph.name: ph.end.kind for ph in phases or ()}
    given = {str(n): (float(t), None, f"switch_times.{n}") for n, t in (schedule.switch_times or {}).items()
             if kinds.get(n, "between") == "between"}  # the ends of the others (a run's switches) are not used
    if phases or given:
        issues += _switch_issues(where, tuple(phases or ()), given, None, "switch_times")
    if issues:
        raise InputError(issues)
    return schedule


# ------------------------------------------------------------------ loading


def load_schedule(path, feed_names, end_time: float | None = None, phases=()) -> Schedule:
    """Read a schedule file (CSV or YAML) for a problem with ``feed_names``.

    Every feed must be scheduled; times must start at 0, increase, and (if
    ``end_time`` is given, h) lie before it; rates must be numbers in a flow unit.
    ``phases`` are the problem's phases (:class:`~optfeed.problem.spec.Phase`): the
    file must give the end of every phase whose end the schedule chooses, inside
    its window and in the phases' order (a ``phase`` column in CSV, ``phases:`` in
    YAML); a file that names phases for a problem without them is refused.

    Raises
    ------
    InputError
        Naming the file, line and column or key.
    """
    path = str(path)
    end = math.inf if end_time is None else float(end_time)
    phases = tuple(phases or ())
    if Path(path).suffix.lower() in (".yaml", ".yml"):
        return _load_yaml(path, feed_names, end, phases)
    return _load_csv(path, feed_names, end, phases)


def _switch_issues(path, phases, given: dict, default_line=None, default_key="phases") -> list:
    """Issues with the phase ends ``given`` (name -> (time h, line, key)) for a
    problem with ``phases``; a 'between' phase without an end is one too."""
    names = [ph.name for ph in phases]
    issues = []
    if given and not phases:
        name, (_, line, key) = next(iter(given.items()))
        return [Issue(path, line, key, "this problem has no phases: leave the phases out of the schedule")]
    for name, (t, line, key) in given.items():
        if name not in names:
            close = difflib.get_close_matches(name, names, n=2)
            hint = f"; did you mean {', '.join(map(repr, close))}?" if close else f"; phases are {', '.join(names)}"
            issues.append(Issue(path, line, key, f"{name!r} is not a phase of this problem{hint}"))
            continue
        e = phases[names.index(name)].end
        if e.kind == "run":
            issues.append(Issue(path, line, key, f"phase {name!r} is the last: it ends with the run"))
        elif e.kind == "at":
            issues.append(Issue(path, line, key, f"phase {name!r} ends {e.text}, fixed by the problem file: "
                                                 "leave it out"))
        elif e.kind == "when":
            issues.append(Issue(path, line, key, f"phase {name!r} ends when {e.text}, found by simulation: "
                                                 "leave it out"))
        elif not e.lower <= t <= e.upper:
            issues.append(Issue(path, line, key, f"phase {name!r} would end at {t:g} h, outside its window "
                                                 f"({e.text})"))
    known = sorted((names.index(n), t, line, key, n) for n, (t, line, key) in given.items() if n in names)
    for (_, t0, _, _, n0), (_, t1, line, key, n1) in zip(known, known[1:]):
        if t1 <= t0:
            issues.append(Issue(path, line, key, f"phase {n1!r} would end at {t1:g} h, not after phase {n0!r} "
                                                 f"({t0:g} h): phases end in the problem's order"))
    for ph in phases:
        if ph.end.kind == "between" and ph.name not in given:
            issues.append(Issue(path, default_line, default_key,
                                f"the schedule must give the end of phase {ph.name!r} ({ph.end.text}): a "
                                "'phase' column in CSV (the first row of a later phase), 'phases: {"
                                f"{ph.name}: 12 h}}' in YAML"))
    return issues


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


def _load_csv(path, feed_names, end_time, phases=()) -> Schedule:
    table = read_table(path)
    interpolation = "constant"
    for lineno, text in table.comments:
        m = re.match(r"interpolation\s*:\s*(\S+)", text)
        if m:
            interpolation = m.group(1).lower()
            if interpolation not in ("constant", "linear"):
                raise InputError.one(path, lineno, "interpolation",
                                     f"expected 'constant' or 'linear', got {m.group(1)!r}")
    header_line, header = table.header
    most = 1 + 2 * len(feed_names)
    if len(header) > most + 10:  # a few stray columns get their own message below
        raise InputError.one(path, header_line, "", f"the header has {len(header)} columns; a schedule for "
                                                    f"{len(feed_names)} feed(s) has at most {most} (time, and a rate "
                                                    "and a growth column per feed)")
    columns = []  # (feed name, 'rate'|'growth'|'time', factor)
    issues = []
    phase_col = None
    for c, cell in enumerate(header):
        if c and cell.strip().lower() == "phase":
            if phase_col is not None:
                issues.append(Issue(path, header_line, cell, "column appears twice"))
            phase_col = c
            continue
        got = header_cell(path, header_line, cell, c, "glucose [L/h]")
        if isinstance(got, Issue):
            issues.append(got)
            continue
        name, unit = got
        if c == 0:
            kind, role = "time", "time"
            if name.lower() != "time":
                issues.append(Issue(path, header_line, cell, "the first column must be 'time [h]' (any time unit)"))
        elif name.endswith(" growth"):
            kind, role, name = "specific_rate", "growth", name[: -len(" growth")].strip()
        else:
            kind, role = "flow", "rate"
        got = unit_factor(path, header_line, cell, unit, kind)
        if isinstance(got, Issue):
            issues.append(got)
            continue
        columns.append((name, role, got[0], cell))
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
    if phase_col is not None and not phases:
        raise InputError.one(path, header_line, header[phase_col],
                             "this problem has no phases: leave the phase column out")
    table.check_width()
    times, lines, row_phase = [], [], []
    data = {n: ([], []) for n in feed_names}
    for lineno, cells in table.rows[1:]:
        growth_seen = {n: 0.0 for n in feed_names}
        rate_row = {}
        if phase_col is not None:
            row_phase.append(cells[phase_col])
            cells = cells[:phase_col] + cells[phase_col + 1:]
        for (name, role, factor, cell), text_value in zip(columns, cells):
            if role == "growth" and text_value == "":
                continue
            value = table.number(lineno, cell, text_value)
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
    switch_times = {}
    if phases:
        given, issues = _phase_column(path, header_line, phases, times, lines, row_phase) \
            if phase_col is not None else ({}, [])
        if not issues:  # a bad phase column: its own message only
            issues = _switch_issues(path, phases, given, header_line, "phase")
        if issues:
            raise InputError(issues)
        switch_times = {n: v[0] for n, v in given.items()}
    return Schedule(feeds, interpolation, path, switch_times)


def _phase_column(path, header_line, phases, times, lines, row_phase):
    """(phase name -> (end h, line, 'phase')) for the 'between' phases, and issues,
    from a CSV schedule's phase column."""
    names = [ph.name for ph in phases]
    index, issues = [], []
    for t, line, name in zip(times, lines, row_phase):
        if name not in names:
            close = difflib.get_close_matches(name, names, n=2)
            hint = f"; did you mean {', '.join(map(repr, close))}?" if close else f"; phases are {', '.join(names)}"
            what = f"{name!r} is not a phase of this problem" if name else "no phase named"
            issues.append(Issue(path, line, "phase", what + hint))
            return {}, issues
        k = names.index(name)
        if index and k < index[-1]:
            issues.append(Issue(path, line, "phase", f"phase {name!r} comes before {names[index[-1]]!r} in the "
                                                     "problem: the phase column must follow the phases' order"))
            return {}, issues
        index.append(k)
    given = {}
    for k, ph in enumerate(phases):
        if ph.end.kind != "between":
            continue
        later = next((j for j, i in enumerate(index) if i > k), None)
        if later is not None:
            given[ph.name] = (times[later], lines[later], "phase")
    return given, issues


def _load_yaml(path, feed_names, end_time, phases=()) -> Schedule:
    data, lines = read_yaml(path)
    if not isinstance(data, dict):
        raise InputError.one(path, lines.get(()), "", "expected a mapping with 'feeds' (and optionally 'interpolation')")
    unknown = set(data) - {"interpolation", "feeds", "description", "phases"}
    if unknown:
        k = sorted(unknown)[0]
        raise InputError.one(path, lines.get((k,)), k, "unknown key; expected interpolation, feeds, phases, "
                                                       "description")
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
    given = {}
    if "phases" in data:
        ends = data["phases"]
        if not isinstance(ends, dict):
            raise InputError.one(path, lines.get(("phases",)), "phases",
                                 "expected a mapping of phase name -> the time it ends, e.g. {growth: 12.5 h}")
        for name, value in ends.items():
            loc = ("phases", name)
            try:
                t = to_internal(parse_quantity(value, "time"))
            except ValueError as exc:
                raise InputError.one(path, lines.get(loc), key_text(loc), str(exc)) from None
            given[str(name)] = (t, lines.get(loc), key_text(loc))
    if phases or given:
        issues = _switch_issues(path, phases, given, lines.get(("phases",)) or lines.get(()), "phases")
        if issues:
            raise InputError(issues)
    return Schedule(feeds, interpolation, path, {n: v[0] for n, v in given.items()})
