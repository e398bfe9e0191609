"""Expressions from problem files: a whitelist parser into CasADi, never eval.

Accepted: numbers, names, ``+ - * / **`` (``^`` is read as power), unary minus,
parentheses, and calls of the functions in :data:`FUNCTIONS` and the rate laws of
:mod:`optfeed.kinetics`. Everything else (attribute access, subscripts, names
starting with ``_``, lambdas, comparisons, keyword arguments, strings, ...) is
rejected with a message saying what was found.

Python's own parser (``ast.parse``) turns text into a syntax tree without running
anything; this module walks that tree and accepts only the node types listed here.
"""

from __future__ import annotations

import ast
import difflib
import math
import unicodedata
from dataclasses import dataclass, field

import casadi as ca

from .kinetics import RATE_LAWS

MAX_LENGTH = 4000
MAX_DEPTH = 60

# name -> (function, argument names)
FUNCTIONS = {
    "exp": (ca.exp, ("x",)),
    "log": (ca.log, ("x",)),
    "log10": (ca.log10, ("x",)),
    "sqrt": (ca.sqrt, ("x",)),
    "abs": (ca.fabs, ("x",)),
    "tanh": (ca.tanh, ("x",)),
    "min": (ca.fmin, ("a", "b")),
    "max": (ca.fmax, ("a", "b")),
    **RATE_LAWS,
}

_BINOPS = {
    ast.Add: lambda a, b: a + b,
    ast.Sub: lambda a, b: a - b,
    ast.Mult: lambda a, b: a * b,
    ast.Div: lambda a, b: a / b,
    ast.Pow: lambda a, b: a**b,
}

_WHAT = {
    ast.Attribute: "attribute access ('.')",
    ast.Subscript: "subscripts ('[...]')",
    ast.Lambda: "lambda",
    ast.Compare: "comparisons (use min/max)",
    ast.BoolOp: "'and'/'or'",
    ast.IfExp: "'if ... else'",
    ast.List: "lists",
    ast.Tuple: "tuples",
    ast.Dict: "dicts",
    ast.Set: "sets",
    ast.ListComp: "comprehensions",
    ast.GeneratorExp: "comprehensions",
    ast.DictComp: "comprehensions",
    ast.SetComp: "comprehensions",
    ast.JoinedStr: "strings",
    ast.NamedExpr: "':='",
    ast.Starred: "'*' arguments",
    ast.Await: "'await'",
}


class ExprError(ValueError):
    """An expression that cannot be accepted; the message is for the user."""


@dataclass(frozen=True)
class Expr:
    """A checked expression.

    Attributes
    ----------
    text : str
        The expression as written.
    names : frozenset of str
        Variable names it uses (not function names).
    """

    text: str
    names: frozenset = field(repr=False, compare=False)  # follows from the text
    _tree: ast.AST = field(repr=False, compare=False)

    def __reduce__(self):
        return (parse, (self.text,))


def parse(text) -> Expr:
    """Check ``text`` and return an :class:`Expr`; raise ExprError otherwise."""
    if isinstance(text, bool):
        raise ExprError(f"expected an expression, got {text!r}")
    if isinstance(text, (int, float)):
        text = repr(float(text))
    if not isinstance(text, str):
        raise ExprError(f"expected an expression (text), got {type(text).__name__}")
    if not text.strip():
        raise ExprError("expression is empty")
    if len(text) > MAX_LENGTH:
        raise ExprError(f"expression is longer than {MAX_LENGTH} characters")
    # Python folds look-alike letters (fullwidth, ligatures, ...) into ASCII names, so
    # 'ｍｕ' would quietly mean 'mu': names are plain ASCII, and so is the rest
    odd = next((i for i, ch in enumerate(text) if ord(ch) > 127), None)
    if odd is not None:
        ch = text[odd]
        raise ExprError(f"character {ch!r} ({unicodedata.name(ch, f'U+{ord(ch):04X}')}) at position {odd + 1}: "
                        "expressions use plain ASCII letters, digits and operators")
    try:
        # '^' is power here; Python would read it as xor with a lower precedence
        tree = ast.parse(text.strip().replace("^", "**"), mode="eval")
    except SyntaxError as exc:
        raise ExprError(f"not a valid expression ({exc.msg}): {text!r}") from None
    except (RecursionError, MemoryError, ValueError):
        raise ExprError("expression is nested too deeply or cannot be read") from None
    names: set[str] = set()
    _check(tree.body, names, 0)
    return Expr(text, frozenset(names), tree.body)


