"""Imaging traces before reverse correlation: remove the indicator's first-order decay.

A calcium trace is, to first order, the cell's spikes convolved with a decaying exponential plus
imaging noise, ``c(t_k) = a_k c(t_{k-1}) + A n_k + e_k`` with ``a_k = exp(-(t_k - t_{k-1}) / tau)``,
``n_k`` the (decay-weighted) spikes in ``(t_{k-1}, t_k]`` and ``e`` the noise: the first-order
autoregressive model of Vogelstein et al. (2010). Averaged over a stimulus frame, every frame's value
then holds the tails of all earlier responses, which is noise for reverse correlation (strongly
correlated from frame to frame, several times the variance of the responses themselves for a slow
indicator), and it moves the response into later frames. :func:`remove_decay` inverts the decay at
the imaging rate,

    ``d_k = (c_k - a_k c_{k-1}) / (1 - a_k)``,

and places ``d_k`` at the middle of its sample interval (the expected time of the spikes it holds).
The division by ``1 - a_k`` keeps the units and scale of the trace: a sustained change of firing
changes ``d`` by as much as it changes the trace's steady level, whatever the imaging rate.

The inversion amplifies white imaging noise (by ``(1 + a^2)`` in variance, against the ``1 / (1 - a^2)``
that the decay adds to the indicator's own fluctuations), so when imaging noise dominates it would
lose more than it gains. Each cell therefore gets, after the inversion, an exponential moving average
``y_k = (1 - r) d_k + r y_{k-1}`` whose coefficient ``0 <= r <= a`` minimises the noise variance under
a new response's first sample, computed from the cell's own autocovariance (its indicator variance
and its white-noise variance; :func:`decay_corrected`): ``r`` near 0 for a clean trace, near ``a`` (no
filter at all) for a noise-dominated one. The choice looks at the trace only, never at its relation
to the stimulus. The maps are then computed from ``y`` exactly as from a trace (frame averages, see
:func:`map2d.maps.frame_responses`); the shuffle null of :func:`map2d.maps.compute_maps` is computed
from the same ``y``, so the significance stays calibrated whatever the estimates.

Why at the imaging rate and not on the frame averages: inverting the decay on the frame averages,
``u_t = r_t - a r_{t-1}``, leaves the moving average that the averaging window makes (the part of a
frame's spikes that arrive after a sample is seen in the next frame), so a response splits about
evenly over its latency and the next frame. Measured on the simulator (0.4-s indicator, 30-Hz
imaging, 20-Hz frames, 10 minutes, 3 x 30 cells): median peak z over its critical value 1.27
unfiltered, 1.33 with the frame-level filter (peak one frame late in 40 % of the cells), 1.64 with
the sample-level inversion and 1.74 with the chosen moving average (peaks at the true latency). With
imaging noise 3 times larger (sd 0.1 per sample for 0.1 per spike) the plain inversion detected 28 of
78 cells against 49 unfiltered; the moving average brings it back to 47 (``tests/test_trace_maps.py``
checks the direction on short sessions).

References
----------
Vogelstein JT, Packer AM, Machado TA, Sippy T, Babadi B, Yuste R, Paninski L (2010) Fast
nonnegative deconvolution for spike train inference from population calcium imaging.
J Neurophysiol 104:3691-3704 (the first-order autoregressive calcium model).
Box GEP, Jenkins GM, Reinsel GC (2008) Time Series Analysis: Forecasting and Control, 4th ed.,
Wiley, section 6.3 (autoregressive coefficients of a mixed model from the autocovariances beyond
its moving-average order).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from .contract import Traces

__all__ = ["TraceDecay", "estimate_trace_decay", "remove_decay", "decay_corrected", "parse_trace_decay"]

_GAP_FACTOR = 1.5          # a sample interval longer than this x the median is a gap in the recording
_CELL_CHUNK = 64           # cells per block of the autocovariance sums


@dataclass
class TraceDecay:
    """The decay removed from each cell's trace.

    Attributes
    ----------
    tau_s : ndarray (cells,)
        Decay time constant used per cell, seconds (NaN: nothing removed for that cell).
    estimated_tau_s : ndarray (cells,)
        The cell's own estimate (:func:`estimate_trace_decay`); NaN where it was not reliable.
    resmooth_s : ndarray (cells,)
        Time constant of the moving average applied after the inversion (0: none; equal to
        ``tau_s``: the trace left as it is), chosen per cell by :func:`decay_corrected`.
    source : ndarray str (cells,)
        'cell' (its own estimate), 'session' (the median of the reliable cells, used for a cell
        whose own estimate is not reliable), 'given' (a time constant passed in) or 'none'.
    mode : str
        'auto', 'given' or 'off'.
    """

    tau_s: np.ndarray
    estimated_tau_s: np.ndarray
    source: np.ndarray
    mode: str
    resmooth_s: np.ndarray | None = None

    def note(self) -> str:
        """One line for the analysis notes."""
        used = np.isfinite(self.tau_s)
        if self.mode == "off" or not used.any():
            return "trace maps: indicator decay not removed" + (
                "" if self.mode == "off" else " (no cell had a reliable decay estimate)")
        med = float(np.median(self.tau_s[used]))
        n_own = int(np.sum(self.source == "cell"))
        if self.mode == "given":
            return f"trace maps: indicator decay removed with tau = {med:.3g} s (given)"
        return (f"trace maps: indicator decay removed (tau estimated per cell, median {med:.3g} s; "
                f"{n_own} of {self.tau_s.size} cells from their own trace, "
                f"{int(np.sum(self.source == 'session'))} from the session median)")


def _segments(times_s: np.ndarray) -> tuple[np.ndarray, float]:
    """Segment index of each sample (a new segment after every gap) and the median interval."""
    dt = np.diff(times_s)
    med = float(np.median(dt)) if dt.size else float("nan")
    seg = np.zeros(times_s.size, dtype=np.int64)
    if dt.size:
        np.cumsum(dt > _GAP_FACTOR * med, out=seg[1:])
    return seg, med


def _autocovariances(values: np.ndarray, seg: np.ndarray, lags: np.ndarray):
    """Autocovariance of each row at the given sample lags, over pairs inside one segment with both
    samples finite (each segment's own mean subtracted); also the number of such pairs. Returns ``g`` (cells, lags), ``g0`` (cells,),
    ``n`` (cells, lags)."""
    C, N = values.shape
    g = np.zeros((C, lags.size))
    n = np.zeros((C, lags.size))
    g0 = np.zeros(C)
    for a in range(0, C, _CELL_CHUNK):
        x = np.asarray(values[a:a + _CELL_CHUNK], dtype=np.float64)
        ok = np.isfinite(x)
        w = ok.astype(np.float64)
        x = np.where(ok, x, 0.0)
        starts = np.flatnonzero(np.concatenate([[True], seg[1:] != seg[:-1]]))
        cnt = np.add.reduceat(w, starts, axis=1)                        # (cells, segments)
        mean = np.add.reduceat(x, starts, axis=1) / np.maximum(cnt, 1)   # each segment its own level
        x = np.where(ok, x - mean[:, seg], 0.0)
        g0[a:a + x.shape[0]] = (x * x).sum(axis=1) / np.maximum(w.sum(axis=1), 1)
        for i, k in enumerate(lags):
            k = int(k)
            if k >= N:
                continue
            same = (seg[k:] == seg[:N - k]).astype(np.float64)
            g[a:a + x.shape[0], i] = (x[:, k:] * x[:, :N - k]) @ same
            n[a:a + x.shape[0], i] = (w[:, k:] * w[:, :N - k]) @ same
    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.where(n > 0, g / np.maximum(n, 1), np.nan)
    return g, g0, n


def estimate_trace_decay(traces: Traces, skip_s: float = 0.05, window_s: float = 1.0,
                         min_snr: float = 5.0, span_s=None) -> np.ndarray:
    """Decay time constant of each cell's trace from its autocovariance, seconds.

    Under the first-order model (module docstring) the trace is an autoregressive process driven by
    the spikes, plus white imaging noise: a mixed (ARMA) process whose autocovariance obeys
    ``g(k + 1) = a g(k)`` at every lag ``k`` beyond the span over which the drive itself is correlated
    (the imaging noise only adds to ``g(0)``; Box, Jenkins & Reinsel 2008, section 6.3). The drive of
    a sparse-noise experiment is correlated over about one stimulus frame, so lags from
    ``k0 = 2 + floor(skip_s / dt)`` samples are used, up to ``k0 + window_s / dt``, and ``a`` is the
    least-squares solution of ``g(k + 1) = a g(k)`` over them: ``a = sum g(k) g(k+1) / sum g(k)^2``;
    ``tau = -dt / log(a)``. The lag-1 autocorrelation of the frame averages would be biased low by
    the imaging noise and by the averaging window (both add to ``g(0)`` and ``g(1)`` only).

    Parameters
    ----------
    traces : Traces
    skip_s : float
        Span over which the drive may be correlated (the stimulus frame interval for sparse noise).
    window_s : float
        Span of lags fitted beyond the first one.
    span_s : (float, float), optional
        Use only the samples in this time span (the sparse-noise stimulus): elsewhere the drive may
        be correlated for seconds (a drifting grating held for 2 s makes the trace rise and fall
        with the trial, not with the indicator), which biases ``a`` toward 1.
    min_snr : float
        A cell's estimate is kept only when ``g(k0)`` exceeds ``min_snr`` times its standard error
        under no autocorrelation (``g(0) / sqrt(pairs)``) and ``0 < a < 0.999``; otherwise NaN (a
        trace of pure imaging noise, or a slow drift that the model does not describe).

    Returns
    -------
    ndarray (cells,)
        NaN where the decay cannot be estimated.

    Examples
    --------
    >>> rng = np.random.default_rng(0)
    >>> t = np.arange(20000) / 30.0
    >>> x = np.zeros(t.size)
    >>> kick = rng.poisson(0.2, t.size).astype(float)
    >>> for k in range(1, t.size):
    ...     x[k] = np.exp(-1 / 30.0 / 0.5) * x[k - 1] + kick[k]
    >>> tau = estimate_trace_decay(Traces(values=x[None] + rng.normal(0, 0.3, t.size), times_s=t))
    >>> bool(abs(tau[0] - 0.5) < 0.05)
    True
    """
    return _fit_decay(traces, skip_s, window_s, min_snr, span_s)[0]


def _fit_decay(traces, skip_s=0.05, window_s=1.0, min_snr=5.0, span_s=None):
    """-> tau (cells,), and the autocovariances ``g`` (cells, lags) at sample ``lags``, ``g0``, ``dt``."""
    if not (np.isfinite(skip_s) and skip_s >= 0):
        raise ValueError(f"skip_s must be >= 0, got {skip_s}")
    if not (np.isfinite(window_s) and window_s > 0):
        raise ValueError(f"window_s must be positive, got {window_s}")
    times = np.asarray(traces.times_s, dtype=np.float64)
    C = traces.values.shape[0]
    values = traces.values
    if span_s is not None:
        i0, i1 = np.searchsorted(times, [float(span_s[0]), float(span_s[1])], side="left")
        times, values = times[i0:i1], values[:, i0:i1]
    seg, dt = _segments(times)
    if times.size < 8 or not (dt > 0):
        return np.full(C, np.nan), None, None, None, dt
    k0 = 2 + int(np.floor(skip_s / dt + 1e-9))
    k1 = k0 + max(int(np.ceil(window_s / dt)), 2)
    lags = np.arange(k0, k1 + 1)
    g, g0, n = _autocovariances(values, seg, lags)
    a_num = np.nansum(g[:, :-1] * g[:, 1:], axis=1)
    a_den = np.nansum(g[:, :-1] ** 2, axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        a = a_num / a_den
        se = g0 / np.sqrt(np.maximum(n[:, 0], 1))
        ok = (g[:, 0] > min_snr * se) & (a > 0) & (a < 0.999) & (n[:, 0] > 0)
        tau = np.where(ok, -dt / np.log(np.where(ok, a, 0.5)), np.nan)
    return tau, g, g0, lags, dt


def _residual_smoothing(tau, g, g0, lags, dt):
    """Time constant ``tau_r`` of the partial re-smoothing that maximises a response's z at its lag.

    The trace is ``c = x + e``: ``x`` the indicator's autoregressive process (coefficient ``a``, variance
    ``V`` fitted as ``g(k) = V a^k`` on the same lags as ``a``), ``e`` white imaging noise of variance
    ``s_e^2 = g(0) - V``. The filter ``(1 - aB) / (1 - rB)`` (``B`` the one-sample delay, ``0 <= r <= a``)
    leaves a new response's first sample unchanged and makes the noise variance
    ``(s_x^2 + s_e^2 (a - r)^2) / (1 - r^2) + s_e^2`` with ``s_x^2 = V (1 - a^2)`` the innovation variance
    (sums of the filter's squared impulse response). ``r = 0`` is the plain inversion (best when the
    indicator's own fluctuations dominate), ``r = a`` leaves the trace as it is (best for pure imaging
    noise); ``r`` is chosen on a grid to minimise that variance, from the trace alone (never from its
    relation to the stimulus), so the choice costs no significance. Returns ``-dt / log r`` (0 for
    ``r = 0``; NaN where ``tau`` is NaN)."""
    C = tau.size
    out = np.full(C, np.nan)
    if g is None:
        return out
    a = np.exp(-dt / tau)
    ak = a[:, None] ** lags[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        V = np.nansum(g * ak, axis=1) / np.nansum(ak * ak, axis=1)
    V = np.clip(np.nan_to_num(V), 0.0, g0)
    se2 = g0 - V
    sx2 = V * (1 - a ** 2)
    frac = np.linspace(0.0, 1.0, 201)
    r = a[:, None] * frac[None, :]
    with np.errstate(invalid="ignore", divide="ignore"):
        var = (sx2[:, None] + se2[:, None] * (a[:, None] - r) ** 2) / (1 - r ** 2)
    best = np.take_along_axis(r, np.nanargmin(np.where(np.isfinite(var), var, np.inf), axis=1)[:, None], 1)[:, 0]
    with np.errstate(divide="ignore"):
        out = np.where(best > 0, -dt / np.log(np.maximum(best, 1e-300)), 0.0)
    out[~np.isfinite(tau)] = np.nan
    return out


def remove_decay(traces: Traces, tau_s, resmooth_s=None) -> Traces:
    """Invert each cell's first-order decay at the imaging rate (module docstring).

    Parameters
    ----------
    traces : Traces
    tau_s : float or array_like (cells,)
        Decay time constant per cell, seconds; NaN (or a non-positive value) leaves that cell's
        trace as it is (its samples keep their values, shifted by half an interval like the rest).
    resmooth_s : float or array_like (cells,), optional
        Time constant of an exponential moving average applied after the inversion,
        ``y_k = (1 - r) d_k + r y_{k-1}``, ``r = exp(-dt / resmooth_s)`` (``dt`` the median interval;
        restarted at every gap, a missing ``d`` counted as the cell's mean): the filter is then
        ``(1 - aB) / (1 - rB)`` up to scale, between the plain inversion (0 or None) and no
        filter at all (``resmooth_s = tau_s``); see :func:`decay_corrected` for the choice.

    Returns
    -------
    Traces
        ``d_k = (c_k - a_k c_{k-1}) / (1 - a_k)``, ``a_k = exp(-(t_k - t_{k-1}) / tau)``, at times
        ``(t_{k-1} + t_k) / 2`` (the first sample at ``t_0 - dt/2``). ``d_k`` is NaN when ``c_k`` or
        ``c_{k-1}`` is NaN, for the first sample, and for the first sample after a gap in the
        recording (an interval longer than 1.5 median intervals): a difference never pairs samples
        across a gap. float32.

    Examples
    --------
    >>> t = np.arange(6) * 0.1
    >>> c = np.array([[0.0, 1.0, np.exp(-1.0), np.exp(-2.0), np.exp(-3.0), np.exp(-4.0)]])
    >>> d = remove_decay(Traces(values=c, times_s=t), 0.1)
    >>> np.round(d.values * (1 - np.exp(-1.0)), 6) + 0.0      # one spike, in the second interval
    array([[nan,  1.,  0.,  0.,  0.,  0.]])
    >>> np.round(d.times_s, 3)
    array([-0.05,  0.05,  0.15,  0.25,  0.35,  0.45])
    """
    times = np.asarray(traces.times_s, dtype=np.float64)
    vals = traces.values
    C, N = vals.shape
    tau = np.broadcast_to(np.asarray(tau_s, dtype=np.float64), (C,))
    if N < 2:
        return Traces(values=np.full((C, N), np.nan, dtype=np.float32), times_s=times.copy(),
                      ids=traces.ids)
    seg, med = _segments(times)
    h = np.diff(times)
    after_gap = np.zeros(N, dtype=bool)
    after_gap[1:] = seg[1:] != seg[:-1]
    out = np.empty((C, N), dtype=np.float32)
    use = np.isfinite(tau) & (tau > 0)
    for a0 in range(0, C, _CELL_CHUNK):
        x = np.asarray(vals[a0:a0 + _CELL_CHUNK], dtype=np.float64)
        u = use[a0:a0 + x.shape[0]]
        t_c = np.where(u, tau[a0:a0 + x.shape[0]], 1.0)
        a = np.exp(-h[None, :] / t_c[:, None])                          # (cells, N-1)
        block = np.empty_like(x)
        block[:, 0] = np.nan
        block[:, 1:] = (x[:, 1:] - a * x[:, :-1]) / (1.0 - a)          # NaN wherever either is NaN
        block[:, after_gap] = np.nan                                      # never across a gap
        block[~u] = x[~u]                                                 # no decay given: unchanged
        if resmooth_s is not None:
            rs = np.broadcast_to(np.asarray(resmooth_s, dtype=np.float64), (C,))[a0:a0 + x.shape[0]]
            for i in np.flatnonzero(u & np.isfinite(rs) & (rs > 0)):
                block[i] = _moving_average(block[i], float(np.exp(-med / rs[i])), after_gap)
        out[a0:a0 + x.shape[0]] = block
    mid = np.empty(N)
    mid[1:] = times[1:] - 0.5 * h
    mid[0] = times[0] - 0.5 * (med if np.isfinite(med) else 0.0)
    # after a gap the midpoint would fall inside the gap: keep the half interval of a normal step
    mid[after_gap] = times[after_gap] - 0.5 * med
    return Traces(values=out, times_s=mid, ids=traces.ids)


def _moving_average(d: np.ndarray, r: float, after_gap: np.ndarray) -> np.ndarray:
    """``y_k = (1 - r) d_k + r y_{k-1}`` on each gap-free stretch, started at the mean; NaN stays NaN."""
    from scipy.signal import lfilter

    ok = np.isfinite(d)
    if not ok.any():
        return d
    mean = float(d[ok].mean())
    filled = np.where(ok, d, mean)
    starts = np.concatenate([[0], np.flatnonzero(after_gap), [d.size]])
    y = np.empty_like(d)
    for a, b in zip(starts[:-1], starts[1:]):
        if b > a:
            y[a:b] = lfilter([1 - r], [1.0, -r], filled[a:b], zi=[r * mean])[0]
    return np.where(ok, y, np.nan)


def parse_trace_decay(value) -> str | float:
    """``'auto'``, ``'off'`` or a positive time constant in seconds from a user's option.

    Raises ``ValueError`` with a short message for anything else (the CLI turns it into BadInput).

    Examples
    --------
    >>> parse_trace_decay("auto"), parse_trace_decay("OFF"), parse_trace_decay("0.4")
    ('auto', 'off', 0.4)
    """
    if isinstance(value, str):
        v = value.strip().lower()
        if v in ("auto", "off"):
            return v
        try:
            value = float(v)
        except ValueError:
            raise ValueError(f"must be 'auto', 'off' or a time constant in seconds, got {value!r}") from None
    if value is None:
        return "auto"
    value = float(value)
    if not (np.isfinite(value) and value > 0):
        raise ValueError(f"a decay time constant must be a positive number of seconds, got {value}")
    return value


def decay_corrected(traces: Traces, decay="auto", skip_s: float = 0.05, span_s=None,
                    resmooth: bool = True) -> tuple[Traces, TraceDecay]:
    """The traces that the maps use, and what was removed.

    Parameters
    ----------
    traces : Traces
    decay : 'auto', 'off' or float
        'auto': each cell's own estimate (:func:`estimate_trace_decay`) where it is reliable, the
        median of the reliable cells elsewhere; nothing removed when no cell is reliable.
        A number: that time constant (seconds) for every cell. 'off': the traces unchanged.
    skip_s, span_s :
        Passed to :func:`estimate_trace_decay` (the stimulus frame interval, and the time span of the
        sparse noise).
    resmooth : bool
        Choose per cell the moving average after the inversion that maximises a response's z at its
        lag given the cell's imaging noise (:func:`_residual_smoothing`); False: plain inversion.

    Returns
    -------
    (Traces, TraceDecay)
    """
    decay = parse_trace_decay(decay)
    C = traces.values.shape[0]
    nan = np.full(C, np.nan)
    if decay == "off":
        return traces, TraceDecay(nan, nan.copy(), np.full(C, "none", dtype=object), "off", nan.copy())
    est, g, g0, lags, dt = _fit_decay(traces, skip_s=skip_s, span_s=span_s)
    if decay == "auto":
        ok = np.isfinite(est)
        if not ok.any():
            return traces, TraceDecay(nan, est, np.full(C, "none", dtype=object), "auto", nan.copy())
        tau = np.where(ok, est, float(np.median(est[ok])))
        source = np.where(ok, "cell", "session").astype(object)
        mode = "auto"
    else:
        tau = np.full(C, float(decay))
        source = np.full(C, "given", dtype=object)
        mode = "given"
    # a cell without data (fewer than 2 finite samples) has nothing removed: no time constant shown
    empty = np.isfinite(np.asarray(traces.values, float)).sum(axis=1) < 2
    if empty.any():
        tau = np.where(empty, np.nan, tau)
        source = np.where(empty, "none", source).astype(object)
    keep = _residual_smoothing(tau, g, g0, lags, dt) if resmooth else np.zeros(C)
    return remove_decay(traces, tau, keep), TraceDecay(tau, est, source, mode, keep)
