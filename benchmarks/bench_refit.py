"""Refit time of the consolidation estimate over 30,000 trials, against statsmodels' generic MLEModel.fit.

Prints the refit the app runs when a session ends: the whole estimate (both
variants, one- and two-rate models, curvature, interval draws, forecast) over
30,000 trials refitted from the fit cached after the previous session, for each
of the last sessions (``--chain``) of the simulated animal; then the first fit
of an animal with no cached fit (cold: a fresh multi-start search) on equal
sessions (75 x 400) and on sessions of 250-550 trials, the time of a warm
refit on unchanged data, the time of fitting the two-rate
error-driven model alone, the cost of one new trial through the live filter, and
the same model fitted by statsmodels' MLEModel (time-varying transition at
session breaks, state_intercept = B u) with a capped number of iterations
(``--maxiter``), and the ratio.  ``figures(quick)`` returns the same figures for
``python -m benchmarks``.  ``--baseline REV`` instead times only the first fit
(median of ``--repeats``, both animals) of this tree and of the tree at git
revision REV (extracted with ``git archive`` into a temporary folder), each in
its own fresh process on the same data, and prints the ratio (REV may predate
the consolidation package: its modules are then found where they were).
Run: python benchmarks/bench_refit.py [--baseline REV]

The goal is one core: BLAS is held to one thread (``OPENBLAS_NUM_THREADS=1``
unless already set, before numpy loads).  scipy's L-BFGS-B wakes an OpenBLAS
worker thread that then spins on the second core; on a busy machine that
slows the fit by up to half.  Run with ``OPENBLAS_NUM_THREADS=2`` to see it.
"""
from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported (see the docstring)

import argparse  # noqa: E402
import importlib  # noqa: E402
import time  # noqa: E402
import timeit  # noqa: E402
from dataclasses import dataclass  # noqa: E402

import numpy as np  # noqa: E402

from monitor.core.consolidation.analysis import estimate_consolidation  # noqa: E402
from monitor.core.consolidation.fit import default_starts, fit_model  # noqa: E402
from monitor.core.consolidation.live import live_filter  # noqa: E402
from monitor.core.consolidation.model import (  # noqa: E402
    TWO_RATE,
    TrialSeries,
    evaluate,
    loglike_gradient,
    prepare,
    simulate,
    to_natural,
)

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


@dataclass(frozen=True)
class RefitTimes:
    """Figures of one run (seconds unless named otherwise)."""

    trials: int
    session_end_s: tuple[float, ...]  # refit after each of the last sessions, from the previous cached fit
    session_end_from_cache: int  # how many of them used the cached fit (the rest fell back to a fresh search)
    cold_s: float
    cold_evaluations: int
    status: str
    cold_varied_s: float  # the same on sessions of 250-550 trials
    cold_varied_evaluations: int
    warm_s: float
    warm_evaluations: int
    single_s: float
    single_loglike: float
    single_converged: bool
    single_evaluations: int
    live_us: float  # one trial through the live filter
    likelihood_ms: float  # one likelihood (two-rate, error variant; best of 7 x 100)
    gradient_ms: float  # one likelihood with its exact gradient (the same)
    blas_threads: str
    sm_s: float
    sm_loglike: float
    sm_converged: bool
    sm_iterations: int | None
    sm_fcalls: int | None
    maxiter: int

    @property
    def session_end_median(self) -> float:
        return float(np.median(self.session_end_s))

    @property
    def session_end_max(self) -> float:
        return max(self.session_end_s)

    @property
    def ratio_single(self) -> float:
        return self.sm_s / self.single_s

    @property
    def ratio_cold(self) -> float:
        return self.sm_s / self.cold_s


def first_sessions(series: TrialSeries, count: int) -> TrialSeries:
    """The series as it stood after its first ``count`` sessions."""
    labels = np.unique(series.session)
    keep = series.session <= labels[count - 1]
    return TrialSeries(series.session[keep], series.y[keep], series.rewarded[keep], series.break_hours[:count],
                       series.excluded[:count])


