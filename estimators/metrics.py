"""Agreement between estimated rates and a reference: pure numerics, no I/O.

Everything here works on plain float64 arrays of times (seconds) and rates (events per
minute). The functions are small and independent so that a report can combine them:

* reference rates from event times (:func:`instantaneous_rate`, :func:`rate_from_events`);
* pairing two time series (:func:`align`) and finding their relative delay
  (:func:`best_lag`);
* the agreement statistics themselves (:func:`agreement`), the share of rows that carry
  a rate (:func:`coverage`) and how the error depends on the reported confidence
  (:func:`calibration`).

NaN means "no value" throughout: rows where either side is NaN are dropped from
statistics, never turned into zeros.
"""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass

import numpy as np
from scipy import stats

from estimators.errors import ParameterError

HR_TOLERANCE_ABS = 5.0
"""Absolute part of the heart-rate tolerance, beats per minute.

ANSI/AAMI EC13 (cardiac monitors) asks a displayed heart rate to be within 10 % or
5 bpm of the true rate, whichever is greater (cited from memory)."""

HR_TOLERANCE_REL = 0.10
"""Relative part of the heart-rate tolerance (fraction of the reference), see
:data:`HR_TOLERANCE_ABS`."""


def _as_1d(name: str, values) -> np.ndarray:
    array = np.asarray(values, dtype=np.float64)
    if array.ndim != 1:
        raise ParameterError(f"{name} must be 1-D, got shape {array.shape}")
    return array


def _check_events(event_times_s) -> np.ndarray:
    events = _as_1d("event_times_s", event_times_s)
    if not np.all(np.isfinite(events)):
        raise ParameterError("event_times_s must be finite (no NaN or inf)")
    if events.size > 1 and not np.all(np.diff(events) > 0):
        k = int(np.argmax(~(np.diff(events) > 0)))
        raise ParameterError(
            f"event_times_s must be strictly increasing; event {k + 1} "
            f"({float(events[k + 1])!r} s) is not after event {k} ({float(events[k])!r} s)"
        )
    return events


# --------------------------------------------------------------------------- references


def instantaneous_rate(event_times_s) -> tuple[np.ndarray, np.ndarray]:
    """Rate from each interval between consecutive events.

    Parameters
    ----------
    event_times_s : array_like, shape (n,)
        Event times (beats or breaths) in seconds, finite and strictly increasing.

    Returns
    -------
    mid_times_s : ndarray, shape (max(n - 1, 0),)
        Midpoint of each interval, ``(t[i] + t[i+1]) / 2``.
    rate_per_min : ndarray, shape (max(n - 1, 0),)
        ``60 / (t[i+1] - t[i])``.

    Raises
    ------
    ParameterError
        If the times are not 1-D, finite and strictly increasing.

    Examples
    --------
    >>> mid, rate = instantaneous_rate([0.0, 1.0, 1.5])
    >>> mid.tolist(), rate.tolist()
    ([0.5, 1.25], [60.0, 120.0])
    """
    events = _check_events(event_times_s)
    if events.size < 2:
        return np.empty(0), np.empty(0)
    intervals = np.diff(events)
    return (events[:-1] + events[1:]) / 2.0, 60.0 / intervals


def rate_from_events(event_times_s, grid_s, window_s: float) -> np.ndarray:
    """Reference rate on a time grid from the events inside a window around each time.

    Parameters
    ----------
    event_times_s : array_like, shape (n,)
        Event times in seconds, finite and strictly increasing.
    grid_s : array_like, shape (m,)
        Times at which to evaluate the rate (any order; NaN gives NaN).
    window_s : float
        Window length in seconds (> 0), centred on each grid time.

    Returns
    -------
    ndarray, shape (m,)
        Rate per minute; NaN where fewer than 2 events fall inside the window.

    Raises
    ------
    ParameterError
        On bad event times or ``window_s <= 0``.

    Notes
    -----
    Only events inside the closed window ``[t - window_s/2, t + window_s/2]`` count, and so
    only intervals lying wholly inside it. With those ``j`` events at times
    ``e_1 < ... < e_j`` the mean interval telescopes to ``(e_j - e_1) / (j - 1)``, so

    .. math:: r(t) = 60 \\, \\frac{j - 1}{e_j - e_1}.

    This is the rate a window-based estimator centred on ``t`` should see; intervals cut
    by the window edges are left out rather than guessed.

    Examples
    --------
    >>> rate_from_events([0.0, 1.0, 2.0, 3.0], [1.5, 10.0], window_s=4.0).tolist()
    [60.0, nan]
    """
    events = _check_events(event_times_s)
    grid = _as_1d("grid_s", grid_s)
    if not (math.isfinite(window_s) and window_s > 0):
        raise ParameterError(f"{window_s=} must be finite and > 0")
    half = window_s / 2.0
    rate = np.full(grid.shape, np.nan)
    finite = np.isfinite(grid)
    # Index of the first event >= t - half and one past the last event <= t + half.
    first = np.searchsorted(events, grid[finite] - half, side="left")
    stop = np.searchsorted(events, grid[finite] + half, side="right")
    count = stop - first
    enough = count >= 2
    span = np.full(count.shape, np.nan)
    span[enough] = events[stop[enough] - 1] - events[first[enough]]
    out = np.full(count.shape, np.nan)
    out[enough] = 60.0 * (count[enough] - 1) / span[enough]
    rate[finite] = out
    return rate


