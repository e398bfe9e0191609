"""Problem files -> :class:`Problem`: every check a problem file must pass.

:func:`load_problem` reads the YAML (safely, keeping lines), checks its shape
(:mod:`.schema`), then units, names and expressions, and returns plain data in
internal units. All problems found are reported together in one
:class:`~optfeed.errors.InputError`, each naming the file, line and key.
"""

from __future__ import annotations

import difflib
import keyword
import re
import typing
from pathlib import Path

import pydantic

from .. import expr as ex
from ..dimensions import annotate
from ..errors import InputError, Issue
from ..paths import SAFE_NAME, safe_folder_name
from ..units import describe, parse_quantity, to_internal, written_unit
from . import schema
from .phases import check_phases
from .uncertain import check_uncertainty
from .spec import RESERVED, Bound, Feed, Heat, Horizon, Objective, Oxygen, Problem, Settings, Species, Vessel
from .yamlio import Lines, key_text, read_yaml

_NAME_RE = re.compile(r"^[A-Za-z][A-Za-z0-9_]*$")

# Solver settings that decide a status word, and their sane ranges: past them an answer
# could be called converged or verified when it is not (a verify tolerance of 0.9
# accepts a re-simulated objective 68 % off), or never could be.
SETTING_RANGES = {
    "smoothing": (0.0, 1e6, "a weight relative to the objective"),
    "tolerance": (1e-12, 1e-4, "IPOPT's convergence tolerance"),
    "verify_tolerance": (1e-6, 1e-2, "largest relative difference between the NLP and the re-simulated "
                                     "objective for a verified answer"),
}
_FOLDER_RE = SAFE_NAME




def load_problem(path, set: dict | None = None) -> Problem:
    """Read and check a problem file.

    Parameters
    ----------
    path : str or Path
        A YAML problem file.
    set : dict, optional
        Values to change before checking, by dotted path as in sweep files:
        ``{"parameters.mu_max": "0.5 1/h", "solver.starts": 2}``
        (see :mod:`optfeed.problem.dotted`).

    Returns
    -------
    Problem
        In internal units (see :mod:`optfeed.units`).

    Raises
    ------
    InputError
        For anything wrong with the file; every issue names file, line and key.

    Examples
    --------
    >>> p = load_problem("configs/fast_microbe.yaml")  # doctest: +SKIP
    >>> p.vessel.working_volume                        # doctest: +SKIP
    80.0
    """
    data, lines = read_yaml(path)
    if not set:
        return problem_from_data(data, str(path), lines)
    from .dotted import apply_overrides, note_overrides

    data = apply_overrides(data, set, str(path))
    try:
        return problem_from_data(data, str(path), lines)
    except InputError as exc:
        raise note_overrides(exc, set) from None


def problem_from_data(data, source: str, lines: Lines | None = None) -> Problem:
    """Check plain data (as read from a problem file) and build a Problem."""
    lines = lines or Lines()
    if not isinstance(data, dict):
        raise InputError.one(source, lines.get(()), "", "expected a mapping of keys at the top level")
    try:
        raw = schema.ProblemIn.model_validate(data)
    except pydantic.ValidationError as exc:
        raise InputError(_pydantic_issues(exc.errors(), source, lines)) from None
    return annotate(_Builder(raw, data, source, lines).build(), lines)  # units for people, unit warnings


# ---------------------------------------------------------------- pydantic errors


def _pydantic_issues(errors, source, lines) -> list[Issue]:
    """One issue per error; a misspelt key is reported once (as unknown), not also
    as the required key it was meant to be."""
    misspelt = set()
    for err in errors:
        if err["type"] == "extra_forbidden":
            loc = tuple(err["loc"])
            allowed = _fields_at(schema.ProblemIn, loc[:-1])
            for close in difflib.get_close_matches(str(loc[-1]), allowed, n=1, cutoff=0.5):
                misspelt.add(loc[:-1] + (close,))
    issues = [_pydantic_issue(e, source, lines) for e in errors
              if not (e["type"] == "missing" and tuple(e["loc"]) in misspelt)]
    # a union reports one error per member: where one of them says what is wrong in
    # words (a yes/no value), keep that one alone for its key
    worded = {i.key for e, i in zip(errors, issues) if e["type"] == "value_error"}
    return list(dict.fromkeys(i for e, i in zip(errors, issues) if e["type"] == "value_error" or i.key not in worded))


