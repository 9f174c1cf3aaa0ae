"""The exact filter against statsmodels' generic state-space filter and published values."""

from __future__ import annotations

import numpy as np
import pytest

from monitor.core.consolidation.kalman import (
    Layout,
    StateSpace,
    chain_solve,
    kalman_filter,
    length_groups,
    loglike,
    one_core_matmul,
    pad,
    profile_effects,
    session_sums,
    steady_covariance,
)

sm_mlemodel = pytest.importorskip("statsmodels.tsa.statespace.mlemodel")

# Smith, Ghazizadeh & Shadmehr 2006 parameters (REFERENCES.md, [memory]; used by public re-implementations)
A_F, B_F, A_S, B_S = 0.92, 0.03, 0.996, 0.004


def statsmodels_filter(y, transition, intercept, design, obs_intercept, obs_var, state_cov, mean0, cov0):
    """statsmodels MLEModel with the given (possibly time-varying) matrices; returns its filter results."""
    mod = sm_mlemodel.MLEModel(np.asarray(y, float), k_states=2)
    mod.ssm["design"] = design
    mod.ssm["obs_intercept"] = obs_intercept
    mod.ssm["obs_cov"] = np.array([[obs_var]])
    mod.ssm["transition"] = transition
    mod.ssm["selection"] = np.eye(2)
    mod.ssm["state_cov"] = state_cov
    mod.ssm["state_intercept"] = intercept
    mod.ssm.initialize_known(np.asarray(mean0, float), np.asarray(cov0, float))
    return mod.ssm.filter()


def test_worked_example_matches_statsmodels_and_published_value():
    r = np.array([0, 0, 1, 1, 1, 1, 1, 1, 1, 1.0])
    y = np.array([0.05, -0.02, 0.10, 0.25, 0.30, 0.38, 0.41, 0.47, 0.50, 0.52])
    b = np.array([B_F, B_S])
    model = StateSpace(np.diag([A_F, A_S]), b, np.ones(2), 1e-3, 1e-4 * np.eye(2), np.zeros(2), 1e-4 * np.eye(2))
    ours = loglike(kalman_filter(model, Layout(np.array([0]), np.array([10]), np.eye(2)[None]), y, r - y))
    # statsmodels 0.15 MLEModel, same matrices; state_intercept column t = B e(t) feeds x(t+1)
    ref = statsmodels_filter(y, np.diag([A_F, A_S]), np.outer(b, r - y), np.ones((1, 2)), np.zeros((1, 10)),
                             1e-3, 1e-4 * np.eye(2), np.zeros(2), 1e-4 * np.eye(2))
    assert ours == pytest.approx(ref.llf, abs=1e-10)
    # published check value: REFERENCES.md worked example [checked: statsmodels 0.15.0 and a hand filter agree]
    assert ours == pytest.approx(-32.08004966562287, abs=1e-10)


def _our_two_rate_case(rng, lengths, two_rate=True):
    a_f, c, a_s = 0.9, 0.01, 0.999
    if two_rate:
        f = np.array([[a_f - c, 0.0], [c, a_s]])
        q, h = np.diag([2e-3, 1e-5]), np.ones(2)
    else:
        f = np.array([[a_f, 0.0], [0.0, 0.0]])
        q, h = np.diag([2e-3, 0.0]), np.array([1.0, 0.0])
    b = np.array([0.08, 0.0])
    n = int(lengths.sum())
    starts = np.r_[0, np.cumsum(lengths)[:-1]]
    rho = np.exp(-rng.uniform(10, 70, len(lengths)) / 20)
    breaks = np.array([np.diag([r_, 1.0 if two_rate else 0.0]) for r_ in rho])
    y = rng.normal(-0.4, 0.3, n)
    u = -y
    effects = np.vstack([np.ones(lengths.max()), np.exp(-np.arange(lengths.max()) / 5)])
    model = StateSpace(f, b, h, 0.05, q, np.array([0.05, 0.02]) * two_rate, np.diag([1e-3, 1e-5]) * [1, two_rate])
    return model, Layout(starts, lengths, breaks), y, u, effects


