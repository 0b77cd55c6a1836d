#!/usr/bin/env python3
"""Generate the demo recording of the invented "orchard-pump-2" irrigation pump station.

The scenario
------------
A hillside orchard's pump station lifts water into a small header tank; drip lines drain the
tank by gravity. A microcontroller samples three sensors at 250 Hz and streams one CSV line per
sample over serial. A local float-switch controller (not streamcond) starts the pump when the
tank is low and stops it when the tank is full, so the pump cycles several times in the three
minutes of the recording. Time is compressed: the demo tank holds only about 22 litres per metre
of height (a narrow header column) so that a handful of fill/drain cycles fit in 180 s; a real
station cycles over tens of minutes, but the signals look the same at the sensor.

The plant is simulated sample by sample (a mass balance of the tank and the on/off controller;
this is the only per-sample loop and it runs once, offline), then each sensor is synthesised with
vectorised numpy from the plant state, with every noise draw from one ``default_rng(seed)``.

Columns (header ``t_ms,level_ma,pump_a,flow_v``)
------------------------------------------------
``t_ms``
    The microcontroller's millisecond timestamp, an integer, one sample every 4 ms (250 Hz).
    Sample time in seconds is ``t_ms * 0.001``; the recording starts at ``t_ms = 0``.
``level_ma``
    Tank level from a 4-20 mA hydrostatic pressure transmitter ranged 0-4 m of water, so
    ``mA = 4 + 4 * level_m`` (16 mA span over 4 m). On top of the true level: white noise
    (sigma 0.018 mA), low-pass (coloured, first-order 1.5 Hz) noise from surface waves and
    turbulence (sigma 0.024 mA, up to 0.036 mA while the pump is filling), mains ripple picked up
    by the loop wiring (49.98 Hz fundamental, 3rd harmonic aliased to 100.06 Hz, 5th harmonic
    aliased to a 0.1 Hz beat: a tone at f sampled at fs appears at |f - fs * round(f / fs)|,
    the Nyquist-Shannon folding rule), rare single-sample spikes (the pump contactor's switching
    surge, plus a few random ones), and a slow zero drift of +0.03 mA over the recording (the
    transmitter warming in the sun). One transmitter fault episode of 4 s: the transmitter's
    self-diagnostics drive the loop to a downscale failure current of about 2.5 mA, inside the
    "failure" region of NAMUR NE 43 (<= 3.6 mA; 3.8-20.5 mA is measurement; from memory), then
    it recovers. The fault is placed automatically in a quiet stretch with no mark crossing or
    pump switching near it.
``pump_a``
    Pump motor current from a clamp-on true-RMS current transducer (0-50 A range, DC output, so
    the value is the RMS current, not the 50 Hz waveform). About 0.015 A of offset plus noise when
    the pump is off. Running: ``4.9 A + 0.6 A per L/s`` of flow (a centrifugal pump's load rises
    with flow), about 6.1-6.9 A, with 99.96 Hz residual ripple of the RMS converter, a 1.3 Hz load
    pulsation and white noise. Each start is direct-on-line: the locked-rotor inrush of 5.5-6.5 x
    the running current lasts the 0.20-0.28 s the motor takes to run up (induction motor
    starting currents of 5-8 x full-load current are the usual handbook range; from memory), then
    decays to the running current. The transducer's response is a first-order lag of 10 ms.
``flow_v``
    Pulse output of a paddle-wheel flow sensor with a reed switch and a pull-up: about 3.24 V or
    0.06 V. K-factor 7.5 pulses per litre, so ``f_Hz = 7.5 * Q_L_per_s`` and
    ``Q_L_per_min = 8 * f_Hz``. Settled flow is 2.0-2.7 L/s (120-162 L/min, 15-20 Hz); after each
    start the flow overshoots by up to ~13 % while the empty downhill line fills and settles
    over a few seconds (so the pulse frequency drifts, never above 25 Hz, i.e. at least 10
    samples per period). Pulses only while water moves: the paddle stalls below 0.25 L/s, and
    after a stop the flow runs down with a 0.3 s time constant; a stalled paddle holds whichever
    level it stopped at. Reed contact bounce: after about 45 % of the edges, one or two short
    glitches (1-3 samples of the old level) within the first 4 samples of the new level. White
    noise sigma 0.018 V.

Truth
-----
:func:`generate` also returns the story's ground truth (``orchard_pump.truth.json`` beside the
CSV): the pump starts and stops (contactor instants), inrush and running currents, the times at
which the noise-free transmitter output (true level plus the slow drift) crosses the marks, the
fault window (first and last sample at the failure current), the level spikes, the flow pulse
count (integer crossings of the paddle's phase, i.e. the number of rising edges of the clean
pulse train), per-run pulse counts and frequencies, and the bounce glitch count.

Regenerate with ``python tools/make_demo.py`` (writes ``replay_data/orchard_pump.csv`` and the
truth JSON); the output is byte-identical for a given seed, duration and rate.
"""

