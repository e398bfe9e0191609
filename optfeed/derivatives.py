"""Exact first and second derivatives of the calibration NLP, assembled from those of
its small pieces.

The calibration NLP is a sum of pieces that each see a few of its variables: every
finite element's collocation equations see the element's states, the end state of
the element before it and the estimated parameters; every measured value sees one
block's end state and the parameters. Handing the whole NLP to CasADi's automatic
differentiation (expanded to one scalar graph) costs time that grows faster than
the NLP (measured: 4.5 s of 8 s CPU for 8 runs of 14 samples), and it is paid
again for every design. Here each kind of piece is differentiated once, as a small
function of its own variables, mapped over all pieces of its kind, and the results
are summed into the NLP's sparse gradient, Jacobian and Hessian of the Lagrangian
by a constant sparse matrix. The values are the same derivatives (tested against
CasADi's on the whole NLP in tests/test_fit.py); only the way to them differs.

A piece kind is (function, variable indices, inputs): ``function`` maps
(z, *inputs) to its outputs, z the piece's variables; ``variable indices``
(n_z x count) says which NLP variable each z entry is, -1 for an entry that is not
a variable of the NLP (its derivatives are dropped).

What is not worth writing as pieces (a few rows at the end of a run, an objective
that combines scenarios) comes as a remainder: an expression of the NLP's variables
that CasADi differentiates on its own graph. It must stay small and never reach
the pieces' mapped calls, or its derivatives cost what the pieces save.

Used by the calibration NLP (:mod:`optfeed.fit.transcription`) and by the
optimizer's (:mod:`optfeed.transcription`).
"""

from __future__ import annotations

from dataclasses import dataclass

import casadi as ca
import numpy as np


@dataclass
class Kind:
    """Pieces of one kind: ``count`` calls of ``function(z, *inputs)``.

    function : casadi.Function (z, *inputs) -> (value (n_out), ...), SX inside
    index : (n_z, count) int array, the NLP variable of each z entry (-1: none)
    inputs : list of casadi MX/DM (rows x count), the other inputs per piece
    rows : (n_out, count) int array or None, where each output lands in g
    """

    function: ca.Function
    index: np.ndarray
    inputs: list
    rows: np.ndarray | None = None


def summing_matrix(n_rows: int, n_cols: int, rows, cols):
    """(sparsity, S): the sparsity of the (n_rows x n_cols) matrix whose entries
    are given as triplets (rows[k], cols[k]) (repeats are summed, a -1 is left out),
    and the constant matrix S that turns the triplets' values into its nonzeros."""
    rows, cols = np.asarray(rows, dtype=np.int64), np.asarray(cols, dtype=np.int64)
    keep = np.flatnonzero((rows >= 0) & (cols >= 0))
    key = cols[keep] * n_rows + rows[keep]
    uniq, where = np.unique(key, return_inverse=True)
    r, c = uniq % n_rows, uniq // n_rows
    colind = np.concatenate([[0], np.cumsum(np.bincount(c, minlength=n_cols))])
    sp = ca.Sparsity(n_rows, n_cols, colind.tolist(), r.tolist())
    S = ca.DM(ca.Sparsity.triplet(len(uniq), len(rows), where.tolist(), keep.tolist()), 1.0)
    return sp, S


def gather(w: ca.MX, index: np.ndarray) -> ca.MX:
    """The NLP variables ``w[index]`` as an (n_z x count) matrix (entry 0 where the
    index is -1; its derivatives are left out)."""
    flat = np.where(index >= 0, index, 0).ravel(order="F")
    return ca.reshape(w[flat.tolist()], index.shape[0], index.shape[1])


def mapped(fn: ca.Function, count: int, *args) -> list:
    """The outputs of ``fn.map(count)(*args)`` as a list (each argument has one
    column per piece)."""
    out = fn.map(count)(*args)
    return list(out) if isinstance(out, (list, tuple)) else [out]


