"""Alignment of spikes and traces to stimulus frames (map2d.align.interval_responses)."""

from __future__ import annotations

import numpy as np
import pytest

from map2d.align import cell_index, interval_responses
from map2d.contract import Spikes, Traces


def test_spike_counts_per_frame_become_rates():
    starts = np.array([1.0, 1.1, 1.2, 1.35])
    ends = np.array([1.1, 1.2, 1.35, 1.5])
    t = np.array([0.5, 1.0, 1.05, 1.1, 1.19, 1.3, 1.3, 1.49, 1.5, 2.0])
    c = np.array([0, 0, 1, 0, 0, 1, 0, 0, 0, 1])
    s = Spikes(time_s=t, cell=c, cell_ids=np.array([0, 1, 5]))
    r = interval_responses(s, starts, ends)
    assert r.shape == (3, 4) and r.dtype == np.float32
    # cell 0: 1.0 -> frame 0; 1.1, 1.19 -> frame 1 (a spike on a boundary belongs to the later frame);
    # 1.3 -> frame 2; 1.49 -> frame 3; 0.5 (before) and 1.5 (at the end of the last frame) are not used
    counts0 = np.array([1, 2, 1, 1])
    np.testing.assert_allclose(r[0], counts0 / (ends - starts), rtol=1e-6)
    np.testing.assert_allclose(r[1], np.array([1, 0, 1, 0]) / (ends - starts), rtol=1e-6)
    assert np.all(r[2] == 0)                                # a listed cell without spikes
    assert cell_index(s).tolist() == [0, 0, 1, 0, 0, 1, 0, 0, 0, 1]


def test_counts_match_histogram_for_many_random_spikes():
    rng = np.random.default_rng(0)
    edges = np.cumsum(rng.uniform(0.01, 0.03, 501))
    t = np.sort(rng.uniform(edges[0] - 1, edges[-1] + 1, 20000))
    s = Spikes(time_s=t, cell=np.zeros(t.size, int))
    r = interval_responses(s, edges[:-1], edges[1:])
    hist, _ = np.histogram(t, bins=edges)                   # numpy reference
    # numpy's last bin is closed on the right; no spike lands exactly on an edge here
    np.testing.assert_allclose(r[0] * np.diff(edges), hist, rtol=1e-5, atol=1e-3)


@pytest.mark.parametrize("fs", [200.0, 31.0, 7.0])
def test_trace_mean_over_frames_at_fast_and_slow_imaging_rates(fs):
    # a trace linear in time: its piecewise-linear interpolant is exact, so each frame's mean is the
    # value at the frame's midpoint, whatever the sampling rate relative to the 20 Hz frames
    times = np.arange(0.0, 10.0, 1 / fs)
    values = np.vstack([2.0 + 0.5 * times, -times])
    tr = Traces(values=values.astype(np.float64), times_s=times)
    starts = np.arange(1.0, 8.0, 0.05)
    ends = starts + 0.05
    r = interval_responses(tr, starts, ends)
    mid = (starts + ends) / 2
    np.testing.assert_allclose(r[0], 2.0 + 0.5 * mid, rtol=1e-5)
    np.testing.assert_allclose(r[1], -mid, rtol=1e-5)


def test_fast_imaging_mean_equals_sample_mean_of_a_sine():
    fs = 1000.0
    times = np.arange(0.0, 4.0, 1 / fs)
    values = np.sin(2 * np.pi * 1.3 * times)[None]
    starts = np.arange(0.5, 3.0, 0.1)
    r = interval_responses(Traces(values=values, times_s=times), starts, starts + 0.1)
    exact = (np.cos(2 * np.pi * 1.3 * starts) - np.cos(2 * np.pi * 1.3 * (starts + 0.1))) / (2 * np.pi * 1.3 * 0.1)
    np.testing.assert_allclose(r[0], exact, atol=1e-5)      # calculus: mean of sin over an interval


def test_nan_samples_are_left_out():
    times = np.arange(0.0, 5.0, 0.01)
    values = np.ones((2, times.size))
    values[0, 150:160] = np.nan                             # a short gap inside frame [1.4, 1.7)
    values[1, 200:300] = np.nan                             # a long gap covering whole frames
    values[1, 100:200] = 3.0
    starts = np.arange(0.5, 4.0, 0.3)
    r = interval_responses(Traces(values=values, times_s=times), starts, starts + 0.3)
    assert np.all(np.isfinite(r[0]))
    np.testing.assert_allclose(r[0], 1.0, rtol=1e-6)        # the gap does not pull the mean
    inside = (starts >= 2.0) & (starts + 0.3 <= 2.99)
    assert inside.any() and np.all(np.isnan(r[1, inside]))  # no valid sample -> NaN, not invented
    frame = np.flatnonzero(np.isclose(starts, 1.1))[0]
    np.testing.assert_allclose(r[1, frame], 3.0, rtol=1e-6)


def test_frames_outside_the_imaging_span_are_nan():
    times = np.arange(1.0, 3.0, 0.05)
    tr = Traces(values=np.ones((1, times.size)), times_s=times)
    r = interval_responses(tr, [0.0, 1.5, 3.5], [0.5, 1.6, 4.0])
    assert np.isnan(r[0, 0]) and r[0, 1] == pytest.approx(1.0) and np.isnan(r[0, 2])


def test_bad_intervals_are_refused():
    s = Spikes(time_s=np.array([0.1]), cell=np.array([0]))
    with pytest.raises(ValueError, match="end after"):
        interval_responses(s, [0.0, 1.0], [1.0, 1.0])
    with pytest.raises(ValueError, match="sorted"):
        interval_responses(s, [1.0, 0.0], [1.5, 0.5])
