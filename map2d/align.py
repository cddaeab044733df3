"""Responses -> one value per stimulus interval (frame or presentation), for all cells at once.

Spikes become rates (spikes/s) in each interval. Traces become the time average of the trace over
each interval, taken from the piecewise-linear interpolant of the samples, which works at any
imaging rate: when samples are dense it is the mean of the samples inside the interval, when they
are sparse it is the interpolated value at the interval (never a Python loop over samples or frames).
"""

from __future__ import annotations

import numpy as np

from .contract import Spikes, Traces

__all__ = ["interval_responses", "cell_index", "spikes_in_intervals"]


def cell_index(spikes: Spikes) -> np.ndarray:
    """Row index (into ``spikes.cell_ids``) of each spike."""
    return _rows_of(spikes.cell_ids, spikes.cell)


def _rows_of(ids, cell):
    """``numpy.searchsorted(ids, cell)``, by a subtraction for consecutive ids and by a table of the
    searches for every id in their range when that range is not much larger than the ids (the same
    numbers, without a binary search per spike)."""
    if ids.size and ids[-1] - ids[0] == ids.size - 1:         # consecutive ids: no search needed
        return cell - ids[0]
    if ids.size and cell.size > 4 * ids.size:
        lo, hi = int(ids.min()), int(ids.max())
        if hi - lo <= 4 * ids.size + 1024:
            table = np.searchsorted(ids, np.arange(lo, hi + 1))
            inside = (cell >= lo) & (cell <= hi)
            if inside.all():
                return table[cell - lo]
            return np.where(inside, table[np.clip(cell, lo, hi) - lo], np.searchsorted(ids, cell))
    return np.searchsorted(ids, cell)


def spikes_in_intervals(spikes: Spikes, starts, ends, return_index: bool = False):
    """Interval and cell row (:func:`cell_index`) of every spike inside an interval.

    A spike at ``t`` is in interval ``k``, the last one with ``starts[k] <= t``, when ``t < ends[k]``;
    spikes outside every interval are left out. Intervals are sorted by start (checked float arrays).

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        Interval index and cell row per spike kept, in the spikes' order; with ``return_index`` also
        the positions of those spikes in ``spikes`` (an index array or a slice).
    """
    t = spikes.time_s
    if starts.size and t.size and np.all(t[1:] >= t[:-1]):
        if np.array_equal(ends[:-1], starts[1:]):
            # back-to-back intervals (stimulus frames) and sorted spikes: one slice holds every spike
            # inside, and no per-spike check against the interval's end is needed
            a, b = np.searchsorted(t, [starts[0], ends[-1]], side="left")
            out = (np.searchsorted(starts, t[a:b], side="right") - 1, _rows_of(spikes.cell_ids, spikes.cell[a:b]))
            return out + (slice(a, b),) if return_index else out
        if np.all(ends[:-1] <= starts[1:]) and np.all(ends >= starts):
            # intervals apart (trials) and sorted spikes: each interval's spikes are one run of them
            a = np.searchsorted(t, starts, side="left")
            counts = np.searchsorted(t, ends, side="left") - a
            k = np.repeat(np.arange(starts.size), counts)
            idx = np.arange(k.size) + np.repeat(a - (np.cumsum(counts) - counts), counts)
            out = (k, _rows_of(spikes.cell_ids, spikes.cell[idx]))
            return out + (idx,) if return_index else out
    k = np.searchsorted(starts, t, side="right") - 1
    ok = k >= 0
    ok[ok] &= t[ok] < ends[k[ok]]
    out = (k[ok], cell_index(spikes)[ok])
    return out + (np.flatnonzero(ok),) if return_index else out


def _check_intervals(starts_s, ends_s):
    starts = np.asarray(starts_s, dtype=np.float64)
    ends = np.asarray(ends_s, dtype=np.float64)
    if starts.ndim != 1 or starts.shape != ends.shape:
        raise ValueError("starts_s and ends_s must be 1-D arrays of equal length")
    if np.any(ends <= starts):
        raise ValueError("every interval must end after it starts")
    if np.any(np.diff(starts) < 0):
        raise ValueError("intervals must be sorted by start")
    return starts, ends


