"""Measured frame times: match a rig's measured onsets to the stimulus schedule.

The stimulus computer's schedule (the nominal onsets in ``sparse_noise_times.npy`` and
``gratings.csv``) is not what was displayed: its clock runs at a slightly different rate from the
recording's and starts at another time, displayed onsets scatter by a fraction of a millisecond, a
frame now and then appears a refresh late (the previous frame was repeated), frames are dropped, and a
photodiode or sync line misses pulses or adds spurious ones. Labs therefore measure the onset of every
displayed frame on the recording's clock. :func:`match_frame_times` pairs those measured onsets with
the nominal ones:

1. **Anchor.** The first few measured and nominal onsets are tried against each other (offset only);
   the pairing that matches the most of the first onsets wins. An extra pulse or a missing one at the
   start does not throw it off.
2. **Track.** The onsets are walked in order. Each nominal onset predicts its measured one through the
   clock model plus a running shift (median of the last three residuals), so that drift and a
   player that slips a whole refresh are followed; the nearest pulse inside a window (from 40 % of the
   interval to the previous onset before, to 60 % of the interval to the next after: frames come late,
   not early) is taken; pulses skipped over are extra, onsets without a pulse are untimed.
3. **Fit.** Offset and drift (``measured = offset + (1 + drift) * nominal``) are fitted by least
   squares to the matched pairs, trimmed at 4 robust sds (late frames and slips are left out), and
   the walk is repeated with the fitted clock.
4. **Classify.** Against a running median of the residuals (51 matched onsets): a residual more than
   ``max(6 sd, 2 ms)`` above it is a *late* frame (shown a refresh late, the previous one repeated); a
   step of the running median by as much is a *slip* (the player fell behind for good). The residual
   jitter is the robust sd (1.4826 MAD) of the on-time residuals.

Onsets alone cannot tell a dropped frame from a missed pulse: both leave a nominal onset without a
pulse, reported as *untimed*. An untimed frame is given the time the clock model predicts and left out
of the analysis; the frame before it keeps its own measured onset.

The match is refused (:class:`~map2d.errors.BadInput`) when fewer than 90 % of the nominal onsets find
a pulse or more than 10 % of the pulses are extra: the file belongs to another stimulus, or is in other
units, or the rig's pulses are unusable.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from .errors import BadInput

__all__ = ["FrameTiming", "match_frame_times", "MIN_MATCHED", "MAX_EXTRA"]

#: Least share of nominal onsets that must find a pulse, and most share of pulses that may be extra.
MIN_MATCHED, MAX_EXTRA = 0.9, 0.1


@dataclass
class FrameTiming:
    """The match of measured to nominal onsets.

    Attributes
    ----------
    measured_s : ndarray (n,)
        Measured onset of each nominal onset, NaN where untimed.
    predicted_s : ndarray (n,)
        Clock-model time of each onset (offset + (1 + drift) * nominal + the running shift); what an
        untimed frame is given.
    timed, late : ndarray of bool (n,)
    offset_s, drift : float
        ``measured = offset_s + (1 + drift) * nominal``.
    jitter_s : float
        Robust sd of the residuals of the on-time frames.
    n_slips : int
        Persistent steps of the residual (a player that fell behind by a refresh or more).
    n_extra : int
        Pulses that match no nominal onset.
    n_pulses : int
    """

    measured_s: np.ndarray
    predicted_s: np.ndarray
    timed: np.ndarray
    late: np.ndarray
    offset_s: float
    drift: float
    jitter_s: float
    n_slips: int
    n_extra: int
    n_pulses: int

    @property
    def n_untimed(self) -> int:
        return int(np.count_nonzero(~self.timed))

    def report(self) -> dict:
        """The timing summary stored in ``session.json`` (``timing``) and shown by the report."""
        return {"offset_s": round(self.offset_s, 9), "drift": float(f"{self.drift:.6g}"),
                "jitter_ms": round(1e3 * self.jitter_s, 4), "onsets": int(self.timed.size),
                "pulses": self.n_pulses, "matched": int(np.count_nonzero(self.timed)),
                "untimed": self.n_untimed, "late": int(np.count_nonzero(self.late)),
                "slips": self.n_slips, "extra_pulses": self.n_extra}

    def summary(self) -> str:
        """One line for people."""
        r = self.report()
        return (f"clock offset {r['offset_s']:.6g} s, drift {r['drift']:.3g} ({r['drift'] * 3600:.3g} s per hour), "
                f"residual jitter {r['jitter_ms']:.3g} ms; {r['matched']} of {r['onsets']} onsets matched to "
                f"{r['pulses']} pulses; {r['late']} late (a frame repeated), {r['slips']} slips, "
                f"{r['untimed']} untimed (dropped frame or missed pulse; left out), {r['extra_pulses']} extra "
                f"pulses ignored")


def _windows(nominal):
    gaps = np.diff(nominal)
    before = np.r_[gaps[:1] if gaps.size else [1.0], gaps]
    after = np.r_[gaps, gaps[-1:] if gaps.size else [1.0]]
    return 0.4 * before, 0.6 * after


def _walk(nominal, measured, offset, slope, early, late, limit=None):
    """Greedy in-order match with a running shift; returns (index of the pulse per onset or -1, n_extra)."""
    n = nominal.size if limit is None else min(limit, nominal.size)
    nom, meas = nominal[:n].tolist(), measured.tolist()
    ear, lat = early[:n].tolist(), late[:n].tolist()
    m = len(meas)
    match = [-1] * n
    r1 = r2 = r3 = None                      # the last three residuals (running shift = their median)
    shift = 0.0
    p = 0
    extra = 0
    for j in range(n):
        base = offset + slope * nom[j]
        pred = base + shift
        lo, hi = pred - ear[j], pred + lat[j]
        while p < m and meas[p] < lo:
            p += 1
            extra += 1
        if p < m and meas[p] <= hi:
            best, q = p, p + 1
            while q < m and meas[q] <= hi:
                if abs(meas[q] - pred) < abs(meas[best] - pred):
                    best = q
                q += 1
            extra += best - p
            match[j] = best
            r1, r2, r3 = r2, r3, meas[best] - base
            if r1 is None:
                shift = r3 if r2 is None else 0.5 * (r2 + r3)
            else:
                shift = r1 + r2 + r3 - min(r1, r2, r3) - max(r1, r2, r3)
            p = best + 1
    if limit is None:
        extra += m - p
    return np.asarray(match, dtype=np.int64), extra


def match_frame_times(nominal_s, measured_s, where="--frame-times") -> FrameTiming:
    """Match measured onsets (recording clock) to nominal onsets (stimulus clock); module notes.

    Parameters
    ----------
    nominal_s : array_like (n,)
        Strictly increasing nominal onsets (every sparse-noise frame and grating presentation).
    measured_s : array_like (m,)
        Strictly increasing measured onsets.
    where : str
        Names the measured file in error messages.

    Returns
    -------
    FrameTiming

    Examples
    --------
    >>> nominal = np.arange(100) * 0.05
    >>> t = match_frame_times(nominal, 12.5 + (1 + 1e-4) * np.delete(nominal, 40))
    >>> round(t.offset_s, 6), round(t.drift, 8), t.n_untimed, t.n_extra
    (12.5, 0.0001, 1, 0)
    """
    nominal = np.asarray(nominal_s, dtype=float)
    measured = np.asarray(measured_s, dtype=float)
    n, m = nominal.size, measured.size
    if n < 3:
        raise BadInput(where, None, f"the stimulus has {n} onsets; at least 3 are needed to fit a clock")
    if m < 3:
        raise BadInput(where, None, f"holds {m} times; the stimulus has {n} onsets")
    early, late = _windows(nominal)
    gn, gm = float(np.median(np.diff(nominal))), float(np.median(np.diff(measured)))
    for factor, unit in ((1e3, "milliseconds"), (1e6, "microseconds")):
        if factor / 3 <= gm / gn <= factor * 3:
            raise BadInput(where, None, f"the median interval between pulses ({gm:.6g}) is about {factor:g} times "
                                        f"the stimulus's ({gn:.6g} s): times in {unit}? (seconds are needed)")
    # 1. anchor: first onsets x first pulses, offset only
    k = min(5, n, m)
    probe = min(n, 200)
    best = None
    for i in range(k):
        for j in range(k):
            match, _ = _walk(nominal, measured[i:], measured[i] - nominal[j], 1.0, early, late, limit=probe)
            score = int(np.count_nonzero(match >= 0))
            if best is None or score > best[0]:
                best = (score, measured[i] - nominal[j])
    offset, slope = best[1], 1.0
    # 2-3. walk, fit, walk again
    for _ in range(2):
        match, extra = _walk(nominal, measured, offset, slope, early, late)
        ok = match >= 0
        if np.count_nonzero(ok) < max(3, MIN_MATCHED * n):
            break
        x, y = nominal[ok], measured[match[ok]]
        keep = np.ones(x.size, dtype=bool)
        for _ in range(3):
            slope, offset = np.polyfit(x[keep], y[keep], 1)
            r = y - (offset + slope * x)
            sd = 1.4826 * float(np.median(np.abs(r[keep] - np.median(r[keep])))) or 1e-6
            keep = np.abs(r - np.median(r[keep])) <= 4 * sd + 1e-7
    n_ok = int(np.count_nonzero(ok))
    if n_ok < MIN_MATCHED * n or extra > MAX_EXTRA * m:
        raise BadInput(where, None, f"cannot be matched to the stimulus: {n_ok} of {n} onsets found a pulse and "
                                    f"{extra} of {m} pulses matched no onset (at least {MIN_MATCHED:.0%} and at "
                                    f"most {MAX_EXTRA:.0%} are needed); are these the onsets of this stimulus, in "
                                    f"seconds, one per frame and grating presentation?")
    measured_on = np.full(n, np.nan)
    measured_on[ok] = measured[match[ok]]
    x, y = nominal[ok], measured_on[ok]
    steps, keep = np.zeros(x.size), np.ones(x.size, dtype=bool)
    for _ in range(3):      # 4. classify; refit the clock with the slips taken out, classify again
        slope, offset = np.polyfit(x[keep], (y - steps)[keep], 1) if keep.sum() >= 2 else (slope, offset)
        rm = y - (offset + slope * x)
        run = ndimage.median_filter(rm, size=min(51, rm.size), mode="nearest")
        dev = rm - run
        sd = 1.4826 * float(np.median(np.abs(dev - np.median(dev))))
        thr = max(6.0 * sd, 2e-3)
        late_ok = dev > thr
        jump = np.diff(run)
        steps = np.zeros(x.size)
        for i in np.flatnonzero(jump > thr):   # each slip's size: residuals after it minus before it
            steps[i + 1:] += np.median(rm[i + 1:i + 26]) - np.median(rm[max(i - 24, 0):i + 1])
        keep = ~late_ok & (np.abs(rm - steps - np.median(rm - steps)) <= max(6.0 * sd, 2e-3))
    on_time = ~late_ok
    jitter = 1.4826 * float(np.median(np.abs(dev[on_time] - np.median(dev[on_time])))) if on_time.any() else np.nan
    slips = int(np.count_nonzero(jump > thr))
    late_mask = np.zeros(n, dtype=bool)
    late_mask[np.flatnonzero(ok)[late_ok]] = True
    predicted = offset + slope * nominal + np.interp(np.arange(n), np.flatnonzero(ok), run)
    return FrameTiming(measured_s=measured_on, predicted_s=predicted, timed=ok, late=late_mask,
                       offset_s=float(offset), drift=float(slope - 1.0), jitter_s=float(jitter),
                       n_slips=slips, n_extra=int(extra), n_pulses=int(m))
