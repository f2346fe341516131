"""The rate now: each live estimate carried forward from the instant it describes to the
newest sample it used.

A live estimate describes the centre of its analysis window, less the causal filters'
group delay (``time_s``); the user sees it at ``emitted_s``, half a window and more
later (4.2 s for heart rate with an 8 s window). During exercise onset or recovery the
rate moves 1-2 bpm/s, so the window-centre rate is several bpm behind the rate *now*.
The rate now forecasts the ridge over that delay with its recent slope (the delay
correction of causal heart-rate trackers; Temko, IEEE TBME 64(9), 2017, cited from
memory):

.. math:: r_{now} = r + \\tilde v \\, (t_{emitted} - t_{centre})

``v`` is the least-squares slope (standard error ``se``) of the last
:attr:`NowParams.window_s` seconds of the
rate against ``emitted_s`` (which never goes back), restarted at a jump (a change
faster than :attr:`NowParams.jump_per_s` between two hops: no heart or breathing rate
moves that fast, so it is the tracker switching to another ridge, and the slope before
it says nothing about the slope after it), and shrunk towards zero where it is small
or uncertain, ``v' = v^3 / (v^2 + \\delta^2 + (2 se)^2)``, so a steady rate is not made
noisier by the slope's own jitter, and limited to :attr:`NowParams.max_slope_per_s`. Why not a Kalman filter
with a constant-velocity state: it needs the same three choices (process noise, jump
handling, bounds) in a less readable form, and its velocity lags a ramp's start by as
much as a regression window does.

A forecast cannot see a *step*: until the tracker switches to the new ridge (5-7 s
after a step of 40 bpm) the centre rate and its slope still describe the old rate. The
newest samples already carry the new one: each hop also has an end-weighted column over
the newest :attr:`~estimators.config.RateSettings.recent_window_s` seconds of the window
(:mod:`estimators.stft`), whose peak (``recent``, describing the centre of that short
span) moves to a new rate once most of the span lies after the change. When that peak
stands more than :attr:`NowParams.recent_margin_per_min` from the forecast for
:attr:`NowParams.recent_hops` hops in a row, the newest samples say the rate is
elsewhere, and the rate now is that peak:

.. math:: r_{now} = r_{recent} \\text{ if } |r_{recent} - r_{fc}| > M
          \\text{ for the last } K \\text{ hops, else } r_{fc}

On a ramp the short column lags the rate at ``emitted_s`` by half its span (2 s, 4 bpm
at 2 bpm/s) and the forecast is better: the margin (twice the tolerance) keeps it out.
Once the tracker has switched, the centre rate jumps, the fit restarts and the forecast
and the peak agree again.

The rate now has its own confidence: the centre estimate's calibrated confidence times
the chance that the forecast's own error (the slope's standard error times the delay,
normal) stays within the tolerance, :func:`now_confidence`.

The offline twin has no delay to compensate: its rate now equals its centre rate.

:func:`rate_now_step` (per hop, with a state) and :func:`rate_now_batch` (a whole
record) are twins, tested against each other.
"""

from __future__ import annotations

import math
from collections import deque
from dataclasses import dataclass, field

import numpy as np


@dataclass(frozen=True)
class NowParams:
    """Forecast settings of one quantity, in its own units (per minute, per second).

    Attributes
    ----------
    window_s : seconds of recent estimates the slope is fitted on.
    jump_per_s : a change between two hops faster than this is a jump (restart).
    shrink_per_s : ``delta`` of the slope's shrinkage towards zero.
    max_slope_per_s : the slope is limited to +- this.
    tolerance_per_min : the tolerance the confidence of the rate now refers to.
    min_points : estimates needed after a (re)start before a slope is used.
    recent_margin_per_min : the newest samples' peak must stand further than this from
        the forecast to replace it (infinite: never).
    recent_hops : ... for this many hops in a row, ...
    recent_spread_per_min : ... over which it moved no more than this (a new rate holds
        still; a stray peak from an ectopic beat or an artifact wanders).
    """

    window_s: float
    jump_per_s: float
    shrink_per_s: float
    max_slope_per_s: float
    tolerance_per_min: float
    min_points: int = 4
    recent_margin_per_min: float = math.inf
    recent_hops: int = 2
    recent_spread_per_min: float = math.inf