@pytest.mark.parametrize("groups", [1, 3])
@pytest.mark.parametrize("two_rate", [True, False])
def test_our_model_with_breaks_matches_statsmodels(two_rate, groups):
    rng = np.random.default_rng(7)
    lengths = np.array([1, 3, 250, 40, 2, 600, 17, 90])  # short sessions: the covariance never settles
    model, layout, y, u, effects = _our_two_rate_case(rng, lengths, two_rate)
    n = len(y)
    offset, warm = -0.3, 0.15
    pos = np.concatenate([np.arange(k) for k in lengths])
    padded = pad(layout, y, u, max_groups=groups, group_cost=0.0)  # sessions in 1 or 3 length groups
    assert len(padded.groups) == groups
    ours = kalman_filter(model, layout, y, u, effects, padded)
    coef = np.array([1.0, offset, warm])
    ours_ll = -0.5 * (n * np.log(2 * np.pi) + ours.logdet + coef @ ours.gram @ coef)

    # statsmodels with time-varying matrices: at a session's last trial, x(t+1) = D (F x + B u + w)
    f, b = model.transition, model.input_gain
    last = layout.starts + lengths - 1
    trans = np.repeat(f[:, :, None], n, axis=2)
    intercept = np.outer(b, u)
    qcov = np.repeat(model.state_cov[:, :, None], n, axis=2)
    for k in range(1, len(lengths)):
        t, d = last[k - 1], layout.breaks[k]
        trans[:, :, t] = d @ f
        intercept[:, t] = d @ (b * u[t])
        qcov[:, :, t] = d @ model.state_cov @ d.T
    obs_int = (offset + warm * np.exp(-pos / 5.0))[None, :]
    ref = statsmodels_filter(y, trans, intercept, model.design[None, :], obs_int, model.obs_var, qcov,
                             model.init_mean, model.init_cov)
    assert ours_ll == pytest.approx(ref.llf, rel=1e-11)
    # end-of-session state (after the last trial, before the break) from statsmodels' filtered state
    means = np.einsum("c,csa->sa", coef, ours.end_means)
    for k, t in enumerate(last):
        ref_mean = f @ ref.filtered_state[:, t] + b * u[t]
        ref_cov = f @ ref.filtered_state_cov[:, :, t] @ f.T + model.state_cov
        np.testing.assert_allclose(means[k], ref_mean, atol=1e-10)
        np.testing.assert_allclose(ours.end_covs[k], ref_cov, atol=1e-12)


def test_length_groups_put_a_long_session_apart():
    lengths = np.r_[np.full(30, 50), 3000, np.full(10, 60)]
    groups = length_groups(lengths)
    assert sorted(np.concatenate(groups).tolist()) == list(range(len(lengths)))  # every session once
    assert [30] in [g.tolist() for g in groups]  # the long session in a group of its own
    assert len(length_groups(np.full(75, 400))) == 1  # equal sessions: one group, no padding


def test_profiled_effects_are_the_likelihood_maximum():
    rng = np.random.default_rng(3)
    lengths = np.array([120, 80, 200])
    model, layout, y, u, effects = _our_two_rate_case(rng, lengths)
    out = kalman_filter(model, layout, y, u, effects)
    prof = profile_effects(out, profile_scale=False)
    n = len(y)

    def ll(coef):
        v = np.r_[1.0, coef]
        return -0.5 * (n * np.log(2 * np.pi) + out.logdet + v @ out.gram @ v)

    assert prof.loglike == pytest.approx(ll(prof.coef), rel=1e-12)
    for delta in ([1e-3, 0], [0, -1e-3]):
        assert ll(prof.coef + np.array(delta)) < prof.loglike


def test_steady_covariance_matches_scipy_riccati_solver():
    from scipy.linalg import solve_discrete_are

    model = StateSpace(np.array([[0.89, 0.0], [0.01, 0.999]]), np.zeros(2), np.ones(2), 0.05,
                       np.diag([2e-3, 1e-6]), np.zeros(2), np.eye(2))
    # scipy's DARE in the filtering form: A = F', B = H'
    ref = solve_discrete_are(model.transition.T, model.design[:, None], model.state_cov, np.array([[0.05]]))
    np.testing.assert_allclose(steady_covariance(model), ref, rtol=1e-9)


@pytest.mark.parametrize("size", [2, 4])
def test_chain_solve_matches_a_dense_solve(size):
    rng = np.random.default_rng(5)
    n_sess, n_cols = 9, 3
    step = rng.normal(0.0, 0.8, (n_sess - 1, size, size))
    rhs = rng.normal(size=(n_sess, size, n_cols))
    dense = np.eye(size * n_sess)
    for k in range(n_sess - 1):
        dense[size * (k + 1) : size * (k + 2), size * k : size * (k + 1)] = -step[k]
    # numpy.linalg.solve of the same block lower-bidiagonal system
    ref = np.linalg.solve(dense, rhs.reshape(size * n_sess, n_cols)).reshape(n_sess, size, n_cols)
    np.testing.assert_allclose(chain_solve(step, rhs), ref, rtol=1e-12, atol=1e-12)


def test_one_core_matmul_matches_numpy():
    rng = np.random.default_rng(6)
    x, y = rng.normal(size=(301, 400)), rng.normal(size=(3, 400, 8))
    # numpy.matmul in one call
    np.testing.assert_allclose(one_core_matmul(x, y), x @ y, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(one_core_matmul(x, y[0]), x @ y[0], rtol=1e-12, atol=1e-12)


@pytest.mark.parametrize("k, j, distinct", [(8, 8, 75), (35, 5, 75), (8, 8, 1), (3, 2, 4)])
def test_session_sums_match_numpy_per_session(k, j, distinct):
    """Both ways of summing (a product per stretch of equal length, or all products summed by stretch)."""
    rng = np.random.default_rng(k * j + distinct)
    lengths = rng.choice(rng.integers(250, 551, distinct), 75)
    left, right = rng.normal(size=(k, lengths.max())), rng.normal(size=(lengths.max(), j))
    # numpy.matmul over each session's first L_s positions
    reference = np.stack([left[:, :length] @ right[:length] for length in lengths])
    np.testing.assert_allclose(session_sums(left, right, lengths), reference, rtol=1e-11, atol=1e-11)