def _pydantic_issue(err, source, lines) -> Issue:
    loc = tuple(err["loc"])
    kind = err["type"]
    line = lines.get(loc)
    if kind == "extra_forbidden":
        allowed = _fields_at(schema.ProblemIn, loc[:-1])
        msg = f"unknown key {loc[-1]!r}"
        close = difflib.get_close_matches(str(loc[-1]), allowed, n=3, cutoff=0.5)
        if close:
            msg += f"; did you mean {', '.join(repr(c) for c in close)}?"
        elif allowed:
            msg += f"; expected one of: {', '.join(allowed)}"
        return Issue(source, line, key_text(loc[:-1]) or "(top level)", msg)
    if kind == "missing":
        return Issue(source, lines.get(loc[:-1]), key_text(loc), "required key is missing")
    # union types report one error per member; keep the message readable
    loc = tuple(p for p in loc if not (isinstance(p, str) and p[:1].islower() and "[" in p))
    loc = tuple(p for p in loc if p not in ("float", "int", "str", "FreeTimeIn", "function-after"))
    got = err.get("input")
    got_text = repr(got) if not isinstance(got, (dict, list)) else type(got).__name__
    msg = err["msg"]
    if kind.endswith("_type") or kind in ("model_type", "dict_type", "list_type"):
        msg = f"wrong type: {msg.lower()}, got {got_text}"
    elif kind == "literal_error":
        msg = f"{msg}, got {got_text}"
    elif kind == "value_error":
        msg = msg.removeprefix("Value error, ")
    return Issue(source, line, key_text(loc), msg)


def _fields_at(model, loc) -> list[str]:
    """Names of the keys allowed at ``loc`` of the schema, for suggestions."""
    ann = model
    for part in loc:
        ann = _unwrap(ann)
        if isinstance(ann, type) and issubclass(ann, pydantic.BaseModel):
            if part not in ann.model_fields:
                return []
            ann = ann.model_fields[part].annotation
        elif typing.get_origin(ann) in (dict, list):
            ann = typing.get_args(ann)[-1]
        else:
            return []
    ann = _unwrap(ann)
    if isinstance(ann, type) and issubclass(ann, pydantic.BaseModel):
        return list(ann.model_fields)
    return []


def _unwrap(ann):
    if typing.get_origin(ann) is typing.Union:
        models = [a for a in typing.get_args(ann) if isinstance(a, type) and issubclass(a, pydantic.BaseModel)]
        others = [a for a in typing.get_args(ann) if typing.get_origin(a) in (dict, list)]
        return (models or others or [ann])[0]
    return ann


# ---------------------------------------------------------------- semantic checks