from __future__ import annotations

import argparse
import io
import json
import logging
import math
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
from scipy import signal

log = logging.getLogger("make_demo")

SEED = 20250417
DURATION_S = 180.0
RATE_HZ = 250.0
HEADER = "t_ms,level_ma,pump_a,flow_v"
STATION = "orchard-pump-2"

REPO = Path(__file__).resolve().parent.parent
DEFAULT_OUT = REPO / "replay_data" / "orchard_pump.csv"

# --- level transmitter: 0-4 m of water -> 4-20 mA (linear 2-wire transmitter) ---------------
RANGE_M = 4.0
MA_PER_M = 16.0 / RANGE_M
LOW_MARK_M = 1.60
HIGH_MARK_M = 2.40
# The station's own float switches (they drive the pump; streamcond only watches).
START_LEVEL_M = 1.50
STOP_LEVEL_M = 2.50
INITIAL_LEVEL_M = 1.80
TANK_L_PER_M = 22.0  # time-compressed demo tank, litres per metre of height

LEVEL_WHITE_SIGMA_MA = 0.018
LEVEL_COLOURED_SIGMA_MA = 0.024  # pump off
LEVEL_COLOURED_EXTRA_MA = 0.012  # added while the inflow stirs the tank
LEVEL_COLOURED_CUTOFF_HZ = 1.5
LEVEL_DRIFT_MA = 0.03  # over the whole recording
MAINS_HZ = 49.98
MAINS_RIPPLE_MA = (0.010, 0.004, 0.006)  # fundamental, 3rd, 5th harmonic amplitudes
FAULT_MA = 2.5  # downscale failure current (NAMUR NE 43: <= 3.6 mA means failure; from memory)
FAULT_S = 4.0
FAULT_MARGIN_S = 2.0  # quiet time kept on each side of the fault

# --- pump motor and current transducer ---------------------------------------------------------
I_BASE_A = 4.9
I_PER_LPS_A = 0.6
I_OFF_OFFSET_A = 0.015
I_OFF_SIGMA_A = 0.010
I_RUN_SIGMA_A = 0.035
I_RIPPLE_A = 0.05  # RMS-converter residual at twice mains
I_PULSATION_A = 0.08
I_PULSATION_HZ = 1.3
INRUSH_RATIO = (5.5, 6.5)
RUN_UP_S = (0.20, 0.28)
INRUSH_DECAY_S = 0.04
CT_LAG_S = 0.010

# --- flow and paddle-wheel sensor --------------------------------------------------------------
K_PULSES_PER_L = 7.5
Q_SETTLED_LPS = (2.0, 2.7)
Q_RISE_S = 0.35
Q_OVERSHOOT = 0.22
Q_SETTLE_S = 4.0
Q_RUNDOWN_S = 0.30
Q_STALL_LPS = 0.25
Q_WANDER = 0.015  # relative, low-passed with Q_WANDER_S
Q_WANDER_S = 3.0
F_MAX_HZ = 25.0
PULSE_DUTY = 0.5
FLOW_HIGH_V = 3.24
FLOW_LOW_V = 0.06
FLOW_SIGMA_V = 0.018
ADC_FULL_SCALE_V = 3.3
BOUNCE_P = (0.55, 0.30, 0.15)  # probability of 0, 1, 2 glitches after an edge
BOUNCE_WINDOW = 3  # glitches lie within this many samples after the edge (a reed contact settles in ~8 ms)

# --- drip-line demand (tank outflow) -----------------------------------------------------------
Q_OUT_BASE_LPS = 1.10
Q_OUT_SWING_LPS = 0.15
Q_OUT_PERIOD_S = 240.0
Q_OUT_ZONE_LPS = 0.20  # a drip zone valve opens part-way through
Q_OUT_ZONE_AT = 0.38  # fraction of the duration

