"""Consolidation estimate of one animal: fit, compare, estimate, forecast, report.

Rule: the search profiles over the fast state's driving signal ("error",
"outcome"): for each variant the one-rate model runs ``race_iter`` steps, then
the two-rate model's candidates (the one-rate solution with a small slow state,
the nested model's basin, and the best of a Sobol-spread set screened on the
likelihood alone, the global stage) run ``race_iter`` steps each; then every
variant goes on to convergence (the two-rate candidates within
``race_margin`` of that variant's best, the best optimum also from short and
long break retentions), and the higher two-rate optimum wins; only its
variant's one-rate model goes on to convergence (raced candidates that meet an
earlier one's end stop).  Runs stop at a relative change of ``ftol`` per step;
the chosen optimum is then polished (``fit.polish``), so that along a flat
direction every route ends at the same point.  The two-rate
model counts as constraining the split only when it beats the one-rate model of the
same variant by AIC(one) - AIC(two) >= ``aic_margin`` (10 by default: the
one-rate model then has essentially no support), and a refit whose cached fit
was "estimated" keeps that until the difference falls below ``aic_margin -
hysteresis`` (the same data always give the same word; only new evidence
moves it across the band); otherwise every session is "not constrained" with
the interval [0, 1].  The interval's draws come from the best optimum's Laplace
approximation (``mode_margin`` > 0 lets optima that close share them, which
makes the interval depend on how many the search happened to find); they come
from their own generator (seeded by ``seed``), so a cached refit and a fresh
search that reach the same optimum give the same interval.  The figure stated
is the median of the draws; ``estimate_supported`` says whether it may be read
at all.  A warm start (``warm_start`` of a previous result, e.g. cached in the
store) refits from the cached optima only, and falls back to the full fit when
another variant now fits better.  A session whose interval is wider than
``uninformative_width`` is "not constrained" too.  Status words: "estimated", "not constrained", "not
converged", "too few trials", "cancelled".  Without a usable fit the figure is
0 with the interval [0, 1]: a model quantity that can never open an eligibility
window by itself.  The figure is a property of a fitted behavioural model, not
proof that behaviour no longer depends on a brain area; advisory only.
"""
from __future__ import annotations

from dataclasses import dataclass, field, replace
from typing import Callable

import numpy as np

from monitor.core.consolidation.estimate import Forecast, forecast, slow_fractions
from monitor.core.consolidation.fit import (FTOL, JOINED, Cancelled, ModelFit, Objective, default_starts,
                                            fit_model, spread_starts, with_curvature)
from monitor.core.consolidation.model import ONE_RATE, TWO_RATE, VARIANTS, Prepared, TrialSeries, prepare, to_theta
from monitor.core.consolidation.words import SUPPORTED_NOTE, UNSUPPORTED_NOTE, supported

CAVEAT = ("Model-based slow-state fraction of a fitted behavioural model; not proof that the behaviour "
          "no longer depends on a brain area. Advisory only: read it with the transparent measures.")
Progress = Callable[[float, str], None]


@dataclass(frozen=True)
class Options:
    """Settings of an estimate (defaults documented in docs/consolidation.md)."""

    variants: tuple[str, ...] = VARIANTS
    starts: int = 4
    optimise: int = 1
    max_iter: int = 150
    ftol: float = FTOL  # a run to convergence stops below this relative change per step (the polish goes on)
    race_iter: int = 15
    race_margin: float = 50.0
    spread: int = 32  # Sobol-spread candidates screened by the likelihood (the global stage)
    screened: int = 3  # of those (with the central and random starts), the best this many are raced
    mode_tau_b: tuple[float, ...] = (2.0, 500.0)
    alt_margin: float = 10.0  # a start from another break retention goes on when this close to the best
    mode_margin: float = 0.0  # > 0: optima this close to the best share the draws (less stable: see docs)
    draws: int = 40
    state_draws: int = 25
    aic_margin: float = 10.0
    hysteresis: float = 4.0  # a cached "estimated" stays so down to aic_margin - hysteresis
    uninformative_width: float = 0.8
    level: float = 0.8
    horizon: int = 200
    min_trials: int = 1000
    min_sessions: int = 4
    warmup: str = "model"
    warmup_trials: int = 5
    tau_w: tuple[float, ...] = (5.0, 25.0)
    drift: bool = True
    seed: int = 0


