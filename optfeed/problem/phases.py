"""The ``phases`` and ``additions`` sections of a problem file.

A run can be cut into phases, in order; each says what ends it and what it changes::

    phases:
      - name: batch
        feeds: off                       # every pump off (or feed -> off / {min, max})
        until: S < 0.5 g/L               # a condition: the first moment it holds
      - name: growth
        until: {between: [10 h, 18 h]}   # a time optimize chooses (check reads it from the schedule)
      - name: production                 # the last phase ends with the run
        parameters: {mu_max: 0.15 1/h}   # values in this phase
        rates: {q_P: q_P_max * X}        # a named rate or a species' rate, replaced in this phase
        limits:                          # extra path limits in this phase only
          - {name: production substrate, expression: S, max: 5 g/L}

``until`` is a time (``12 h``, a fixed end), ``{between: [a, b], guess: c}`` or a
condition ``<expression> <|<=|>|>= <level>``. Additions are state jumps at fixed
times::

    additions:
      - {sample: 10 mL, every: 6 h}                  # volume taken out, concentrations unchanged
      - {bolus: 50 mL, amounts: {S: 20 g}, at: 12 h}  # volume and what it holds

:func:`check_phases` checks both and returns plain :class:`~optfeed.problem.spec.Phase`
and :class:`~optfeed.problem.spec.Addition` tuples, recording every fault with its
file, line and key.
"""

from __future__ import annotations

import difflib
import math
import re

from ..units import describe, parse_quantity, written_unit
from .schema import AmountRangeIn, BetweenIn
from .spec import Addition, Phase, PhaseEnd

MAX_PHASES = 20
MAX_ADDITIONS = 1000
_CONDITION = re.compile(r"^(?P<expr>.+?)\s*(?P<op><=|>=|<|>)\s*(?P<level>[^<>=]+)$")
_NAME = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")


def check_phases(loader, species_dims: dict, env, horizon, bound_names=()):
    """(phases, additions) of the problem file ``loader.raw``, checked.

    ``loader`` is the problem loader (its ``fail``, ``quantity``, ``expression`` and
    ``bound``); ``species_dims`` each species' dimensionality as written; ``env`` the
    names an expression may use; ``horizon`` the checked run length (or None);
    ``bound_names`` the names of the problem's own limits.
    """
    raw = loader.raw
    phases = _phases(loader, raw, species_dims, env, horizon, list(bound_names))
    additions = _additions(loader, raw, species_dims, horizon)
    return tuple(phases), tuple(additions)


def _end_of_run(horizon):
    if horizon is None:
        return None
    return horizon.end_time if not horizon.free else horizon.max_end