# ---------------------------------------------------------------------------- pairing


def align(times_a, values_a, times_b, values_b, max_gap_s: float
          ) -> tuple[np.ndarray, np.ndarray]:
    """Pair series b with series a by linear interpolation of b at a's times.

    Parameters
    ----------
    times_a, values_a : array_like, shape (n,)
        The series whose times are kept (usually the estimate).
    times_b, values_b : array_like, shape (m,)
        The series to interpolate (usually the reference); ``times_b`` strictly
        increasing. NaN values count as "no sample".
    max_gap_s : float
        Largest distance (>= 0) from a time of a to the b samples used for it.

    Returns
    -------
    values_a : ndarray, shape (n,)
        A float64 copy of ``values_a``.
    b_at_a : ndarray, shape (n,)
        b at each time of a; NaN unless a finite b sample lies at that time exactly, or
        finite b samples lie on both sides of it, each within ``max_gap_s``. Nothing is
        extrapolated and nothing is bridged across a longer gap in b.

    Raises
    ------
    ParameterError
        On shape mismatches, unsorted ``times_b`` or a negative ``max_gap_s``.

    Examples
    --------
    >>> a, b = align([0.5, 1.5, 5.0], [60, 61, 62], [0, 1, 2, 3], [60, 62, 64, 66], 1.0)
    >>> a.tolist(), b.tolist()
    ([60.0, 61.0, 62.0], [61.0, 63.0, nan])
    """
    ta = _as_1d("times_a", times_a)
    va = _as_1d("values_a", values_a)
    tb = _as_1d("times_b", times_b)
    vb = _as_1d("values_b", values_b)
    if ta.shape != va.shape:
        raise ParameterError(f"times_a {ta.shape} and values_a {va.shape} must match")
    if tb.shape != vb.shape:
        raise ParameterError(f"times_b {tb.shape} and values_b {vb.shape} must match")
    if not (math.isfinite(max_gap_s) and max_gap_s >= 0):
        raise ParameterError(f"{max_gap_s=} must be finite and >= 0")
    keep = np.isfinite(tb) & np.isfinite(vb)
    tb, vb = tb[keep], vb[keep]
    if tb.size > 1 and not np.all(np.diff(tb) > 0):
        raise ParameterError("times_b must be strictly increasing")
    out = np.full(ta.shape, np.nan)
    if tb.size == 0:
        return va.copy(), out
    valid_t = np.isfinite(ta)
    t = ta[valid_t]
    after = np.searchsorted(tb, t, side="left")  # first b sample >= t
    res = np.full(t.shape, np.nan)
    exact = (after < tb.size) & (tb[np.minimum(after, tb.size - 1)] == t)
    res[exact] = vb[after[exact]]
    inner = ~exact & (after > 0) & (after < tb.size)
    lo, hi = after[inner] - 1, after[inner]
    near = (t[inner] - tb[lo] <= max_gap_s) & (tb[hi] - t[inner] <= max_gap_s)
    frac = (t[inner] - tb[lo]) / (tb[hi] - tb[lo])
    interpolated = vb[lo] + frac * (vb[hi] - vb[lo])
    res_inner = np.where(near, interpolated, np.nan)
    res[inner] = res_inner
    out[valid_t] = res
    return va.copy(), out


