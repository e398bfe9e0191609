"""A light dimension inference over a problem's expressions.

Expressions are text without units; the names in them carry units (species from
their initial values, parameters from their values, ``t``, ``V``, feed rates,
``OUR``, ``heat_load``...). Walking each expression tree with those dimensions gives

* the dimension (and a unit for people) of every named rate and of every limit's
  expression, so that tables and reports show a real unit instead of "internal";
* warnings where an expression adds things that cannot be added: a bare number
  added to a quantity whose internal unit is not the one the user wrote
  (``heat_load + 3000`` adds 3000 g*dm^2/h^3, about 6e-13 W, not 3 kW), or two
  quantities of different dimensions (``S + mu``); and balances whose rate does not
  have the species' dimension per time.

A bare number inside a product or quotient (``20 * mu * X``) often carries a unit
the user had in mind, so such a product is left undetermined rather than guessed;
parameters written without a unit are undetermined too. Nothing here changes a
computed value: it only names units and warns.
"""

from __future__ import annotations

import ast
import dataclasses
import re
from dataclasses import dataclass
from functools import lru_cache

from .errors import Issue
from .units import UREG, describe, factor_to, internal_units

_DIMLESS = UREG.Quantity(1, "").dimensionality


def dims_of(unit: str):
    """Dimensionality of a unit text ('' is dimensionless)."""
    return UREG.Quantity(1, unit or "").dimensionality


_TIME = dims_of("h")
_VOLUME = dims_of("L")

# dimensions whose internal unit is not built from g, L, h and mmol: a word for people
_NAMED = [("W", dims_of("W")), ("kJ", dims_of("kJ")), ("kJ/mol", dims_of("kJ/mol")), ("m", dims_of("m")),
          ("m^2", dims_of("m^2")), ("Pa", dims_of("Pa"))]
_BASE_TEXT = {"[mass]": "g", "[time]": "h", "[substance]": "mmol", "[temperature]": "K"}


def unit_for(dims) -> str:
    """A unit for people for a dimensionality, in which internal values read as they are
    where possible: 'g/L', 'g/L/h', 'mmol/L/h', '1/h', 'dimensionless'; 'W' for a power."""
    if dims == _DIMLESS:
        return "dimensionless"
    for text, d in _NAMED:
        if d == dims:
            return text
    powers = dict(dims)
    length = powers.pop("[length]", 0)
    if length % 3 == 0 and all(k in _BASE_TEXT for k in powers):
        if length:
            powers["L"] = length // 3
        up = [(_BASE_TEXT.get(k, k), p) for k, p in powers.items() if p > 0]
        down = [(_BASE_TEXT.get(k, k), -p) for k, p in powers.items() if p < 0]
        order = {"g": 0, "mmol": 1, "K": 2, "L": 3, "h": 4}
        up.sort(key=lambda x: order.get(x[0], 9))
        down.sort(key=lambda x: order.get(x[0], 9))

        def part(name, p):
            return name if p == 1 else f"{name}^{p:g}"

        text = "*".join(part(n, p) for n, p in up) or "1"
        return text + "".join("/" + part(n, p) for n, p in down)
    return f"{internal_units(dims):~C}".replace("**", "^")


def _natural(dims, hint: str | None) -> bool:
    """True if a bare number added to a quantity of ``dims`` (written in ``hint``) means
    what its writer expects: the internal unit is the unit they wrote (or, with no
    unit written, a unit built from g, L, h and mmol)."""
    if hint:
        try:
            return abs(factor_to(hint) - 1.0) < 1e-12
        except Exception:  # noqa: BLE001 - an unusual unit text: do not warn on it
            return True
    return "[length]" not in dict(dims) or dict(dims)["[length]"] % 3 == 0


@lru_cache(maxsize=512)
def _source_lines(text: str) -> tuple:
    """The lines (UTF-8, ends kept) of an expression's text as the parser reads it,
    split where the parser splits them (ast.get_source_segment splits the whole
    text again for every node it is asked about)."""
    parts = _LINE_END.split(text.strip().replace("^", "**"))
    return tuple((line + end).encode() for line, end in zip(parts[0::2], parts[1::2] + [""]))


_LINE_END = re.compile(r"(\r\n|\r|\n)")


def _segment(text: str, node) -> str:
    """The source text of ``node`` (as ast.get_source_segment gives it; "" where
    the node has no position)."""
    first, last = getattr(node, "lineno", None), getattr(node, "end_lineno", None)
    start, end = getattr(node, "col_offset", None), getattr(node, "end_col_offset", None)
    if None in (first, last, start, end):
        return ""
    lines = _source_lines(text)
    first, last = first - 1, last - 1
    if first == last:
        return lines[first][start:end].decode()
    return (lines[first][start:] + b"".join(lines[first + 1:last]) + lines[last][:end]).decode()