def _phases(loader, raw, species_dims, env, horizon, bound_names):
    if not raw.phases:
        return []
    fail = loader.fail
    if len(raw.phases) > MAX_PHASES:
        fail(("phases",), f"at most {MAX_PHASES} phases, got {len(raw.phases)}")
        return []
    if len(raw.phases) == 1:
        fail(("phases",), "one phase is the whole run: give two or more, or leave 'phases' out")
    end = _end_of_run(horizon)
    params = {}
    for name, value in raw.parameters.items():
        try:
            q = parse_quantity(value, "any")
            params[name] = (q.dimensionality, bool(written_unit(value, "any")))
        except ValueError:
            pass  # reported with the parameter
    out, seen = [], set()
    last_time = 0.0  # the latest time the previous phases can end at
    for i, ph in enumerate(raw.phases):
        loc = ("phases", i)
        ok = True
        if not _NAME.match(ph.name):
            fail(loc + ("name",), f"phase name {ph.name!r} must start with a letter and hold only letters, "
                                  "digits and '_'")
            ok = False
        elif ph.name in seen:
            fail(loc + ("name",), f"phase name {ph.name!r} is used twice")
            ok = False
        seen.add(ph.name)
        last = i == len(raw.phases) - 1
        if last:
            if ph.until is not None:
                fail(loc + ("until",), "the last phase ends with the run (horizon.end_time): leave 'until' out")
                ok = False
            phase_end = PhaseEnd("run")
        else:
            phase_end = _until(loader, ph.until, loc + ("until",), species_dims, env, end, last_time)
            if phase_end is None:
                ok = False
            elif phase_end.kind == "at":
                last_time = phase_end.time
            elif phase_end.kind == "between":
                last_time = phase_end.upper
        pumps = _pumps(loader, raw, ph.feeds, loc + ("feeds",))
        parameters = {}
        for name, value in ph.parameters.items():
            ploc = loc + ("parameters", name)
            if name not in raw.parameters:
                close = difflib.get_close_matches(name, list(raw.parameters), n=3)
                hint = f"; did you mean {', '.join(map(repr, close))}?" if close else ""
                fail(ploc, f"{name!r} is not a parameter of this problem (a phase changes values the file "
                           f"gives under 'parameters'){hint}")
                ok = False
                continue
            got = loader.quantity(value, "any", ploc)
            if got is None:
                ok = False
                continue
            dims, known = params.get(name, (None, False))
            if known and written_unit(value, "any") and got[2] != dims:
                fail(ploc, f"{value!r} has dimension {describe(got[2])}, but parameter {name!r} is in "
                           f"{describe(dims)}")
                ok = False
                continue
            parameters[name] = got[0]
        rates = {}
        order = {n: j for j, n in enumerate(raw.rates)}
        for name, text in ph.rates.items():
            rloc = loc + ("rates", name)
            if name not in raw.rates and name not in raw.species:
                fail(rloc, f"{name!r} is neither a named rate nor a species of this problem")
                ok = False
                continue
            e = loader.expression(text, rloc, env)
            if e is None:
                ok = False
                continue
            if name in order:
                later = sorted(n for n in e.names if order.get(n, -1) >= order[name])
                if later:
                    fail(rloc, f"uses rate {later[0]!r}, which is not defined above {name!r}; rates are "
                               "evaluated in the order written")
                    ok = False
                    continue
            rates[name] = e
        bounds = []
        names_used = bound_names + [b.name for p in out for b in p.bounds]
        for j, b in enumerate(ph.limits):
            got = loader.bound(b, loc + ("limits", j), False, species_dims, env,
                               names_used + [x.name for x in bounds], prefix=f"{ph.name}: ")
            if got is None:
                ok = False
            else:
                bounds.append(got)
        if ok and pumps is not None:
            out.append(Phase(ph.name, phase_end, pumps, parameters, rates, tuple(bounds), f"phases[{i}]"))
    return out if len(out) == len(raw.phases) else []


def _until(loader, until, loc, species_dims, env, end, after):
    fail = loader.fail
    if until is None:
        fail(loc, "say what ends this phase: a time ('12 h'), {between: [10 h, 18 h]}, or a condition "
                  "('S < 0.5 g/L')")
        return None
    if isinstance(until, BetweenIn):
        if len(until.between) != 2:
            fail(loc + ("between",), "give two times: [earliest, latest]")
            return None
        lo = loader.quantity(until.between[0], "time", loc + ("between", 0))
        hi = loader.quantity(until.between[1], "time", loc + ("between", 1))
        if not (lo and hi):
            return None
        if not lo[0] < hi[0]:
            fail(loc + ("between",), f"the earliest time {until.between[0]!r} must be below the latest "
                                     f"{until.between[1]!r}")
            return None
        guess = 0.5 * (lo[0] + hi[0])
        if until.guess is not None:
            g = loader.quantity(until.guess, "time", loc + ("guess",))
            if not g:
                return None
            if not lo[0] <= g[0] <= hi[0]:
                fail(loc + ("guess",), "the guess lies outside the two times")
                return None
            guess = g[0]
        if not _inside(loader, loc, lo[0], hi[0], end, after):
            return None
        return PhaseEnd("between", lower=lo[0], upper=hi[0], guess=guess,
                        text=f"between {until.between[0]} and {until.between[1]}")
    text = str(until)
    m = _CONDITION.match(text.strip())
    if m is None:
        got = loader.quantity(until, "time", loc)
        if not got:
            return None
        if not _inside(loader, loc, got[0], got[0], end, after):
            return None
        return PhaseEnd("at", time=got[0], text=f"at {text}")
    e = loader.expression(m["expr"], loc, env)
    level = loader.quantity(m["level"].strip(), "any", loc)
    if e is None or level is None:
        return None
    dims = species_dims.get(e.text.strip())
    if dims is not None and written_unit(m["level"].strip(), "any") and level[2] != dims:
        fail(loc, f"the level {m['level'].strip()!r} has dimension {describe(level[2])}, but "
                  f"{e.text.strip()!r} is in {describe(dims)}")
        return None
    if not math.isfinite(level[0]):
        fail(loc, "the level must be a finite number")
        return None
    return PhaseEnd("when", condition=e, level=level[0], falling=m["op"].startswith("<"), text=text.strip(),
                    level_text=m["level"].strip())