@dataclass(frozen=True)
class SessionEstimate:
    session: int
    estimate: float
    low: float
    high: float
    status: str


@dataclass(frozen=True)
class ConsolidationResult:
    """Everything an estimate produced; ``warm_start`` can be cached and passed to the next refit."""

    status: str
    reason: str
    sessions: list[SessionEstimate]
    n_trials: int
    dropped_trials: int
    two_rate: ModelFit | None = None
    one_rate: ModelFit | None = None
    variant_loglikes: dict[str, float] = field(default_factory=dict)
    delta_aic: float | None = None
    forecast: Forecast | None = None
    warm_start: dict = field(default_factory=dict)
    evaluations: int = 0
    notes: tuple[str, ...] = ()
    from_cache: bool = False  # refitted from the cached fit's optima (no fresh multi-start search)


def _key(variant: str, two_rate: bool) -> str:
    return f"{variant}/{'two' if two_rate else 'one'}"


def _empty(status: str, reason: str, labels: np.ndarray, n_trials: int, dropped: int) -> ConsolidationResult:
    rows = [SessionEstimate(int(s), 0.0, 0.0, 1.0, status) for s in labels]
    return ConsolidationResult(status, reason, rows, n_trials, dropped)


def estimate_consolidation(
    series: TrialSeries,
    options: Options = Options(),
    warm_start: dict | None = None,
    progress: Progress | None = None,
    cancel: Callable[[], bool] | None = None,
) -> ConsolidationResult:
    """Fit the models to one animal's series and estimate the slow-state fraction per session."""
    report = progress or (lambda fraction, message: None)
    warm = warm_start or {}
    report(0.0, "preparing trials")
    prep = prepare(series, options.warmup, options.warmup_trials, options.tau_w, options.drift)
    if prep.n_trials < options.min_trials or len(prep.labels) < options.min_sessions:
        return _empty("too few trials", f"{prep.n_trials} trials in {len(prep.labels)} sessions (need "
                      f"{options.min_trials} in {options.min_sessions})", prep.labels, prep.n_trials,
                      prep.dropped_trials)
    rng = np.random.default_rng(options.seed)
    steps = len(options.variants) + 3
    try:
        fitted = _refit_warm(prep, warm, options, cancel, report, steps) if _usable(warm, options) else None
        from_cache = fitted is not None
        variant, modes, fits = fitted or _fit_cold(prep, warm, options, cancel, report, steps, rng)
        two, one = modes[0], fits[_key(variant, False)]
        report((steps - 0.5) / steps, "interval")
        draws = np.random.default_rng([options.seed, 1])  # the interval's own draws: the same for the same optima
        fractions = slow_fractions(prep, modes, draws, options.draws, options.state_draws)
        outlook = forecast(prep, two, fractions, options.level, options.horizon)
    except Cancelled:
        return _empty("cancelled", "cancelled", prep.labels, prep.n_trials, prep.dropped_trials)
    report(1.0, "done")
    delta_aic = one.aic - two.aic
    kept = warm.get("status") == "estimated"  # hysteresis: a cached "estimated" leaves only below the band
    threshold = options.aic_margin - (options.hysteresis if kept else 0.0)
    if not two.converged:
        status, reason = "not converged", two.reason or "optimiser did not converge"
    elif delta_aic < threshold:
        status, reason = "not constrained", (f"two-rate model does not beat one-rate clearly "
                                             f"(AIC difference {delta_aic:.1f} < {threshold:g})")
    elif delta_aic < options.aic_margin:
        status, reason = "estimated", (f"two-rate model still preferred (AIC difference {delta_aic:.1f}: below "
                                       f"{options.aic_margin:g}, above the {threshold:g} at which an earlier "
                                       "\"estimated\" is withdrawn)")
    else:
        status, reason = "estimated", f"two-rate model preferred (AIC difference {delta_aic:.1f})"
    rows = []
    for label, est, low, high in zip(prep.labels, fractions.estimate, fractions.low, fractions.high):
        word = status
        if status != "estimated":
            low, high = 0.0, 1.0
        elif high - low > options.uninformative_width:
            word = "not constrained"
        rows.append(SessionEstimate(int(label), float(est), float(low), float(high), word))
    warm_out: dict = {key: fit.theta.tolist() for key, fit in fits.items()}
    warm_out |= {"variant": variant, "modes": [m.theta.tolist() for m in modes], "status": status}
    return ConsolidationResult(
        status, reason, rows, prep.n_trials, prep.dropped_trials, two, one,
        {v: fits[_key(v, True)].loglike for v in options.variants}, float(delta_aic), outlook, warm_out,
        sum(f.evaluations for f in fits.values()), tuple(prep.notes), from_cache,
    )