RANDOM_SPIKES_MEAN = 4.0
SPIKE_AT_SWITCH_P = 0.7
SPIKE_MA = (0.4, 1.2)

RUN_POOL = 32  # per-run random draws come from fixed-size pools so rng use never depends on the story


@dataclass(frozen=True)
class Components:
    """Noise-free internals of one synthesis, for plots and for tests that need the clean truth."""

    t_s: np.ndarray  # sample times, seconds (t_ms * 0.001)
    level_m: np.ndarray  # true tank level
    level_clean_ma: np.ndarray  # transmitter output without noise, ripple, spikes or fault
    pump_on: np.ndarray  # contactor closed (bool)
    q_in_lps: np.ndarray  # pump flow into the tank
    q_out_lps: np.ndarray  # drip-line demand
    flow_hz: np.ndarray  # paddle-wheel pulse frequency (0 while stalled)
    phase: np.ndarray  # paddle phase in pulses; rising edge at each integer crossing
    flow_clean: np.ndarray  # 0/1 pulse train before bounce and noise
    current_rms_a: np.ndarray  # true motor RMS current before the transducer


def _ar1(rng: np.random.Generator, n: int, a: float) -> np.ndarray:
    """Unit-variance stationary first-order autoregressive (low-pass) noise, y = a*y + sqrt(1-a^2)*w."""
    w = rng.standard_normal(n)
    y0 = rng.standard_normal()
    b = math.sqrt(1.0 - a * a)
    y, _ = signal.lfilter([b], [1.0, -a], w, zi=[a * y0])
    return y


def _tone(t: np.ndarray, f_hz: float, phase0: float) -> np.ndarray:
    """sin(2*pi*f*t + phase0) with the cycle count wrapped first, to keep precision at large f*t."""
    return np.sin(2.0 * np.pi * np.mod(f_hz * t, 1.0) + phase0)


def _crossings(t: np.ndarray, x: np.ndarray, level: float) -> list[tuple[float, str]]:
    """Linearly interpolated instants where a smooth signal crosses ``level``, with direction."""
    above = x >= level
    idx = np.flatnonzero(above[1:] != above[:-1])
    out = []
    for i in idx:
        frac = (level - x[i]) / (x[i + 1] - x[i])
        out.append((float(t[i] + frac * (t[i + 1] - t[i])), "rising" if above[i + 1] else "falling"))
    return out


def _simulate_plant(
    t: np.ndarray, dt: float, q_out: np.ndarray, q_ss_pool: np.ndarray, wander: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray, list[tuple[int, int | None]]]:
    """Integrate the tank mass balance, dh/dt = (Q_in - Q_out) / A, under the float-switch controller.

    Forward Euler per sample (dt = 4 ms against cycle times of tens of seconds). Returns the level
    at each sample (before that sample's update), the contactor state, the pump flow, and the runs
    as (start index, stop index or None).
    """
    n = t.size
    level = np.empty(n)
    on = np.zeros(n, dtype=bool)
    q_in = np.empty(n)
    runs: list[tuple[int, int | None]] = []
    h = INITIAL_LEVEL_M
    running = False
    t_on = t_off = 0.0
    q_ss = q_stop = 0.0
    area = TANK_L_PER_M
    for i in range(n):
        ti = t[i]
        level[i] = h
        if not running and h <= START_LEVEL_M:
            running, t_on = True, ti
            q_ss = float(q_ss_pool[len(runs) % RUN_POOL])
            runs.append((i, None))
        elif running and h >= STOP_LEVEL_M:
            running, t_off = False, ti
            runs[-1] = (runs[-1][0], i)
            q_stop = q_in[i - 1]
        if running:
            tr = ti - t_on
            q = q_ss * (1.0 - math.exp(-tr / Q_RISE_S)) * (1.0 + Q_OVERSHOOT * math.exp(-tr / Q_SETTLE_S))
            q *= 1.0 + wander[i]
        elif runs:
            q = q_stop * math.exp(-(ti - t_off) / Q_RUNDOWN_S)
        else:
            q = 0.0
        on[i] = running
        q_in[i] = q
        h += (q - q_out[i]) * dt / area
    return level, on, q_in, runs


