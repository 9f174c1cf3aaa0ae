"""Invented view models of our own scenario, for screenshots, benchmarks and tests.

Rule: everything here is made up from a seeded numpy generator (a cohort of
animals named after trees and birds, on boxes "box-01".. "box-16", a 650 ms
two-press target); it produces the same view models the app fills from the
engine and the store, so a screen can be drawn without any of them. Nothing in
the live path uses this module.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import replace

import numpy as np

from monitor.ui.models import (
    Alert,
    AnimalPageState,
    Connection,
    ConsolidationState,
    CurveState,
    HistogramData,
    RigTileState,
    SessionRow,
    Severity,
    StartDrop,
    TodayState,
)

ANIMALS = ("alder", "birch", "cedar", "dunlin", "egret", "fir", "grebe", "hazel",
           "ibis", "juniper", "kestrel", "larch", "merlin", "nuthatch", "oak", "plover")
TARGET_MS = 650.0
WINDOW_MS = (520.0, 780.0)
LINEAR_EDGES = np.linspace(0.0, 1500.0, 31)
LOG_EDGES = np.geomspace(50.0, 3000.0, 31)
TILE_EDGES = np.linspace(0.0, 1500.0, 21)
STAGES = ("shaping", "wide window", "final")


def _wilson(k: np.ndarray, n: np.ndarray, z: float = 1.96) -> tuple[np.ndarray, np.ndarray]:
    n = np.maximum(n, 1)
    p = k / n
    centre = (p + z * z / (2 * n)) / (1 + z * z / n)
    half = z * np.sqrt(p * (1 - p) / n + z * z / (4 * n * n)) / (1 + z * z / n)
    return np.clip(centre - half, 0, 1), np.clip(centre + half, 0, 1)


def _intervals(rng: np.random.Generator, n: int, skill: float) -> np.ndarray:
    """Inter-press intervals (ms): early animals press short and wide, skilled ones near the target."""
    centre = 250.0 + skill * (TARGET_MS - 250.0)
    spread = 0.55 - 0.33 * skill
    return rng.lognormal(np.log(centre), spread, n)


def tile_state(index: int, rng: np.random.Generator, seconds: float = 2400.0) -> RigTileState:
    """A plausible tile for box number `index` (0-based)."""
    rig = f"box-{index + 1:02d}"
    animal = ANIMALS[index % len(ANIMALS)]
    kinds = [Connection.LIVE] * 11 + [Connection.IDLE, Connection.QUIET, Connection.LIVE, Connection.RETRYING,
                                      Connection.LOST]
    connection = kinds[index % len(kinds)]
    if connection is Connection.IDLE:
        return RigTileState(rig=rig, animal=None, connection=connection, source_text=f"/dev/ttyACM{index}")
    skill = (index % 5) / 4.0
    trials = int(rng.integers(80, 420))
    x = _intervals(rng, trials, skill)
    last50 = x[-50:]
    k = int(np.sum((last50 >= WINDOW_MS[0]) & (last50 <= WINDOW_MS[1])))
    low, high = _wilson(np.array(k), np.array(len(last50)))
    counts, _ = np.histogram(x, bins=TILE_EDGES)
    alerts = {Connection.QUIET: (1, Severity.ATTENTION), Connection.RETRYING: (1, Severity.ATTENTION),
              Connection.LOST: (2, Severity.URGENT)}.get(connection, (0, None))
    return RigTileState(
        rig=rig, animal=animal, connection=connection, session_seconds=seconds + 37.0 * index,
        trials_today=trials, hit_rate=k / len(last50), hit_low=float(low), hit_high=float(high),
        last_interval_ms=float(x[-1]), hist_counts=tuple(int(c) for c in counts),
        hist_edges_ms=tuple(float(e) for e in TILE_EDGES), window_low_ms=WINDOW_MS[0], window_high_ms=WINDOW_MS[1],
        alert_count=alerts[0], alert_severity=alerts[1], source_text=f"/dev/ttyACM{index}",
    )


def today_state(rng: np.random.Generator, skill: float = 0.85, trials: int = 300) -> TodayState:
    """A live part of an animal page: `trials` trials so far today."""
    x = _intervals(rng, trials, skill)
    prev = _intervals(rng, 420, max(0.0, skill - 0.08))
    hit = (x >= WINDOW_MS[0]) & (x <= WINDOW_MS[1])
    size = 50
    cum = np.concatenate([[0], np.cumsum(hit)])
    idx = np.arange(1, trials + 1)
    start = np.maximum(0, idx - size)
    k = cum[idx] - cum[start]
    n = idx - start
    low, high = _wilson(k, n)
    return TodayState(
        linear=HistogramData(LINEAR_EDGES, np.histogram(x, LINEAR_EDGES)[0], np.histogram(prev, LINEAR_EDGES)[0]),
        log=HistogramData(LOG_EDGES, np.histogram(x, LOG_EDGES)[0], np.histogram(prev, LOG_EDGES)[0]),
        window_low_ms=WINDOW_MS[0], window_high_ms=WINDOW_MS[1], target_ms=TARGET_MS,
        trial_index=idx.astype(float), rolling_rate=k / n, rolling_low=low, rolling_high=high, rolling_size=size,
        trials=trials, hits=int(hit.sum()), premature=int(rng.integers(5, 30)), lone=int(rng.integers(3, 25)),
        omission=int(rng.integers(0, 8)), session_seconds=2710.0,
    )


def curve_state(rng: np.random.Generator, sessions: int = 24) -> CurveState:
    s = np.arange(1, sessions + 1)
    rate = 0.72 / (1 + np.exp(-(s - 9) / 2.2)) + rng.normal(0, 0.025, sessions)
    rate = np.clip(rate, 0.01, 0.95)
    n = rng.integers(250, 450, sessions)
    low, high = _wilson(np.round(rate * n), n)
    stage = tuple(STAGES[0] if i < 4 else STAGES[1] if i < 8 else STAGES[2] for i in range(sessions))
    return CurveState(session=s.astype(float), measure=rate, low=low, high=high, stage=stage, criterion=0.5,
                      plateau_session=14, plateau_word="reached", final_stage=STAGES[2],
                      plateau_reason="Hit rate was at or above 50 % in 3 consecutive final-stage sessions "
                                     "(14, 15, 16).")


def consolidation_state(rng: np.random.Generator, first: int = 14, last: int = 24) -> ConsolidationState:
    s = np.arange(first, last + 1, dtype=float)
    frac = 0.3 + 0.5 * (1 - np.exp(-(s - first) / 6.0))
    width = np.linspace(0.25, 0.12, len(s))
    status = tuple("not constrained" if i < 2 else "estimated" for i in range(len(s)))
    drops = tuple(StartDrop(session=int(i), drop=float(d), low=float(d - 0.08), high=float(d + 0.08),
                            warmup_trials=10)
                  for i, d in zip(range(last - 4, last + 1), np.linspace(0.14, 0.05, 5) + rng.normal(0, 0.01, 5)))
    return ConsolidationState(
        trials_since_plateau=3820, sessions_since_plateau=last - first, interval_error=0.094, cv=0.19,
        start_drops=drops, session=s, fraction=frac, fraction_low=np.clip(frac - width, 0, 1),
        fraction_high=np.clip(frac + width * 0.8, 0, 1), status=status,
        model_comparison="The two-rate model fits better than the one-rate model (ΔAIC 14).",
        forecast_low=4, forecast_high=11, forecast_level=0.8,
    )


def session_rows(rng: np.random.Generator, curve: CurveState, rig: str = "box-03") -> tuple[SessionRow, ...]:
    rows = []
    day0 = dt.datetime(2026, 3, 2, 9, 14)
    for i, (rate, stage) in enumerate(zip(curve.measure, curve.stage)):
        start = day0 + dt.timedelta(days=i, minutes=int(rng.integers(0, 90)))
        trials = int(rng.integers(250, 450))
        excluded = i == 17
        rows.append(SessionRow(
            index=i + 1, start=start.strftime("%Y-%m-%d %H:%M"),
            rig=rig if i % 6 else "box-07", stage=stage, trials=trials, hits=int(rate * trials), hit_rate=float(rate),
            median_ms=float(250 + min(1.0, i / 12) * 400 + rng.normal(0, 15)), cv=float(0.5 - min(1.0, i / 14) * 0.3),
            excluded=excluded, exclusion_reason="lever stuck for 20 min" if excluded else "",
            conditions="saline sham 0.5 µL" if i == 20 else "",
        ))
    return tuple(rows)


def animal_page_state(animal: str = "cedar", seed: int = 3) -> AnimalPageState:
    """A full animal page of an animal past its plateau, mid-way through consolidation."""
    rng = np.random.default_rng(seed)
    every = curve_state(rng)
    rows = session_rows(rng, every)
    kept = np.array([not row.excluded for row in rows])
    curve = replace(every, session=every.session[kept], measure=every.measure[kept], low=every.low[kept],
                    high=every.high[kept], stage=tuple(s for s, k in zip(every.stage, kept) if k))
    return AnimalPageState(
        animal=animal, rig="box-03", protocol="two-press 650 ms (v3)", today=today_state(rng), curve=curve,
        consolidation=consolidation_state(rng), sessions=rows,
        care_text="Water today 0.62 mL earned, supplement 0.38 mL; weight 27.4 g (91 % of baseline).",
        eligibility_text="not yet: the protocol asks for 12 sessions after the plateau and cedar has 10.",
    )


def alerts(now: dt.datetime | None = None) -> list[Alert]:
    now = now or dt.datetime(2026, 3, 25, 10, 42)
    return [
        Alert(1, now - dt.timedelta(minutes=31), "box-13", "merlin", "silent", "No events for 10 min during a session.",
              Severity.ATTENTION),
        Alert(2, now - dt.timedelta(minutes=12), "box-15", "oak", "retrying", "Port lost; reopening /dev/ttyACM14.",
              Severity.ATTENTION),
        Alert(3, now - dt.timedelta(minutes=4), "box-16", "plover", "disconnected",
              "Lost the device at /dev/ttyACM15; it has not come back.", Severity.URGENT),
        Alert(4, now - dt.timedelta(minutes=50), "box-03", "cedar", "plateau", "Plateau reached at session 14.",
              Severity.INFO, acknowledged_by="R. Okafor", acknowledged_at=now - dt.timedelta(minutes=45)),
    ]