def _usable(warm: dict, options: Options) -> bool:
    variant = warm.get("variant")
    return (variant in options.variants and bool(warm.get("modes"))
            and all(_key(v, True) in warm for v in options.variants) and _key(variant, False) in warm)


def _fit_cold(prep: Prepared, warm: dict, options: Options, cancel, report: Progress, steps: int,
              rng: np.random.Generator) -> tuple[str, list[ModelFit], dict[str, ModelFit]]:
    """Profile over the variant: race every variant's candidates, then take every variant's best candidate to
    convergence (a variant far behind after its first steps can still hold the best optimum), the leader's
    first; a variant whose converged best is still ``race_margin`` behind goes no further.  The higher
    optimum wins; only its variant's one-rate model goes on to convergence (the comparison needs no other)."""
    fits: dict[str, ModelFit] = {}
    raced: dict[str, tuple[ModelFit, list[ModelFit]]] = {}
    spent = 0
    for v_i, variant in enumerate(options.variants):
        one = _fit_one_rate(prep, variant, warm, options, cancel, rng, options.race_iter)
        candidates, used = _race_two_rate(prep, variant, one, warm, options, cancel, rng)
        raced[variant], spent = (one, candidates), spent + used
        fits[_key(variant, False)], fits[_key(variant, True)] = one, candidates[0]
        report((v_i + 1) / steps, f"{variant} variant: first {options.race_iter} steps")
    found_by: dict[str, list[ModelFit]] = {}
    for variant in sorted(options.variants, key=lambda v: -raced[v][1][0].loglike):
        candidates = raced[variant][1]
        top = max((f[0].loglike for f in found_by.values()), default=None)
        found, used = _converge_two_rate(prep, variant, candidates, options, cancel, top)
        found_by[variant], spent = found, spent + used
        fits[_key(variant, True)] = found[0]
        report((len(options.variants) + 1) / steps, f"{variant} variant to convergence")
    variant = max(found_by, key=lambda v: found_by[v][0].loglike)
    # only the chosen variant's one-rate model is compared with its two-rate one: it alone goes on
    one = raced[variant][0]
    fits[_key(variant, False)] = _fit_one_rate(prep, variant, {_key(variant, False): one.theta}, options, cancel,
                                               rng, options.max_iter, spent=one.evaluations)
    others = sum(f.evaluations for v in found_by if v != variant for f in found_by[v])
    modes = _select_modes(prep, found_by[variant], spent + others, options, cancel)
    fits[_key(variant, True)] = modes[0]
    return variant, modes, fits