def best_lag(t, a, b, max_lag_s: float, step_s: float | None = None) -> float:
    """Delay of series b relative to series a that maximises their correlation.

    Parameters
    ----------
    t : array_like, shape (n,)
        Common, strictly increasing sample times of both series, seconds.
    a : array_like, shape (n,)
        The reference series (NaN = missing).
    b : array_like, shape (n,)
        The estimate series (NaN = missing).
    max_lag_s : float
        Lags from ``-max_lag_s`` to ``+max_lag_s`` are tried (> 0).
    step_s : float, optional
        Step of the even grid both series are resampled to; default the median step of
        ``t``. The returned lag is a multiple of it.

    Returns
    -------
    float
        Lag ``L`` in seconds such that ``b(t)`` best matches ``a(t - L)``. **Positive
        means b (the estimate) lags the reference**: it shows a change ``L`` seconds
        after the reference does. NaN when no lag has at least 3 paired, non-constant
        samples.

    Raises
    ------
    ParameterError
        On shape mismatches, unsorted ``t`` or a non-positive ``max_lag_s`` / ``step_s``.

    Notes
    -----
    Both series are put on the grid ``t_0 + k * step_s`` with :func:`align` (gaps stay NaN).
    For each integer shift ``s`` the score is the Pearson correlation of
    ``b[k]`` with ``a[k - s]`` over the samples where both are finite, that is the
    mean-removed cross-correlation normalised by the overlap, so that shifts with fewer
    overlapping samples are not penalised merely for their count. Ties go to the
    smallest ``|s|``.

    Examples
    --------
    >>> t = np.arange(60.0)
    >>> a = np.sin(2 * np.pi * t / 20)
    >>> b = np.sin(2 * np.pi * (t - 3) / 20)   # b is a 3 s late copy of a
    >>> best_lag(t, a, b, max_lag_s=8.0)
    3.0
    """
    tt = _as_1d("t", t)
    aa = _as_1d("a", a)
    bb = _as_1d("b", b)
    if not (tt.shape == aa.shape == bb.shape):
        raise ParameterError(f"t {tt.shape}, a {aa.shape} and b {bb.shape} must match")
    if not (math.isfinite(max_lag_s) and max_lag_s > 0):
        raise ParameterError(f"{max_lag_s=} must be finite and > 0")
    if tt.size < 3:
        return math.nan
    if not (np.all(np.isfinite(tt)) and np.all(np.diff(tt) > 0)):
        raise ParameterError("t must be finite and strictly increasing")
    if step_s is None:
        step_s = float(np.median(np.diff(tt)))
    if not (math.isfinite(step_s) and step_s > 0):
        raise ParameterError(f"{step_s=} must be finite and > 0")
    n_grid = int(math.floor((tt[-1] - tt[0]) / step_s + 1e-9)) + 1
    grid = tt[0] + step_s * np.arange(n_grid)
    # Half a step of slack so that grid points falling between samples still pair.
    gap = step_s * 1.5
    _, ga = align(grid, grid, tt, aa, gap)
    _, gb = align(grid, grid, tt, bb, gap)
    # A shift as long as the series leaves no overlap (and would wrap the slices below).
    max_shift = min(int(math.floor(max_lag_s / step_s + 1e-9)), n_grid - 1)
    shifts = np.arange(-max_shift, max_shift + 1)
    # Try shifts by increasing |s| so that a strict '>' keeps the smallest on ties.
    order = shifts[np.argsort(np.abs(shifts), kind="stable")]
    best_shift, best_score = None, -np.inf
    for s in order:
        if s >= 0:
            x, y = ga[: n_grid - s], gb[s:]
        else:
            x, y = ga[-s:], gb[: n_grid + s]
        both = np.isfinite(x) & np.isfinite(y)
        if both.sum() < 3:
            continue
        x, y = x[both] - x[both].mean(), y[both] - y[both].mean()
        denom = math.sqrt(float(np.dot(x, x)) * float(np.dot(y, y)))
        if denom == 0.0:
            continue
        score = float(np.dot(x, y)) / denom
        if score > best_score + 1e-12:
            best_shift, best_score = int(s), score
    if best_shift is None:
        return math.nan
    return best_shift * step_s


# ------------------------------------------------------------------------- statistics


