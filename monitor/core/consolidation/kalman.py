"""Exact Kalman-filter likelihood for two-state linear-Gaussian learning models.

Rule: the model is, per trial n of a session,
    x[n+1] = F x[n] + B u[n] + w[n],   w ~ N(0, Q)
    y[n]   = H x[n] + v[n],            v ~ N(0, R)
with a known input u (learning from an observed result is a known input), and
between sessions x[start of next] = D_k x[end of previous] (a break transition
per session).  Several "columns" of (y, u) are filtered at once with the same
gains: the filter is linear in the data, so regression effects in the
observation (an offset, a warm-up term) are innovations of extra columns and can
be profiled out by generalised least squares (de Jong's augmented filter).

Speed: every session is filtered with the steady-state gain (the fixed point of
the Riccati recursion, found by the doubling algorithm), which is exact for a
session whose prior covariance is the steady one; the mean recursion is then a
second-order linear filter that ``scipy.signal.lfilter`` runs on all sessions of
a length group at once (sessions are grouped by length, so that one long
session does not pad every other session's row to its length).  The session's
true prior covariance P_inf + dP is corrected for exactly with the determinant
lemma and the Woodbury identity (2x2 algebra per session), and each session's
means are affine in its start mean, so only short loops over sessions are
sequential.  The covariance need not settle within a session (it
does not when the slow state's noise is small); the result equals the plain
trial-by-trial filter to rounding.  A one-state model is the two-state one with
the second state held at zero (zero row/column in F, B, Q and the initial
covariance).  The intermediates can be kept (``keep_work``) for the exact
gradient of the profiled likelihood (:mod:`monitor.core.consolidation.kalman_tangent`).
"""
from __future__ import annotations

import functools
import math
import os
from dataclasses import dataclass

import numpy as np

LOG_2PI = float(np.log(2.0 * np.pi))


@dataclass(frozen=True)
class StateSpace:
    """Matrices of the two-state model (see module docstring)."""

    transition: np.ndarray  # F (2, 2)
    input_gain: np.ndarray  # B (2,)
    design: np.ndarray  # H (2,)
    obs_var: float  # R
    state_cov: np.ndarray  # Q (2, 2)
    init_mean: np.ndarray  # mean of x before the first trial (2,)
    init_cov: np.ndarray  # covariance of x before the first trial (2, 2)


@dataclass(frozen=True)
class Layout:
    """Session layout of a trial series: contiguous blocks of trials."""

    starts: np.ndarray  # (S,) index of each session's first trial
    lengths: np.ndarray  # (S,) trials per session (>= 1)
    breaks: np.ndarray  # (S, 2, 2) transition applied before each session (first ignored)


@dataclass(frozen=True)
class FilterOutput:
    """Sufficient statistics of the exact filter for every data column."""

    gram: np.ndarray  # (C, C) sum over trials of v_c v_d / S (exact innovations v, variance S)
    logdet: float  # sum over trials of ln S
    n_obs: int
    end_means: np.ndarray  # (C, S, 2) predicted state after each session's last trial
    end_covs: np.ndarray  # (S, 2, 2) its covariance (before the break)
    work: FilterWork | None = None  # intermediates, kept on request for the gradient


@dataclass(frozen=True)
class GroupWork:
    """The data's steady filter for one length group (rows as in ``PaddedGroup``)."""

    a: np.ndarray  # (G, T_g) zero-start steady innovations of the data, zero after each session's end
    h_psi: np.ndarray  # (G, T_g+1) H times the zero-start steady state of the data
    phis: list[np.ndarray]  # (G, T_g+1) x / den for each driving series (y; u too unless u = -y)


