"""Spikes and calcium-like traces from per-frame rates, shared by the map-engine tests."""

import numpy as np
from scipy import signal

from map2d.contract import Spikes, Traces


def spikes_from_rates(noise, rates, rng):
    """Poisson spike times: per-frame counts, times uniform within each frame."""
    rng = np.random.default_rng(rng)
    starts, ends = noise.times_s, noise.frame_ends_s()
    counts = rng.poisson(rates * (ends - starts)[None])
    cell, frame = np.nonzero(counts)
    reps = counts[cell, frame]
    cell, frame = np.repeat(cell, reps), np.repeat(frame, reps)
    t = starts[frame] + rng.uniform(0, 1, frame.size) * (ends - starts)[frame]
    order = np.argsort(t)
    return Spikes(time_s=t[order], cell=cell[order], cell_ids=np.arange(rates.shape[0]))


def traces_from_rates(noise, rates, rng, fs, tau_s, noise_sd=0.05, amp=0.02):
    """Calcium-like traces: Poisson events at the imaging rate, exponential decay, Gaussian noise."""
    rng = np.random.default_rng(rng)
    t = np.arange(noise.times_s[0], noise.frame_ends_s()[-1], 1 / fs)
    k = np.clip(np.searchsorted(noise.times_s, t, side="right") - 1, 0, noise.n_frames - 1)
    events = rng.poisson(rates[:, k] / fs)
    calcium = signal.lfilter([1.0], [1.0, -np.exp(-1 / (fs * tau_s))], events, axis=1) * amp
    values = calcium + noise_sd * rng.standard_normal(calcium.shape)
    return Traces(values=values.astype(np.float32), times_s=t)
