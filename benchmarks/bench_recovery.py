"""Recovery of the slow-state fraction on mock_rig's simulated learners, per regime.

For each regime a small cohort is trained with mock_rig.learner (its own
parameters drawn per animal; one target, a reward window of +/-20 %, nights and
weekends between sessions), the estimate is computed from the trials alone,
and the truth (the learner's slow / (fast + slow) after each session's last
trial) is compared with it.  Per animal it prints the fitted two-rate
log-likelihood minus the log-likelihood of the generating variant's model at
the generating parameters (mock_rig's a_fast, b_fast or b_outcome, transfer,
a_slow, fast break tau; no state noise; offsets and noise scale profiled), the
variant chosen, the gap between the two variants' optima (both fitted to
convergence), the fit's seconds and its likelihood evaluations (most with the
exact gradient: the figure of the search's cost that the machine's load does
not move).  Per regime: the coverage of the 90 % interval over animals x
sessions (all of them, and "cov.est": only sessions whose status is
"estimated"), among "estimated" end-of-training checkpoints the median and
largest absolute error, the share "estimated" at plateau + 10 sessions
(plateau: 3 sessions in a row with hit rate >= 0.5; the first of them), the
median interval width and the status words.
BLAS is held to one thread (as in bench_refit.py).
Run: python benchmarks/bench_recovery.py [--animals 4] [--regimes NAME ...]
"""
from __future__ import annotations

import os

os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")  # before numpy is imported

import argparse  # noqa: E402
import time  # noqa: E402
from collections import Counter  # noqa: E402
from dataclasses import dataclass  # noqa: E402

import numpy as np  # noqa: E402

from mock_rig.learner import ERROR_DRIVEN, OUTCOME_DRIVEN, Learner, LearnerParams, draw_params  # noqa: E402
from monitor.core.consolidation.analysis import Options, estimate_consolidation  # noqa: E402
from monitor.core.consolidation.model import TrialSeries, evaluate, prepare  # noqa: E402

TARGET_MS = 650.0
TOLERANCE = 0.2
BASE = LearnerParams()


@dataclass(frozen=True)
class Regime:
    """A cohort's learner, schedule, session count and trials per session."""

    matched: bool  # our model family can generate it exactly (error-driven, no variants)
    params: LearnerParams
    schedule: str = "daily"
    sessions: int = 40
    trials: tuple[int, int] = (250, 350)


SLOW = BASE.with_(b_fast=BASE.b_fast * 3, transfer=BASE.transfer / 4)  # plateaus early, consolidates for long
REGIMES: dict[str, Regime] = {
    "fast consolidator": Regime(True, BASE.with_(transfer=BASE.transfer * 2)),
    "slow consolidator": Regime(True, BASE.with_(transfer=BASE.transfer / 2)),
    "slow, long (error)": Regime(True, SLOW, sessions=60),
    "slow, long (outcome)": Regime(False, SLOW.with_(drive=OUTCOME_DRIVEN), sessions=60),
    "fast (outcome)": Regime(False, BASE.with_(transfer=BASE.transfer * 2, drive=OUTCOME_DRIVEN)),
    "50-900 trials, 3-day gaps": Regime(True, BASE, "weekends of 3 days", 40, (50, 900)),
    "slow, 50-900, 3-day gaps": Regime(True, SLOW, "weekends of 3 days", 60, (50, 900)),
    "short breaks": Regime(True, BASE, "twice daily"),
    "long breaks": Regime(True, BASE, "every other day"),
    "outcome-driven": Regime(False, BASE.with_(drive=OUTCOME_DRIVEN)),
    "warm-up": Regime(False, BASE.with_(warmup_offset=-0.3)),
    "satiety": Regime(False, BASE.with_(satiety_rewards=150.0)),
    "variability narrowing": Regime(False, BASE.with_(sigma_naive=0.4)),
}


def break_hours(schedule: str, count: int, rng: np.random.Generator) -> np.ndarray:
    """Hours before each session: nights, with a weekend every fifth session (or the schedule's own)."""
    if schedule == "twice daily":
        base = np.where(np.arange(count) % 2 == 0, 16.0, 6.0)
    elif schedule == "every other day":
        base = np.full(count, 46.0)
    elif schedule == "weekends of 3 days":
        base = np.where(np.arange(count) % 5 == 0, 94.0, 22.0)
    else:
        base = np.where(np.arange(count) % 5 == 0, 70.0, 22.0)
    return base + rng.normal(0.0, 0.5, count)


def train(params: LearnerParams, regime: Regime, rng: np.random.Generator):
    """Trials of one animal and the true fraction after each session."""
    learner = Learner(params, rng)
    hours = break_hours(regime.schedule, regime.sessions, rng)
    labels, intervals, rewarded, truth, hit_rates = [], [], [], [], []
    for k in range(regime.sessions):
        learner.start_session(None if k == 0 else float(hours[k]))
        n = int(rng.integers(regime.trials[0], regime.trials[1] + 1))
        hits = 0
        for _ in range(n):
            interval, y, noise = learner.produce_ms()
            hit = abs(interval - TARGET_MS) <= TOLERANCE * TARGET_MS
            learner.learn(TARGET_MS, y, noise, hit)
            labels.append(k + 1)
            intervals.append(interval)
            rewarded.append(hit)
            hits += hit
        truth.append(learner.consolidation())
        hit_rates.append(hits / n)
    series = TrialSeries.from_intervals(np.array(labels), np.array(intervals), TARGET_MS, np.array(rewarded),
                                        hours, np.zeros(regime.sessions, bool))
    return series, np.array(truth), np.array(hit_rates)


