"""Exact profiled likelihood and its gradient for the one-state (one-rate) model, in scalar algebra.

Rule: the method of :func:`monitor.core.consolidation.kalman.kalman_filter` and
:func:`monitor.core.consolidation.kalman_tangent.profile_gradient` (each session
filtered with the steady gain, corrected exactly for its true prior variance by
the determinant lemma and the Woodbury identity; forward-mode tangents, the
data's filter differentiated through its coefficient) written for one state:
    x[t+1] = a x[t] + b u[t] + w,  w ~ N(0, q);   y[t] = x[t] + v,  v ~ N(0, 1)
with x <- rho_k x across the break before session k (rho_k = exp(-h_k / tau)),
x starting at 0 with variance q.  Every 2 x 2 matrix of the two-state code is a
number here and the steady filter is of first order, so a call costs about half.
The result equals the two-state code's on the one-rate state space to rounding
(tests/core/test_consolidation_kalman_one.py).
"""
from __future__ import annotations

import math

import numpy as np

from monitor.core.consolidation.kalman import (FilterOutput, Padded, Profiled, chain_solve, one_core_matmul,
                                               profile_effects, session_sums)
from monitor.core.consolidation.kalman_tangent import innovation_tangent_sums


def steady_variance(a: float, q: float) -> float:
    """The fixed point p = a^2 p / (p + 1) + q (the predicted variance), the positive root of
    p^2 + (1 - a^2 - q) p - q = 0 in its cancellation-free form."""
    beta = 1.0 - a * a - q
    root = math.sqrt(beta * beta + 4.0 * q)
    return 2.0 * q / (beta + root) if beta >= 0 else 0.5 * (root - beta)


def _first_order(m: float, drive: np.ndarray) -> np.ndarray:
    """z[0] = 0, z[t+1] = m z[t] + drive[t] along the last axis: (..., T) -> (..., T+1)."""
    from scipy.signal import lfilter

    padded = np.zeros(drive.shape[:-1] + (drive.shape[-1] + 1,))
    padded[..., 1:] = drive
    return lfilter([1.0], [1.0, -m], padded, axis=-1)


