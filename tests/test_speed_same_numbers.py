"""The drifting-grating analysis and the flashed-grating signal test, restructured for speed (issue
17), give the same numbers as before.

:func:`map2d.gratings.analyze_drifting` now reads only the spikes of the drifting block, bins them by
runs of sorted spikes, draws the DSI resamples of all cells from one stream in the former order and
takes the bootstrap quantiles of all cells at once. ``tests/reference_drifting.py`` keeps the former
implementation; with the same seeds every field of the result must be equal (bit for bit, NaN where
NaN; the only tolerance is none). Sessions: the small simulated ones of ``conftest.py``, spikes with
non-consecutive cell ids and unsorted spike times, traces with missing samples.

:func:`map2d.analysis.flashed_signal_p` computes once what a permutation of the condition sequence
cannot change (every condition's count: the fit over phase and its noise gain, the group layout);
``tests/reference_signal_p.py`` keeps the former code, which redid everything per permutation.
"""

from __future__ import annotations

import numpy as np
import pytest

import reference_drifting as ref
import reference_signal_p as ref_p
from map2d.analysis import flashed_signal_p
from map2d.contract import Spikes, Traces
from map2d.gratings import analyze_drifting, analyze_flashed


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
    # each cell's decay given (the former code had no per-cell estimate from the offsets: without a
    # given decay the two differ by design)
    tau = np.linspace(0.3, 0.8, vals.shape[0])
    new = analyze_drifting(tr, s.gratings, n_boot=200, rng=1, trace_tau_s=tau)
    old = ref.analyze_drifting(tr, s.gratings, n_boot=200, rng=1, trace_tau_s=tau)
    _assert_same(new, old)
    assert np.isfinite(new.dsi_ci_low).sum() >= 3


@pytest.mark.parametrize("kind", ["spikes", "traces with missing samples"])
def test_flashed_signal_p_equals_the_former_implementation(small_spikes_session, small_traces_session, kind):
    s, _ = small_spikes_session if kind == "spikes" else small_traces_session
    resp = s.responses
    if kind != "spikes":
        vals = np.array(resp.values, float)
        vals[1, 5::11] = np.nan
        t0 = float(s.gratings.onset_s.min())
        vals[4, (resp.times_s > t0 + 20.0) & (resp.times_s < t0 + 24.0)] = np.nan   # whole frames missing
        resp = Traces(values=vals, times_s=resp.times_s)
    fl = analyze_flashed(resp, s.gratings, rng=0)
    cells = np.arange(resp.cell_ids.size) % 4 != 3
    new = flashed_signal_p(resp, s.gratings, fl, n_shuffles=40, rng=3, cells=cells)
    old = ref_p.flashed_signal_p(resp, s.gratings, fl, n_shuffles=40, rng=3, cells=cells)
    assert np.array_equal(new, old, equal_nan=True)
    assert np.isfinite(new).sum() >= 6


# ----------------------------------------------------------------------------------------------
# loading (map2d.contract): the same arrays, counts and ids by cheaper passes
# ----------------------------------------------------------------------------------------------
def test_npz_members_read_in_one_go_equal_numpy_and_keep_their_checksum(tmp_path):
    """Stored members are read straight from their place in the file, their CRC-32 computed over the
    bytes read (reference: numpy.load; the zip format's CRC-32, PKWARE APPNOTE 4.4.7)."""
    from map2d.contract import _load_npz
    from map2d.errors import BadInput
    rng = np.random.default_rng(0)
    arrays = {"time_s": rng.random(5000), "cell": rng.integers(0, 9, 5000),
              "fortran": np.asfortranarray(rng.random((30, 7))), "small": np.arange(3, dtype=np.int16)}
    np.savez(tmp_path / "a.npz", **arrays)
    np.savez_compressed(tmp_path / "b.npz", **arrays)
    for name in ("a.npz", "b.npz"):
        got = _load_npz(tmp_path, name, "file")
        assert set(got) == set(arrays)
        for k, v in arrays.items():
            assert got[k].dtype == v.dtype and np.array_equal(got[k], v)
    raw = bytearray((tmp_path / "a.npz").read_bytes())
    pos = bytes(raw).find(arrays["time_s"][2500:2502].tobytes())
    assert pos > 0
    raw[pos] ^= 0x10                                  # one flipped bit in the data of time_s
    (tmp_path / "c.npz").write_bytes(bytes(raw))
    with pytest.raises(BadInput, match="checksum"):
        _load_npz(tmp_path, "c.npz", "file")


