"""Exact gradient of the profiled log-likelihood of :func:`monitor.core.consolidation.kalman.kalman_filter`.

Rule: forward-mode differentiation (tangent propagation) of the steady-gain /
Woodbury filter along P parameter directions at once, every step vectorised
over the directions; no finite differences.  By the envelope theorem the
profiled effects (offset, warm-up, drift) are held at their GLS values and the
scale at RSS / N, so only the combined data column v = [1, coef] is
differentiated.  The steady covariance's tangent solves a 2x2 Stein equation;
the powers M^t, F^t go through their Cayley-Hamilton coefficients; the shared
steady responses are linear recursions driven by the tangents; the data's
steady filter is differentiated through its coefficients,
d(h) = (d num x - d den h) / den, so the lagged signals x / den and h / den
(two or three passes over the data, whatever P is) carry every direction; the
session chains' tangents are block-bidiagonal solves
(:func:`monitor.core.consolidation.kalman.chain_solve`).  The design H, the observation
variance R and the initial mean are held fixed.  Checked against scipy's
numerical derivatives (tests/core/test_consolidation_gradient.py).
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from monitor.core.consolidation.kalman import (
    FilterOutput,
    Layout,
    Padded,
    Profiled,
    StateSpace,
    chain_solve,
    one_core_matmul,
    session_sums,
    steady_response,
)


@dataclass(frozen=True)
class Tangents:
    """Derivatives of the model's matrices along P directions (see module docstring)."""

    transition: np.ndarray  # (P, 2, 2) dF
    input_gain: np.ndarray  # (P, 2) dB
    state_cov: np.ndarray  # (P, 2, 2) dQ
    init_cov: np.ndarray  # (P, 2, 2) d(initial covariance)
    breaks: np.ndarray  # (P, S, 2, 2) d(break transitions); the first session's is ignored