def synthesise(
    seed: int = SEED, duration_s: float = DURATION_S, rate_hz: float = RATE_HZ
) -> tuple[np.ndarray, Components, dict[str, Any]]:
    """Build the raw (unrounded) channels, the clean components and the truth.

    Returns ``(raw, components, truth)`` with ``raw`` of shape (n, 4): t_ms, level_ma, pump_a, flow_v.
    """
    if rate_hz < 10.0 * F_MAX_HZ:
        raise ValueError(f"rate_hz must be >= {10.0 * F_MAX_HZ:g} to keep 10 samples per flow pulse")
    if duration_s < 60.0:
        raise ValueError("duration_s must be >= 60 s to hold a pump cycle")
    rng = np.random.default_rng(seed)
    n = int(round(duration_s * rate_hz))
    dt = 1.0 / rate_hz
    t_ms = np.round(np.arange(n) * (1000.0 / rate_hz)).astype(np.int64)
    t = t_ms * 1e-3

    # Fixed-order, fixed-size draws first (the story below must not change what they are).
    q_ss_pool = rng.uniform(*Q_SETTLED_LPS, RUN_POOL)
    inrush_pool = rng.uniform(*INRUSH_RATIO, RUN_POOL)
    run_up_pool = rng.uniform(*RUN_UP_S, RUN_POOL)
    wander = Q_WANDER * _ar1(rng, n, math.exp(-dt / Q_WANDER_S))
    demand_noise = 0.02 * _ar1(rng, n, math.exp(-dt / 5.0))
    lvl_white = rng.standard_normal(n)
    lvl_col = _ar1(rng, n, math.exp(-2.0 * np.pi * LEVEL_COLOURED_CUTOFF_HZ * dt))
    mains_phase = rng.uniform(0.0, 2.0 * np.pi, 3)
    i_noise = rng.standard_normal(n)
    i_off = rng.standard_normal(n)
    i_phase = rng.uniform(0.0, 2.0 * np.pi, 2)
    flow_noise = rng.standard_normal(n)
    fault_noise = rng.standard_normal(int(FAULT_S * rate_hz) + 2)
    phase0 = rng.uniform(PULSE_DUTY, 1.0)  # paddle starts mid-gap: output low, no edge at t=0
    n_random_spikes = int(rng.poisson(RANDOM_SPIKES_MEAN))
    spike_t = rng.uniform(2.0, duration_s - 2.0, n_random_spikes)
    spike_u = rng.uniform(0.0, 1.0, RUN_POOL * 2)
    spike_amp = rng.uniform(*SPIKE_MA, RUN_POOL * 2 + n_random_spikes) * rng.choice([-1.0, 1.0], RUN_POOL * 2 + n_random_spikes)

    # --- plant ----------------------------------------------------------------------------------
    q_out = (
        Q_OUT_BASE_LPS
        + Q_OUT_SWING_LPS * np.sin(2.0 * np.pi * t / Q_OUT_PERIOD_S)
        + Q_OUT_ZONE_LPS * (t >= Q_OUT_ZONE_AT * duration_s)
        + demand_noise
    )
    level_m, pump_on, q_in, runs = _simulate_plant(t, dt, q_out, q_ss_pool, wander)

    # --- level transmitter -------------------------------------------------------------------------
    drift = LEVEL_DRIFT_MA * t / duration_s
    clean_ma = 4.0 + MA_PER_M * level_m + drift
    stir = signal.lfilter([1.0 - math.exp(-dt / 2.0)], [1.0, -math.exp(-dt / 2.0)], pump_on.astype(float))
    mains = sum(
        amp * _tone(t, k * MAINS_HZ, ph) for amp, k, ph in zip(MAINS_RIPPLE_MA, (1, 3, 5), mains_phase)
    )
    level_ma = (
        clean_ma
        + LEVEL_WHITE_SIGMA_MA * lvl_white
        + (LEVEL_COLOURED_SIGMA_MA + LEVEL_COLOURED_EXTRA_MA * stir) * lvl_col
        + mains
    )

    low_ma = 4.0 + MA_PER_M * LOW_MARK_M
    high_ma = 4.0 + MA_PER_M * HIGH_MARK_M
    crossings = sorted(
        [(tc, "low", d) for tc, d in _crossings(t, clean_ma, low_ma)]
        + [(tc, "high", d) for tc, d in _crossings(t, clean_ma, high_ma)]
    )

    # Fault: centre of the longest quiet stretch in the later part of the recording.
    switch_t = [t[s] for s, _ in runs] + [t[e] for _, e in runs if e is not None]
    busy = np.sort(np.array([c[0] for c in crossings] + switch_t + [0.0, duration_s]))
    lo_win, hi_win = 0.4 * duration_s, 0.9 * duration_s
    best = None
    for a, b in zip(busy[:-1], busy[1:]):
        a2, b2 = max(a, lo_win) + FAULT_MARGIN_S, min(b, hi_win) - FAULT_MARGIN_S
        if b2 - a2 >= FAULT_S and (best is None or b2 - a2 > best[1] - best[0]):
            best = (a2, b2)
    if best is None:
        raise ValueError("no quiet stretch long enough for the fault episode")
    f_mid = 0.5 * (best[0] + best[1])
    f0 = int(np.searchsorted(t, f_mid - FAULT_S / 2))
    f1 = f0 + int(FAULT_S * rate_hz)  # exclusive
    fault = np.zeros(n, dtype=bool)
    fault[f0:f1] = True

    # Spikes: at contactor operations (switching surge) and a few at random instants.
    spikes: list[tuple[int, float]] = []
    for j, i_sw in enumerate(sorted(int(np.searchsorted(t, ts)) for ts in switch_t)):
        if spike_u[j % spike_u.size] < SPIKE_AT_SWITCH_P:
            spikes.append((i_sw, float(spike_amp[j % (RUN_POOL * 2)])))
    for j, ts in enumerate(spike_t):
        spikes.append((int(np.searchsorted(t, ts)), float(spike_amp[RUN_POOL * 2 + j])))
    spikes = sorted((i, a) for i, a in spikes if not (f0 - 1 <= i <= f1))
    for i, a in spikes:
        level_ma[i] += a
    level_ma[fault] = FAULT_MA + LEVEL_WHITE_SIGMA_MA * fault_noise[: f1 - f0]

    # --- pump current ------------------------------------------------------------------------------
    i_true = np.zeros(n)
    run_truth = []
    for k, (s, e) in enumerate(runs):
        e_idx = n if e is None else e
        tr = t[s:e_idx] - t[s]
        i_run = I_BASE_A + I_PER_LPS_A * q_in[s:e_idx]
        i_nominal = I_BASE_A + I_PER_LPS_A * q_ss_pool[k % RUN_POOL]
        ratio, t_up = inrush_pool[k % RUN_POOL], run_up_pool[k % RUN_POOL]
        i_lr = ratio * i_nominal * (1.0 - 0.12 * np.minimum(tr, t_up) / t_up)  # falls as slip falls
        i_lr_end = ratio * i_nominal * 0.88
        after = i_run + (i_lr_end - i_run) * np.exp(-np.maximum(tr - t_up, 0.0) / INRUSH_DECAY_S)
        i_true[s:e_idx] = np.where(tr < t_up, i_lr, after)
        run_truth.append({"k": k, "s": s, "e": e, "ratio": ratio, "t_up": t_up, "i_nominal": i_nominal})
    a_ct = math.exp(-dt / CT_LAG_S)
    i_meas = signal.lfilter([1.0 - a_ct], [1.0, -a_ct], i_true)
    running = i_true > 0.0
    ripple = I_RIPPLE_A * _tone(t, 2.0 * MAINS_HZ, i_phase[0]) + I_PULSATION_A * _tone(t, I_PULSATION_HZ, i_phase[1])
    pump_a = np.where(
        running,
        i_meas + ripple + I_RUN_SIGMA_A * i_noise,
        np.maximum(i_meas + I_OFF_OFFSET_A + I_OFF_SIGMA_A * i_off, 0.0),
    )

    # --- paddle-wheel flow sensor ------------------------------------------------------------------
    flow_hz = np.where(q_in > Q_STALL_LPS, K_PULSES_PER_L * q_in, 0.0)
    phase = phase0 + np.concatenate(([0.0], np.cumsum(flow_hz[:-1]) * dt))
    flow_clean = (np.mod(phase, 1.0) < PULSE_DUTY).astype(np.int8)
    bounced = flow_clean.copy()
    edges = np.flatnonzero(np.diff(flow_clean)) + 1  # index of the first sample of the new level
    next_edge = np.append(edges[1:], n)
    n_glitch = rng.choice(3, size=edges.size, p=BOUNCE_P)
    g_start = rng.integers(1, 3, size=edges.size)  # 1 or 2 samples after the edge
    g_len = rng.integers(1, 4, size=edges.size)  # 1-3 samples
    glitches = 0
    for j in np.flatnonzero(n_glitch):  # loop over sparse edges only
        e0, room = edges[j], next_edge[j] - edges[j]
        old = 1 - flow_clean[e0]
        if n_glitch[j] == 1:
            pieces = [(int(g_start[j]), int(g_len[j]))]
        else:
            pieces = [(1, 1), (3, 1)]
        for off, ln in pieces:
            ln = min(ln, BOUNCE_WINDOW - off)
            if ln >= 1 and off + ln < room:  # keep at least one sample of the new level after it
                bounced[e0 + off : e0 + off + ln] = old
                glitches += 1
    flow_v = np.where(bounced == 1, FLOW_HIGH_V, FLOW_LOW_V) + FLOW_SIGMA_V * flow_noise
    flow_v = np.clip(flow_v, 0.0, ADC_FULL_SCALE_V)

    raw = np.column_stack([t_ms.astype(float), level_ma, pump_a, flow_v])

    # --- truth ---------------------------------------------------------------------------------------
    def r(x: float, nd: int = 4) -> float:
        return float(round(float(x), nd))

    def pulses_between(i0: int, i1: int) -> int:
        """Rising edges of the clean train in samples [i0, i1): integer crossings of the phase."""
        i1 = min(i1, n)
        return int(math.floor(phase[i1 - 1]) - math.floor(phase[i0 - 1] if i0 > 0 else phase0))

    pump_runs, flow_runs = [], []
    for j, rt in enumerate(run_truth):
        s, e = rt["s"], rt["e"]
        e_idx = n if e is None else e
        win_end = runs[j + 1][0] if j + 1 < len(runs) else n
        last = slice(max(s, e_idx - int(5.0 * rate_hz)), e_idx)
        settled = slice(min(s + int(1.0 * rate_hz), e_idx), e_idx)
        pump_runs.append(
            {
                "start": r(t[s], 3),
                "stop": None if e is None else r(t[e], 3),
                "run_up_s": r(rt["t_up"]),
                "inrush_peak_a": r(np.max(i_meas[s:e_idx]), 3),
                "running_a": r(rt["i_nominal"], 3),
            }
        )
        flow_runs.append(
            {
                "start": r(t[s], 3),
                "pulses": pulses_between(s, win_end),
                "q_settled_lps": r(q_ss_pool[j % RUN_POOL]),
                "f_settled_hz": r(K_PULSES_PER_L * q_ss_pool[j % RUN_POOL]),
                "f_max_hz": r(np.max(flow_hz[s:win_end])),
                "f_min_settled_hz": r(np.min(flow_hz[settled])),
                "f_last5s_hz": r((phase[last.stop - 1] - phase[last.start]) / ((last.stop - 1 - last.start) * dt)),
            }
        )
    on_time = sum(((n if e is None else e) - s) for s, e in runs) * dt
    v_in = float(np.sum(q_in) * dt)
    v_out = float(np.sum(q_out) * dt)
    truth: dict[str, Any] = {
        "station": STATION,
        "seed": seed,
        "rate_hz": rate_hz,
        "duration_s": duration_s,
        "rows": n,
        "columns": HEADER.split(","),
        "time": {"column": "t_ms", "scale_s": 0.001, "t0_ms": int(t_ms[0])},
        "level": {
            "range_m": [0.0, RANGE_M],
            "range_ma": [4.0, 20.0],
            "low_mark_m": LOW_MARK_M,
            "low_mark_ma": r(low_ma),
            "high_mark_m": HIGH_MARK_M,
            "high_mark_ma": r(high_ma),
            "pump_start_level_m": START_LEVEL_M,
            "pump_stop_level_m": STOP_LEVEL_M,
            "drift_ma": LEVEL_DRIFT_MA,
            "crossings": [{"t": r(tc), "mark": m, "direction": d} for tc, m, d in crossings],
            "spikes": [{"t": r(t[i], 3), "delta_ma": r(a)} for i, a in spikes],
        },
        "fault": {
            "channel": "level_ma",
            "t_start": r(t[f0], 3),
            "t_end": r(t[f1 - 1], 3),
            "current_ma": FAULT_MA,
        },
        "pump": {
            "starts": len(runs),
            "stops": sum(e is not None for _, e in runs),
            "duty": r(on_time / (n * dt)),
            "runs": pump_runs,
        },
        "flow": {
            "k_factor_pulses_per_l": K_PULSES_PER_L,
            "pulses": pulses_between(0, n),
            "volume_l": r(v_in, 3),
            "bounce_glitches": glitches,
            "high_v": FLOW_HIGH_V,
            "low_v": FLOW_LOW_V,
            "runs": flow_runs,
        },
        "tank": {
            "litres_per_m": TANK_L_PER_M,
            "level_start_m": r(level_m[0], 6),
            "level_end_m": r(level_m[-1] + (q_in[-1] - q_out[-1]) * dt / TANK_L_PER_M, 6),
            "volume_in_l": r(v_in, 6),
            "volume_out_l": r(v_out, 6),
        },
    }
    comps = Components(t, level_m, clean_ma, pump_on, q_in, q_out, flow_hz, phase, flow_clean, i_true)
    return raw, comps, truth


