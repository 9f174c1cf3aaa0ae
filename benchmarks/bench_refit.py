"""Refit time of the consolidation estimate over 30,000 trials, against statsmodels' generic MLEModel.fit.

Prints `refit (30000 trials): S s` for the whole estimate (both variants, one- and
two-rate models, several starts, curvature, interval draws, forecast), the time
of a warm refit from the cached fit, the time of fitting the two-rate
error-driven model alone, and the same model fitted by statsmodels' MLEModel
(time-varying transition at session breaks, state_intercept = B u) with a
capped number of iterations, and the ratio.  Run: python benchmarks/bench_refit.py
"""
from __future__ import annotations

import argparse
import importlib
import time

import numpy as np

from monitor.core.consolidation import estimate_consolidation
from monitor.core.consolidation_fit import default_starts, fit_model
from monitor.core.consolidation_model import TWO_RATE, prepare, simulate, to_natural

TRUTH = {"a_f": 0.97, "b_f": 0.03, "c": 2e-4, "slow_leak": 1e-5, "tau_b": 20.0, "q_f": 1e-3, "q_s": 1e-5}


def statsmodels_fit(prep, maxiter: int):
    """The two-rate error-driven model as a statsmodels MLEModel (offset, warm-up, drift, noise as parameters)."""
    from statsmodels.tsa.statespace.mlemodel import MLEModel

    y, u = prep.y, prep.inputs["error"]
    n = len(y)
    last = prep.starts + prep.layout_lengths - 1
    pos = np.concatenate([np.arange(k) for k in prep.layout_lengths])
    effects = prep.effects[1:, pos]  # the same warm-up and drift regressors as ours
    n_eff = effects.shape[0]
    hours_next = prep.hours[1:]

    class TwoRate(MLEModel):
        def __init__(self):
            super().__init__(y, k_states=2)
            self.ssm["design"] = np.ones((1, 2))
            self.ssm["selection"] = np.eye(2)
            self.ssm.initialize_known(np.zeros(2), 1e-6 * np.eye(2))

        @property
        def start_params(self):
            theta = default_starts(True, 1, np.random.default_rng(0))[0]
            return np.r_[theta, -0.5, np.zeros(n_eff), np.log(0.02)]

        def update(self, params, **kwargs):
            params = super().update(params, **kwargs)
            p = to_natural(params[:7], TWO_RATE)
            b0, w, r = params[7], params[8 : 8 + n_eff], np.exp(params[8 + n_eff])
            f = np.array([[p["a_f"] - p["c"], 0.0], [p["c"], 1.0 - p["slow_leak"]]])
            q = np.diag([p["q_f"], p["q_s"]]) * r
            trans = np.repeat(f[:, :, None], n, axis=2)
            qcov = np.repeat(q[:, :, None], n, axis=2)
            intercept = np.outer([p["b_f"], 0.0], u)
            for t, h in zip(last[:-1], hours_next):
                d = np.diag([np.exp(-h / p["tau_b"]), 1.0])
                trans[:, :, t] = d @ f
                intercept[:, t] = d @ intercept[:, t]
                qcov[:, :, t] = d @ q @ d.T
            self.ssm["transition"] = trans
            self.ssm["state_cov"] = qcov
            self.ssm["state_intercept"] = intercept
            self.ssm["obs_intercept"] = (b0 + w @ effects)[None, :]
            self.ssm["obs_cov"] = np.array([[r]])

    model = TwoRate()
    t0 = time.perf_counter()
    res = model.fit(method="lbfgs", maxiter=maxiter, disp=False)
    return time.perf_counter() - t0, res


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=30000)
    parser.add_argument("--maxiter", type=int, default=50, help="iteration cap of the statsmodels fit")
    parser.add_argument("--seed", type=int, default=3)
    args = parser.parse_args()
    rng = np.random.default_rng(args.seed)
    sessions = args.trials // 400
    lengths = np.full(sessions, args.trials // sessions)
    hours = rng.choice([22.0, 24.0, 26.0, 48.0, 70.0], sessions)
    sim = simulate(TRUTH, lengths, hours, rng, warmup=-0.2)
    prep = prepare(sim.series)
    for module in ("scipy.optimize", "scipy.signal"):  # cold imports are paid once per process
        importlib.import_module(module)

    t0 = time.perf_counter()
    res = estimate_consolidation(sim.series)
    cold = time.perf_counter() - t0
    print(f"refit (30000 trials): {cold:.2f} s" if args.trials == 30000 else f"refit ({args.trials} trials): {cold:.2f} s")
    print(f"  status {res.status}; {res.evaluations} likelihood evaluations ({1e3 * cold / res.evaluations:.2f} ms each)")
    t0 = time.perf_counter()
    again = estimate_consolidation(sim.series, warm_start=res.warm_start)
    print(f"warm refit from the cached fit: {time.perf_counter() - t0:.2f} s ({again.evaluations} evaluations)")

    t0 = time.perf_counter()
    ours = fit_model(prep, "error", True, default_starts(True, 1, np.random.default_rng(0)), 1, 150, None, False)
    ours_time = time.perf_counter() - t0
    print(f"two-rate error-driven model alone, one start: {ours_time:.2f} s, loglike {ours.loglike:.3f}, "
          f"converged {ours.converged}, {ours.evaluations} evaluations")

    sm_time, sm = statsmodels_fit(prep, args.maxiter)
    iters = sm.mle_retvals.get("iterations", sm.mle_retvals.get("nit"))
    print(f"statsmodels MLEModel.fit (lbfgs, maxiter={args.maxiter}): {sm_time:.2f} s, loglike {sm.llf:.3f}, "
          f"converged {sm.mle_retvals.get('converged')}, iterations {iters}, "
          f"function calls {sm.mle_retvals.get('fcalls')}")
    print(f"ratio statsmodels / ours (same model, one start): {sm_time / ours_time:.1f}")
    print(f"ratio statsmodels / our whole refit: {sm_time / cold:.1f}")


if __name__ == "__main__":
    main()
