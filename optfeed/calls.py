"""Calling a CasADi Function on numpy arrays without converting them.

A plain call (``f(x0=..., p=...)``) turns every numpy input into a CasADi matrix and
every output back, element by element in Python: for the few thousand numbers of a
batch of runs or of a limit evaluated at every sample, that costs several times the
evaluation itself (8000 numbers in: about 1 ms against 0.15 ms of evaluation).
:func:`call` hands the arrays to the Function's buffer as they lie in memory instead.

Layout: CasADi stores a matrix column by column, so a C-ordered numpy array of shape
(n, k) is the (k, n) matrix with one column per row of the array: a run's samples
(n points, nx states) go in as the (nx, n) matrix a Function mapped over the points
expects, with no transposing.
"""

from __future__ import annotations

import casadi as ca
import numpy as np


# CVODES' counts of one integrator call (they start again at every call)
COUNTS = ("nsteps", "nfevals", "nlinsetups", "netfails", "nniters", "nncfails")


def call(f: ca.Function, inputs: dict, outputs, stats: dict | None = None) -> list[np.ndarray]:
    """Evaluate ``f`` with ``inputs`` (input name -> array; inputs not named are
    zero) and return the named ``outputs`` as flat arrays in CasADi's column-major
    order (reshape them as needed). Every input and output used must be dense.
    ``stats``: a dict to which an integrator's counts of this evaluation are added
    (:data:`COUNTS`: steps, right-hand-side evaluations, Jacobian set-ups, ...; its
    other statistics are running totals over the Function's life, or orders).

    Raises RuntimeError where the Function fails (as a plain call does), ValueError
    where an input has the wrong number of values."""
    buffer, run = f.buffer()
    keep = []  # the arrays must outlive run()
    for name, value in inputs.items():
        a = np.ascontiguousarray(value, dtype=float).reshape(-1)
        j, size = _slot(f, name, True)
        if a.size != size:
            raise ValueError(f"input {name!r} of {f.name()}: {a.size} values where a dense "
                             f"{f.size1_in(j)}x{f.size2_in(j)} is expected")
        if a.size:
            buffer.set_arg(j, memoryview(a))
            keep.append(a)
    out = []
    for name in outputs:
        j, size = _slot(f, name, False)
        res = np.empty(size)
        if res.size:
            buffer.set_res(j, memoryview(res))
        out.append(res)
    run()
    if stats is not None:
        own = buffer.stats()
        for key in COUNTS:
            if key in own:
                stats[key] = stats.get(key, 0) + int(own[key])
    return out


def _slot(f: ca.Function, name: str, is_input: bool) -> tuple[int, int]:
    """(index, number of values) of an input or output of ``f`` named ``name``,
    checked dense once per Function object (ValueError where it is not); kept on the
    object itself, so it lives and dies with it."""
    slots = getattr(f, "_optfeed_slots", None)
    if slots is None:
        slots = f._optfeed_slots = {}
    found = slots.get((name, is_input))
    if found is None:
        if is_input:
            j = f.index_in(name)
            dense, size = f.sparsity_in(j).is_dense(), f.nnz_in(j)
            if not dense:
                raise ValueError(f"input {name!r} of {f.name()} is not dense")
        else:
            j = f.index_out(name)
            dense, size = f.sparsity_out(j).is_dense(), f.nnz_out(j)
            if not dense:
                raise ValueError(f"output {name!r} of {f.name()} is not dense")
        found = slots[(name, is_input)] = (j, size)
    return found