def format_csv(header: str, array: np.ndarray) -> str:
    """Render rows as the recording's text: integer ms, 4 decimals for mA, 3 for A and V."""
    buf = io.StringIO()
    buf.write(header + "\n")
    fmt = "%d,%.4f,%.3f,%.3f\n"
    for row in array.tolist():
        buf.write(fmt % (int(row[0]), row[1], row[2], row[3]))
    return buf.getvalue()


def generate(
    seed: int = SEED, duration_s: float = DURATION_S, rate_hz: float = RATE_HZ
) -> tuple[str, np.ndarray, dict[str, Any]]:
    """Return ``(header, array, truth)``; ``array`` holds exactly the values the CSV holds.

    The array is parsed back from the formatted text, so ``np.loadtxt`` of the written file
    equals it bit for bit.
    """
    raw, _, truth = synthesise(seed, duration_s, rate_hz)
    text = format_csv(HEADER, raw)
    array = np.loadtxt(io.StringIO(text), delimiter=",", skiprows=1)
    return HEADER, array, truth


def truth_path_for(csv_path: Path) -> Path:
    """``x/orchard_pump.csv`` -> ``x/orchard_pump.truth.json``."""
    return csv_path.with_suffix(".truth.json")


def dump_truth(truth: dict[str, Any]) -> str:
    return json.dumps(truth, indent=2) + "\n"