def _check(node, names, depth):
    if depth > MAX_DEPTH:
        raise ExprError(f"expression is nested more than {MAX_DEPTH} levels deep")
    if isinstance(node, ast.Constant):
        if isinstance(node.value, bool) or not isinstance(node.value, (int, float)):
            raise ExprError(f"only numbers are allowed as constants, found {node.value!r}")
        if isinstance(node.value, int) and abs(node.value) > 10**15:
            raise ExprError(f"number {node.value} is too large")
        return
    if isinstance(node, ast.Name):
        _check_name(node.id)
        names.add(node.id)
        return
    if isinstance(node, ast.BinOp):
        if type(node.op) not in _BINOPS:
            raise ExprError(f"operator {type(node.op).__name__} is not allowed (use + - * / **)")
        _check(node.left, names, depth + 1)
        _check(node.right, names, depth + 1)
        return
    if isinstance(node, ast.UnaryOp):
        if not isinstance(node.op, (ast.USub, ast.UAdd)):
            raise ExprError(f"operator {type(node.op).__name__} is not allowed")
        _check(node.operand, names, depth + 1)
        return
    if isinstance(node, ast.Call):
        if not isinstance(node.func, ast.Name):
            raise ExprError("only named functions can be called (no attribute access or calls of calls)")
        fname = node.func.id
        _check_name(fname)
        if fname not in FUNCTIONS:
            raise ExprError(f"unknown function {fname!r}" + _suggest(fname, FUNCTIONS))
        if node.keywords:
            raise ExprError(f"{fname}(): keyword arguments are not allowed")
        expected = FUNCTIONS[fname][1]
        if len(node.args) != len(expected):
            raise ExprError(
                f"{fname}() takes {len(expected)} argument(s) ({', '.join(expected)}), "
                f"got {len(node.args)}"
            )
        for arg in node.args:
            _check(arg, names, depth + 1)
        return
    what = _WHAT.get(type(node), type(node).__name__)
    raise ExprError(f"{what} not allowed in expressions")


def _check_name(name):
    if name.startswith("_"):
        raise ExprError(f"names starting with '_' are not allowed: {name!r}")


def _suggest(name, known) -> str:
    close = difflib.get_close_matches(name, sorted(known), n=3, cutoff=0.6)
    return f"; did you mean {', '.join(repr(c) for c in close)}?" if close else ""


def unknown_names(expr: Expr, known) -> list[str]:
    """Messages for every name in ``expr`` that is not in ``known``."""
    known = known if isinstance(known, (set, frozenset)) else set(known)
    out = []
    for name in sorted(expr.names - known):
        if name in FUNCTIONS:
            out.append(f"{name!r} is a function; call it as {name}(...)")
        else:
            out.append(f"unknown name {name!r}" + _suggest(name, known))
    return out


def to_casadi(expr: Expr, env: dict):
    """Build the CasADi expression of ``expr`` with names looked up in ``env``."""
    return _build(expr._tree, env)


def _build(node, env):
    if isinstance(node, ast.Constant):
        value = float(node.value)
        return value
    if isinstance(node, ast.Name):
        return env[node.id]
    if isinstance(node, ast.BinOp):
        left, right = _build(node.left, env), _build(node.right, env)
        if isinstance(node.op, ast.Div) and isinstance(right, float) and right == 0.0:
            raise ExprError("division by a constant zero")
        if isinstance(left, float) and isinstance(right, float):
            try:
                value = _BINOPS[type(node.op)](left, right)
            except (OverflowError, ZeroDivisionError):
                raise ExprError("a constant part of the expression overflows or divides by zero") from None
            if isinstance(value, complex) or not math.isfinite(value):
                raise ExprError("a constant part of the expression is not a finite number")
            return value
        return _BINOPS[type(node.op)](left, right)
    if isinstance(node, ast.UnaryOp):
        value = _build(node.operand, env)
        return -value if isinstance(node.op, ast.USub) else value
    if isinstance(node, ast.Call):
        name = node.func.id
        func = FUNCTIONS[name][0]
        args = [_build(a, env) for a in node.args]
        if all(isinstance(a, float) for a in args):  # a constant: compute it now, and check it
            try:
                value = float(ca.DM(func(*args)))
            except (ZeroDivisionError, OverflowError, ValueError, RuntimeError):
                raise ExprError(f"{name}() of constant arguments cannot be computed") from None
            if not math.isfinite(value):
                raise ExprError(f"{name}() of constant arguments is not a finite number")
            return value
        return func(*args)
    raise ExprError(f"unexpected {type(node).__name__}")  # unreachable after parse()