def _inside(loader, loc, lo, hi, end, after) -> bool:
    if lo <= after:
        loader.fail(loc, f"must end after the phase before it can end ({after:g} h)" if after > 0 else
                    "must end after the start of the run")
        return False
    if end is not None and hi >= end:
        loader.fail(loc, f"must end before the end of the run ({end:g} h)")
        return False
    return True


def _pumps(loader, raw, feeds, loc):
    """Feed -> (min, max) L/h for the feeds whose range this phase changes; None on a fault."""
    if feeds is None:
        return {}
    if feeds is False or feeds == "off":
        return {name: (0.0, 0.0) for name in raw.feeds}
    if feeds is True:
        loader.fail(loc, "write 'off', or a range per feed ({concentrate: {max: 50 mL/h}})")
        return None
    out, ok = {}, True
    for name, value in feeds.items():
        floc = loc + (name,)
        if name not in raw.feeds:
            loader.fail(floc, f"{name!r} is not a feed of this problem")
            ok = False
            continue
        if value is False or value == "off":
            out[name] = (0.0, 0.0)
            continue
        if value is True:
            loader.fail(floc, "write 'off' or a range {min: ..., max: ...}")
            ok = False
            continue
        own = raw.feeds[name]
        own_lo = loader.quantity(own.min_rate, "flow", ("feeds", name, "min_rate"))
        own_hi = loader.quantity(own.max_rate, "flow", ("feeds", name, "max_rate"))
        if not (own_lo and own_hi):
            ok = False
            continue
        lo, hi = own_lo[0], own_hi[0]
        for side in ("min", "max"):
            v = getattr(value, side)
            if v is None:
                continue
            got = loader.quantity(v, "flow", floc + (side,))
            if not got:
                ok = False
                continue
            if not own_lo[0] <= got[0] <= own_hi[0]:
                loader.fail(floc + (side,), f"{v!r} lies outside the feed's own range ({own.min_rate} to "
                                            f"{own.max_rate})")
                ok = False
                continue
            if side == "min":
                lo = got[0]
            else:
                hi = got[0]
        if lo > hi:
            loader.fail(floc, "min is above max")
            ok = False
            continue
        out[name] = (lo, hi)
    return out if ok else None