def write(out: Path, seed: int = SEED, duration_s: float = DURATION_S, rate_hz: float = RATE_HZ) -> tuple[Path, Path]:
    """Write the CSV and its truth JSON; returns both paths."""
    header, array, truth = generate(seed, duration_s, rate_hz)
    out.parent.mkdir(parents=True, exist_ok=True)
    out.write_bytes(format_csv(header, array).encode("ascii"))
    tp = truth_path_for(out)
    tp.write_bytes(dump_truth(truth).encode("ascii"))
    return out, tp


def events_markdown(truth: dict[str, Any]) -> str:
    """The story's event table, as pasted into replay_data/README.md (a test keeps it current)."""
    ev: list[tuple[float, str]] = []
    for k, run in enumerate(truth["pump"]["runs"], 1):
        ev.append((run["start"], f"pump start #{k} (inrush peak {run['inrush_peak_a']:.1f} A, run-up {run['run_up_s']:.2f} s)"))
        if run["stop"] is not None:
            ev.append((run["stop"], f"pump stop #{k}"))
    for c in truth["level"]["crossings"]:
        ev.append((c["t"], f"level crosses the {c['mark']} mark, {c['direction']}"))
    f = truth["fault"]
    ev.append((f["t_start"], f"transmitter fault begins (loop at ~{f['current_ma']} mA)"))
    ev.append((f["t_end"], "transmitter fault ends (last sample at failure current)"))
    lines = ["| t (s) | event |", "| ---: | --- |"]
    lines += [f"| {tv:.3f} | {what} |" for tv, what in sorted(ev)]
    return "\n".join(lines) + "\n"