def within_tolerance(estimate, reference, tolerance_abs: float = HR_TOLERANCE_ABS,
                     tolerance_rel: float = HR_TOLERANCE_REL) -> np.ndarray:
    """Whether each error is within ``max(tolerance_abs, tolerance_rel * |reference|)``.

    The defaults are the EC13-style heart-rate tolerance, see :data:`HR_TOLERANCE_ABS`.
    NaN pairs give False.

    Examples
    --------
    >>> within_tolerance([64.0, 106.0, 111.0], [60.0, 100.0, 100.0]).tolist()
    [True, True, False]
    """
    est = np.asarray(estimate, dtype=np.float64)
    ref = np.asarray(reference, dtype=np.float64)
    if est.shape != ref.shape:
        raise ParameterError(f"estimate {est.shape} and reference {ref.shape} must match")
    if not (tolerance_abs >= 0 and tolerance_rel >= 0):
        raise ParameterError(f"{tolerance_abs=} and {tolerance_rel=} must be >= 0")
    with np.errstate(invalid="ignore"):
        limit = np.maximum(tolerance_abs, tolerance_rel * np.abs(ref))
        return np.abs(est - ref) <= limit


@dataclass(frozen=True)
class Agreement:
    """Agreement statistics of paired estimate and reference rates.

    Attributes
    ----------
    n : number of pairs where both are finite.
    mae : mean absolute error.
    rmse : root mean square error.
    mape_percent : mean absolute error relative to the reference, in %, over the pairs
        with a non-zero reference.
    bias : mean of ``estimate - reference``.
    sd : sample standard deviation (ddof = 1) of ``estimate - reference``.
    loa_lower, loa_upper : 95 % limits of agreement, ``bias -/+ 1.96 sd``.
    pearson_r : Pearson correlation (``scipy.stats.pearsonr``); NaN with fewer than 3
        pairs or a side constant to within floating-point precision.
    within_tolerance : fraction of pairs within the tolerance.
    tolerance_abs, tolerance_rel : the tolerance used, ``max(abs, rel * reference)``.
    """

    n: int
    mae: float
    rmse: float
    mape_percent: float
    bias: float
    sd: float
    loa_lower: float
    loa_upper: float
    pearson_r: float
    within_tolerance: float
    tolerance_abs: float
    tolerance_rel: float

    def as_dict(self) -> dict:
        """The attributes as a plain dict of Python numbers."""
        return {name: getattr(self, name) for name in self.__dataclass_fields__}


def agreement(estimate, reference, tolerance_abs: float = HR_TOLERANCE_ABS,
              tolerance_rel: float = HR_TOLERANCE_REL) -> Agreement:
    """Agreement statistics of paired estimate and reference values.

    Parameters
    ----------
    estimate, reference : array_like, shape (n,)
        Paired values (same units); pairs with a NaN on either side are dropped.
    tolerance_abs, tolerance_rel : float
        Tolerance for :attr:`Agreement.within_tolerance`, default the EC13-style heart-rate
        tolerance (see :data:`HR_TOLERANCE_ABS`).

    Returns
    -------
    Agreement
        All statistics; NaN where undefined (e.g. no pairs, ``sd`` with one pair).

    Raises
    ------
    ParameterError
        If the arrays are not 1-D of the same length.

    Notes
    -----
    With errors :math:`e_i = x_i - y_i` over the :math:`n` finite pairs:
    MAE :math:`= \\frac{1}{n}\\sum |e_i|`, RMSE :math:`= \\sqrt{\\frac{1}{n}\\sum e_i^2}`,
    MAPE :math:`= \\frac{100}{n'}\\sum |e_i| / |y_i|` over the :math:`n'` pairs with
    :math:`y_i \\ne 0`. The limits of agreement follow Bland J.M. & Altman D.G. (1986),
    "Statistical methods for assessing agreement between two methods of clinical
    measurement", Lancet 327(8476):307-310: :math:`\\bar e \\pm 1.96\\, s_e` with
    :math:`s_e` the sample standard deviation of the differences.

    Examples
    --------
    >>> a = agreement([60.0, 62.0, 65.0], [61.0, 61.0, 61.0])
    >>> a.n, a.mae, a.bias
    (3, 2.0, 1.3333333333333333)
    """
    est = _as_1d("estimate", estimate)
    ref = _as_1d("reference", reference)
    if est.shape != ref.shape:
        raise ParameterError(f"estimate {est.shape} and reference {ref.shape} must match")
    both = np.isfinite(est) & np.isfinite(ref)
    x, y = est[both], ref[both]
    n = int(x.size)
    nan = math.nan
    if n == 0:
        return Agreement(0, nan, nan, nan, nan, nan, nan, nan, nan, nan,
                         float(tolerance_abs), float(tolerance_rel))
    err = x - y
    mae = float(np.mean(np.abs(err)))
    rmse = float(np.sqrt(np.mean(err**2)))
    nonzero = y != 0
    mape = float(100.0 * np.mean(np.abs(err[nonzero]) / np.abs(y[nonzero]))) if nonzero.any() else nan
    bias = float(np.mean(err))
    sd = float(np.std(err, ddof=1)) if n >= 2 else nan
    # 1.96: the two-sided 95 % point of the standard normal, as in Bland & Altman (1986).
    loa_lower, loa_upper = bias - 1.96 * sd, bias + 1.96 * sd
    r = _pearson_r(x, y)
    within = float(np.mean(within_tolerance(x, y, tolerance_abs, tolerance_rel)))
    return Agreement(n, mae, rmse, mape, bias, sd, loa_lower, loa_upper, r, within,
                     float(tolerance_abs), float(tolerance_rel))