def truth_loglike(series: TrialSeries, params: LearnerParams, options: Options) -> float:
    """Our two-rate model of the generating variant at the generating parameters (offsets profiled)."""
    prep = prepare(series, options.warmup, options.warmup_trials, options.tau_w, options.drift)
    gain = params.b_fast if params.drive == ERROR_DRIVEN else params.b_outcome
    natural = {"a_f": params.a_fast, "b_f": gain, "c": params.transfer, "slow_leak": max(1.0 - params.a_slow, 1e-7),
               "tau_b": params.fast_break_tau_h, "q_f": 1e-7, "q_s": 1e-9}
    return evaluate(prep, natural, params.drive, True).profiled.loglike


def plateau_session(hit_rates: np.ndarray, level: float = 0.5, run: int = 3) -> int | None:
    for k in range(len(hit_rates) - run + 1):
        if np.all(hit_rates[k : k + run] >= level):
            return k
    return None


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--animals", type=int, default=4)
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--regimes", nargs="*", default=list(REGIMES))
    parser.add_argument("--quiet", action="store_true", help="the regime table only")
    args = parser.parse_args()
    options = Options()
    rows, worst_gap, wrong_variant, evaluations = [], np.inf, 0, []
    if not args.quiet:
        print(f"{'regime':26s} {'#':>2s} {'drive':7s} {'chosen':7s} {'fit-truth':>9s} {'var.gap':>8s} "
              f"{'end est':>7s} {'truth':>5s} {'status':16s} {'s':>5s} {'evals':>5s}")
    for name in args.regimes:
        regime = REGIMES[name]
        covered, confident, end_errors, at_plus10, widths, words, spent = [], [], [], [], [], Counter(), 0.0
        for animal in range(args.animals):
            rng = np.random.default_rng([args.seed, animal, list(REGIMES).index(name)])
            params = draw_params(rng, regime.params)
            series, truth, hit_rates = train(params, regime, rng)
            t0 = time.perf_counter()
            res = estimate_consolidation(series, Options(seed=animal))
            spent += time.perf_counter() - t0
            est = np.array([s.estimate for s in res.sessions])
            low = np.array([s.low for s in res.sessions])
            high = np.array([s.high for s in res.sessions])
            status = [s.status for s in res.sessions]
            inside = (low <= truth) & (truth <= high)
            covered.extend(inside)
            confident.extend(inside[[s == "estimated" for s in status]])
            widths.extend(high - low)
            words.update(status)
            if status[-1] == "estimated":
                end_errors.append(abs(est[-1] - truth[-1]))
            plateau = plateau_session(hit_rates)
            if plateau is not None and plateau + 10 < len(status):
                at_plus10.append(status[plateau + 10] == "estimated")
            gap = res.two_rate.loglike - truth_loglike(series, params, options) if res.two_rate else np.nan
            lls = res.variant_loglikes
            var_gap = lls.get(params.drive, np.nan) - max(v for k, v in lls.items() if k != params.drive)
            chosen = res.two_rate.variant if res.two_rate else "-"
            worst_gap = min(worst_gap, gap)
            evaluations.append(res.evaluations)
            wrong_variant += bool(abs(var_gap) > 4 and (var_gap > 0) != (chosen == params.drive))
            if not args.quiet:
                print(f"{name:26s} {animal:2d} {params.drive:7s} {chosen:7s} {gap:9.2f} {var_gap:8.2f} "
                      f"{est[-1]:7.2f} {truth[-1]:5.2f} {status[-1]:16s} {time.perf_counter() - t0:5.1f} "
                      f"{res.evaluations:5d}",
                      flush=True)
        rows.append((name, regime, covered, confident, end_errors, at_plus10, widths, words, spent))
    print(f"\n{args.animals} animals per regime; worst fit - truth log-likelihood {worst_gap:.2f}; "
          f"wrong variant where the optima differ by > 4: {wrong_variant}; likelihood evaluations per fit: "
          f"median {np.median(evaluations):.0f}, total {sum(evaluations)}")
    print(f"{'regime':26s} {'kind':9s} {'cover':>5s} {'c.est':>5s} {'MAE end':>7s} {'max end':>7s} "
          f"{'est@p+10':>8s} {'width':>5s} {'s/fit':>5s}  status")
    for name, regime, covered, confident, end_errors, at_plus10, widths, words, spent in rows:
        mae = f"{np.median(end_errors):.3f}" if end_errors else "n/a"
        worst = f"{np.max(end_errors):.3f}" if end_errors else "n/a"
        cov_est = f"{np.mean(confident):.2f}" if confident else "n/a"
        share = f"{np.mean(at_plus10):.2f}" if at_plus10 else "n/a"
        print(f"{name:26s} {'matched' if regime.matched else 'mismatch':9s} {np.mean(covered):5.2f} {cov_est:>5s} "
              f"{mae:>7s} {worst:>7s} {share:>8s} {np.median(widths):5.2f} {spent / args.animals:5.1f}  {dict(words)}")


if __name__ == "__main__":
    main()