def _fit_one_rate(prep: Prepared, variant: str, warm: dict, options: Options, cancel,
                  rng: np.random.Generator, max_iter: int, spent: int = 0) -> ModelFit:
    """The one-rate model from the cached one, central, random and spread starts, as hard as the
    two-rate one (the comparison is only fair then); ``max_iter`` steps."""
    key = _key(variant, False)
    cached = [np.asarray(warm[key])] if key in warm else []
    starts = cached + default_starts(False, options.starts, rng) + spread_starts(False, options.spread // 2,
                                                                               options.seed)
    if spent:  # going on from a raced optimum: it runs first, then the other starts are screened again
        fit = fit_model(prep, variant, False, cached, 1, max_iter, cancel, False, ftol=options.ftol)
        return replace(fit, evaluations=fit.evaluations + spent)
    return fit_model(prep, variant, False, starts, options.optimise + 1, max_iter, cancel, False,
                     race=(max(1, options.race_iter // 3), options.race_margin))


def _race_two_rate(prep: Prepared, variant: str, one: ModelFit, warm: dict, options: Options, cancel,
                   rng: np.random.Generator) -> tuple[list[ModelFit], int]:
    """Candidates of the two-rate model after ``race_iter`` steps each, best first, and the screening's cost.

    Candidates: the cached optima, the one-rate solution with a small slow state (the nested
    model's basin, at two slow-state rates), and the best ``screened`` of a central, random and
    Sobol-spread set ranked by the likelihood alone (the global stage).  A candidate whose run comes
    within ``fit.JOIN_DISTANCE`` of an earlier candidate's end stops there and is dropped: it would
    follow that one.
    """
    key = _key(variant, True)
    cached = [np.asarray(t) for t in warm.get("modes", []) if warm.get("variant") == variant]
    cached += [np.asarray(warm[key])] if key in warm and not cached else []
    embeds = [to_theta(one.params | {"c": c, "slow_leak": 1e-6, "q_s": 1e-7}, TWO_RATE) for c in (1e-4, 1e-3)]
    pool = default_starts(True, options.starts, rng) + spread_starts(True, options.spread, options.seed)
    objective = Objective(prep, variant, True, cancel)
    screened = sorted(pool, key=objective)[: options.screened]
    raced: list[ModelFit] = []
    for start in cached + embeds + screened:  # one that meets an earlier candidate's end would follow it
        raced.append(fit_model(prep, variant, True, [start], 1, options.race_iter, cancel, False,
                               tuple(r.theta for r in raced if r.reason != JOINED)))
    followers = sum(r.evaluations for r in raced if r.reason == JOINED)
    kept = [r for r in raced if r.reason != JOINED]
    return sorted(kept, key=lambda f: -f.loglike), objective.evaluations + followers


def _converge_two_rate(prep: Prepared, variant: str, raced: list[ModelFit], options: Options,
                       cancel, top: float | None = None) -> tuple[list[ModelFit], int]:
    """Raced candidates within ``race_margin`` of the best go on to convergence, best first (a run
    that joins an optimum already found stops there); the best optimum is then also started from
    short and long break forgetting (the likelihood can have an optimum at each end).  With ``top``
    (another variant's optimum), nothing goes on after the best candidate when its optimum is still
    ``race_margin`` below it.  Returns the optima, best first, and the evaluations of runs that found none."""
    spent = 0
    found: list[ModelFit] = []
    for r in raced:
        spent += r.evaluations
        if found and top is not None and found[0].loglike <= top - options.race_margin:
            continue
        if raced[0].loglike - r.loglike >= options.race_margin:
            continue
        again = fit_model(prep, variant, True, [r.theta], 1, options.max_iter, cancel, False,
                          tuple(f.theta for f in found), ftol=options.ftol)
        if again.reason == JOINED:
            spent += again.evaluations
        else:
            found.append(again)
    found.sort(key=lambda f: -f.loglike)
    for tau in options.mode_tau_b if top is None or found[0].loglike > top - options.race_margin else ():
        alt = found[0].theta.copy()
        alt[TWO_RATE.index("tau_b")] = to_theta({"tau_b": tau}, ("tau_b",))[0]
        known = tuple(f.theta for f in found)
        short = fit_model(prep, variant, True, [alt], 1, options.race_iter, cancel, False, known)
        spent += short.evaluations
        if short.reason == JOINED or found[0].loglike - short.loglike >= options.alt_margin:
            continue
        again = fit_model(prep, variant, True, [short.theta], 1, options.max_iter, cancel, False, known,
                          ftol=options.ftol)
        if again.reason == JOINED:
            spent += again.evaluations
        else:
            found.append(again)
    return sorted(found, key=lambda f: -f.loglike), spent


def _refit_warm(prep: Prepared, warm: dict, options: Options, cancel, report: Progress,
                steps: int) -> tuple[str, list[ModelFit], dict[str, ModelFit]] | None:
    """Refit from a cached result's optima; None (refit cold) when another variant now fits better
    or the two-rate optimum falls below the one-rate model it nests."""
    variant = warm["variant"]
    fits: dict[str, ModelFit] = {}
    found = [fit_model(prep, variant, True, [np.asarray(t)], 1, options.max_iter, cancel, False, ftol=options.ftol)
             for t in warm["modes"]]
    report(1 / steps, f"two-rate model, {variant} variant, from the cached fit")
    for other in options.variants:
        if other != variant:
            fits[_key(other, True)] = fit_model(prep, other, True, [np.asarray(warm[_key(other, True)])], 1,
                                                options.race_iter // 3, cancel, False)
            if fits[_key(other, True)].loglike > max(f.loglike for f in found):
                return None
    modes = _select_modes(prep, found, 0, options, cancel)
    fits[_key(variant, True)] = modes[0]
    key = _key(variant, False)
    fits[key] = fit_model(prep, variant, False, [np.asarray(warm[key])], 1, options.max_iter, cancel, False,
                          ftol=options.ftol)
    report((steps - 1) / steps, "one-rate model, from the cached fit")
    if modes[0].loglike < fits[key].loglike + 1.0:  # a poor optimum of the nesting model: refit cold
        return None
    return variant, modes, fits


def _select_modes(prep: Prepared, found: list[ModelFit], spent: int, options: Options,
                  cancel) -> list[ModelFit]:
    """Converged, distinct optima within ``mode_margin`` of the best, best first, with curvature."""
    found = sorted(found, key=lambda f: -f.loglike)
    best = found[0]
    modes = [best]
    for f in found[1:]:
        distinct = all(np.max(np.abs(f.theta - m.theta)) > 0.5 for m in modes)
        if f.converged and distinct and best.loglike - f.loglike < options.mode_margin:
            modes.append(f)
    spent += sum(f.evaluations for f in found)
    modes = [with_curvature(prep, m, cancel) for m in modes]
    return [replace(modes[0], evaluations=spent + modes[0].evaluations - best.evaluations)] + modes[1:]


def consolidation_block(result: ConsolidationResult, aic_margin: float = 10.0) -> dict:
    """The report's ``consolidation`` block (the report JSON in docs/cli.md) plus extra keys."""
    last = result.sessions[-1] if result.sessions else SessionEstimate(0, 0.0, 0.0, 1.0, result.status)
    block: dict = {
        "session": last.session if result.sessions else None,
        "estimate": last.estimate,
        "low": last.low,
        "high": last.high,
        "status": last.status,
        "estimate_supported": supported(last.status),
        "estimate_note": SUPPORTED_NOTE if supported(last.status) else UNSUPPORTED_NOTE,
        "reason": result.reason,
        "caveat": CAVEAT,
        "trajectory": [
            {"session": s.session, "estimate": s.estimate, "low": s.low, "high": s.high, "status": s.status,
             "estimate_supported": supported(s.status)}
            for s in result.sessions
        ],
        "trials": result.n_trials,
        "dropped_trials": result.dropped_trials,
        "notes": list(result.notes),
    }
    if result.two_rate is not None and result.one_rate is not None:
        block["comparison"] = {
            "variant": result.two_rate.variant,
            "variant_loglikes": result.variant_loglikes,
            "one_rate_loglike": result.one_rate.loglike,
            "two_rate_loglike": result.two_rate.loglike,
            "delta_aic": result.delta_aic,
            "criterion": f"two-rate preferred when AIC(one-rate) - AIC(two-rate) >= {aic_margin:g}",
            "two_rate_preferred": bool(result.delta_aic is not None and result.delta_aic >= aic_margin),
            "converged": result.two_rate.converged,
            "parameters": result.two_rate.params,
            "one_rate_parameters": {k: result.one_rate.params[k] for k in ONE_RATE},
        }
    if result.forecast is not None:
        f = result.forecast
        block["forecast"] = {
            "level": f.level, "reached": f.reached, "summary": f.summary, "sessions_low": f.sessions_low,
            "sessions_median": f.sessions_median, "sessions_high": f.sessions_high, "horizon": f.horizon,
            "trials_per_session": f.trials_per_session, "break_hours": f.break_hours,
        }
    return block
