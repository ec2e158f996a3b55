"""The NLP's exact derivatives, assembled segment by segment (one job).

:class:`AssembledDerivatives` is a base of :class:`optimizer.transcription.Transcription`: the
integration enters the constraints only through the segment ends ``W`` (the defects are ``+W``),
so the constraint Jacobian is ``dg/dx|W + dg/dW dW/dx`` and the Lagrangian's Hessian is that of the
W-free part plus, per segment, the Hessian of its defect multipliers times ``W``.  Each segment's
7 x 8 Jacobian and 8 x 8 Hessian are SX functions mapped over a coast (in threads) instead of
CasADi's colouring of the whole MX graph.  It reads the transcription's layout and functions
(``_x``, ``_g_w``, ``f``, ``_shots``, ``v``, ``steps``, ``segments``, ``threads``, ``p``/``p_value``,
``_segments`` (its function cache), ``segment_function``, ``fix_parameters``).

May import numpy and CasADi only.
"""

from __future__ import annotations

import casadi as ca
import numpy as np

#: How segments are evaluated: CasADi map over threads (the transcription's thread count).
MAP_MODE = "thread"


class AssembledDerivatives:
    """``derivative_functions`` and its pieces, for :class:`~optimizer.transcription.Transcription`."""

    def _segment_derivatives(self, steps: int, parametric: bool = False):
        """Mapped SX functions of one coast's segments: (ends, Jacobians 7 x 8) and the upper
        triangle of the Hessian of ``mu' segment(z, h)`` over ``(z, h)``."""
        key = ("derivatives", steps, parametric)
        if key not in self._segments:
            seg = self.segment_function(steps, parametric)
            z, h, mu = ca.SX.sym("z", 7), ca.SX.sym("h"), ca.SX.sym("mu", 7)
            par = ca.SX.sym("p", self.p_value.size)
            zh = ca.vertcat(z, h)
            end = seg(z, h, par)
            jac = ca.Function(f"segment{steps}_jac", [z, h, par], [end, ca.jacobian(end, zh)])
            hess = ca.Function(f"segment{steps}_hess", [z, h, mu, par],
                               [ca.triu(ca.hessian(ca.dot(mu, end), zh)[0])])
            self._segments[key] = (jac.map(self.segments, MAP_MODE, self.threads),
                                   hess.map(self.segments, MAP_MODE, self.threads))
        return self._segments[key]

    def _x_index(self, k: int, a: int, seg: int) -> int:
        """Variable index of input ``a`` (0-6 node state, 7 the step) of segment ``seg`` of phase ``k``."""
        if a == 7:
            return self.v.index[f"S{k}"].start
        return self.v.index[f"z{k}"].start + 7 * seg + a

    @staticmethod
    def _part(expr):
        """An MX matrix as a part for :meth:`_assemble`: its nonzeros where they stand, weight 1."""
        rows, cols = expr.sparsity().get_triplet()
        vals = expr.nz[:] if expr.nnz() else ca.MX(0, 1)
        return vals, rows, cols, np.ones(len(rows))

    @staticmethod
    def _assemble(shape, parts, triu=False):
        """Sparse sum of MX nonzero vectors.  ``parts``: (values (MX column), rows, cols, weights),
        one entry of rows/cols/weights per value.  Returns an MX of ``shape`` whose nonzeros are
        the sums over equal (row, col); with ``triu`` pairs below the diagonal are mirrored."""
        rows = np.concatenate([np.asarray(r, dtype=np.int64) for _, r, _, _ in parts])
        cols = np.concatenate([np.asarray(c, dtype=np.int64) for _, _, c, _ in parts])
        if triu:
            rows, cols = np.minimum(rows, cols), np.maximum(rows, cols)
        keys = cols * shape[0] + rows  # column-major order of the nonzeros
        uniq, where = np.unique(keys, return_inverse=True)
        sp_rows, sp_cols = (uniq % shape[0]).astype(int), (uniq // shape[0]).astype(int)
        colind = np.searchsorted(sp_cols, np.arange(shape[1] + 1)).astype(int)
        sparsity = ca.Sparsity(shape[0], shape[1], colind.tolist(), sp_rows.tolist())
        total, start = 0, 0
        for vals, r, _, wts in parts:
            m = len(r)
            pick = ca.DM(ca.Sparsity.triplet(len(uniq), m, where[start:start + m].tolist(), list(range(m))),
                         np.asarray(wts, dtype=float))
            total = total + ca.mtimes(pick, vals)
            start += m
        return ca.sparsity_cast(total, sparsity)

    def derivative_functions(self, hessian: bool = True, parametric: bool = False) -> dict:
        """``jac_g`` and (when ``hessian``) ``hess_lag`` for CasADi's nlpsol, exact, assembled per
        segment: the integration enters the constraints only through the defects, linearly in the
        segment ends W; so dg/dx = dg/dx|W + dg/dW dW/dx and the Lagrangian's Hessian is that of
        the W-free part plus, per segment, the Hessian of (its defect multipliers)' W.  Each
        segment's 7 x 8 Jacobian and 8 x 8 Hessian are SX functions mapped over the coast (in
        threads), instead of CasADi's colouring of the whole MX graph.

        With ``parametric`` the functions' input ``p`` is the parameter vector (``self.p``, for a
        library shared across epochs); otherwise ``p`` is empty and this problem's values are
        written in (what nlpsol takes with ``self.nlp``)."""
        key = ("nlp derivatives", hessian, parametric)
        if key in self._segments:
            return self._segments[key]
        x, g_w, n = self._x, self._g_w, self.segments
        ws = [w for *_, w in self._shots]
        nx, ng = x.numel(), g_w.numel()
        jparts = [self._part(ca.jacobian(g_w, x))]
        ends, hparts = [], []
        lam_f, lam_g = ca.MX.sym("lam_f"), ca.MX.sym("lam_g", ng)
        for k, nodes, slen, _ in self._shots:
            jac_map, hess_map = self._segment_derivatives(self.steps[k], parametric)
            hs = ca.repmat(slen / n, 1, n)
            end, jmat = jac_map(nodes[:, :-1], hs, self.p)
            ends.append(end)
            # W enters only its coast's defects, as +W (``_add_phases``): entry (i, s) of W is
            # constraint row start + 7 s + i
            rows_w = self.v.gindex[f"defects{k}"]
            # Jacobian: entry (i, a) of segment s sits at column 8 s + a of the 7 x 8n map output
            i, a, sidx = np.meshgrid(np.arange(7), np.arange(8), np.arange(n), indexing="ij")
            i, a, sidx = (q.transpose(2, 1, 0).ravel() for q in (i, a, sidx))  # column-major of jmat
            rows = rows_w.start + 7 * sidx + i
            cols = np.array([self._x_index(k, aa, ss) for aa, ss in zip(a, sidx)])
            jparts.append((ca.vec(jmat), rows, cols, np.where(a == 7, 1.0 / n, 1.0)))
            if hessian:
                mu = ca.reshape(lam_g[rows_w], 7, n)
                hmat = hess_map(nodes[:, :-1], hs, mu, self.p)
                hr, hc = hmat.sparsity().get_triplet()
                hr, hc = np.asarray(hr), np.asarray(hc)
                ss, hb = hc // 8, hc % 8
                rows = [self._x_index(k, aa, s_) for aa, s_ in zip(hr, ss)]
                cols = [self._x_index(k, bb, s_) for bb, s_ in zip(hb, ss)]
                wts = (1.0 / n) ** ((hr == 7).astype(int) + (hb == 7).astype(int))
                hparts.append((hmat.nz[:], rows, cols, wts))
        g = ca.substitute([g_w], ws, ends)[0]
        jac = self._assemble((ng, nx), jparts)
        p = self.p if parametric else ca.MX.sym("p", 0, 1)
        fix = (lambda *exprs: list(exprs)) if parametric else self.fix_parameters  # a list of outputs

        out = {"jac_g": ca.Function("nlp_jac_g", [x, p], fix(g, jac), ["x", "p"], ["g", "jac_g_x"])}
        if hessian:
            lag = lam_f * self.f + ca.dot(lam_g, g_w)
            hess = self._assemble((nx, nx), [self._part(ca.triu(ca.hessian(lag, x)[0]))] + hparts, triu=True)
            out["hess_lag"] = ca.Function("nlp_hess_l", [x, p, lam_f, lam_g], fix(hess),
                                          ["x", "p", "lam_f", "lam_g"], ["triu_hess_gamma_x_x"])
        self._segments[key] = out
        return out