HEART = NowParams(window_s=6.0, jump_per_s=6.0, shrink_per_s=0.5, max_slope_per_s=4.0,
                  tolerance_per_min=5.0, recent_margin_per_min=10.0, recent_hops=4,
                  recent_spread_per_min=10.0)
"""Heart rate. Onset and recovery of exercise move the rate 1-2 bpm/s and rarely more
than 3-4 bpm/s (common practice; the issue's 2 bpm/s): the slope is limited to 4 bpm/s,
and 6 bpm/s between hops counts as a jump. The slope is fitted on 6 s (24 hops at
0.25 s) and a slope below 0.5 bpm/s (2 bpm over the 4.2 s delay) is mostly shrunk away.
Why these and not a shorter, livelier fit: on running wrist PPG (SPC 2015 records
01-12, profile exercise-wrist) the tracked ridge wanders, and its slope over a few
seconds does not hold for the next four. Against the reference of the window centred on
each estimate's own instant, the window-centre rate read as the current rate is 3.06
bpm off (mean over records); a 3 s fit with 0.2 bpm/s shrinkage made the rate now
worse (3.48), 6 s and 0.5 bpm/s keeps it level (3.12; 10 s: 3.06) while still
following clean ramps (measured on four variants only, chosen a priori; no
per-record fit). The newest samples' peak replaces the forecast when it stands more than
10 bpm (twice the tolerance) from it for 4 hops (1 s) in a row and moves less than 10 bpm
over them: twice the tolerance because the short column's own error at a steady rate is
a few bpm and its lag on a 2 bpm/s ramp 4 bpm; the run and the spread keep out stray
peaks around ectopic beats and short artifacts (picked from 2-4 hops and 5-10 bpm on
BIDMC 01-12 fingertip PPG, MIT-BIH 100 ECG and the synthetic steps; not cross-validated;
there it takes over on 0.3 % of hops). Synthetic figures: ``python -m bench.rate_now``."""

BREATHING = NowParams(window_s=10.0, jump_per_s=1.0, shrink_per_s=0.05,
                      max_slope_per_s=0.2, tolerance_per_min=2.0)
"""Breathing rate, whose windows are long (32 s or more: a delay of 16 s) and whose
changes are slow (a few breaths per minute over tens of seconds; common practice): a
10 s fit, shrinkage below 0.05 /min per s (0.8 /min over the delay), slope limited to
0.2 /min per s, a jump above 1 /min per s; tolerance 2 breaths/min (common practice)."""


def params_for(quantity: str) -> NowParams:
    return HEART if quantity == "hr" else BREATHING


@dataclass
class NowState:
    """The recent (emitted_s, rate) pairs since the last jump and their running sums
    (times relative to ``anchor``, re-anchored as the window moves on), and the last
    finite rate: each estimate costs a few float operations, not a fit."""

    times: deque = field(default_factory=deque)
    rates: deque = field(default_factory=deque)
    sums: list = field(default_factory=lambda: [0.0] * 5)  # t, r, tt, tr, rr
    anchor: float = math.nan
    last_rate: float = math.nan
    last_time: float = math.nan
    apart: deque = field(default_factory=deque)  # the newest peaks in a row apart

    def copy(self) -> "NowState":
        return NowState(deque(self.times), deque(self.rates), list(self.sums), self.anchor,
                        self.last_rate, self.last_time, deque(self.apart))

    def clear(self) -> None:
        self.times.clear()
        self.rates.clear()
        self.sums = [0.0] * 5
        self.anchor = math.nan

    def _account(self, t: float, r: float, sign: float) -> None:
        u = t - self.anchor
        s = self.sums
        s[0] += sign * u
        s[1] += sign * r
        s[2] += sign * u * u
        s[3] += sign * u * r
        s[4] += sign * r * r

    def add(self, t: float, r: float, window_s: float) -> None:
        if not self.times or t - self.anchor > 4.0 * window_s:
            self.times.append(t)
            self.rates.append(r)
            self._reanchor()
        else:
            self.times.append(t)
            self.rates.append(r)
            self._account(t, r, 1.0)
        while self.times and self.times[0] <= t - window_s:
            self._account(self.times.popleft(), self.rates.popleft(), -1.0)

    def _reanchor(self) -> None:
        self.anchor = self.times[0]
        self.sums = [0.0] * 5
        for t, r in zip(self.times, self.rates):
            self._account(t, r, 1.0)

    def slope(self, min_points: int) -> tuple[float, float]:
        """The least-squares slope of the held pairs and its standard error (0, 0 with
        fewer than ``min_points`` or 3)."""
        n = len(self.times)
        if n < max(min_points, 3):
            return 0.0, 0.0
        st, sr, stt, s_tr, srr = self.sums
        sxx = stt - st * st / n
        if sxx <= 1e-12:
            return 0.0, 0.0
        sxy = s_tr - st * sr / n
        v = sxy / sxx
        ss = max(srr - sr * sr / n - v * sxy, 0.0)
        return v, math.sqrt(ss / (n - 2) / sxx)