def _pearson_r(x: np.ndarray, y: np.ndarray) -> float:
    """Pearson r, or NaN with fewer than 3 pairs or a side that is constant to within
    floating-point precision (where scipy warns that r would be meaningless)."""
    if x.size < 3 or np.ptp(x) == 0 or np.ptp(y) == 0:
        return math.nan
    with warnings.catch_warnings():
        warnings.simplefilter("error", stats.ConstantInputWarning)
        warnings.simplefilter("error", stats.NearConstantInputWarning)
        try:
            return float(stats.pearsonr(x, y).statistic)
        except (stats.ConstantInputWarning, stats.NearConstantInputWarning):
            return math.nan


def coverage(rate) -> float:
    """Fraction of rows that carry a rate (finite value); NaN for no rows.

    Examples
    --------
    >>> coverage([60.0, float("nan"), 61.0, 62.0])
    0.75
    """
    values = _as_1d("rate", rate)
    if values.size == 0:
        return math.nan
    return float(np.mean(np.isfinite(values)))


@dataclass(frozen=True)
class Calibration:
    """Error statistics per confidence bin.

    Attributes
    ----------
    edges : ndarray, shape (b + 1,); bin ``i`` is ``[edges[i], edges[i+1])``, the last bin
        also includes its upper edge.
    count : ndarray of int, shape (b,); pairs in each bin.
    median_abs_error : ndarray, shape (b,); NaN for an empty bin.
    fraction_within : ndarray, shape (b,); fraction within tolerance, NaN for an empty bin.
    """

    edges: np.ndarray
    count: np.ndarray
    median_abs_error: np.ndarray
    fraction_within: np.ndarray

    def rows(self) -> list[dict]:
        """One plain dict per bin (for tables and JSON)."""
        return [
            {
                "confidence_low": float(self.edges[i]),
                "confidence_high": float(self.edges[i + 1]),
                "count": int(self.count[i]),
                "median_abs_error": float(self.median_abs_error[i]),
                "fraction_within": float(self.fraction_within[i]),
            }
            for i in range(self.count.size)
        ]


def calibration(errors, confidence, bins=5, reference=None,
                tolerance_abs: float = HR_TOLERANCE_ABS,
                tolerance_rel: float = HR_TOLERANCE_REL) -> Calibration:
    """How the error depends on the reported confidence.

    Parameters
    ----------
    errors : array_like, shape (n,)
        ``estimate - reference``; NaN rows are dropped.
    confidence : array_like, shape (n,)
        Confidence in [0, 1] of each estimate; NaN rows are dropped.
    bins : int or array_like
        Number of equal-width bins on [0, 1], or increasing bin edges.
    reference : array_like, shape (n,), optional
        Reference values, needed for the relative part of the tolerance; without them only
        ``tolerance_abs`` applies.
    tolerance_abs, tolerance_rel : float
        Tolerance, as in :func:`within_tolerance`.

    Returns
    -------
    Calibration

    Raises
    ------
    ParameterError
        On shape mismatches, fewer than 1 bin or edges that do not increase.

    Notes
    -----
    A useful confidence is one whose bins show a falling median ``|error|`` and a rising
    fraction within tolerance as confidence rises.

    Examples
    --------
    >>> c = calibration([4.0, -2.0, 0.5, 0.1], [0.1, 0.3, 0.8, 0.9], bins=2)
    >>> c.count.tolist(), c.median_abs_error.tolist()
    ([2, 2], [3.0, 0.3])
    """
    err = _as_1d("errors", errors)
    conf = _as_1d("confidence", confidence)
    if err.shape != conf.shape:
        raise ParameterError(f"errors {err.shape} and confidence {conf.shape} must match")
    if np.isscalar(bins) or np.ndim(bins) == 0:
        if int(bins) != bins or int(bins) < 1:
            raise ParameterError(f"{bins=} must be a positive integer or an array of edges")
        edges = np.linspace(0.0, 1.0, int(bins) + 1)
    else:
        edges = _as_1d("bins", bins)
        if edges.size < 2 or not np.all(np.diff(edges) > 0):
            raise ParameterError("bin edges must be at least 2 increasing values")
    if reference is None:
        ref = np.zeros_like(err)
        rel = 0.0
    else:
        ref = _as_1d("reference", reference)
        if ref.shape != err.shape:
            raise ParameterError(f"reference {ref.shape} and errors {err.shape} must match")
        rel = tolerance_rel
    keep = np.isfinite(err) & np.isfinite(conf) & np.isfinite(ref)
    err, conf, ref = err[keep], conf[keep], ref[keep]
    inside = within_tolerance(ref + err, ref, tolerance_abs, rel)
    index = np.searchsorted(edges, conf, side="right") - 1
    index[conf == edges[-1]] = edges.size - 2  # close the last bin on the right
    n_bins = edges.size - 1
    count = np.zeros(n_bins, dtype=np.int64)
    median_abs = np.full(n_bins, np.nan)
    fraction = np.full(n_bins, np.nan)
    for i in range(n_bins):
        member = index == i
        count[i] = int(member.sum())
        if count[i]:
            median_abs[i] = float(np.median(np.abs(err[member])))
            fraction[i] = float(np.mean(inside[member]))
    return Calibration(edges, count, median_abs, fraction)


