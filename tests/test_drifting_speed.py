"""The drifting-grating analysis restructured for speed (issue 17) gives the same numbers as before.

:func:`map2d.gratings.analyze_drifting` now reads only the spikes of the drifting block, bins them by
runs of sorted spikes, draws the DSI resamples of all cells from one stream in the former order and
takes the bootstrap quantiles of all cells at once. ``tests/reference_drifting.py`` keeps the former
implementation; with the same seeds every field of the result must be equal (bit for bit, NaN where
NaN; the only tolerance is none). Sessions: the small simulated ones of ``conftest.py``, spikes with
non-consecutive cell ids and unsorted spike times, traces with missing samples.
"""

from __future__ import annotations

import numpy as np
import pytest

import reference_drifting as ref
from map2d.contract import Spikes, Traces
from map2d.gratings import analyze_drifting


def _assert_same(a, b):
    for name, v in a.__dict__.items():
        w = b.__dict__[name]
        if isinstance(v, np.ndarray):
            assert v.shape == w.shape, name
            if v.dtype == object:
                assert (v == w).all(), name
            else:
                assert np.array_equal(v, w, equal_nan=True), name
        elif isinstance(v, float) and np.isnan(v):
            assert np.isnan(w), name
        else:
            assert v == w, name


def _spikes_variant(sp: Spikes) -> Spikes:
    """Non-consecutive cell ids, a silent cell, and the spike times out of order."""
    rng = np.random.default_rng(3)
    ids = np.append(sp.cell_ids * 3 + 5, 1000)
    order = rng.permutation(sp.time_s.size)
    return Spikes(time_s=sp.time_s[order], cell=(sp.cell * 3 + 5)[order], cell_ids=ids)


@pytest.mark.parametrize("variant", ["as simulated", "ids and order"])
def test_drifting_spikes_equal_the_former_implementation(small_spikes_session, variant):
    s, _ = small_spikes_session
    sp = s.responses if variant == "as simulated" else _spikes_variant(s.responses)
    for latency in ("auto", 0.03):
        new = analyze_drifting(sp, s.gratings, latency_s=latency, n_boot=300, rng=5)
        old = ref.analyze_drifting(sp, s.gratings, latency_s=latency, n_boot=300, rng=5)
        _assert_same(new, old)
    assert np.isfinite(new.dsi_ci_low).sum() >= 3 and np.isfinite(new.f1_f0_ci_low).sum() >= 3


def test_drifting_traces_equal_the_former_implementation(small_traces_session):
    s, _ = small_traces_session
    vals = np.array(s.responses.values, float)
    vals[2, ::7] = np.nan                       # missing samples: trials left out, unequal resamples
    tr = Traces(values=vals, times_s=s.responses.times_s)
    new = analyze_drifting(tr, s.gratings, n_boot=200, rng=1)
    old = ref.analyze_drifting(tr, s.gratings, n_boot=200, rng=1)
    _assert_same(new, old)
    assert np.isfinite(new.dsi_ci_low).sum() >= 3