def _spike_rates(spikes: Spikes, starts, ends, frame_major: bool = False) -> np.ndarray:
    """Spike rate of every cell in every interval: (cells, n), or (n, cells) with ``frame_major``.

    Each spike adds ``1 / duration`` of its interval to one element of a float32 array allocated
    once (no full-size temporaries: on large sessions fresh memory costs more than the arithmetic).
    """
    n_cells, n = spikes.cell_ids.size, starts.size
    shape = (n, n_cells) if frame_major else (n_cells, n)
    if n == 0 or spikes.time_s.size == 0:
        return np.zeros(shape, dtype=np.float32)
    k, rows = spikes_in_intervals(spikes, starts, ends)
    rate = (1.0 / (ends - starts)).astype(np.float32)
    out = np.zeros(shape, dtype=np.float32)
    flat = k * n_cells + rows if frame_major else rows * n + k
    np.add.at(out.reshape(-1), flat, rate[k])
    return out


def _cumulative_integral(times, values):
    """Integral of the piecewise-linear interpolant from ``times[0]`` to each sample, (cells, samples)."""
    h = np.diff(times)
    seg = 0.5 * (values[:, 1:] + values[:, :-1]) * h
    out = np.zeros(values.shape, dtype=np.float64)
    np.cumsum(seg, axis=1, out=out[:, 1:])
    return out


def _integral_at(times, values, cum, t):
    """Integral of the interpolant from ``times[0]`` to each of ``t`` (clipped to the sampled span)."""
    t = np.clip(t, times[0], times[-1])
    k = np.clip(np.searchsorted(times, t, side="right") - 1, 0, times.size - 2)
    h = times[k + 1] - times[k]
    dt = t - times[k]
    v0, v1 = values[:, k], values[:, k + 1]
    return cum[:, k] + v0 * dt + (v1 - v0) * dt * dt / (2 * h)


def _trace_means(traces: Traces, starts, ends) -> np.ndarray:
    times = traces.times_s
    vals = np.asarray(traces.values, dtype=np.float64)
    n_cells = vals.shape[0]
    if times.size < 2:
        return np.full((n_cells, starts.size), np.nan, dtype=np.float32)
    valid = np.isfinite(vals)
    w = valid.astype(np.float64)
    v = np.where(valid, vals, 0.0)
    cum_v = _cumulative_integral(times, v)
    cum_w = _cumulative_integral(times, w)
    num = _integral_at(times, v, cum_v, ends) - _integral_at(times, v, cum_v, starts)
    den = _integral_at(times, w, cum_w, ends) - _integral_at(times, w, cum_w, starts)
    # an interval that lies outside the sampled span has no data
    outside = (ends <= times[0]) | (starts >= times[-1])
    with np.errstate(invalid="ignore", divide="ignore"):
        out = np.where(den > 1e-9 * (ends - starts), num / den, np.nan)
    out[:, outside] = np.nan
    return out.astype(np.float32)


def interval_responses(responses: Spikes | Traces, starts_s, ends_s) -> np.ndarray:
    """Response of every cell in every interval.

    Parameters
    ----------
    responses : Spikes or Traces
    starts_s, ends_s : array_like, shape (n,)
        Interval bounds in seconds, sorted by start, each ``end > start``.

    Returns
    -------
    numpy.ndarray, float32, shape (cells, n)
        Spike rate (spikes/s) for spikes; time-averaged trace value for traces (NaN where an
        interval holds no valid sample). Rows follow ``responses.cell_ids``.

    Examples
    --------
    >>> from map2d.contract import Spikes
    >>> s = Spikes(time_s=np.array([0.05, 0.12, 0.15, 0.31]), cell=np.array([0, 0, 1, 0]))
    >>> interval_responses(s, [0.0, 0.1, 0.2], [0.1, 0.2, 0.3])
    array([[10., 10.,  0.],
           [ 0., 10.,  0.]], dtype=float32)
    """
    starts, ends = _check_intervals(starts_s, ends_s)
    if isinstance(responses, Spikes):
        return _spike_rates(responses, starts, ends)
    return _trace_means(responses, starts, ends)