@dataclass(frozen=True)
class Term:
    """What the inference knows about a (sub)expression.

    dims : pint dimensionality, or None when undetermined;
    bare : made of numbers only (its value is ``value``);
    hint : the unit the user wrote for it, for a name;
    text : the expression text, for messages;
    weak : derived from a unit the user did not write (a species with a bare initial
        value takes g/L by default): good enough to name a unit, not to warn.
    """

    dims: object
    bare: bool = False
    value: float | None = None
    hint: str | None = None
    text: str = ""
    weak: bool = False


class Inference:
    """Dimensions of every name of one problem, and the warnings found on the way.

    A named rate gets its dimension from its own expression, or, where that is
    undetermined or rests on default units, from where it is used: a balance
    ``X: g1 * X`` needs ``g1`` in 1/h.

    Parameters
    ----------
    problem : Problem
    lines : Lines, optional
        For the line numbers of warnings.
    """

    def __init__(self, problem, lines=None):
        self.problem = problem
        self.lines = lines
        self.warnings: list[Issue] = []
        self._loc = ()
        self._quiet = True
        p = problem
        data_species = (p.data or {}).get("species") or {}
        env = {
            "t": Term(_TIME, hint="h", text="t"),
            "V": Term(_VOLUME, hint=p.vessel.unit if p.vessel else "L", text="V"),
            "F_total": Term(dims_of("L/h"), hint="L/h", text="F_total"),
            "D": Term(dims_of("1/h"), hint="1/h", text="D"),
        }
        for s in p.species:
            initial = (data_species.get(s.name) or {}).get("initial") if isinstance(data_species, dict) else None
            bare = isinstance(initial, (int, float)) and not isinstance(initial, bool)
            env[s.name] = Term(dims_of(s.unit), hint=s.unit, text=s.name, weak=bare)
        for name in p.parameters:
            unit = p.parameter_units.get(name, "")
            env[name] = Term(dims_of(unit) if unit else None, hint=unit or None, text=name)
        for f in p.feeds:
            env[f.name] = Term(dims_of("L/h"), hint="L/h", text=f.name)
        if p.vessel is not None and p.vessel.oxygen is not None:
            env["OUR"] = Term(dims_of("mmol/L/h"), hint="mmol/L/h", text="OUR")
        if p.vessel is not None and p.vessel.heat is not None:
            env["heat_load"] = Term(dims_of("W"), hint="W", text="heat_load")
        for s in p.species:
            env[f"fed_{s.name}"] = Term(env[s.name].dims * _VOLUME, text=f"fed_{s.name}", weak=env[s.name].weak)
        self.env = env
        self.used = {}  # rate name -> dimensionality needed where it is used
        self.rates = {}
        for _ in range(len(p.rates) + 2):  # until what is learnt from uses settles
            before = dict(self.used)
            self._pass()
            if self.used == before:
                break
        self._quiet = False
        self._pass()

    def _pass(self) -> None:
        p, env = self.problem, self.env
        self.warnings = []
        for name, e in p.rates:
            t = self.infer(e, ("rates", name))
            if name in self.used and (t.dims is None or t.weak):
                t = Term(self.used[name], text=name, weak=True)
            self.rates[name] = t.dims
            env[name] = Term(t.dims, text=name, weak=t.weak)
        if p.vessel is not None and p.vessel.oxygen is not None:
            self._expect(p.vessel.oxygen.uptake, dims_of("mmol/L/h"), False, ("vessel", "oxygen", "uptake"),
                         "the oxygen uptake rate OUR")
        for s in p.species:
            where = "derivatives" if s.raw else "reactions"
            self._expect(s.rate, env[s.name].dims / _TIME, env[s.name].weak, (where, s.name),
                         f"the rate of {s.name} ({s.unit} per h)")
        self.bounds = {}
        for b in p.bounds:
            loc = _key_loc(b.key) + ("expression",)
            t = self.infer(b.expression, loc)
            if b.unit and not t.bare:
                self._expect(b.expression, dims_of(b.unit), False, loc, f"{b.name!r} (bounded in {b.unit})")
            self.bounds[b.name] = t.dims

    # -- results
    def unit_of_rate(self, name: str) -> str | None:
        """Unit for people of a named rate, or None if undetermined."""
        d = self.rates.get(name)
        return None if d is None else unit_for(d)

    # -- walking
    def infer(self, expr, loc) -> Term:
        self._loc = loc
        return self._walk(expr._tree, expr.text)

    def _expect(self, expr, dims, weak, loc, what) -> None:
        """``expr`` must have ``dims``: learn the dimension of rates from it, and warn
        where it cannot hold."""
        t = self.infer(expr, loc)
        self._solve(expr._tree, expr.text, dims)
        if t.dims is not None and not t.bare and not t.weak and not weak and t.dims != dims:
            self._warn(f"{what} should have dimension {describe(dims)}, but {expr.text!r} has "
                       f"{describe(t.dims)}")

    def _solve(self, node, text, dims) -> None:
        """Learn the dimension of an undetermined (or default-based) rate in ``node``
        that ``node`` having ``dims`` requires."""
        quiet, self._quiet = self._quiet, True
        try:
            if isinstance(node, ast.Name):
                name = node.id
                if any(name == n for n, _ in self.problem.rates):
                    t = self.env.get(name)
                    if t is None or t.dims is None or t.weak:
                        self.used.setdefault(name, dims)
            elif isinstance(node, ast.UnaryOp):
                self._solve(node.operand, text, dims)
            elif isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Add, ast.Sub)):
                self._solve(node.left, text, dims)
                self._solve(node.right, text, dims)
            elif isinstance(node, ast.BinOp) and isinstance(node.op, (ast.Mult, ast.Div)):
                a, b = self._walk(node.left, text), self._walk(node.right, text)
                mult = isinstance(node.op, ast.Mult)
                if b.dims is not None and not b.bare:
                    self._solve(node.left, text, dims / b.dims if mult else dims * b.dims)
                if a.dims is not None and not a.bare:
                    self._solve(node.right, text, dims / a.dims if mult else a.dims / dims)
        finally:
            self._quiet = quiet

    def _warn(self, message) -> None:
        if self._quiet:
            return
        loc = self._loc
        line = self.lines.get(loc) if self.lines is not None else None
        from .problem.yamlio import key_text

        issue = Issue(self.problem.source, line, key_text(loc), message)
        if issue not in self.warnings:
            self.warnings.append(issue)

    def _walk(self, node, text) -> Term:
        seg = _segment(text, node)
        if isinstance(node, ast.Constant):
            return Term(_DIMLESS, bare=True, value=float(node.value), text=seg)
        if isinstance(node, ast.Name):
            t = self.env.get(node.id, Term(None, text=node.id))
            return dataclasses.replace(t, text=node.id)
        if isinstance(node, ast.UnaryOp):
            t = self._walk(node.operand, text)
            value = None if t.value is None else (-t.value if isinstance(node.op, ast.USub) else t.value)
            return dataclasses.replace(t, value=value, text=seg)
        if isinstance(node, ast.BinOp):
            a, b = self._walk(node.left, text), self._walk(node.right, text)
            if isinstance(node.op, (ast.Add, ast.Sub)):
                return self._add(a, b, seg)
            if isinstance(node.op, ast.Mult):
                return self._mul(a, b, 1, seg)
            if isinstance(node.op, ast.Div):
                return self._mul(a, b, -1, seg)
            if isinstance(node.op, ast.Pow):
                return self._pow(a, b, seg)
        if isinstance(node, ast.Call):
            args = [self._walk(a, text) for a in node.args]
            return self._call(node.func.id, args, seg)
        return Term(None, text=seg)

    def _add(self, a: Term, b: Term, text: str) -> Term:
        if a.bare and b.bare:
            return _constant(a, b, lambda x, y: x + y, text)
        if a.bare or b.bare:
            num, other = (a, b) if a.bare else (b, a)
            if other.dims is None:
                return Term(None, text=text)
            if other.dims != _DIMLESS and not other.weak and not _natural(other.dims, other.hint) and num.value != 0:
                unit = other.hint or unit_for(other.dims)
                internal = f"{internal_units(other.dims):~C}".replace("**", "^")
                meant = num.value * factor_to(unit)
                self._warn(f"the bare number {num.text} is added to {other.text!r} ({unit}): a number "
                           f"inside an expression is read in internal units, so this adds {num.text} "
                           f"{internal} = {meant:.3g} {unit}; give the value its unit as a parameter "
                           f"(e.g. parameters: {{extra: {num.text} {unit}}}) and use its name")
            return Term(other.dims, hint=other.hint, text=text, weak=other.weak)
        if a.dims is None or b.dims is None:
            known = a if a.dims is not None else b
            return Term(known.dims, hint=known.hint, text=text, weak=True)
        if a.dims != b.dims:
            if not (a.weak or b.weak):
                self._warn(f"{a.text!r} ({describe(a.dims)}) and {b.text!r} ({describe(b.dims)}) are added, "
                           "but their dimensions differ")
            return Term(None, text=text)
        hint = a.hint if a.hint == b.hint else None
        return Term(a.dims, hint=hint, text=text, weak=a.weak or b.weak)

    def _mul(self, a: Term, b: Term, power: int, text: str) -> Term:
        if a.bare and b.bare:
            return _constant(a, b, (lambda x, y: x * y) if power == 1 else (lambda x, y: x / y), text)
        if a.bare or b.bare or a.dims is None or b.dims is None:
            return Term(None, text=text)  # a bare factor may carry a unit in the writer's mind
        return Term(a.dims * b.dims if power == 1 else a.dims / b.dims, text=text, weak=a.weak or b.weak)

    def _pow(self, a: Term, b: Term, text: str) -> Term:
        if a.bare and b.bare:
            return _constant(a, b, lambda x, y: x ** y, text)
        if a.dims == _DIMLESS and not a.bare:
            return Term(_DIMLESS, text=text, weak=a.weak)
        if a.dims is not None and b.bare and b.value is not None:
            return Term(a.dims ** b.value, text=text, weak=a.weak)
        return Term(None, text=text)

    def _call(self, name, args, text) -> Term:
        one = Term(_DIMLESS, bare=True, value=1.0, text="1")
        if name in ("exp", "log", "log10", "tanh"):
            a = args[0]
            if a.dims is not None and not a.bare and not a.weak and a.dims != _DIMLESS:
                self._warn(f"{name}() of {a.text!r}, which has dimension {describe(a.dims)}; "
                           "its argument should be dimensionless")
            return Term(_DIMLESS, bare=a.bare, text=text)
        if name == "sqrt":
            return self._pow(args[0], Term(_DIMLESS, bare=True, value=0.5, text="0.5"), text)
        if name == "abs":
            return dataclasses.replace(args[0], text=text, value=None)
        if name in ("min", "max"):
            return self._add(*args, text)
        # the rate laws, written with the same operations as in kinetics.py
        add, mul = self._add, self._mul
        if name == "monod":
            S, mu_max, K_s = args
            return mul(mu_max, mul(S, add(K_s, S, text), -1, text), 1, text)
        if name in ("andrews", "haldane"):
            S, mu_max, K_s, K_i = args
            S2 = mul(S, S, 1, text)
            return mul(mu_max, mul(S, add(add(K_s, S, text), mul(S2, K_i, -1, text), text), -1, text), 1, text)
        if name == "contois":
            S, X, mu_max, K_sx = args
            return mul(mu_max, mul(S, add(mul(K_sx, X, 1, text), S, text), -1, text), 1, text)
        if name == "pirt":
            mu, Y, m = args
            return add(mul(mu, Y, -1, text), m, text)
        if name == "luedeking_piret":
            mu, alpha, beta = args
            return add(mul(alpha, mu, 1, text), beta, text)
        if name == "levenspiel":
            P, P_max, _n = args
            add(one, mul(P, P_max, -1, text), text)
            return Term(_DIMLESS, text=text)
        if name == "excess":
            q, q_crit = args
            return add(q, q_crit, text)
        return Term(None, text=text)