class _Builder:
    """Checks one validated file and builds the Problem, collecting every issue."""

    def __init__(self, raw: schema.ProblemIn, data: dict, source: str, lines: Lines):
        self.raw, self.data, self.source, self.lines = raw, data, source, lines
        self.issues: list[Issue] = []

    # -- helpers
    def fail(self, loc, message):
        self.issues.append(Issue(self.source, self.lines.get(loc), key_text(loc), message))

    def quantity(self, value, kind, loc):
        """(internal float, unit text, dimensionality) or None after recording an issue."""
        try:
            q = parse_quantity(value, kind)
        except ValueError as exc:
            self.fail(loc, str(exc))
            return None
        try:
            internal = to_internal(q)
        except ValueError as exc:
            self.fail(loc, str(exc))
            return None
        unit = written_unit(value, kind)
        return internal, unit, q.dimensionality

    def expression(self, text, loc, known):
        try:
            e = ex.parse(text)
        except ex.ExprError as exc:
            self.fail(loc, str(exc))
            return None
        for msg in ex.unknown_names(e, known):
            self.fail(loc, f"{msg} (in {e.text!r})")
        return e

    # -- build
    def build(self) -> Problem:
        r = self.raw
        names = self._names()
        if r.name and not _FOLDER_RE.match(r.name):
            self.fail(("name",), f"name {r.name!r} is used for result folders: letters, digits, '_', '-' and '.', "
                                 "not starting with '.'")
        species_dims = {}
        species_initial = {}
        for name, sp in r.species.items():
            got = self.quantity(sp.initial, "amount", ("species", name, "initial"))
            if got:
                species_initial[name] = got[:2]
                species_dims[name] = got[2]
                if got[0] < 0:
                    self.fail(("species", name, "initial"), f"initial value {sp.initial!r} is negative")

        parameters, parameter_units = {}, {}
        for name, value in r.parameters.items():
            got = self.quantity(value, "any", ("parameters", name))
            if got:
                parameters[name], parameter_units[name] = got[0], got[1]

        feed_names = list(r.feeds)
        base = list(r.species) + list(r.parameters) + feed_names + ["t", "V", "D", "F_total"]
        rates = []
        # one set of every name and each rate's position: checking a rate costs only
        # the names it uses, so thousands of chained rates load in linear time
        order = {n: i for i, n in enumerate(r.rates)}
        all_names = set(base) | set(order)
        for i, (name, text) in enumerate(r.rates.items()):
            e = self.expression(text, ("rates", name), all_names)
            if e is not None:
                for used in sorted(n for n in e.names if order.get(n, -1) > i):
                    self.fail(("rates", name), f"uses rate {used!r}, which is defined below it; "
                                               "rates are evaluated in the order written")
                if name in e.names:
                    self.fail(("rates", name), "a rate cannot use itself")
                rates.append((name, e))
        rate_env = frozenset(all_names)

        vessel = self._vessel(rate_env)
        with_oxygen = rate_env | ({"OUR"} if r.vessel.oxygen else set())
        fed = {f"fed_{n}" for n in r.species if any(n in f.composition for f in r.feeds.values())}
        end_env = with_oxygen | ({"heat_load"} if r.vessel.heat else set()) | fed

        species = self._species(species_initial, rate_env)
        feeds = self._feeds(species_dims)
        bounds = self._bounds(species_dims, end_env)
        horizon = self._horizon()
        objective = self._objective(end_env)
        settings = self._settings(horizon)
        uncertainty = check_uncertainty(r, self.source, self.lines, self.fail, self.issues)
        phases, additions = check_phases(self, species_dims, end_env, horizon, [b.name for b in bounds])
        if uncertainty is not None:
            uncertain = {v.ref for v in uncertainty.values if v.target == "constant"}
            for i, ph in enumerate(r.phases):
                for name in ph.parameters:
                    if name in uncertain:
                        self.fail(("phases", i, "parameters", name),
                                  f"{name!r} is uncertain (the uncertainty section) and this phase sets it to one "
                                  "value, which would drop its spread in the phase; make the phase's value a "
                                  "parameter of its own (e.g. mu_max_induced) and give it a spread too")

        if not self.issues:
            self._dry_build(parameters, species, rates, vessel, bounds, objective)
        if self.issues:
            # in file order (the problem file's first, then a file it names)
            raise InputError(sorted(self.issues, key=lambda i: (i.file != self.source, i.line or 0)))
        return Problem(
            name=safe_folder_name(r.name or Path(self.source).stem),
            description=r.description.strip(),
            source=self.source,
            species=tuple(species),
            parameters=parameters,
            parameter_units=parameter_units,
            rates=tuple(rates),
            feeds=tuple(feeds),
            vessel=vessel,
            bounds=tuple(bounds),
            horizon=horizon,
            objective=objective,
            settings=settings,
            uncertainty=uncertainty,
            phases=phases,
            additions=additions,
            data=self.data,
        )

    def _dry_build(self, parameters, species, rates, vessel, bounds, objective):
        """Compile every expression once with symbols for everything that varies,
        so that a constant part that cannot be computed (a division by a zero
        parameter, say) is reported here, with its key."""
        import casadi as ca

        env = {n: ca.SX.sym(n) for n in [s.name for s in species] + list(self.raw.feeds) +
               ["t", "V", "D", "F_total", "OUR", "heat_load"] +
               [f"fed_{n}" for n in self.raw.species] + [n for n, _ in rates]}
        env.update(parameters)
        items = [(("rates", n), e) for n, e in rates]
        items += [(("derivatives" if s.raw else "reactions", s.name), s.rate) for s in species]
        if vessel is not None and vessel.oxygen is not None:
            items.append((("vessel", "oxygen", "uptake"), vessel.oxygen.uptake))
        items += [(tuple(b.key.replace("[", ".").replace("]", "").split(".")) + ("expression",), b.expression)
                  for b in bounds]
        if objective is not None:
            items += [(("objective", k), getattr(objective, k)) for k in ("expression", "integral")
                      if getattr(objective, k) is not None]
        for loc, e in items:
            loc = tuple(int(p) if isinstance(p, str) and p.isdigit() else p for p in loc)
            try:
                ex.to_casadi(e, env)
            except ex.ExprError as exc:
                self.fail(loc, f"{exc} (in {e.text!r})")

    def _names(self):
        seen = {}
        r = self.raw
        groups = [("species", r.species), ("parameters", r.parameters), ("rates", r.rates), ("feeds", r.feeds)]
        for group, items in groups:
            for name in items:
                loc = (group, name)
                if not _NAME_RE.match(name):
                    self.fail(loc, f"name {name!r} must start with a letter and hold only letters, digits and '_'")
                elif keyword.iskeyword(name):
                    self.fail(loc, f"name {name!r} is a word of the expression language and cannot name a value")
                elif name in RESERVED or name.startswith("fed_"):
                    self.fail(loc, f"name {name!r} is reserved ({', '.join(RESERVED)} and fed_<species>)")
                elif name in ex.FUNCTIONS:
                    self.fail(loc, f"name {name!r} is a function name")
                elif name in seen:
                    self.fail(loc, f"name {name!r} is already used under {seen[name]}")
                seen.setdefault(name, group)
        if not r.species:
            self.fail(("species",), "at least one species is needed")
        if not r.feeds:
            self.fail(("feeds",), "at least one feed is needed")

    def _species(self, initial, env):
        r = self.raw
        out = []
        for where in ("reactions", "derivatives"):
            for name in getattr(r, where):
                if name not in r.species:
                    close = difflib.get_close_matches(name, list(r.species), n=3)
                    hint = f"; did you mean {', '.join(map(repr, close))}?" if close else ""
                    self.fail((where, name), f"{name!r} is not a species{hint}")
        for name, sp in r.species.items():
            in_r, in_d = name in r.reactions, name in r.derivatives
            if in_r and in_d:
                self.fail(("derivatives", name), "a species has either a reaction rate or a derivative, not both")
                continue
            if not in_r and not in_d:
                self.fail(("species", name), "has no rate: add it under 'reactions' (net rate; the tool adds "
                                             "feed and dilution) or 'derivatives' (full right-hand side)")
                continue
            where = "reactions" if in_r else "derivatives"
            e = self.expression(getattr(r, where)[name], (where, name), env)
            if e is None or name not in initial:
                continue
            out.append(Species(
                name=name, initial=initial[name][0], unit=initial[name][1], description=sp.description,
                dilute=sp.dilute and in_r, raw=in_d, rate=e,
            ))
        return out

    def _feeds(self, species_dims):
        r = self.raw
        out = []
        for name, fd in r.feeds.items():
            hi = self.quantity(fd.max_rate, "flow", ("feeds", name, "max_rate"))
            lo = self.quantity(fd.min_rate, "flow", ("feeds", name, "min_rate"))
            comp = {}
            for sname, value in fd.composition.items():
                loc = ("feeds", name, "composition", sname)
                if sname not in r.species:
                    close = difflib.get_close_matches(sname, list(r.species), n=3)
                    hint = f"; did you mean {', '.join(map(repr, close))}?" if close else ""
                    self.fail(loc, f"{sname!r} is not a species{hint}")
                    continue
                if sname in r.derivatives or not r.species[sname].dilute:
                    self.fail(loc, f"species {sname!r} has its balance written in full (raw derivative or "
                                   "dilute: false); write its inflow in that expression instead")
                    continue
                got = self.quantity(value, "amount", loc)
                if got is None:
                    continue
                if sname in species_dims and got[2] != species_dims[sname]:
                    self.fail(loc, f"{value!r} has dimension {describe(got[2])}, but species {sname!r} is in "
                                   f"{describe(species_dims[sname])}")
                    continue
                if got[0] < 0:
                    self.fail(loc, f"feed concentration {value!r} is negative")
                comp[sname] = got[0]
            if hi and lo:
                if hi[0] <= 0:
                    self.fail(("feeds", name, "max_rate"), f"maximum pump rate must be above zero, got {fd.max_rate!r}")
                if lo[0] < 0:
                    self.fail(("feeds", name, "min_rate"), f"minimum pump rate cannot be negative, got {fd.min_rate!r}")
                if lo[0] > hi[0]:
                    self.fail(("feeds", name, "min_rate"),
                              f"minimum pump rate {fd.min_rate!r} is above the maximum {fd.max_rate!r}")
                extra = {}
                for key, word in (("min_on", "minimum setting when on"), ("step", "setting step")):
                    value = getattr(fd, key)
                    if value is None:
                        continue
                    got = self.quantity(value, "flow", ("feeds", name, key))
                    if not got:
                        continue
                    if not 0 < got[0] <= hi[0]:
                        self.fail(("feeds", name, key), f"the pump's {word} must be above zero and at most its "
                                                        f"maximum {fd.max_rate!r}, got {value!r}")
                        continue
                    extra[key] = got[0]
                out.append(Feed(name, comp, lo[0], hi[0], hi[1], fd.description, **extra))
        return out

    def _vessel(self, env):
        v = self.raw.vessel
        v0 = self.quantity(v.initial_volume, "volume", ("vessel", "initial_volume"))
        vw = self.quantity(v.working_volume, "volume", ("vessel", "working_volume"))
        if v0 and v0[0] <= 0:
            self.fail(("vessel", "initial_volume"), f"initial volume must be above zero, got {v.initial_volume!r}")
        if vw and vw[0] <= 0:
            self.fail(("vessel", "working_volume"), f"working volume must be above zero, got {v.working_volume!r}")
        if v0 and vw and 0 < vw[0] < v0[0]:
            self.fail(("vessel", "initial_volume"),
                      f"initial volume {v.initial_volume!r} is above the working volume {v.working_volume!r}")
        oxygen = heat = None
        if v.oxygen is not None:
            e = self.expression(v.oxygen.uptake, ("vessel", "oxygen", "uptake"), env)
            otr = self.quantity(v.oxygen.transfer_max, "oxygen_rate", ("vessel", "oxygen", "transfer_max"))
            if otr and otr[0] <= 0:
                self.fail(("vessel", "oxygen", "transfer_max"), "OTR ceiling must be above zero")
            if e is not None and otr:
                oxygen = Oxygen(e, otr[0], otr[1])
        if v.heat is not None:
            qmax = self.quantity(v.heat.removal_max, "power", ("vessel", "heat", "removal_max"))
            y = self.quantity(v.heat.yield_per_oxygen, "heat_yield", ("vessel", "heat", "yield_per_oxygen"))
            if v.oxygen is None:
                self.fail(("vessel", "heat"), "the heat load is computed from oxygen uptake: add vessel.oxygen")
            if qmax and qmax[0] <= 0:
                self.fail(("vessel", "heat", "removal_max"), "heat-removal ceiling must be above zero")
            if y and y[0] <= 0:
                self.fail(("vessel", "heat", "yield_per_oxygen"), "heat yield must be above zero")
            if qmax and y:
                heat = Heat(qmax[0], y[0], qmax[1])
        if v0 and vw:
            margin = 0.0
            if v.margin is not None:
                got = self.quantity(v.margin, "fraction", ("vessel", "margin"))
                if got:
                    margin = got[0]
                    if not 0 <= margin < 0.5:
                        self.fail(("vessel", "margin"), f"must be at least 0 % and below 50 %, got {v.margin!r}")
            return Vessel(v0[0], vw[0], vw[1], oxygen, heat, margin)
        return None

    def _bounds(self, species_dims, env):
        out = []
        for group, at_end in (("limits", False), ("end", True)):
            for i, b in enumerate(getattr(self.raw, group)):
                got = self.bound(b, (group, i), at_end, species_dims, env, [x.name for x in out])
                if got is not None:
                    out.append(got)
        return out

    def bound(self, b, loc, at_end, species_dims, env, taken, prefix=""):
        """One checked :class:`Bound` from a limit entry ``b`` (schema.BoundIn) at ``loc``,
        or None after recording its issues. ``taken``: limit names already used;
        ``prefix`` goes before a default name."""
        e = self.expression(b.expression, loc + ("expression",), env)
        if b.min is None and b.max is None:
            self.fail(loc, "give 'min', 'max' or both")
            return None
        lo = hi = None
        unit = ""
        dims = species_dims.get(e.text.strip()) if e is not None else None
        for side in ("min", "max"):
            value = getattr(b, side)
            if value is None:
                continue
            got = self.quantity(value, "any", loc + (side,))
            if got is None:
                continue
            if dims is not None and got[2] != dims and written_unit(value, "any"):
                self.fail(loc + (side,), f"{value!r} has dimension {got[2]}, but {e.text.strip()!r} "
                                         f"is in {dims}")
            if side == "min":
                lo = got[0]
            else:
                hi = got[0]
            unit = unit or got[1]
        if lo is not None and hi is not None and lo > hi:
            self.fail(loc, f"min {b.min!r} is above max {b.max!r}")
        if e is None:
            return None
        name = b.name or (prefix + f"{'end ' if at_end else ''}{e.text.strip()}")
        taken = list(taken) + ["working volume", "OTR ceiling", "heat removal"] + \
            [f"pump {f}" for f in self.raw.feeds]
        if name in taken:
            self.fail(loc + ("name",), f"limit name {name!r} is already used; give each limit its own name")
            return None
        return Bound(name, e, lo, hi, unit, at_end, key_text(loc))

    def _horizon(self):
        h = self.raw.horizon.end_time
        loc = ("horizon", "end_time")
        if isinstance(h, schema.FreeTimeIn):
            lo = self.quantity(h.min, "time", loc + ("min",))
            hi = self.quantity(h.max, "time", loc + ("max",))
            guess = self.quantity(h.guess, "time", loc + ("guess",)) if h.guess is not None else None
            if lo and hi:
                if lo[0] <= 0:
                    self.fail(loc + ("min",), "the shortest end time must be above zero")
                if lo[0] > hi[0]:
                    self.fail(loc, f"min {h.min!r} is above max {h.max!r}")
                g = guess[0] if guess else 0.5 * (lo[0] + hi[0])
                if not lo[0] <= g <= hi[0]:
                    self.fail(loc + ("guess",), "the guess lies outside min..max")
                return Horizon(None, lo[0], hi[0], g)
            return None
        got = self.quantity(h, "time", loc)
        if got:
            if got[0] <= 0:
                self.fail(loc, f"end time must be above zero, got {h!r}")
            return Horizon(got[0])
        return None

    def _objective(self, env):
        o = self.raw.objective
        if o is None:
            return None
        loc = ("objective",)
        if (o.maximize is None) == (o.minimize is None):
            self.fail(loc, "give exactly one of 'maximize' or 'minimize'")
            return None
        sense = "maximize" if o.maximize else "minimize"
        quantity = o.maximize or o.minimize
        species = self.raw.species
        for key, needed in (("product", ("titer", "product_mass", "productivity", "yield")),
                            ("substrate", ("yield",))):
            value = getattr(o, key)
            if quantity in needed and value is None:
                self.fail(loc + (key,), f"'{quantity}' needs the {key} species named here")
            if value is not None and value not in species:
                close = difflib.get_close_matches(value, list(species), n=3)
                hint = f"; did you mean {', '.join(map(repr, close))}?" if close else ""
                self.fail(loc + (key,), f"{value!r} is not a species{hint}")
        if quantity == "yield" and o.substrate in species and not any(
                o.substrate in f.composition for f in self.raw.feeds.values()):
            self.fail(loc + ("substrate",), f"no feed carries {o.substrate!r}, so its yield is undefined")
        e = None
        if quantity == "expression":
            if o.expression is None:
                self.fail(loc + ("expression",), "'expression' objective needs an expression here")
            else:
                e = self.expression(o.expression, loc + ("expression",), env)
        elif o.expression is not None:
            self.fail(loc + ("expression",), f"an expression is only used with '{sense}: expression'")
        integral = self.expression(o.integral, loc + ("integral",), env) if o.integral is not None else None
        turn = self.quantity(o.turnaround, "time", loc + ("turnaround",))
        if turn and turn[0] < 0:
            self.fail(loc + ("turnaround",), "turnaround time cannot be negative")
        return Objective(sense, quantity, o.product, o.substrate, e, integral, turn[0] if turn else 0.0)

    def _settings(self, horizon):
        s = self.raw.solver
        loc = ("solver",)
        if s.pump_interval is not None and s.pump_steps is not None:
            self.fail(loc, "give pump_interval or pump_steps, not both")
        steps = s.pump_steps if s.pump_steps is not None else Settings().pump_steps
        if s.pump_interval is not None:
            got = self.quantity(s.pump_interval, "time", loc + ("pump_interval",))
            if got and horizon is not None:
                length = horizon.end_time if not horizon.free else horizon.guess
                if got[0] <= 0:
                    self.fail(loc + ("pump_interval",), "pump interval must be above zero")
                elif not length / got[0] <= 5000:  # also infinite for a tiny interval
                    self.fail(loc + ("pump_interval",), f"a pump interval of {got[0]:g} h gives more than 5000 "
                                                        f"pump steps over the run ({length:g} h)")
                else:
                    steps = max(1, round(length / got[0]))
                    if abs(steps * got[0] - length) > 1e-6 * length:
                        self.fail(loc + ("pump_interval",), f"the run ({length:g} h) is not a whole number of "
                                                            f"pump intervals of {got[0]:g} h")
        checks = [
            ("pump_steps", steps, 1, 5000), ("elements_per_step", s.elements_per_step, 1, 50),
            ("degree", s.degree, 1, 9), ("starts", s.starts, 1, 64), ("max_iter", s.max_iter, 1, 10**6),
        ]
        for key, value, lo, hi in checks:
            if not lo <= value <= hi:
                self.fail(loc + (key,), f"must be between {lo} and {hi}, got {value}")
        for key, (lo, hi, what) in SETTING_RANGES.items():
            value = getattr(s, key)
            if not lo <= value <= hi:  # also refuses NaN
                self.fail(loc + (key,), f"must be between {lo:g} and {hi:g} ({what}; default "
                                        f"{getattr(Settings(), key):g}), got {value:g}")
        if steps * s.elements_per_step > 20000:
            self.fail(loc, "more than 20000 finite elements")
        if not 0 <= s.grid_tolerance <= 0.1:
            self.fail(loc + ("grid_tolerance",), f"must be between 0 and 0.1 (a relative change), got {s.grid_tolerance}")
        if not steps <= s.max_pump_steps <= 5000:
            self.fail(loc + ("max_pump_steps",), f"must be between pump_steps ({steps}) and 5000, got {s.max_pump_steps}")
        limit = None
        if s.time_limit is not None:
            got = self.quantity(s.time_limit, "time", loc + ("time_limit",))
            if got:
                limit = got[0] * 3600.0
                if not 0 < limit <= 30 * 86400:
                    self.fail(loc + ("time_limit",), f"must be above zero and at most 30 days, got {s.time_limit!r}")
        refine = s.refine_grid if s.refine_grid is not None else (s.pump_steps is None and s.pump_interval is None)
        return Settings(steps, s.elements_per_step, s.degree, s.starts, float(s.smoothing), s.max_iter,
                        float(s.tolerance), float(s.verify_tolerance), bool(refine), float(s.grid_tolerance),
                        int(s.max_pump_steps), limit)