# ---------------------------------------------------------------------------- phases


def time_to_steady(time_s, rate, start_s: float, band: float, hold_s: float) -> float:
    """Time from ``start_s`` until the rate settles, or NaN when it never does.

    Parameters
    ----------
    time_s : array_like, shape (n,)
        Estimate times (s), increasing; usually the estimates of one phase, from a marker
        to the next.
    rate : array_like, shape (n,)
        Rates at those times; NaN (no estimate) rows are left out.
    start_s : float
        The time the phase starts (the marker), from which the result is counted.
    band : float
        Half-width (>= 0, in the rate's units) of the band around the settled rate.
    hold_s : float
        How long (>= 0, seconds) the rate must stay in the band, at least.

    Returns
    -------
    float
        ``t_i - start_s`` for the earliest estimate ``i`` (at or after ``start_s``) that
        starts a steady stretch; NaN when there is none.

    Raises
    ------
    ParameterError
        On mismatched shapes or a negative or non-finite ``band`` or ``hold_s``.

    Notes
    -----
    With the finite estimates at or after ``start_s``, ``(t_1, r_1) ... (t_n, r_n)``,
    estimate ``i`` starts a steady stretch when the rest of the phase lasts long enough
    and never leaves the band around its own median:

    .. math:: t_n - t_i \\ge \\text{hold}, \\qquad
              |r_j - \\operatorname{median}(r_i, \\dots, r_n)| \\le \\text{band}
              \\quad \\text{for all } j \\ge i.

    This is the settling time of a step response (the time after which the response
    stays within a band around its final value), with the final value read as the median
    of everything that follows, so one late outlier does not move it.

    Examples
    --------
    >>> t = [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]
    >>> time_to_steady(t, [60, 70, 80, 81, 79, 80], 0.0, band=2.0, hold_s=3.0)
    2.0
    >>> time_to_steady(t, [60, 70, 80, 81, 79, 80], 0.0, band=2.0, hold_s=4.0)
    nan
    """
    t = _as_1d("time_s", time_s)
    r = _as_1d("rate", rate)
    if t.shape != r.shape:
        raise ParameterError(f"time_s {t.shape} and rate {r.shape} must match")
    if not (math.isfinite(band) and band >= 0):
        raise ParameterError(f"{band=} must be finite and >= 0")
    if not (math.isfinite(hold_s) and hold_s >= 0):
        raise ParameterError(f"{hold_s=} must be finite and >= 0")
    keep = np.isfinite(t) & np.isfinite(r) & (t >= start_s)
    t, r = t[keep], r[keep]
    if t.size == 0:
        return math.nan
    # The latest stretch end is fixed (the phase's last estimate); scan candidate starts
    # from the earliest and stop at the first steady one. A phase holds a few thousand
    # hops at most, so the quadratic worst case is a few milliseconds.
    for i in range(t.size):
        if t[-1] - t[i] < hold_s:
            break
        rest = r[i:]
        if np.all(np.abs(rest - np.median(rest)) <= band):
            return float(t[i] - start_s)
    return math.nan