def test_spikes_outside_counted_per_run_of_windows_as_per_spike():
    """The count over runs of overlapping windows (sorted spikes) equals the per-spike search (the
    former code, which unsorted spikes still take), on random windows that overlap, touch and nest."""
    import map2d.contract as C
    rng = np.random.default_rng(1)
    for _ in range(100):
        starts = np.sort(rng.uniform(0, 100, rng.integers(1, 30)))
        ends = starts + rng.choice([0.5, 2.0, 8.0], starts.size) * rng.random(starts.size) + 1e-3
        touch = rng.random(starts.size - 1) < 0.2                  # some windows end where the next starts
        ends[:-1][touch] = starts[1:][touch]
        t = np.sort(np.concatenate([rng.uniform(-5, 120, rng.integers(0, 300)), starts[:3], ends[:3]]))
        counts = []
        for times in (t, t[::-1].copy()):
            s = C.Session(responses=C.Spikes(time_s=times, cell=np.zeros(times.size, int), cell_ids=np.array([0])))
            saved = C._stimulus_windows
            C._stimulus_windows = lambda session: (starts, ends)
            try:
                counts.append(C.count_spikes_outside(s))
            finally:
                C._stimulus_windows = saved
        assert counts[0] == counts[1]


def test_cell_ids_by_count_equal_unique():
    from map2d.contract import _distinct
    rng = np.random.default_rng(2)
    for v in (rng.integers(-50, 50, 5000), rng.integers(0, 10**9, 5000), rng.integers(0, 7, 3000).astype(np.uint16),
              np.array([3, 1, 3]), np.zeros(0, np.int64)):
        got = _distinct(v)
        assert got.dtype == np.unique(v).dtype and np.array_equal(got, np.unique(v))


def test_all_cells_table_same_page_as_escaping_every_value():
    """The report's table of every cells.csv value escapes each distinct text once and leaves numbers
    as printed; the page is the one escaping every value gave (reference: the former loop below,
    html.escape of the standard library)."""
    import html
    from types import SimpleNamespace

    from map2d.report.html import _all_cells_table, _cell_text

    cells = {"cell": [0, 1, 2], "responsive": [True, False, None], "snr": [1.5, float("nan"), -2e-7],
             "linear_reason": ['a < b & "c"', "x" * 40 + "<", 'a < b & "c"'], "model": ["gabor", "", None],
             "n": [np.int64(3), np.float32(0.25), np.inf]}
    an = SimpleNamespace(cells=cells, cell_ids=np.arange(3))
    got = _all_cells_table(an)
    esc = lambda v: html.escape(str(v), quote=True)                                   # noqa: E731
    rows = []
    for r in range(3):
        tds = []
        for col in cells.values():
            v, t = col[r], _cell_text(col[r])
            if isinstance(v, (int, float, np.integer, np.floating)) and not isinstance(v, (bool, np.bool_)):
                tds.append(f'<td class="num">{esc(t)}</td>')
            elif len(t) > 30:
                tds.append(f'<td title="{esc(t)}">{esc(t)}</td>')
            else:
                tds.append(f"<td>{esc(t)}</td>")
        rows.append("<tr>" + "".join(tds) + "</tr>")
    assert "\n".join(rows) in got and "&lt;" in got and "&quot;" in got