def _constant(a: Term, b: Term, op, text: str) -> Term:
    """A term made of numbers only, with its value where it can be computed."""
    try:
        value = float(op(a.value, b.value))
    except (TypeError, ArithmeticError, ValueError):
        value = None
    return Term(_DIMLESS, bare=True, value=value, text=text)


def _key_loc(key: str) -> tuple:
    """'limits[0]' -> ('limits', 0)."""
    out = []
    for part in key.replace("]", "").split("."):
        if "[" in part:
            name, index = part.split("[")
            out += [name, int(index)]
        else:
            out.append(part)
    return tuple(out)


def annotate(problem, lines=None):
    """``problem`` with its unit warnings, and with units for people where the file
    left them out:

    * a limit written with bare numbers gets the unit of its expression (its values
      are internal, so they read correctly in that unit);
    * a species with a bare initial value that the feed does not dilute
      (``dilute: false``) is not given the concentration default g/L: it is
      dimensionless (its value is unchanged; write its unit if it has one).
    """
    species = []
    for s in problem.species:
        raw = ((problem.data.get("species") or {}).get(s.name) or {}).get("initial") if problem.data else None
        if not s.dilute and not s.raw and isinstance(raw, (int, float)) and not isinstance(raw, bool):
            s = dataclasses.replace(s, unit="dimensionless")
        species.append(s)
    problem = dataclasses.replace(problem, species=tuple(species))
    inf = Inference(problem, lines)
    bounds = []
    for b in problem.bounds:
        dims = inf.bounds.get(b.name)
        if not b.unit and dims is not None:
            b = dataclasses.replace(b, unit=_species_unit(problem, b) or unit_for(dims))
        bounds.append(b)
    return dataclasses.replace(problem, bounds=tuple(bounds), warnings=tuple(inf.warnings))


def _species_unit(problem, bound) -> str | None:
    name = bound.expression.text.strip()
    return next((s.unit for s in problem.species if s.name == name), None)