def _nonzeros(expr: ca.SX):
    """(nonzero values as a column, their (rows, cols))."""
    sp = expr.sparsity()
    r, c = sp.get_triplet()
    return ca.vertcat(*expr.nonzeros()) if expr.nnz() else ca.SX(0, 1), np.array(r, int), np.array(c, int)


class Assembled:
    """Objective terms and constraint pieces, with the NLP's derivative Functions.

    Parameters
    ----------
    w, p : casadi.MX
        The NLP's variable and parameter vectors (the Functions' inputs).
    n_g : int
    objective : list of Kind
        Each piece's single output is a term of the objective.
    constraints : list of Kind
        Each piece's outputs are rows of g (``rows`` says which).
    rest_f : casadi.MX, optional
        A remainder of the objective (an expression of w and p).
    rest_g, rest_rows : casadi.MX (n x 1) and int array (n,), optional
        The rows of g that no piece gives, and where they land in g.
    """

    def __init__(self, w: ca.MX, p: ca.MX, n_g: int, objective: list, constraints: list,
                 rest_f: ca.MX | None = None, rest_g: ca.MX | None = None, rest_rows=None):
        n_w = w.shape[0]
        lam_f = ca.MX.sym("lam_f")
        lam_g = ca.MX.sym("lam_g", n_g)
        # a mapped call computes all its outputs: the values alone (what the line
        # search asks for) come from their own calls
        f_terms, f_terms_d, grad_vals, grad_rows = [], [], [], []
        g_vals, g_vals_d, g_rows, jac_vals, jac_r, jac_c = [], [], [], [], [], []
        hess_vals, hess_r, hess_c = [], [], []
        for kind in objective:
            z = ca.SX.sym("z", kind.function.size1_in(0))
            args = [ca.SX.sym(f"a{i}", kind.function.sparsity_in(i + 1)) for i in range(len(kind.inputs))]
            term = kind.function(z, *args)
            grad = ca.gradient(term, z)
            hz, _ = ca.hessian(term, z)
            hv, hr, hc = _nonzeros(ca.triu(hz))
            count = kind.index.shape[1]
            zs = gather(w, kind.index)
            t, = mapped(ca.Function("term", [z, *args], [term]), count, zs, *kind.inputs)
            t_d, gv = mapped(ca.Function("term_grad", [z, *args], [term, grad]), count, zs, *kind.inputs)
            hvv, = mapped(ca.Function("term_hess", [z, *args], [hv]), count, zs, *kind.inputs)
            f_terms.append(ca.sum2(t))
            f_terms_d.append(ca.sum2(t_d))
            grad_vals.append(ca.vec(gv))
            grad_rows.append(kind.index.ravel(order="F"))
            hess_vals.append(lam_f * ca.vec(hvv))
            hess_r.append(kind.index[hr, :].ravel(order="F"))
            hess_c.append(kind.index[hc, :].ravel(order="F"))
        for kind in constraints:
            z = ca.SX.sym("z", kind.function.size1_in(0))
            args = [ca.SX.sym(f"a{i}", kind.function.sparsity_in(i + 1)) for i in range(len(kind.inputs))]
            out = kind.function(z, *args)
            n_out = out.shape[0]
            lam = ca.SX.sym("lam", n_out)
            jv, jr, jc = _nonzeros(ca.jacobian(out, z))
            hz, _ = ca.hessian(ca.dot(lam, out), z)
            hv, hr, hc = _nonzeros(ca.triu(hz))
            count = kind.index.shape[1]
            zs = gather(w, kind.index)
            lam_k = ca.reshape(lam_g[kind.rows.ravel(order="F").tolist()], n_out, count)
            o, = mapped(ca.Function("piece", [z, *args], [out]), count, zs, *kind.inputs)
            o_d, jvv = mapped(ca.Function("piece_jac", [z, *args], [out, jv]), count, zs, *kind.inputs)
            hvv, = mapped(ca.Function("piece_hess", [z, lam, *args], [hv]), count, zs, lam_k, *kind.inputs)
            g_vals.append(ca.vec(o))
            g_vals_d.append(ca.vec(o_d))
            g_rows.append(kind.rows.ravel(order="F"))
            jac_vals.append(ca.vec(jvv))
            jac_r.append(kind.rows[jr, :].ravel(order="F"))
            jac_c.append(kind.index[jc, :].ravel(order="F"))
            hess_vals.append(ca.vec(hvv))
            hess_r.append(kind.index[hr, :].ravel(order="F"))
            hess_c.append(kind.index[hc, :].ravel(order="F"))
        if rest_f is not None:
            f_terms.append(rest_f)
            f_terms_d.append(rest_f)
        f = sum(f_terms[1:], f_terms[0]) if f_terms else ca.MX(0)
        f_d = sum(f_terms_d[1:], f_terms_d[0]) if f_terms_d else ca.MX(0)
        # gradient: a column of the n_w x 1 matrix; rows are variables
        rows = np.concatenate(grad_rows) if grad_rows else np.zeros(0, dtype=np.int64)
        sp_g, S_g = summing_matrix(n_w, 1, rows, np.zeros_like(rows))
        grad = ca.densify(ca.MX(sp_g, ca.mtimes(S_g, ca.vertcat(*grad_vals)))) if grad_rows else ca.MX.zeros(n_w)
        rest_rows = np.zeros(0, dtype=np.int64) if rest_g is None else np.asarray(rest_rows, dtype=np.int64)
        g_rows_all = np.concatenate(g_rows + [rest_rows])
        order = np.argsort(g_rows_all, kind="stable")
        assert np.array_equal(g_rows_all[order], np.arange(n_g)), "every row of g exactly once"
        rest = [] if rest_g is None else [rest_g]
        g, g_d = ca.vertcat(*g_vals, *rest)[order.tolist()], ca.vertcat(*g_vals_d, *rest)[order.tolist()]
        sp_j, S_j = summing_matrix(n_g, n_w, np.concatenate(jac_r), np.concatenate(jac_c))
        jac = ca.MX(sp_j, ca.mtimes(S_j, ca.vertcat(*jac_vals)))
        hr, hc = np.concatenate(hess_r), np.concatenate(hess_c)
        upper_r, upper_c = np.minimum(hr, hc), np.maximum(hr, hc)  # the upper triangle, as IPOPT reads it
        upper_r[(hr < 0) | (hc < 0)] = -1
        sp_h, S_h = summing_matrix(n_w, n_w, upper_r, upper_c)
        hess = ca.MX(sp_h, ca.mtimes(S_h, ca.vertcat(*hess_vals)))
        # the remainder: CasADi's derivatives on its own (small) graph
        lagrangian = ca.MX(0)
        if rest_f is not None:
            grad = grad + ca.gradient(rest_f, w)
            lagrangian = lam_f * rest_f
        if rest_g is not None and rest_rows.size:
            place = ca.DM(ca.Sparsity.triplet(n_g, len(rest_rows), rest_rows.tolist(),
                                              list(range(len(rest_rows)))), 1.0)
            jac = jac + ca.mtimes(place, ca.jacobian(rest_g, w))
            lagrangian = lagrangian + ca.dot(lam_g[rest_rows.tolist()], rest_g)
        if rest_f is not None or rest_rows.size:
            hess = hess + ca.triu(ca.hessian(lagrangian, w)[0])
        self.f, self.g = f, g
        self.functions = {
            "grad_f": ca.Function("nlp_grad_f", [w, p], [f_d, grad], ["x", "p"], ["f", "grad_f_x"]),
            "jac_g": ca.Function("nlp_jac_g", [w, p], [g_d, jac], ["x", "p"], ["g", "jac_g_x"]),
            "hess_lag": ca.Function("nlp_hess_l", [w, p, lam_f, lam_g], [hess],
                                    ["x", "p", "lam_f", "lam_g"], ["triu_hess_gamma_x_x"]),
        }