def plot_overview(path: Path, seed: int = SEED, duration_s: float = DURATION_S, rate_hz: float = RATE_HZ) -> None:
    """Whole recording plus three zooms (a mark crossing, an inrush, flow bounce), for eyeballing."""
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    header, a, truth = generate(seed, duration_s, rate_hz)
    _, comps, _ = synthesise(seed, duration_s, rate_hz)
    t = a[:, 0] * 1e-3
    fig = plt.figure(figsize=(15, 11))
    gs = fig.add_gridspec(4, 3, height_ratios=[1.2, 1, 1, 1.1])
    ax0 = fig.add_subplot(gs[0, :])
    ax0.plot(t, a[:, 1], lw=0.4, label="level_ma (recorded)")
    ax0.plot(t, comps.level_clean_ma, lw=1.0, color="k", label="clean")
    for key, c in (("low_mark_ma", "tab:orange"), ("high_mark_ma", "tab:red")):
        ax0.axhline(truth["level"][key], color=c, ls="--", lw=0.8, label=key)
    f = truth["fault"]
    ax0.axvspan(f["t_start"], f["t_end"], color="tab:red", alpha=0.15, label="fault")
    ax0.set_ylabel("mA")
    ax0.legend(loc="upper right", fontsize=7, ncol=3)
    ax1 = fig.add_subplot(gs[1, :], sharex=ax0)
    ax1.plot(t, a[:, 2], lw=0.4)
    ax1.set_ylabel("pump A")
    ax2 = fig.add_subplot(gs[2, :], sharex=ax0)
    ax2.plot(t, a[:, 3], lw=0.2)
    ax2.plot(t, comps.flow_hz / 10.0, color="tab:green", lw=1.0, label="flow Hz / 10")
    ax2.set_ylabel("flow V")
    ax2.legend(loc="upper right", fontsize=7)
    ax2.set_xlabel("t (s)")
    c0 = next(c for c in truth["level"]["crossings"] if c["mark"] == "high")
    s0 = truth["pump"]["runs"][0]["start"]
    zooms = [
        (c0["t"] - 2.0, c0["t"] + 2.0, 1, f"level at high mark, t={c0['t']:.2f}"),
        (s0 - 0.2, s0 + 1.0, 2, f"inrush at start t={s0:.2f}"),
        (s0 + 8.0, s0 + 8.4, 3, "flow pulses with bounce"),
    ]
    for col, (z0, z1, ch, title) in enumerate(zooms):
        ax = fig.add_subplot(gs[3, col])
        m = (t >= z0) & (t <= z1)
        ax.plot(t[m], a[m, ch], lw=0.7, marker="." if ch == 3 else None, ms=3)
        if ch == 1:
            ax.axhline(truth["level"]["high_mark_ma"], color="tab:red", ls="--", lw=0.8)
            ax.plot(t[m], comps.level_clean_ma[m], color="k", lw=1.0)
        if ch == 3:
            ax.plot(t[m], comps.flow_clean[m] * 3.3, color="k", lw=0.6, alpha=0.5, drawstyle="steps-post")
        ax.set_title(title, fontsize=9)
    fig.suptitle(f"{STATION} demo recording (seed {seed})")
    fig.tight_layout()
    fig.savefig(path, dpi=90)
    plt.close(fig)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description="Write the orchard-pump-2 demo recording and its truth JSON.")
    parser.add_argument("--out", type=Path, default=DEFAULT_OUT, help="CSV path (truth JSON goes beside it)")
    parser.add_argument("--seed", type=int, default=SEED)
    parser.add_argument("--duration", type=float, default=DURATION_S, help="seconds")
    parser.add_argument("--rate", type=float, default=RATE_HZ, help="samples per second")
    parser.add_argument("--plot", type=Path, help="also write an overview PNG here (needs matplotlib)")
    parser.add_argument("--events", action="store_true", help="print the event table (markdown) for the README")
    args = parser.parse_args(argv)
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    csv_path, truth_path = write(args.out, args.seed, args.duration, args.rate)
    log.info("wrote %s (%d bytes) and %s", csv_path, csv_path.stat().st_size, truth_path)
    if args.events:
        print(events_markdown(json.loads(truth_path.read_text())), end="")
    if args.plot:
        plot_overview(args.plot, args.seed, args.duration, args.rate)
        log.info("wrote %s", args.plot)
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
