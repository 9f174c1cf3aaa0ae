"""Effects on simulated animals: interval coverage, controls beyond chance, the cohort trend, and time per animal.

Rule: a printed report, never a pass/fail. A cohort of mock_rig animals at the
plateau, each with a different share of its learned change in the slow state,
trains 3 daily final-stage sessions and then has one session with the fast
state inactivated (tests) or with a vehicle (controls). Printed: how often
the per-animal 95 % interval of the hit-rate effect covers the simulated one,
how many controls' intervals exclude 0, the tests' trend against the slow
fraction (estimated and simulated slopes) and the time to compute one
animal's effect (five measures, 2000 resamples). `--animals N` per arm.
"""

from __future__ import annotations

import argparse
import time
from dataclasses import replace

import numpy as np

from mock_rig import scenario
from mock_rig.manipulations import manipulated_animal
from monitor.core.effects.animal import SessionTrials, animal_effect
from monitor.core.effects.cohort import trend
from monitor.core.session.trials import Trial

PROTOCOL = replace(scenario.two_press_protocol(650), max_trials=300, max_minutes=30.0)


def _cohort(n: int, kind: str, offset: int) -> tuple[list, list, list, list]:
    stages, truths, effects, seconds = [], [], [], []
    for k in range(n):
        stage, simulated = manipulated_animal(offset + k, 0.1 + 0.85 * k / max(n - 1, 1), kind, PROTOCOL)
        sessions = [SessionTrials(i, [Trial(j, r.t_us, r.interval_ms, r.target_ms, r.window_low_ms,
                                            r.window_high_ms, r.stage, r.outcome, r.outcome == "hit", "rig",
                                            r.outcome, 0) for j, r in enumerate(s.records, start=1)], s.minutes)
                    for i, s in enumerate(simulated, start=1)]
        began = time.perf_counter()
        effect = animal_effect(sessions[-1], sessions[:-1], seed=k)
        seconds.append(time.perf_counter() - began)
        stages.append(stage)
        truths.append(simulated[-1].expected_hit_rate - float(np.mean([s.expected_hit_rate for s in simulated[:-1]])))
        effects.append(effect.vs_baseline["hit_rate"])
    return stages, truths, effects, seconds


def figures(quick: bool) -> list[tuple[str, float, str, str]]:
    n = 12 if quick else 40
    stages, truths, effects, seconds = _cohort(n, "inactivate_fast", 0)
    covered = sum(e.low <= t <= e.high for e, t in zip(effects, truths))
    _, _, controls, _ = _cohort(n, "vehicle", 1000)
    beyond = sum(bool(e.excludes_zero) for e in controls)
    fitted = trend(stages, [e.effect for e in effects])
    true_line = trend(stages, truths)
    return [
        ("effect interval coverage (hit rate)", round(100 * covered / n, 1), "%",
         f"{covered}/{n} simulated tests; nominal 95 %"),
        ("controls beyond chance", round(100 * beyond / n, 1), "%",
         f"{beyond}/{n} vehicle intervals exclude 0; nominal 5 %"),
        ("trend slope (hit rate per unit fraction)", round(fitted.slope, 3), "",
         f"95 % interval {fitted.slope_low:.3f} to {fitted.slope_high:.3f}; simulated {true_line.slope:.3f}"),
        ("one animal's effect, 5 measures", round(1000 * float(np.median(seconds)), 1), "ms",
         f"median of {n}; 2000 resamples, up to 300 completed trials per session"),
    ]


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="12 animals per arm instead of 40")
    args = parser.parse_args()
    for label, value, unit, detail in figures(args.quick):
        print(f"{label}: {value} {unit}".rstrip())
        print(f"    {detail}")


if __name__ == "__main__":
    main()