def _additions(loader, raw, species_dims, horizon):
    fail = loader.fail
    end = _end_of_run(horizon)
    out = []
    for i, a in enumerate(raw.additions):
        loc = ("additions", i)
        if (a.sample is None) == (a.bolus is None):
            fail(loc, "give 'sample' (a volume taken out) or 'bolus' (a volume added), one of them")
            continue
        kind = "sample" if a.sample is not None else "bolus"
        vol = loader.quantity(getattr(a, kind), "volume", loc + (kind,))
        if not vol:
            continue
        if kind == "sample" and not vol[0] > 0:
            fail(loc + (kind,), "a sample takes out more than nothing: give a volume above zero")
            continue
        if kind == "bolus" and vol[0] < 0:
            fail(loc + (kind,), "a bolus volume cannot be negative")
            continue
        amounts, chosen = {}, {}
        if a.amounts and kind == "sample":
            fail(loc + ("amounts",), "a sample takes out broth as it is: 'amounts' belongs to a bolus")
            continue
        bad = False
        for sname, value in a.amounts.items():
            aloc = loc + ("amounts", sname)
            if sname not in raw.species:
                fail(aloc, f"{sname!r} is not a species")
                bad = True
                continue
            if sname in raw.derivatives or not raw.species[sname].dilute:
                fail(aloc, f"species {sname!r} has its balance written in full (raw derivative or dilute: "
                           "false): a bolus cannot add to it")
                bad = True
                continue
            ranged = isinstance(value, AmountRangeIn)
            sides = [("min", value.min), ("max", value.max)] if ranged else [(None, value)]
            got_sides = {}
            for side, v in sides:
                if v is None:
                    got_sides[side] = 0.0
                    continue
                sloc = aloc + ((side,) if side else ())
                got = loader.quantity(v, "any", sloc)
                if not got:
                    bad = True
                    break
                dims = species_dims.get(sname)
                if dims is not None and written_unit(v, "any"):
                    want = dims * parse_quantity("1 L", "volume").dimensionality
                    if got[2] != want:
                        fail(sloc, f"{v!r} has dimension {describe(got[2])}; an amount of {sname!r} is its "
                                   f"concentration times a volume ({describe(want)})")
                        bad = True
                        break
                if not got[0] >= 0:
                    fail(sloc, "an amount added cannot be negative")
                    bad = True
                    break
                got_sides[side] = got[0]
            if bad:
                continue
            if ranged:
                if not got_sides["min"] <= got_sides["max"]:
                    fail(aloc, "min is above max")
                    bad = True
                    continue
                chosen[sname] = (got_sides["min"], got_sides["max"])
            else:
                amounts[sname] = got_sides[None]
        if bad:
            continue
        if kind == "bolus" and vol[0] == 0 and not any(amounts.values()) and not any(hi for _, hi in chosen.values()):
            fail(loc, "this bolus adds nothing: give a volume above zero or amounts")
            continue
        times = _times(loader, a, loc, end)
        if times is None:
            continue
        if len(out) + len(times) > MAX_ADDITIONS:
            fail(loc, f"more than {MAX_ADDITIONS} additions over the run")
            return []
        out += [Addition(kind, t, vol[0], dict(amounts), f"additions[{i}]", dict(chosen), loader.lines.get(loc))
                for t in times]
    out.sort(key=lambda a: a.time)
    for a, b in zip(out, out[1:]):
        if b.time - a.time < 1e-9:
            fail(("additions",), f"two additions at the same time ({a.time:g} h: {a.key} and {b.key}); "
                                 "write them as one")
            return []
    return out


def _times(loader, a, loc, end):
    """Times (h) of one addition entry, or None after recording a fault."""
    if (a.at is None) == (a.every is None):
        loader.fail(loc, "give 'at' (a time or a list of times) or 'every' (an interval), one of them")
        return None
    if a.at is not None:
        if a.start is not None or a.stop is not None:
            loader.fail(loc, "'start' and 'stop' go with 'every'")
            return None
        items = a.at if isinstance(a.at, list) else [a.at]
        times = []
        for j, value in enumerate(items):
            tloc = loc + ("at", j) if isinstance(a.at, list) else loc + ("at",)
            got = loader.quantity(value, "time", tloc)
            if not got:
                return None
            times.append(got[0])
    else:
        every = loader.quantity(a.every, "time", loc + ("every",))
        if not every:
            return None
        if not every[0] > 0:
            loader.fail(loc + ("every",), "the interval must be above zero")
            return None
        start = loader.quantity(a.start, "time", loc + ("start",)) if a.start is not None else (every[0],)
        stop = loader.quantity(a.stop, "time", loc + ("stop",)) if a.stop is not None else (end,)
        if not (start and stop):
            return None
        if stop[0] is None:
            return None
        n = math.floor((stop[0] - start[0]) / every[0] * (1 + 1e-12)) + 1
        if n > MAX_ADDITIONS:
            loader.fail(loc + ("every",), f"more than {MAX_ADDITIONS} additions over the run")
            return None
        times = [start[0] + k * every[0] for k in range(max(n, 0))]
        if a.stop is None and end is not None:
            times = [t for t in times if t < end - 1e-9]  # not at the very end
    for t in times:
        if not t > 0 or (end is not None and not t < end):
            loader.fail(loc, f"an addition at {t:g} h lies outside the run (after 0 and before "
                             f"{end:g} h)" if end is not None else f"an addition at {t:g} h lies outside the run")
            return None
    return times