def animal(trials: int, seed: int, varied: bool):
    """A simulated animal of ``trials`` trials in sessions of 400 (or of 250-550, scaled to the total)."""
    rng = np.random.default_rng(seed)
    sessions = trials // 400
    lengths = np.full(sessions, trials // sessions)
    if varied:
        drawn = rng.integers(250, 551, sessions)
        lengths = np.floor(drawn * trials / drawn.sum()).astype(int)
        lengths[-1] += trials - lengths.sum()
    hours = rng.choice([22.0, 24.0, 26.0, 48.0, 70.0], sessions)
    return simulate(TRUTH, lengths, hours, rng, warmup=-0.2)


def timed(series: TrialSeries, warm_start: dict | None = None):
    t0 = time.perf_counter()
    res = estimate_consolidation(series, warm_start=warm_start)
    return time.perf_counter() - t0, res


def measure(trials: int = 30000, maxiter: int = 50, seed: int = 3, chain: int = 10) -> RefitTimes:
    """Time the session-end refits, the cold and warm estimate, one two-rate fit, the live filter and statsmodels."""
    sim = animal(trials, seed, varied=False)
    prep = prepare(sim.series)
    for module in ("scipy.optimize", "scipy.signal", "scipy.linalg"):  # cold imports are paid once per process
        importlib.import_module(module)

    n_sessions = len(np.unique(sim.series.session))
    _, cached = timed(first_sessions(sim.series, n_sessions - chain))
    session_end, from_cache = [], 0
    for count in range(n_sessions - chain + 1, n_sessions + 1):
        seconds, cached = timed(first_sessions(sim.series, count), cached.warm_start)
        session_end.append(seconds)
        from_cache += cached.from_cache

    cold, res = timed(sim.series)
    cold_varied, varied = timed(animal(trials, seed, varied=True).series)
    t0 = time.perf_counter()
    again = estimate_consolidation(sim.series, warm_start=res.warm_start)
    warm = time.perf_counter() - t0

    t0 = time.perf_counter()
    ours = fit_model(prep, "error", True, default_starts(True, 1, np.random.default_rng(0)), 1, 150, None, False)
    single = time.perf_counter() - t0

    live = live_filter(sim.series, res)
    live.start_session(22.0)
    new_y, new_rewarded = sim.series.y[-400:], sim.series.rewarded[-400:]
    t0 = time.perf_counter()
    for y, rewarded in zip(new_y.tolist(), new_rewarded.tolist()):
        live.add_trial(y, rewarded)
        live.fraction()
    live_us = (time.perf_counter() - t0) / len(new_y) * 1e6

    theta = ours.theta
    params = to_natural(theta, TWO_RATE)
    likelihood = min(timeit.repeat(lambda: evaluate(prep, params, "error", True), number=100, repeat=7)) / 100
    gradient = min(timeit.repeat(lambda: loglike_gradient(prep, theta, "error", True), number=100, repeat=7)) / 100

    sm_time, sm = statsmodels_fit(prep, maxiter)
    iters = sm.mle_retvals.get("iterations", sm.mle_retvals.get("nit"))
    return RefitTimes(len(sim.series.y), tuple(session_end), from_cache, cold, res.evaluations, res.status,
                      cold_varied, varied.evaluations, warm, again.evaluations, single,
                      ours.loglike, ours.converged, ours.evaluations, live_us, 1e3 * likelihood, 1e3 * gradient,
                      os.environ.get("OPENBLAS_NUM_THREADS", ""), sm_time, float(sm.llf),
                      bool(sm.mle_retvals.get("converged")), iters, sm.mle_retvals.get("fcalls"), maxiter)


def figures(quick: bool = False) -> list[tuple[str, float, str, str]]:
    """Table lines for `python -m benchmarks`: (label, value, unit, detail)."""
    m = measure(maxiter=5 if quick else 50, chain=3 if quick else 10)
    cold_goal = "met" if max(m.cold_s, m.cold_varied_s) <= 1.0 else "NOT met"
    return [
        (f"refit at session end ({m.trials} trials), median", m.session_end_median, "s",
         f"goal <= 1 s ({'met' if m.session_end_max <= 1.0 else 'NOT met'}): max {m.session_end_max:.2f} s over "
         f"the last {len(m.session_end_s)} sessions, {m.session_end_from_cache} of them from the previous cached "
         f"fit; the whole estimate (both variants, one- and two-rate, curvature, interval, forecast); "
         f"OPENBLAS_NUM_THREADS={m.blas_threads}"),
        (f"first fit, no cached fit ({m.trials} trials)", m.cold_s, "s",
         f"<= 1 s {cold_goal}; fresh multi-start search, {m.cold_evaluations} likelihood evaluations (most with "
         f"their exact gradient), status {m.status}, 75 x 400 trials; sessions of 250-550 trials "
         f"{m.cold_varied_s:.2f} s ({m.cold_varied_evaluations} evaluations); warm refit on unchanged data "
         f"{m.warm_s:.2f} s"),
        ("one likelihood / with its exact gradient", m.likelihood_ms, "ms",
         f"with gradient {m.gradient_ms:.2f} ms (30000 trials, two-rate, best of 7 x 100)"),
        ("statsmodels MLEModel.fit / ours (same model, one start)", m.ratio_single, "x",
         f"statsmodels {m.sm_s:.2f} s (lbfgs, maxiter={m.maxiter}, converged {m.sm_converged}, "
         f"loglike {m.sm_loglike:.3f}) vs ours {m.single_s:.2f} s (loglike {m.single_loglike:.3f}); "
         f"statsmodels / our whole first fit {m.ratio_cold:.1f}x"),
        ("live filter, one new trial", m.live_us, "us", "update + fraction at fixed parameters, no refit"),
    ]


FIRST_FIT = """
import statistics, sys, time
import numpy as np
import monitor
try:
    from monitor.core.consolidation.analysis import estimate_consolidation
    from monitor.core.consolidation.model import TrialSeries
except ImportError:  # revisions before the consolidation modules became a package
    from monitor.core.consolidation import estimate_consolidation
    from monitor.core.consolidation_model import TrialSeries
times, lines = [], []
for path in sys.argv[2:]:
    d = np.load(path)
    series = TrialSeries(d["session"], d["y"], d["rewarded"], d["break_hours"], d["excluded"])
    estimate_consolidation(series)  # imports and first calls are paid once
    for _ in range(int(sys.argv[1])):
        t0 = time.perf_counter()
        res = estimate_consolidation(series)
        times.append(time.perf_counter() - t0)
    lines.append(f"{res.two_rate.loglike:.3f} {res.evaluations} {res.sessions[-1].status}")
print(statistics.median(times), monitor.__file__, *lines, sep="|")
"""


def first_fit_against(revision: str, repeats: int, trials: int, seed: int) -> None:
    """Median first-fit time of this tree and of ``revision``'s, each in a fresh process, and the ratio."""
    import subprocess
    import sys
    import tempfile
    from pathlib import Path

    root = Path(__file__).resolve().parent.parent
    with tempfile.TemporaryDirectory() as tmp:
        old = Path(tmp) / "old"
        old.mkdir()
        archive = subprocess.run(["git", "-C", str(root), "archive", revision, "monitor", "drivers"],
                                 check=True, capture_output=True).stdout
        subprocess.run(["tar", "-x", "-C", str(old)], input=archive, check=True)
        paths = []
        for varied in (False, True):
            series = animal(trials, seed, varied).series
            path = Path(tmp) / f"animal_{int(varied)}.npz"
            np.savez(path, session=series.session, y=series.y, rewarded=series.rewarded,
                     break_hours=series.break_hours, excluded=series.excluded)
            paths.append(str(path))
        trees = (("this tree", root), (f"revision {revision}", old))
        times: dict[str, list[float]] = {name: [] for name, _ in trees}
        found: dict[str, str] = {}
        for _ in range(repeats):  # interleaved, so that both trees see the same load
            for name, tree in trees:
                env = dict(os.environ, PYTHONPATH=str(tree), OPENBLAS_NUM_THREADS="1")
                out = subprocess.run([sys.executable, "-c", FIRST_FIT, "1", *paths], cwd=str(tree), env=env,
                                     check=True, capture_output=True, text=True).stdout.strip().split("|")
                times[name].append(float(out[0]))
                found[name] = f"({out[1]}) loglike, evaluations, status: " + "; ".join(out[2:])
        for name, _ in trees:
            print(f"first fit, {name}: median {np.median(times[name]):.2f} s over {repeats} runs x 2 animals "
                  f"({trials} trials; 75 x 400 and 250-550 a session); runs " + ", ".join(f"{t:.2f}" for t in times[name]))
            print(f"  {found[name]}")
    mine, theirs = np.median(times["this tree"]), np.median(times[f"revision {revision}"])
    print(f"ratio this tree / revision {revision}: {mine / theirs:.2f} (goal: first fit <= 1.0 s median)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--trials", type=int, default=30000)
    parser.add_argument("--maxiter", type=int, default=50, help="iteration cap of the statsmodels fit")
    parser.add_argument("--seed", type=int, default=3)
    parser.add_argument("--chain", type=int, default=10, help="session-end refits timed (the last sessions)")
    parser.add_argument("--baseline", metavar="REV", help="time only the first fit, here and at git revision REV")
    parser.add_argument("--repeats", type=int, default=3, help="first fits per animal with --baseline")
    args = parser.parse_args()
    if args.baseline:
        first_fit_against(args.baseline, args.repeats, args.trials, args.seed)
        return
    m = measure(args.trials, args.maxiter, args.seed, args.chain)
    print(f"refit at session end ({m.trials} trials): median {m.session_end_median:.2f} s, max "
          f"{m.session_end_max:.2f} s over the last {len(m.session_end_s)} sessions "
          f"({m.session_end_from_cache} from the previous cached fit): "
          + ", ".join(f"{t:.2f}" for t in m.session_end_s))
    print(f"first fit, no cached fit ({m.trials} trials, 75 x 400): {m.cold_s:.2f} s")
    print(f"  status {m.status}; {m.cold_evaluations} likelihood evaluations, most with their exact gradient "
          f"({1e3 * m.cold_s / m.cold_evaluations:.2f} ms each); OPENBLAS_NUM_THREADS={m.blas_threads}")
    print(f"first fit, sessions of 250-550 trials: {m.cold_varied_s:.2f} s ({m.cold_varied_evaluations} evaluations)")
    print(f"one likelihood: {m.likelihood_ms:.2f} ms; with its exact gradient: {m.gradient_ms:.2f} ms")
    print(f"warm refit on unchanged data: {m.warm_s:.2f} s ({m.warm_evaluations} evaluations)")
    print(f"two-rate error-driven model alone, one start: {m.single_s:.2f} s, loglike {m.single_loglike:.3f}, "
          f"converged {m.single_converged}, {m.single_evaluations} evaluations")
    print(f"live filter (fixed parameters, no refit): {m.live_us:.1f} us per new trial")
    print(f"statsmodels MLEModel.fit (lbfgs, maxiter={m.maxiter}): {m.sm_s:.2f} s, loglike {m.sm_loglike:.3f}, "
          f"converged {m.sm_converged}, iterations {m.sm_iterations}, function calls {m.sm_fcalls}")
    print(f"ratio statsmodels / ours (same model, one start): {m.ratio_single:.1f}")
    print(f"ratio statsmodels / our whole first fit: {m.ratio_cold:.1f}")


if __name__ == "__main__":
    main()