# Internally every batch of 2x2 matrices is laid out components first, (2, 2, ...), and every
# batch of 2-vectors (2, ...): numpy is slow on long stacks of tiny trailing axes.
def _mm(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.einsum("ab...,bc...->ac...", a, b)


def _mt(a: np.ndarray, b: np.ndarray) -> np.ndarray:
    return np.einsum("ab...,cb...->ac...", a, b)


def _mv(a: np.ndarray, v: np.ndarray) -> np.ndarray:
    return np.einsum("ab...,b...->a...", a, v)


def _congruence(a: np.ndarray, x: np.ndarray) -> np.ndarray:
    return np.einsum("ab...,bc...,dc...->ad...", a, x, a)


def _first(x: np.ndarray) -> np.ndarray:
    """(..., 2, 2) -> (2, 2, ...) (or (N, 2) -> (2, N))."""
    axes = (1, 0) if x.ndim == 2 else (x.ndim - 2, x.ndim - 1, *range(x.ndim - 2))
    return np.ascontiguousarray(x.transpose(axes))


def _trace_det(mat: np.ndarray, dmat: np.ndarray) -> tuple[float, float, np.ndarray, np.ndarray]:
    """Trace and determinant of a 2x2 matrix and their tangents along each direction (dmat (2, 2, P))."""
    det = mat[0, 0] * mat[1, 1] - mat[0, 1] * mat[1, 0]
    d_det = dmat[0, 0] * mat[1, 1] + mat[0, 0] * dmat[1, 1] - dmat[0, 1] * mat[1, 0] - mat[0, 1] * dmat[1, 0]
    return mat[0, 0] + mat[1, 1], det, dmat[0, 0] + dmat[1, 1], d_det


@dataclass(frozen=True)
class _PowerTangent:
    """d(mat^t) for t = 0..count-1 along P directions, kept as Cayley-Hamilton coefficients.

    mat^t = alpha_t I + beta_t mat with beta_(t+1) = tr beta_t - det beta_(t-1) (beta_0 = 0,
    beta_1 = 1) and alpha_t = -det beta_(t-1); so d(mat^t) = d_alpha_t I + d_beta_t mat + beta_t dmat,
    and beta's tangents along tr and det are beta filtered by z / (1 - tr z + det z^2) and by -z^2 / (...).
    """

    mat: np.ndarray
    dmat: np.ndarray  # (2, 2, P)
    beta: np.ndarray  # (count,)
    d_alpha: np.ndarray  # (P, count)
    d_beta: np.ndarray  # (P, count)

    @classmethod
    def of(cls, mat: np.ndarray, dmat: np.ndarray, count: int) -> "_PowerTangent":
        from scipy.signal import lfilter

        tr, det, d_tr, d_det = _trace_det(mat, dmat)
        den = np.array([1.0, -tr, det])
        # beta = z den / den^2, d beta / d tr = z^2 / den^2, d beta / d det = -z^3 / den^2 (impulse responses)
        pulses = np.zeros((3, max(count, 4)))
        pulses[0, 1:4], pulses[1, 2], pulses[2, 3] = den, 1.0, -1.0
        beta, by_tr, by_det = lfilter([1.0], np.convolve(den, den), pulses, axis=-1)[:, :count]
        d_beta = np.outer(d_tr, by_tr) + np.outer(d_det, by_det)
        d_alpha = np.zeros_like(d_beta)
        d_alpha[:, 1:] = -np.outer(d_det, beta[:-1]) - det * d_beta[:, :-1]
        return cls(mat, dmat, beta, d_alpha, d_beta)

    def _combine(self, vec: np.ndarray, mat_vec: np.ndarray, dmat_vec: np.ndarray) -> np.ndarray:
        return (self.d_alpha * vec[:, None, None] + self.d_beta * mat_vec[:, None, None]
                + self.beta * dmat_vec[:, :, None])

    def rows(self, vec: np.ndarray) -> np.ndarray:
        """vec' d(mat^t): (2, P, count)."""
        return self._combine(vec, vec @ self.mat, np.einsum("a,abp->bp", vec, self.dmat))

    def cols(self, vec: np.ndarray) -> np.ndarray:
        """d(mat^t) vec: (2, P, count)."""
        return self._combine(vec, self.mat @ vec, np.einsum("abp,b->ap", self.dmat, vec))

    def at(self, t: np.ndarray) -> np.ndarray:
        """d(mat^t) at the given powers: (2, 2, P, len(t))."""
        out = self.d_beta[:, t] * self.mat[:, :, None, None] + self.beta[t] * self.dmat[..., None]
        out[0, 0] += self.d_alpha[:, t]
        out[1, 1] += self.d_alpha[:, t]
        return out


def _filter_coef_tangent(h: np.ndarray, m: np.ndarray, dm: np.ndarray, vec: np.ndarray,
                         dvec: np.ndarray) -> np.ndarray:
    """d of the numerator [0, h.vec, h.adj0.vec] of the steady filter (lags 1, 2): (P, 2)."""
    adj0 = np.array([[-m[1, 1], m[0, 1]], [m[1, 0], -m[0, 0]]])
    dadj0 = np.array([[-dm[1, 1], dm[0, 1]], [dm[1, 0], -dm[0, 0]]])
    return np.stack([h @ dvec, h @ (np.einsum("abp,b->ap", dadj0, vec) + adj0 @ dvec)], -1)


def innovation_tangent_sums(lagged: np.ndarray, weight: np.ndarray, a: np.ndarray, basis: np.ndarray,
                            dbasis: np.ndarray, s: float) -> tuple[np.ndarray, np.ndarray]:
    """Per session, the tangents of sum a^2 / s and of sum a basis / s at a fixed s, where the innovations'
    tangent is da = -sum_j weight[p, j] lagged[j] (``lagged`` (J, G, T) already zero past each session's
    end, ``a`` (G, T), ``basis`` (T, B), ``dbasis`` (B, P, T)): (P, G) and (B, P, G)."""
    n_rows, t_len = a.shape
    n_basis, n_dir = dbasis.shape[:2]
    d_square = -2.0 * (weight @ np.einsum("jst,st->js", lagged, a)) / s
    lagged_basis = one_core_matmul(lagged.reshape(-1, t_len), basis).reshape(len(lagged), n_rows, n_basis)
    a_dbasis = one_core_matmul(a, dbasis.reshape(n_basis * n_dir, t_len).T).reshape(n_rows, n_basis, n_dir)
    d_basis = (np.transpose(a_dbasis, (1, 2, 0)) - np.einsum("pj,jsi->ips", weight, lagged_basis)) / s
    return d_square, d_basis


def profile_gradient(
    model: StateSpace, layout: Layout, padded: Padded, out: FilterOutput, prof: Profiled, tangents: Tangents
) -> np.ndarray:
    """d(profiled log-likelihood) along each of the P directions, at the filter run ``out``.

    ``out`` comes from ``kalman_filter(..., padded=padded, keep_work=True)`` and ``prof`` from
    ``profile_effects(out, profile_scale=True)``; the result has shape (P,).
    """
    from scipy.signal import lfilter

    wk = out.work
    f, bvec, h = model.transition, model.input_gain, model.design
    n_dir = len(tangents.transition)
    df, db = _first(tangents.transition), _first(tangents.input_gain)  # (2, 2, P), (2, P)
    lengths = layout.lengths.astype(np.intp)
    n_sess, t_max, n = len(lengths), len(wk.h_m), out.n_obs
    v = np.concatenate(([1.0], prof.coef))
    s, k, m, gain, p_inf = wk.s_inf, wk.k_inf, wk.m, wk.gain, wk.p_inf

    # steady covariance: dP = M dP M' + dF Pf F' + F Pf dF' + dQ (a Stein equation), Pf = (I - k h') P
    pf = p_inf - np.outer(k, h @ p_inf)
    rhs = _mm(_mm(df, pf), f.T)
    rhs = rhs + rhs.swapaxes(0, 1) + _first(tangents.state_cov)
    stein = np.eye(4) - (m[:, None, :, None] * m[None, :, None, :]).reshape(4, 4)  # I - kron(M, M)
    dp_inf = np.linalg.solve(stein, rhs.reshape(4, n_dir)).reshape(2, 2, n_dir)
    dph = np.einsum("abp,b->ap", dp_inf, h)
    ds = h @ dph
    dk = (dph - np.outer(k, ds)) / s
    dm = _mm(df, np.eye(2) - np.outer(k, h)) - (f @ dk)[:, None, :] * h[None, :, None]
    dgain = np.einsum("abp,b->ap", df, k) + f @ dk
    dm_pow, df_pow = _PowerTangent.of(m, dm, t_max + 1), _PowerTangent.of(f, df, t_max + 1)

    # shared steady responses of O's two rows and of the combined effect row (coef . effects)
    y3 = np.concatenate([wk.shared_y[:2], (prof.coef @ wk.shared_y[2:])[None]])  # (3, T)
    z3 = np.concatenate([wk.shared_state[:, :2], np.einsum("aet,e->at", wk.shared_state[:, 2:], prof.coef)[:, None]], 1)
    dy3 = np.zeros((n_dir, 3, t_max))
    dy3[:, :2] = df_pow.rows(h)[..., :t_max].swapaxes(0, 1)
    drive = (np.einsum("abp,bjt->apjt", dm, z3[..., :t_max]) + dgain[:, :, None, None] * y3
             + gain[:, None, None, None] * dy3)
    dz = steady_response(m, drive)  # (2, P, 3, T+1)
    a3 = y3 - np.einsum("a,ajt->jt", h, z3[..., :t_max])
    da3 = dy3 - np.einsum("a,apjt->pjt", h, dz[..., :t_max])
    dg = df_pow.at(lengths) - dz[:, :, :2][..., lengths].swapaxes(1, 2)  # d(F^L - zeta_L) (2, 2, P, S)
    d_eff_end = dz[:, :, 2][..., lengths]  # (2, P, S)

    # shared sums over a session's trials of the basis [effects' innovations, H M^t, O~] (divided by s)
    basis = np.concatenate([a3[2][:, None], wk.h_m, a3[:2].T], 1)  # (T, 5)
    dbasis = np.concatenate([da3[None, :, 2], dm_pow.rows(h)[..., :t_max], da3[:, :2].swapaxes(0, 1)])  # (5, P, T)
    to_combined = np.zeros((len(prof.coef) + 4, 5))  # [effects, H M^t, O~] -> [coef . effects, H M^t, O~]
    to_combined[: len(prof.coef), 0], to_combined[len(prof.coef) :, 1:] = prof.coef, np.eye(4)
    sums = np.moveaxis(to_combined.T @ wk.shared_sums @ to_combined, 0, -1)  # (5, 5, S); einsum did it 10x slower
    dsums = session_sums(dbasis.reshape(5 * n_dir, t_max), basis, lengths).reshape(n_sess, 5, n_dir, 5)
    dsums = np.transpose(dsums, (1, 3, 2, 0))
    dsums = (dsums + dsums.swapaxes(0, 1)) / s - sums[:, :, None] * (ds / s)[:, None]  # (5, 5, P, S)

    # the data: innovations a of the steady filter from a zero start, and their tangent, per length group
    sa, a_basis = wk.data_square, (wk.data_sums @ to_combined).T  # (S,), (5, S)
    tr_m, det_m, d_tr, d_det = _trace_det(m, dm)
    den = [1.0, -tr_m, det_m]
    pairs = [(gain - bvec, dgain - db)] if padded.u_is_minus_y else [(gain, dgain), (bvec, db)]
    weight = np.concatenate([_filter_coef_tangent(h, m, dm, vec, dvec) for vec, dvec in pairs]
                            + [np.stack([d_tr, -d_det], -1)], 1)  # (P, J)
    # psi_end = sum_t M^(T_g-1-t) vec x_t; its tangent's weights d(M^k) vec + M^k dvec, read backwards
    end_weights = [dm_pow.cols(vec)[..., :t_max] + np.einsum("tab,bp->apt", wk.m_pow[:t_max], dvec)
                   for vec, dvec in pairs]  # (2, P, T) each, by the power k
    dsa, da_basis, dpsi = np.empty((n_dir, n_sess)), np.empty((5, n_dir, n_sess)), np.zeros((2 * n_dir, n_sess))
    for grp, work in zip(padded.groups, wk.groups):
        tg, rows, a = grp.t_max, grp.rows, work.a
        bases = work.phis + [lfilter([1.0], den, work.h_psi, axis=-1)]  # x / den (kept by the filter), h_psi / den
        lagged = np.zeros((2 * len(bases), len(rows), tg))  # x / den and h_psi / den at lags 1 and 2
        for i, base in enumerate(bases):
            lagged[2 * i, :, 1:], lagged[2 * i + 1, :, 2:] = base[:, : tg - 1], base[:, : tg - 2]
        lagged *= grp.valid
        dsa[:, rows], da_basis[:, :, rows] = innovation_tangent_sums(lagged, weight, a, basis[:tg], dbasis[..., :tg], s)
        rights = [grp.y_right] if padded.u_is_minus_y else [grp.y_right, grp.u_right]
        for x, weights in zip(rights, end_weights):
            dpsi[:, rows] += one_core_matmul(x, weights[..., tg - 1 :: -1].reshape(2 * n_dir, tg).T).T
    dsa -= sa * (ds / s)[:, None]  # (P, S)
    da_basis -= a_basis[:, None] * (ds / s)[:, None]  # (5, P, S)
    dpsi = dpsi.reshape(2, n_dir, n_sess)  # (2, P, S)
    # the combined column's sums: innovations a + coef . effects' innovations
    ah, ao = a_basis[1:3] + sums[0, 1:3], a_basis[3:5] + sums[0, 3:5]  # (2, S)
    dquad = dsa + 2.0 * da_basis[0] + dsums[0, 0]
    dah, dao = da_basis[1:3] + dsums[0, 1:3], da_basis[3:5] + dsums[0, 3:5]  # (2, P, S)
    hh, oh, oo = sums[1:3, 1:3], sums[3:5, 1:3], sums[3:5, 3:5]  # (2, 2, S)
    dhh, doh, doo = dsums[1:3, 1:3], dsums[3:5, 1:3], dsums[3:5, 3:5]  # (2, 2, P, S)

    # covariance chain: P0 -> X = P0 - P_inf, N = (I + X A)^-1, W = N X, E = P_inf + G W G', next P0 = D E D'
    brk, dbrk = _first(layout.breaks), _first(tangents.breaks)  # (2, 2, S), (2, 2, P, S)
    g, w, ends = _first(wk.g_end[lengths]), _first(wk.w), _first(out.end_covs)
    priors = np.empty_like(ends)
    priors[..., 0] = model.init_cov
    priors[..., 1:] = _congruence(brk[..., 1:], ends[..., :-1])
    x_dev = priors - p_inf[..., None]
    lmat = np.eye(2)[..., None] + _mm(x_dev, oo)
    nmat = np.array([[lmat[1, 1], -lmat[0, 1]], [-lmat[1, 0], lmat[0, 0]]])
    nmat /= lmat[0, 0] * lmat[1, 1] - lmat[0, 1] * lmat[1, 0]
    gn, gw = _mm(g, nmat), _mm(g, w)
    # dE = G N dP0 N' G' + [dP_inf - G N dP_inf N' G' - G W dA W G' + dG W G' + G W dG']
    cross = _mt(dg, gw)
    free = (dp_inf[..., None] - _congruence(gn[:, :, None], dp_inf[..., None]) - _congruence(gw[:, :, None], doo)
            + cross + cross.swapaxes(0, 1))
    carry = _mm(brk[..., 1:], gn[..., :-1])  # dP0[k+1] = carry_k dP0[k] carry_k' + c_k
    cross = _mt(_mm(dbrk[..., 1:], ends[:, :, None, :-1]), brk[:, :, None, 1:])
    c_k = _congruence(brk[:, :, None, 1:], free[..., :-1]) + cross + cross.swapaxes(0, 1)
    rhs = np.concatenate([_first(tangents.init_cov).reshape(4, n_dir, 1), c_k.reshape(4, n_dir, n_sess - 1)], 2)
    kron = np.einsum("iak,jbk->kijab", carry, carry).reshape(n_sess - 1, 4, 4)
    dp0 = np.transpose(chain_solve(kron, np.transpose(rhs, (2, 0, 1))), (1, 2, 0)).reshape(2, 2, n_dir, n_sess)
    dx = dp0 - dp_inf[..., None]
    dw = _congruence(nmat[:, :, None], dx) - _mm(_mm(w[:, :, None], doo), w[:, :, None])
    dlogdet = (n * ds / s + np.einsum("abs,baps->p", _mm(oo, nmat), dx)
               + np.einsum("abs,baps->p", w, doo))

    # mean chain of the combined column: m0[k+1] = D (trans m0 + const)
    m0 = np.einsum("c,sca->as", v, wk.start_means)  # (2, S)
    end = np.einsum("c,csa->as", v, out.end_means)
    dgw = _mm(dg, w[:, :, None]) + _mm(g[:, :, None], dw)
    dtrans = dm_pow.at(lengths) - _mm(dgw, oh[:, :, None]) - _mm(gw[:, :, None], doh)
    dconst = dpsi + d_eff_end + _mv(dgw, ao[:, None]) + _mv(gw[:, :, None], dao)
    rhs = np.zeros((n_sess, 2, n_dir))
    step_rhs = (_mv(brk[:, :, None, 1:], _mv(dtrans[..., :-1], m0[:, None, :-1]) + dconst[..., :-1])
                + _mv(dbrk[..., 1:], end[:, None, :-1]))  # (2, P, S-1)
    rhs[1:] = np.transpose(step_rhs, (2, 0, 1))
    dm0 = np.transpose(chain_solve(layout.breaks[1:] @ wk.trans[:-1], rhs), (1, 2, 0))  # (2, P, S)

    # the combined column's sum of squared exact innovations, per session, and its tangent
    b = ao - _mv(oh, m0)
    dbv = dao - _mv(doh, m0[:, None]) - _mv(oh[:, :, None], dm0)
    hm0, wb = _mv(hh, m0), _mv(w, b)
    dgram = (dquad - 2.0 * (np.einsum("aps,as->ps", dah, m0) + np.einsum("as,aps->ps", ah, dm0))
             + 2.0 * np.einsum("aps,as->ps", dm0, hm0) + np.einsum("as,abps,bs->ps", m0, dhh, m0)
             - 2.0 * np.einsum("aps,as->ps", dbv, wb) - np.einsum("as,abps,bs->ps", b, dw, b))
    rss = prof.scale * n
    return -0.5 * (n * dgram.sum(1) / rss + dlogdet)