def _sessions(step: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """x[0] = rhs[0], x[k+1] = step[k] x[k] + rhs[k+1] for (S-1,) steps and (S, C) right-hand sides."""
    return chain_solve(step[:, None, None], rhs[:, None, :])[:, 0, :]


def one_state(a: float, b: float, q: float, hours: np.ndarray, tau: float, lengths: np.ndarray, padded: Padded,
              effects: np.ndarray, gradient: bool = False) -> FilterOutput | tuple[FilterOutput, Profiled, np.ndarray]:
    """The filter's statistics (a :class:`FilterOutput` whose states carry a second, zero component); with
    ``gradient`` also the profiled effects and scale and the profiled log-likelihood's derivatives along
    (a, b, tau, q), in that order."""
    lengths = np.asarray(lengths, np.intp)
    n_sess, t_max = len(lengths), int(lengths.max())
    eff = np.asarray(effects, float)[:, :t_max]
    n_eff = eff.shape[0]
    n = int(lengths.sum())
    rho = np.exp(-np.asarray(hours, float) / tau)
    p = steady_variance(a, q)
    s = p + 1.0
    m, gain = a / s, a * p / s
    steps = np.arange(t_max + 1)
    m_pow, a_pow = m ** steps, a ** steps

    # shared sequences over the position t in a session: the steady filter of a^t (O) and of the effects
    shared_y = np.concatenate([a_pow[None, :t_max], -eff])  # (1 + E, T)
    shared_z = _first_order(m, gain * shared_y)  # (1 + E, T + 1)
    shared_a = shared_y - shared_z[:, :t_max]
    g_end = a_pow - shared_z[0]  # a^L - zeta_L
    basis = np.concatenate([shared_a[1:].T, m_pow[:t_max, None], shared_a[:1].T], axis=1)  # (T, E + 2)
    at_end = session_sums(basis.T, basis, lengths) / s  # (S, E + 2, E + 2)
    eo, oh, oo = at_end[:, :n_eff, n_eff + 1], at_end[:, n_eff + 1, n_eff], at_end[:, n_eff + 1, n_eff + 1]
    hh = at_end[:, n_eff, n_eff]

    # the data: the steady filter from a zero start, by length groups
    coefs = [gain - b] if padded.u_is_minus_y else [gain, b]  # psi[t+1] = m psi[t] + sum of coef x[t]
    s_aa, sums, psi_end = np.empty(n_sess), np.empty((n_sess, n_eff + 2)), np.zeros(n_sess)
    kept = []
    for grp in padded.groups:
        xs = [grp.y] if padded.u_is_minus_y else [grp.y, grp.u]
        phis = [_first_order(m, x[:, : grp.t_max]) for x in xs]  # x / (1 - m z), lagged by one
        psi = sum(coef * phi for coef, phi in zip(coefs, phis))
        a_data = (grp.y[:, : grp.t_max] - psi[:, : grp.t_max]) * grp.valid
        s_aa[grp.rows] = np.einsum("st,st->s", a_data, a_data) / s
        sums[grp.rows] = one_core_matmul(a_data, basis[: grp.t_max]) / s
        rights = [grp.y_right] if padded.u_is_minus_y else [grp.y_right, grp.u_right]
        ends_at = [x @ m_pow[grp.t_max - 1 :: -1] for x in rights]  # x[t] weighs m^(T_g - 1 - t) at the end
        psi_end[grp.rows] += sum(coef * at_end_x for coef, at_end_x in zip(coefs, ends_at))
        kept.append((a_data, phis, psi, rights, ends_at))

    # the variance chain over sessions (data-free)
    g_l = g_end[lengths]
    prior, ends, w, big_l = np.empty(n_sess), np.empty(n_sess), np.empty(n_sess), np.empty(n_sess)
    logdet_corr, e_prev = 0.0, 0.0
    for k, (oo_k, g_k, r_k) in enumerate(zip(oo.tolist(), g_l.tolist(), rho.tolist())):
        p0 = q if k == 0 else r_k * r_k * e_prev
        dev = p0 - p
        l_k = 1.0 + dev * oo_k
        logdet_corr += math.log(l_k)
        w_k = dev / l_k
        e_prev = p + g_k * g_k * w_k
        prior[k], w[k], ends[k], big_l[k] = p0, w_k, e_prev, l_k
    logdet = n * math.log(s) + logdet_corr

    # the mean chain: per column, end = trans m0 + const
    n_cols = 1 + n_eff
    gw = g_l * w
    trans = m_pow[lengths] - gw * oh
    const = np.empty((n_sess, n_cols))
    const[:, 0] = psi_end + gw * sums[:, n_eff + 1]
    const[:, 1:] = shared_z[1:, lengths].T + gw[:, None] * eo
    rhs = np.zeros((n_sess, n_cols))
    rhs[1:] = rho[1:, None] * const[:-1]
    m0 = _sessions(rho[1:] * trans[:-1], rhs)  # (S, C)
    end = trans[:, None] * m0 + const

    quad = np.empty((n_sess, n_cols, n_cols))
    quad[:, 0, 0], quad[:, 0, 1:], quad[:, 1:, 0] = s_aa, sums[:, :n_eff], sums[:, :n_eff]
    quad[:, 1:, 1:] = at_end[:, :n_eff, :n_eff]
    ah = np.concatenate([sums[:, n_eff : n_eff + 1], at_end[:, :n_eff, n_eff]], axis=1)  # (S, C)
    ao = np.concatenate([sums[:, n_eff + 1 : n_eff + 2], eo], axis=1)
    cross = ah[:, :, None] * m0[:, None, :]
    bvec = ao - m0 * oh[:, None]
    gram = (quad - cross - cross.transpose(0, 2, 1) + hh[:, None, None] * m0[:, :, None] * m0[:, None, :]
            - w[:, None, None] * bvec[:, :, None] * bvec[:, None, :]).sum(0)
    end_means = np.zeros((n_cols, n_sess, 2))
    end_means[:, :, 0] = end.T
    end_covs = np.zeros((n_sess, 2, 2))
    end_covs[:, 0, 0] = ends
    out = FilterOutput(gram, float(logdet), n, end_means, end_covs)
    if not gradient:
        return out
    profile = profile_effects(out, profile_scale=True)

    # ---- tangents along (a, b, tau, q) at the profiled effects (envelope theorem) ----
    coef = profile.coef
    v = np.concatenate(([1.0], coef))
    n_dir = 4
    da, db, dtau, dq = np.eye(n_dir)
    dp = (2.0 * a * p * da + (p + 1.0) * dq) / math.sqrt((1.0 - a * a - q) ** 2 + 4.0 * q)
    ds = dp
    dm = da / s - m * ds / s
    dgain = (da * p + a * dp) / s - gain * ds / s
    d_rho = np.outer(dtau, np.asarray(hours, float) / tau**2 * rho)  # (P, S)
    t_minus = np.maximum(steps - 1, 0)
    dm_pow = np.outer(dm, steps * m ** t_minus)  # (P, T + 1)
    da_pow = np.outer(da, steps * a ** t_minus)

    # the shared responses of O and of the combined effect row
    y2 = np.stack([a_pow[:t_max], coef @ shared_y[1:]])  # (2, T)
    z2 = np.stack([shared_z[0], coef @ shared_z[1:]])  # (2, T + 1)
    dy2 = np.zeros((n_dir, 2, t_max))
    dy2[:, 0] = da_pow[:, :t_max]
    dz2 = _first_order(m, dm[:, None, None] * z2[:, :t_max] + dgain[:, None, None] * y2 + gain * dy2)
    a2 = y2 - z2[:, :t_max]
    da2 = dy2 - dz2[..., :t_max]
    dg_l = da_pow[:, lengths] - dz2[:, 0, lengths]  # (P, S)
    d_eff_end = dz2[:, 1, lengths]

    # sums of the combined basis [effects' innovations . coef, m^t, O~] and their tangents
    to_combined = np.zeros((n_eff + 2, 3))
    to_combined[:n_eff, 0], to_combined[n_eff:, 1:] = coef, np.eye(2)
    sums3 = to_combined.T @ at_end @ to_combined  # (S, 3, 3)
    basis3 = np.stack([a2[1], m_pow[:t_max], a2[0]], axis=1)  # (T, 3)
    dbasis3 = np.stack([da2[:, 1], dm_pow[:, :t_max], da2[:, 0]])  # (3, P, T)
    dsums = session_sums(dbasis3.reshape(3 * n_dir, t_max), basis3, lengths).reshape(n_sess, 3, n_dir, 3)
    dsums = (dsums + dsums.transpose(0, 3, 2, 1)) / s - sums3[:, :, None, :] * (ds / s)[None, None, :, None]

    # the data's innovations: a = y - psi, psi[t+1] = m psi[t] + c x[t]; d psi = dm F(psi) + dc F(x), lagged
    dcoefs = [dgain - db] if padded.u_is_minus_y else [dgain, db]
    weight = np.stack(dcoefs + [dm], axis=1)  # (P, J)
    a_basis = (sums @ to_combined).T  # (3, S)
    dsa, da_basis, dpsi = np.empty((n_dir, n_sess)), np.empty((3, n_dir, n_sess)), np.zeros((n_dir, n_sess))
    for grp, (a_data, phis, psi, rights, ends_at) in zip(padded.groups, kept):
        tg, rows = grp.t_max, grp.rows
        lagged = np.stack([phi[:, :tg] for phi in phis] + [_first_order(m, psi[:, :tg])[:, :tg]])
        lagged *= grp.valid
        dsa[:, rows], da_basis[:, :, rows] = innovation_tangent_sums(lagged, weight, a_data, basis3[:tg],
                                                                     dbasis3[..., :tg], s)
        dback = dm_pow[:, tg - 1 :: -1]
        for x, at_end_x, c_x, dc_x in zip(rights, ends_at, coefs, dcoefs):
            dpsi[:, rows] += np.outer(dc_x, at_end_x) + c_x * (dback @ x.T)
    dsa -= s_aa * (ds / s)[:, None]
    da_basis -= a_basis[:, None] * (ds / s)[:, None]
    ah_c, ao_c = a_basis[1] + sums3[:, 0, 1], a_basis[2] + sums3[:, 0, 2]  # (S,)
    dquad = dsa + 2.0 * da_basis[0] + dsums[:, 0, :, 0].T
    dah, dao = da_basis[1] + dsums[:, 0, :, 1].T, da_basis[2] + dsums[:, 0, :, 2].T  # (P, S)
    dhh, doh, doo = dsums[:, 1, :, 1].T, dsums[:, 2, :, 1].T, dsums[:, 2, :, 2].T

    # the variance chain's tangent: dP0[k+1] = rho^2 G^2 / L^2 dP0[k] + the rest
    dev = prior - p
    dx_free = -dp[:, None] * (g_l**2 / big_l**2) - (w**2)[None] * doo * g_l**2 + 2.0 * g_l * dg_l * w + dp[:, None]
    rhs_p = np.zeros((n_sess, n_dir))
    rhs_p[0] = dq
    rhs_p[1:] = (2.0 * rho[1:] * d_rho[:, 1:] * ends[:-1] + rho[1:] ** 2 * dx_free[:, :-1]).T
    dp0 = _sessions(rho[1:] ** 2 * g_l[:-1] ** 2 / big_l[:-1] ** 2, rhs_p).T  # (P, S)
    dx = dp0 - dp[:, None]
    dw = dx / big_l**2 - w**2 * doo
    dlogdet = n * ds / s + ((dx * oo + dev * doo) / big_l).sum(1)

    # the mean chain of the combined column
    m0c, endc = m0 @ v, end @ v
    dgw = dg_l * w + g_l * dw
    dtrans = dm_pow[:, lengths] - dgw * oh - gw * doh
    dconst = dpsi + d_eff_end + dgw * ao_c + gw * dao
    rhs_m = np.zeros((n_sess, n_dir))
    rhs_m[1:] = (rho[1:] * (dtrans[:, :-1] * m0c[:-1] + dconst[:, :-1]) + d_rho[:, 1:] * endc[:-1]).T
    dm0 = _sessions(rho[1:] * trans[:-1], rhs_m).T  # (P, S)

    bc = ao_c - oh * m0c
    dbc = dao - doh * m0c - oh * dm0
    dgram = (dquad - 2.0 * (dah * m0c + ah_c * dm0) + dhh * m0c**2 + 2.0 * hh * m0c * dm0
             - dw * bc**2 - 2.0 * w * bc * dbc)
    rss = profile.scale * n
    return out, profile, -0.5 * (n * dgram.sum(1) / rss + dlogdet)