@dataclass(frozen=True)
class FilterWork:
    """Intermediates of :func:`kalman_filter` that its tangent (``kalman_tangent``) reuses."""

    p_inf: np.ndarray  # (2, 2) steady predicted covariance
    s_inf: float  # its innovation variance
    k_inf: np.ndarray  # (2,) steady Kalman gain (filtering form)
    m: np.ndarray  # (2, 2) steady closed-loop matrix F (I - k h')
    gain: np.ndarray  # (2,) F k
    m_pow: np.ndarray  # (T+1, 2, 2) M^t
    h_m: np.ndarray  # (T, 2) H M^t
    shared_y: np.ndarray  # (2 + E, T) rows of O' and the effects' observations -effects
    shared_state: np.ndarray  # (2, 2 + E, T+1) their zero-start steady states
    g_end: np.ndarray  # (T+1, 2, 2) F^t - zeta_t
    shared_sums: np.ndarray  # (S, E+4, E+4) sums over each session of basis basis' / s, basis [eff_a', H M^t, O~]
    data_sums: np.ndarray  # (S, E+4) sums of a basis / s
    data_square: np.ndarray  # (S,) sums of a^2 / s
    groups: tuple[GroupWork, ...]  # per length group of the padded data (``Padded.groups``)
    w: np.ndarray  # (S, 2, 2) Woodbury correction of each session
    trans: np.ndarray  # (S, 2, 2) end mean = trans m0 + const
    start_means: np.ndarray  # (S, C, 2)


def steady_covariance(model: StateSpace, iterations: int = 80) -> np.ndarray:
    """Fixed point of the predicted-covariance Riccati recursion (structure-preserving doubling).

    Iterates A <- A W^-1 A, G <- G + A W^-1 G A', X <- X + A' X W^-1 A with
    W = I + G X, from A = F', G = H'H/R, X = Q; X converges quadratically to P_inf.
    Written out for 2x2 matrices in floats (it runs once per likelihood).
    """
    (f11, f12), (f21, f22) = model.transition.tolist()
    a11, a12, a21, a22 = f11, f21, f12, f22  # A = F'
    h1, h2 = model.design.tolist()
    r = float(model.obs_var)
    g11, g12, g22 = h1 * h1 / r, h1 * h2 / r, h2 * h2 / r
    (x11, x12), (_, x22) = model.state_cov.tolist()
    for _ in range(iterations):
        w11, w12 = 1.0 + g11 * x11 + g12 * x12, g11 * x12 + g12 * x22
        w21, w22 = g12 * x11 + g22 * x12, 1.0 + g12 * x12 + g22 * x22
        det = w11 * w22 - w12 * w21
        i11, i12, i21, i22 = w22 / det, -w12 / det, -w21 / det, w11 / det
        # V = W^-1 A
        v11, v12 = i11 * a11 + i12 * a21, i11 * a12 + i12 * a22
        v21, v22 = i21 * a11 + i22 * a21, i21 * a12 + i22 * a22
        # X' = X + A' X V
        xv11, xv12 = x11 * v11 + x12 * v21, x11 * v12 + x12 * v22
        xv21, xv22 = x12 * v11 + x22 * v21, x12 * v12 + x22 * v22
        n11 = x11 + a11 * xv11 + a21 * xv21
        n12 = x12 + a11 * xv12 + a21 * xv22
        n22 = x22 + a12 * xv12 + a22 * xv22
        # G' = G + A W^-1 G A' ; U = W^-1 G
        u11, u12 = i11 * g11 + i12 * g12, i11 * g12 + i12 * g22
        u21, u22 = i21 * g11 + i22 * g12, i21 * g12 + i22 * g22
        au11, au12 = a11 * u11 + a12 * u21, a11 * u12 + a12 * u22
        au21, au22 = a21 * u11 + a22 * u21, a21 * u12 + a22 * u22
        g11, g12, g22 = (g11 + au11 * a11 + au12 * a12, g12 + au11 * a21 + au12 * a22,
                         g22 + au21 * a21 + au22 * a22)
        # A' = A W^-1 A = A V
        a11, a12, a21, a22 = (a11 * v11 + a12 * v21, a11 * v12 + a12 * v22,
                              a21 * v11 + a22 * v21, a21 * v12 + a22 * v22)
        change = max(abs(n11 - x11), abs(n12 - x12), abs(n22 - x22))
        x11, x12, x22 = n11, n12, n22
        if change <= 1e-16 * max(abs(x11), abs(x22), 1e-300):
            break
    return np.array([[x11, x12], [x12, x22]])


