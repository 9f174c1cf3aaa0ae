"""Recovery of the slow-state fraction on mock_rig's simulated learners, per regime.

For each regime a small cohort is trained with mock_rig.learner (its own
parameters drawn per animal; one target, a reward window of +/-20 %, nights and
weekends between sessions), the estimate is computed from the trials alone,
and the truth (the learner's slow / (fast + slow) after each session's last
trial) is compared with it.  Prints per regime: the coverage of the 90 %
interval over animals x sessions (all of them, and "cov.est": only the
sessions whose status is "estimated", where the interval is not the whole
[0, 1] by rule), the median absolute error after plateau
(3 sessions in a row with hit rate >= 0.5; the first of them is the plateau
session), the median interval width and the status words.
Run: python benchmarks/bench_recovery.py [--animals 4 --sessions 40]
"""
from __future__ import annotations

import argparse
import time
from collections import Counter

import numpy as np

from mock_rig.learner import OUTCOME_DRIVEN, Learner, LearnerParams, draw_params
from monitor.core.consolidation.analysis import Options, estimate_consolidation
from monitor.core.consolidation.model import TrialSeries

TARGET_MS = 650.0
TOLERANCE = 0.2
BASE = LearnerParams()
REGIMES: dict[str, tuple[bool, LearnerParams, str]] = {
    "fast consolidator": (True, BASE.with_(transfer=BASE.transfer * 2), "daily"),
    "slow consolidator": (True, BASE.with_(transfer=BASE.transfer / 2), "daily"),
    "short breaks": (True, BASE, "twice daily"),
    "long breaks": (True, BASE, "every other day"),
    "outcome-driven": (False, BASE.with_(drive=OUTCOME_DRIVEN), "daily"),
    "warm-up": (False, BASE.with_(warmup_offset=-0.3), "daily"),
    "satiety": (False, BASE.with_(satiety_rewards=150.0), "daily"),
    "variability narrowing": (False, BASE.with_(sigma_naive=0.4), "daily"),
}


def break_hours(schedule: str, count: int, rng: np.random.Generator) -> np.ndarray:
    """Hours before each session: nights, with a weekend every fifth session (or the schedule's own)."""
    if schedule == "twice daily":
        base = np.where(np.arange(count) % 2 == 0, 16.0, 6.0)
    elif schedule == "every other day":
        base = np.full(count, 46.0)
    else:
        base = np.where(np.arange(count) % 5 == 0, 70.0, 22.0)
    return base + rng.normal(0.0, 0.5, count)


def train(params: LearnerParams, sessions: int, schedule: str, rng: np.random.Generator):
    """Trials of one animal and the true fraction after each session."""
    learner = Learner(params, rng)
    hours = break_hours(schedule, sessions, rng)
    labels, intervals, rewarded, truth, hit_rates = [], [], [], [], []
    for k in range(sessions):
        learner.start_session(None if k == 0 else float(hours[k]))
        n = int(rng.integers(250, 351))
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
                                        hours, np.zeros(sessions, bool))
    return series, np.array(truth), np.array(hit_rates)


def plateau_session(hit_rates: np.ndarray, level: float = 0.5, run: int = 3) -> int | None:
    for k in range(len(hit_rates) - run + 1):
        if np.all(hit_rates[k : k + run] >= level):
            return k
    return None


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--animals", type=int, default=4)
    parser.add_argument("--sessions", type=int, default=40)
    parser.add_argument("--seed", type=int, default=11)
    parser.add_argument("--regimes", nargs="*", default=list(REGIMES))
    args = parser.parse_args()
    print(f"{args.animals} animals x {args.sessions} sessions per regime (250-350 trials each)")
    print(f"{'regime':24s} {'kind':10s} {'coverage':>8s} {'cov.est':>7s} {'MAE>plat':>8s} {'width':>6s} "
          f"{'seconds':>7s}  status")
    for name in args.regimes:
        matched, base, schedule = REGIMES[name]
        covered, confident, errors, widths, words, spent = [], [], [], [], Counter(), 0.0
        for animal in range(args.animals):
            rng = np.random.default_rng([args.seed, animal, list(REGIMES).index(name)])
            series, truth, hit_rates = train(draw_params(rng, base), args.sessions, schedule, rng)
            t0 = time.perf_counter()
            res = estimate_consolidation(series, Options(seed=animal))
            spent += time.perf_counter() - t0
            est = np.array([s.estimate for s in res.sessions])
            low = np.array([s.low for s in res.sessions])
            high = np.array([s.high for s in res.sessions])
            inside = (low <= truth) & (truth <= high)
            covered.extend(inside)
            confident.extend(inside[[s.status == "estimated" for s in res.sessions]])
            widths.extend(high - low)
            words.update(s.status for s in res.sessions)
            plateau = plateau_session(hit_rates)
            if plateau is not None:
                errors.extend(np.abs(est - truth)[plateau:])
        mae = f"{np.median(errors):.3f}" if errors else "n/a"
        cov_est = f"{np.mean(confident):.2f}" if confident else "n/a"
        print(f"{name:24s} {'matched' if matched else 'mismatch':10s} {np.mean(covered):8.2f} {cov_est:>7s} {mae:>8s} "
              f"{np.median(widths):6.2f} {spent / args.animals:7.1f}  {dict(words)}")


if __name__ == "__main__":
    main()