def _slope(times: list, rates: list, min_points: int) -> tuple[float, float]:
    """Least-squares slope of ``rates`` against ``times`` and its standard error
    (0 and 0 with fewer than ``min_points``; the error is infinite-free: a perfect fit
    has error 0)."""
    n = len(times)
    if n < max(min_points, 3):
        return 0.0, 0.0
    t = np.asarray(times) - times[-1]
    r = np.asarray(rates)
    tm, rm = t.mean(), r.mean()
    sxx = float(np.sum((t - tm) ** 2))
    if sxx <= 0:
        return 0.0, 0.0
    v = float(np.sum((t - tm) * (r - rm)) / sxx)
    resid = r - (rm + v * (t - tm))
    se = math.sqrt(max(float(np.sum(resid ** 2)) / (n - 2), 0.0) / sxx)
    return v, se


SLOPE_T = 2.0
"""How many standard errors a slope must stand from zero to be carried forward in full
(the shrinkage adds ``(SLOPE_T * se)^2`` to ``delta^2``; two standard errors, the usual
significance rule of thumb, common practice)."""


def _shrunk(v: float, params: NowParams, se: float = 0.0) -> float:
    if v == 0.0:
        return 0.0
    v = v ** 3 / (v * v + params.shrink_per_s ** 2 + (SLOPE_T * se) ** 2)
    return min(max(v, -params.max_slope_per_s), params.max_slope_per_s)


def now_confidence(confidence: float, slope_se: float, delay_s: float,
                   params: NowParams) -> float:
    """``confidence`` times ``P(|N(0, (slope_se * delay_s)^2)| <= tolerance)``: the
    centre estimate right and the forecast's own error within the tolerance, taken as
    independent (an approximation: both fail together during fast changes, so it is,
    if anything, optimistic there; checked against the references in the bench)."""
    if not math.isfinite(confidence):
        return confidence
    spread = abs(slope_se * delay_s)
    if spread == 0.0:
        return confidence
    return confidence * math.erf(params.tolerance_per_min / (spread * math.sqrt(2.0)))


def _with_recent(apart: deque, params: NowParams, forecast: float, recent: float) -> float:
    """The forecast, or the newest samples' peak where it has stood apart for the last
    ``recent_hops`` hops and moved no more than ``recent_spread_per_min`` over them
    (``apart``, the last peaks of the run apart, advanced in place; a peak within the
    margin, or none, ends the run)."""
    if math.isfinite(recent) and abs(recent - forecast) > params.recent_margin_per_min:
        apart.append(recent)
        if len(apart) > params.recent_hops:
            apart.popleft()
    else:
        apart.clear()
    if (len(apart) >= params.recent_hops
            and max(apart) - min(apart) <= params.recent_spread_per_min):
        return recent
    return forecast


def rate_now_step(state: NowState, params: NowParams, emitted_s: float, rate: float,
                  delay_s: float, confidence: float,
                  recent: float = math.nan) -> tuple[float, float]:
    """Advance ``state`` (in place) by one estimate; its ``(rate_now, confidence_now)``.
    ``recent``: the peak of the end-weighted column (NaN: none). A NaN rate gives NaN
    and leaves the state as it was."""
    if not math.isfinite(rate):
        return math.nan, math.nan
    if math.isfinite(state.last_rate):
        step_s = max(emitted_s - state.last_time, 1e-9)
        if abs(rate - state.last_rate) > params.jump_per_s * max(step_s, 0.25):
            state.clear()
    state.last_rate, state.last_time = rate, emitted_s
    state.add(emitted_s, rate, params.window_s)
    v, se = state.slope(params.min_points)
    forecast = rate + _shrunk(v, params, se) * delay_s
    return (_with_recent(state.apart, params, forecast, recent),
            now_confidence(confidence, se if v != 0.0 else 0.0, delay_s, params))