BLAS_ONE_THREAD = os.environ.get("OPENBLAS_NUM_THREADS") == "1"  # read by OpenBLAS when numpy loads
ONE_CORE_PRODUCT = 200_000  # multiply-adds per BLAS call, below OpenBLAS's threading threshold (4 * 65536)


PART_COST_CELLS = 1000  # one stretch's product (~2 us) in cells of the summed products (~2 ns each)


def one_core_matmul(x: np.ndarray, y: np.ndarray) -> np.ndarray:
    """x @ y for x (R, T) and y (..., T, K), in row blocks small enough that BLAS stays on one core.

    OpenBLAS splits a larger product over threads; when the other core is busy the
    wait for it costs milliseconds, far more than the product itself.  When BLAS was
    loaded with one thread (``OPENBLAS_NUM_THREADS=1``, as in the refit process) it is
    one product.
    """
    rows = max(1, ONE_CORE_PRODUCT // (x.shape[1] * y.shape[-1]))
    if x.shape[0] <= rows or BLAS_ONE_THREAD:
        return x @ y
    return np.concatenate([x[i : i + rows] @ y for i in range(0, x.shape[0], rows)], axis=-2)


@functools.lru_cache(maxsize=64)
def _distinct_lengths(lengths: bytes) -> tuple[np.ndarray, np.ndarray]:
    """The distinct session lengths, sorted, and each session's place among them (a fit asks again and
    again for the same layout)."""
    return np.unique(np.frombuffer(lengths, np.intp), return_inverse=True)


def session_sums(left: np.ndarray, right: np.ndarray, lengths: np.ndarray) -> np.ndarray:
    """sum over t < L_s of left[k, t] right[t, j] for every session: (S, K, J).

    The sums over each stretch between distinct session lengths, then a cumulative
    sum over the stretches: a matrix product per stretch, or, with many distinct
    lengths and few products per trial, the products at every trial summed by
    stretch in one pass (``PART_COST_CELLS``).
    """
    edges, where = _distinct_lengths(np.asarray(lengths, np.intp).tobytes())
    starts = np.concatenate(([0], edges[:-1]))
    if len(edges) * PART_COST_CELLS > left.shape[0] * right.shape[1] * edges[-1]:
        products = np.einsum("kt,tj->tkj", left[:, : edges[-1]], right[: edges[-1]])
        parts = np.add.reduceat(products, starts, axis=0)
    else:
        parts = np.stack([left[:, lo:hi] @ right[lo:hi] for lo, hi in zip(starts, edges)])
    return np.cumsum(parts, 0)[where]


def _powers(m: np.ndarray, count: int) -> np.ndarray:
    """M**t for t = 0..count-1 as (count, 2, 2), by the Cayley-Hamilton recurrence."""
    from scipy.signal import lfilter

    tr, det = m[0, 0] + m[1, 1], m[0, 0] * m[1, 1] - m[0, 1] * m[1, 0]
    x = np.zeros((4, max(count, 2)))
    x[:, 0] = np.eye(2).ravel()
    x[:, 1] = m.ravel() - tr * np.eye(2).ravel()
    out = lfilter([1.0], [1.0, -tr, det], x, axis=-1)[:, :count]
    return out.T.reshape(count, 2, 2)


def steady_response(m: np.ndarray, drive: np.ndarray) -> np.ndarray:
    """Zero-start states z[t+1] = M z[t] + drive[t] for t = 0..T-1; drive (2, ..., T) -> (2, ..., T+1).

    Each state component is a second-order all-pole filter of the drive:
    (z^2 - tr z + det) z_t = (z I + adj0) drive (Cayley-Hamilton).
    """
    from scipy.signal import lfilter

    tr, det = m[0, 0] + m[1, 1], m[0, 0] * m[1, 1] - m[0, 1] * m[1, 0]
    c1, c2 = drive[0], drive[1]
    w = np.zeros(drive.shape[:-1] + (drive.shape[-1] + 1,))
    w[..., 1:] = drive
    w[0, ..., 2:] += -m[1, 1] * c1[..., :-1] + m[0, 1] * c2[..., :-1]
    w[1, ..., 2:] += m[1, 0] * c1[..., :-1] - m[0, 0] * c2[..., :-1]
    return lfilter([1.0], [1.0, -tr, det], w, axis=-1)


def _covariance_chain(
    breaks: np.ndarray,
    init_cov: np.ndarray,
    p_inf: np.ndarray,
    oo: np.ndarray,
    g: np.ndarray,
) -> tuple[np.ndarray, np.ndarray, float]:
    """Sequential 2x2 recursion over sessions, in floats; ``oo`` (A) and ``g`` (G) per session.

    Per session: dP = P0 - P_inf, L = I + dP A, W = L^-1 dP, ln det L, and the
    end covariance P_inf + G W G'; the next prior is D P_end D'.
    """
    n_sess = len(breaks)
    w_rows: list[tuple[float, ...]] = []
    end_rows: list[tuple[float, ...]] = []
    (q11, q12), (_, q22) = p_inf.tolist()
    (p11, p12), (_, p22) = init_cov.tolist()
    brk = breaks.reshape(n_sess, 4).tolist()
    aa = oo.reshape(n_sess, 4).tolist()
    gg = g.reshape(n_sess, 4).tolist()
    logdet = 0.0
    e11 = e12 = e22 = 0.0
    for k in range(n_sess):
        if k:
            d11, d12, d21, d22 = brk[k]
            t11, t12 = d11 * e11 + d12 * e12, d11 * e12 + d12 * e22
            t21, t22 = d21 * e11 + d22 * e12, d21 * e12 + d22 * e22
            p11, p12, p22 = t11 * d11 + t12 * d12, t11 * d21 + t12 * d22, t21 * d21 + t22 * d22
        x11, x12, x22 = p11 - q11, p12 - q12, p22 - q22
        a11, a12, _, a22 = aa[k]
        l11, l12 = 1.0 + x11 * a11 + x12 * a12, x11 * a12 + x12 * a22
        l21, l22 = x12 * a11 + x22 * a12, 1.0 + x12 * a12 + x22 * a22
        det = l11 * l22 - l12 * l21
        logdet += math.log(det)
        w11 = (l22 * x11 - l12 * x12) / det
        w12 = (l22 * x12 - l12 * x22) / det
        w22 = (l11 * x22 - l21 * x12) / det
        w_rows.append((w11, w12, w12, w22))
        g11, g12, g21, g22 = gg[k]
        u11, u12 = g11 * w11 + g12 * w12, g11 * w12 + g12 * w22
        u21, u22 = g21 * w11 + g22 * w12, g21 * w12 + g22 * w22
        e11 = q11 + u11 * g11 + u12 * g12
        e12 = q12 + u11 * g21 + u12 * g22
        e22 = q22 + u21 * g21 + u22 * g22
        end_rows.append((e11, e12, e12, e22))
    return np.array(w_rows).reshape(n_sess, 2, 2), np.array(end_rows).reshape(n_sess, 2, 2), logdet


def _mean_chain(breaks: np.ndarray, trans: np.ndarray, const: np.ndarray, init_mean: np.ndarray) -> np.ndarray:
    """Start means of every session and column: m0[k+1] = D[k+1] (T[k] m0[k] + c[k])."""
    n_sess, n_cols, _ = const.shape
    rhs = np.zeros((n_sess, 2, n_cols))
    rhs[0, :, 0] = init_mean
    if n_sess > 1:
        rhs[1:] = breaks[1:] @ np.swapaxes(const[:-1], 1, 2)  # D[k+1] c[k]
    return np.moveaxis(chain_solve(breaks[1:] @ trans[:-1], rhs), 2, 1)


@functools.cache
def _square_index(size: int) -> tuple[np.ndarray, np.ndarray]:
    """Row and column of every entry of a size x size matrix."""
    rows, cols = np.indices((size, size)).reshape(2, -1)
    return rows, cols


def chain_solve(step: np.ndarray, rhs: np.ndarray) -> np.ndarray:
    """Solve x[0] = rhs[0], x[k+1] = step[k] x[k] + rhs[k+1] for all k; step (S-1, n, n), rhs (S, n, C).

    The recursion is a unit lower-triangular banded system in the stacked x (nS
    unknowns per column, lower bandwidth 2n - 1), solved by forward substitution
    in one LAPACK call (dtbtrs).
    """
    from scipy.linalg.lapack import dtbtrs

    n_sess, size, n_cols = rhs.shape
    if n_sess == 1:
        return rhs.copy()
    # band[i - j, j] = matrix[i, j], the unit diagonal implied; entry (i, j) of step[k] sits at
    # (n(k+1) + i, nk + j), so at band row n + i - j, column nk + j
    band = np.zeros((2 * size, n_sess, size))
    rows, cols = _square_index(size)
    band[size + rows - cols, :-1, cols] = -step[:, rows, cols].T
    band = band.reshape(2 * size, size * n_sess)
    solved, info = dtbtrs(band, rhs.reshape(size * n_sess, n_cols), uplo="L", diag="U")
    if info != 0:
        raise np.linalg.LinAlgError(f"dtbtrs failed (info {info})")
    return solved.reshape(n_sess, size, n_cols)


GROUP_COST_CELLS = 3000  # a length group's fixed cost (~25 numpy calls), in padded cells (~40 ns each)


@dataclass(frozen=True)
class PaddedGroup:
    """Sessions of similar length, one zero-padded row each (G, T_g+1), T_g their longest."""

    rows: np.ndarray  # (G,) the sessions' indices in the layout
    t_max: int
    y: np.ndarray
    u: np.ndarray
    valid: np.ndarray  # (G, T_g) True on real trials
    y_right: np.ndarray  # (G, T_g): each session's data ending at the last column
    u_right: np.ndarray


@dataclass(frozen=True)
class Padded:
    """The data laid out for the filter's passes, in length groups; reusable across fits."""

    groups: tuple[PaddedGroup, ...]
    u_is_minus_y: bool


def length_groups(lengths: np.ndarray, max_groups: int = 3, group_cost: float = GROUP_COST_CELLS) -> list[np.ndarray]:
    """Split the sessions, by length, into at most ``max_groups`` groups of least padded area.

    The area is the sum over groups of (sessions x longest session) plus
    ``group_cost`` a group: one long session then no longer pads every
    other session's row to its length.
    """
    order = np.argsort(lengths, kind="stable")
    ranked = lengths[order].astype(float)
    n = len(ranked)
    k = np.arange(1, n)  # a split after the k shortest sessions
    best = [(n * ranked[-1] + group_cost, ())]
    if max_groups >= 2 and n > 1:
        two = k * ranked[k - 1] + (n - k) * ranked[-1] + 2 * group_cost
        best.append((float(two.min()), (int(k[two.argmin()]),)))
    if max_groups >= 3 and n > 2:
        i, j = np.meshgrid(k, k, indexing="ij")
        three = i * ranked[i - 1] + (j - i) * ranked[j - 1] + (n - j) * ranked[-1] + 3 * group_cost
        three = np.where(j > i, three, np.inf)
        flat = int(three.argmin())
        best.append((float(three.flat[flat]), (int(i.flat[flat]), int(j.flat[flat]))))
    cuts = min(best, key=lambda pair: pair[0])[1]
    return np.split(order, cuts)


def pad(layout: Layout, obs: np.ndarray, inputs: np.ndarray, max_groups: int = 3,
        group_cost: float = GROUP_COST_CELLS) -> Padded:
    """Lay the trial series out as zero-padded rows per session (left- and right-aligned), in length groups."""
    obs, inputs = np.asarray(obs, float), np.asarray(inputs, float)
    all_lengths = layout.lengths.astype(np.intp)
    groups = []
    for rows in length_groups(all_lengths, max_groups, group_cost):
        lengths, starts = all_lengths[rows], layout.starts.astype(np.intp)[rows]
        t_max = int(lengths.max())
        grid = np.arange(t_max + 1)
        valid = grid[None, :] < lengths[:, None]
        gidx = np.minimum(starts[:, None] + grid[None, :], len(obs) - 1)
        shift = grid[None, :t_max] - (t_max - lengths[:, None])  # position within the session, right-aligned
        valid_r = shift >= 0
        ridx = np.clip(starts[:, None] + shift, 0, len(obs) - 1)
        groups.append(PaddedGroup(rows, t_max, obs[gidx] * valid, inputs[gidx] * valid, valid[:, :t_max],
                                  obs[ridx] * valid_r, inputs[ridx] * valid_r))
    return Padded(tuple(groups), bool(np.array_equal(inputs, -obs)))


def kalman_filter(
    model: StateSpace,
    layout: Layout,
    obs: np.ndarray,
    inputs: np.ndarray,
    effects: np.ndarray | None = None,
    padded: Padded | None = None,
    keep_work: bool = False,
) -> FilterOutput:
    """Exact filter statistics of the data (column 0) and of unit observation effects.

    ``obs``, ``inputs``: (N,) per trial.  ``effects``: (E, T) regressors indexed by
    the trial's position within its session (an offset is a row of ones, a
    warm-up term a decaying row); column e + 1 of the output is the filter of
    an observation offset of -effects[e] with no input, so the innovations for
    effect sizes b are v0 + sum b_e v_e.  Column 0 starts from ``init_mean``,
    the effect columns from zero.  ``padded`` (from :func:`pad`) saves laying
    out the same data again on every call; ``keep_work`` keeps the intermediates
    (``FilterOutput.work``) for :mod:`monitor.core.consolidation.kalman_tangent`.

    Method: each session is filtered with the steady-state gain (an exact
    filter for a session whose prior covariance is the steady one), then
    corrected exactly for its true prior covariance P0 = P_inf + dP: the
    observations' covariance differs by O dP O' with O[j] = H F^j, so the
    determinant lemma and the Woodbury identity give the exact
    log-likelihood, innovation quadratic forms and end state from 2x2
    quantities per session.
    """
    from scipy.signal import lfilter

    n = len(obs)
    starts, lengths = layout.starts.astype(np.intp), layout.lengths.astype(np.intp)
    n_sess = len(starts)
    t_max = int(lengths.max())
    eff = np.zeros((0, t_max)) if effects is None else np.asarray(effects, float)[:, :t_max]
    n_eff = eff.shape[0]
    f, bvec, h = model.transition, model.input_gain, model.design
    p_inf = steady_covariance(model)
    s_inf = float(h @ p_inf @ h + model.obs_var)
    k_inf = p_inf @ h / s_inf
    m = f @ (np.eye(2) - np.outer(k_inf, h))
    gain = f @ k_inf

    # shared sequences over the position t within a session
    m_pow = _powers(m, t_max + 1)
    f_pow = _powers(f, t_max + 1)
    h_m = np.einsum("a,tab->tb", h, m_pow[:t_max])  # H M^t
    o_rows = np.einsum("a,tab->tb", h, f_pow[:t_max])  # O[t] = H F^t
    # steady filter of the columns O (2 of them) and of the effects (data -eff, no input)
    shared_y = np.concatenate([o_rows.T, -eff])  # (2 + E, T)
    shared_state = steady_response(m, gain[:, None, None] * shared_y[None])  # (2, 2 + E, T + 1)
    shared_a = shared_y - np.einsum("a,act->ct", h, shared_state[:, :, :t_max])  # innovations
    o_tilde, eff_a = shared_a[:2].T, shared_a[2:]  # (T, 2), (E, T)
    zeta_end = np.moveaxis(shared_state[:, :2], -1, 0)  # (T+1, 2, 2)
    g_end = f_pow - zeta_end  # F^n - zeta_n
    eff_end = np.moveaxis(shared_state[:, 2:], -1, 0)  # (T+1, 2, E)

    # sums over each session's trials (divided by s) of products of the shared sequences
    basis = np.concatenate([eff_a.T, h_m, o_tilde], axis=1)  # (T, E + 4)
    at_end = session_sums(basis.T, basis, lengths) / s_inf
    ee, eh, eo = at_end[:, :n_eff, :n_eff], at_end[:, :n_eff, n_eff : n_eff + 2], at_end[:, :n_eff, n_eff + 2 :]
    hh, oh, oo = at_end[:, n_eff : n_eff + 2, n_eff : n_eff + 2], at_end[:, n_eff + 2 :, n_eff : n_eff + 2], \
        at_end[:, n_eff + 2 :, n_eff + 2 :]

    # the data: steady filter from a zero start, the sessions of each length group at once (padded)
    data = padded if padded is not None else pad(layout, obs, inputs)
    tr, det = m[0, 0] + m[1, 1], m[0, 0] * m[1, 1] - m[0, 1] * m[1, 0]
    adj0 = np.array([[-m[1, 1], m[0, 1]], [m[1, 0], -m[0, 0]]])
    den = [1.0, -tr, det]

    def numerator(proj: np.ndarray, vec: np.ndarray) -> list[float]:
        return [0.0, float(proj @ vec), float(proj @ adj0 @ vec)]

    vecs = [gain - bvec] if data.u_is_minus_y else [gain, bvec]
    back_vecs = [m_pow[:t_max] @ vec for vec in vecs]  # (T, 2): M^k vec; a group reads it backwards
    s_aa, sums, psi_end = np.empty(n_sess), np.empty((n_sess, n_eff + 4)), np.zeros((n_sess, 2))
    group_work = []
    for grp in data.groups:
        xs = [grp.y] if data.u_is_minus_y else [grp.y, grp.u]
        phis = []
        if keep_work:  # through x / den, which the gradient reuses (equal to the direct filter to rounding)
            phis = [lfilter([1.0], den, x, axis=-1) for x in xs]
            h_psi = np.zeros_like(grp.y)
            for phi, vec in zip(phis, vecs):
                _, lag1, lag2 = numerator(h, vec)
                h_psi[:, 1:] += lag1 * phi[:, :-1]
                h_psi[:, 2:] += lag2 * phi[:, :-2]
        else:
            h_psi = sum(lfilter(numerator(h, vec), den, x, axis=-1) for x, vec in zip(xs, vecs))
        a = grp.y[:, : grp.t_max] - h_psi[:, : grp.t_max]
        a *= grp.valid
        s_aa[grp.rows] = np.einsum("st,st->s", a, a) / s_inf
        sums[grp.rows] = one_core_matmul(a, basis[: grp.t_max]) / s_inf
        # end states: with the sessions right-aligned the weights M^(T_g-1-t) are shared
        rights = [grp.y_right] if data.u_is_minus_y else [grp.y_right, grp.u_right]
        for x, weights in zip(rights, back_vecs):
            psi_end[grp.rows] += one_core_matmul(x, weights[grp.t_max - 1 :: -1])
        group_work.append(GroupWork(a, h_psi, phis))
    s_ae, s_ah, s_ao = sums[:, :n_eff], sums[:, n_eff : n_eff + 2], sums[:, n_eff + 2 :]

    # covariance chain (data-free): prior of each session, correction W, end covariance
    w_all, end_covs, logdet_corr = _covariance_chain(
        layout.breaks, np.asarray(model.init_cov, float), p_inf, oo, g_end[lengths]
    )
    logdet = n * np.log(s_inf) + logdet_corr

    # mean chain: per column, end = T_k m0 + c_k (affine in the session's start mean)
    n_cols = 1 + n_eff
    gw = g_end[lengths] @ w_all  # G W
    trans = m_pow[lengths] - gw @ oh  # (S, 2, 2)
    const = np.empty((n_sess, n_cols, 2))
    const[:, 0] = psi_end + (gw @ s_ao[:, :, None])[:, :, 0]
    const[:, 1:] = np.moveaxis(eff_end[lengths], 1, 2) + eo @ np.swapaxes(gw, 1, 2)
    start_means = _mean_chain(layout.breaks, trans, const, np.asarray(model.init_mean, float))
    end_means = start_means @ np.swapaxes(trans, 1, 2) + const

    # exact quadratic forms of the innovations, all sessions at once
    quad_a = np.empty((n_sess, n_cols, n_cols))  # sum a_c a_d / s for the zero-start responses
    quad_a[:, 0, 0] = s_aa
    quad_a[:, 0, 1:] = s_ae
    quad_a[:, 1:, 0] = s_ae
    quad_a[:, 1:, 1:] = ee
    ah = np.empty((n_sess, n_cols, 2))  # sum a_c (H M^t) / s
    ah[:, 0], ah[:, 1:] = s_ah, eh
    ao = np.empty((n_sess, n_cols, 2))  # sum a_c O~_t / s
    ao[:, 0], ao[:, 1:] = s_ao, eo
    m0 = start_means
    cross = ah @ np.swapaxes(m0, 1, 2)
    b = ao - m0 @ np.swapaxes(oh, 1, 2)  # (S, C, 2): O~' v / s
    gram = (
        quad_a - cross - np.transpose(cross, (0, 2, 1))
        + m0 @ hh @ np.swapaxes(m0, 1, 2)
        - b @ w_all @ np.swapaxes(b, 1, 2)
    ).sum(0)
    work = None
    if keep_work:
        work = FilterWork(p_inf, s_inf, k_inf, m, gain, m_pow, h_m, shared_y, shared_state, g_end, at_end, sums,
                          s_aa, tuple(group_work), w_all, trans, start_means)
    return FilterOutput(gram, float(logdet), n, np.transpose(end_means, (1, 0, 2)), end_covs, work)


def loglike(out: FilterOutput) -> float:
    """Gaussian log-likelihood of column 0: -1/2 sum[ln(2 pi S) + v^2/S]."""
    return float(-0.5 * (out.n_obs * LOG_2PI + out.logdet + out.gram[0, 0]))


@dataclass(frozen=True)
class Profiled:
    """Log-likelihood with regression effects (and optionally the scale) profiled out."""

    loglike: float
    coef: np.ndarray  # effects of columns 1.. (observation offsets)
    scale: float  # multiplies every variance (1 when not profiled)


def profile_effects(out: FilterOutput, profile_scale: bool) -> Profiled:
    """Maximise over the effects of columns 1.. (GLS) and, if asked, a common variance scale.

    Column c >= 1 holds the filter of a unit effect, so the innovations for
    effects b are v0 + sum_c b_c v_c.  With ``profile_scale`` every variance of
    the model is read as relative to R and the scale is its ML value RSS / N.
    """
    gram, n = out.gram, out.n_obs
    if gram.shape[0] > 1:
        coef = -np.linalg.solve(gram[1:, 1:], gram[1:, 0])
        rss = float(gram[0, 0] + gram[1:, 0] @ coef)
    else:
        coef, rss = np.zeros(0), float(gram[0, 0])
    rss = max(rss, 1e-300)
    if profile_scale:
        scale = rss / n
        ll = -0.5 * (n * LOG_2PI + n * np.log(scale) + out.logdet + n)
    else:
        scale = 1.0
        ll = -0.5 * (n * LOG_2PI + out.logdet + rss)
    return Profiled(float(ll), coef, float(scale))