def rate_now_batch(emitted_s: np.ndarray, rate: np.ndarray, delay_s: np.ndarray,
                   confidence: np.ndarray, params: NowParams,
                   recent: np.ndarray | None = None) -> tuple[np.ndarray, np.ndarray]:
    """The batch twin of :func:`rate_now_step` over one record's estimates (one output,
    in hop order): each estimate's fit window found by search on the finite rates,
    restarted after the last jump before it; the newest samples' peak (``recent``,
    None: none) replaces the forecast after runs of ``recent_hops`` estimates apart."""
    emitted_s = np.asarray(emitted_s, dtype=np.float64)
    rate = np.asarray(rate, dtype=np.float64)
    finite = np.flatnonzero(np.isfinite(rate))
    now = np.full(len(rate), np.nan)
    conf_now = np.full(len(rate), np.nan)
    if len(finite) == 0:
        return now, conf_now
    recent = (np.full(len(rate), np.nan) if recent is None
              else np.asarray(recent, dtype=np.float64))
    t, r = emitted_s[finite], rate[finite]
    run = 0  # length of the run of peaks apart ending at the current estimate
    steps = np.maximum(np.diff(t), 1e-9)
    jumps = np.abs(np.diff(r)) > params.jump_per_s * np.maximum(steps, 0.25)
    start_of = np.zeros(len(t), dtype=int)  # first index of each estimate's segment
    for k in range(1, len(t)):
        start_of[k] = k if jumps[k - 1] else start_of[k - 1]
    for k in range(len(t)):
        first = max(start_of[k], int(np.searchsorted(t, t[k] - params.window_s, side="right")))
        v, se = _slope(t[first:k + 1].tolist(), r[first:k + 1].tolist(), params.min_points)
        i = finite[k]
        forecast = r[k] + _shrunk(v, params, se) * delay_s[i]
        apart = (np.isfinite(recent[i])
                 and abs(recent[i] - forecast) > params.recent_margin_per_min)
        run = run + 1 if apart else 0
        last = recent[finite[k - params.recent_hops + 1:k + 1]] if run >= params.recent_hops \
            else None
        steady = last is not None and last.max() - last.min() <= params.recent_spread_per_min
        now[i] = recent[i] if steady else forecast
        conf_now[i] = now_confidence(float(confidence[i]), se if v != 0.0 else 0.0,
                                     float(delay_s[i]), params)
    return now, conf_now


def _with_now(e, now: float, confidence: float):
    """The estimate ``e`` with its rate now and that rate's confidence (a new record,
    built field by field: ``dataclasses.replace`` costs several times as much, and this
    runs for every estimate)."""
    return type(e)(e.quantity, e.source, e.time_s, e.emitted_s, e.rate_per_min,
                   e.confidence, e.quality, e.evidence, now, confidence,
                   e.recent_rate_per_min)


@dataclass(frozen=True)
class RateNow:
    """Stage (:mod:`estimators.stage`): the estimates of one output, in hop order, with
    their rate now and its confidence (:func:`rate_now_step` per estimate, state
    :class:`NowState`). Input and output are lists of
    :class:`~estimators.estimate.Estimate`; :meth:`batch` is :func:`rate_now_batch`."""

    params: NowParams

    def initial_state(self) -> NowState:
        return NowState()

    def step(self, state: NowState, estimates: list) -> tuple[NowState, list]:
        if not estimates:  # nothing to advance: the state as it was (never changed)
            return state, []
        state = state.copy()
        out = []
        for e in estimates:
            now, conf = rate_now_step(state, self.params, e.emitted_s, e.rate_per_min,
                                      e.delay_s, e.confidence, e.recent_rate_per_min)
            out.append(_with_now(e, now, conf))
        return state, out

    def batch(self, estimates: list) -> list:
        if not estimates:
            return []
        column = (lambda name: np.array([getattr(e, name) for e in estimates], dtype=float))
        now, conf = rate_now_batch(column("emitted_s"), column("rate_per_min"),
                                   column("delay_s"), column("confidence"), self.params,
                                   column("recent_rate_per_min"))
        return [_with_now(e, n, c) for e, n, c in zip(estimates, now.tolist(), conf.tolist())]

    def split(self, estimates: list, bounds) -> list:
        edges = [0, *[int(b) for b in bounds], len(estimates)]
        return [estimates[lo:hi] for lo, hi in zip(edges[:-1], edges[1:])]

    def join(self, parts) -> list:
        return [e for part in parts for e in part]
