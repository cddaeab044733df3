"""Live maps of imaging traces (map2d.live.LiveTraceMaps, ``traces.txt``, ``map2d watch --trace-decay``).

The reference for every live map is the offline engine itself: :func:`map2d.maps.compute_maps` on the
frames and trace samples written so far (with the same fixed decay setting). The live sums are float64
and the offline ones float32, so maps are compared to float32 rounding (relative 1e-5 of the largest
map value), as in ``tests/test_live.py``.
"""

from __future__ import annotations

import dataclasses
import itertools

import numpy as np
import pytest

from map2d.cli import main
from map2d.contract import SparseNoise, Traces
from map2d.maps import compute_maps
from map2d.replay import replay_steps
from map2d.traces import decay_corrected
from map2d.watch import TRACES_FILE, AppendedFile, Follower, parse_trace_lines, watch_folder

from _live_check import assert_maps_equal

TAU_S = 0.3          # the simulator's indicator decay (conftest TRACES)


@pytest.fixture(scope="module")
def trace_session(simulated):
    """A 4-minute traces session (12 cells, 30-Hz imaging) with NaN samples: one cell loses 10 s, another
    every 7th sample."""
    session, truth = simulated(responses="traces", calcium_tau_s=TAU_S, minutes=4.0)
    tr = session.responses
    vals = np.array(tr.values, dtype=np.float64)
    vals[3, 100:400] = np.nan
    vals[5, ::7] = np.nan
    return dataclasses.replace(session, responses=Traces(vals, np.asarray(tr.times_s, dtype=np.float64))), truth


def offline_so_far(session, now_s, decay="off"):
    """Offline maps of the sparse noise and the trace samples written up to recording time ``now_s``
    (the replay writes samples from 1 s before the first frame)."""
    sn, tr = session.sparse_noise, session.responses
    t0 = sn.times_s[0]
    F = int(np.searchsorted(sn.times_s, t0 + now_s, side="left"))
    keep = (tr.times_s >= t0 - 1.0) & (tr.times_s < t0 + now_s)
    traces = Traces(tr.values[:, keep], tr.times_s[keep])
    if decay != "off":
        traces, _ = decay_corrected(traces, decay, resmooth=False)
    return compute_maps(traces, SparseNoise(np.asarray(sn.frames[:F]), sn.times_s[:F], sn.grid), rng=0)


@pytest.mark.parametrize("decay", ["off", TAU_S])
def test_live_trace_maps_equal_offline_maps_of_the_data_so_far(trace_session, tmp_path, decay):
    session, _ = trace_session
    folder = tmp_path / "rec"
    steps = replay_steps(session, folder, step_s=60.0, crash_at_s=90.0)
    next(steps)
    fol = Follower(folder, trace_decay=decay)
    seen = []
    for written in itertools.chain([60.0], steps):
        fol.poll()
        seen.append((written, fol.live.snapshot()))
    assert len(seen) == 5                                     # 4 minutes in 1-minute steps + the crash
    for written, live in (seen[0], seen[2], seen[-1]):
        assert_maps_equal(live, offline_so_far(session, written, decay))
    # frames become final only once a sample at or after their end has arrived; the rest are
    # computed at each snapshot (and the maps above still equal the offline ones)
    K, F, last = fol.live.K, fol.live.F, fol.live._pt[fol.live.n_proc - 1]
    assert 0 < K < F and fol.live.times[K] <= last and (K + 1 == F or last < fol.live.times[K + 1])
    # the crash: half a frame line and half a sample line skipped as torn, resent lines recognised
    st = fol.state
    assert st.n_bad == 2 and all("torn" in r for _, _, r in st.bad_lines)
    assert st.repeated_samples == 3 and st.repeated_frames == 5
    sn, tr = session.sparse_noise, session.responses
    assert st.samples_read == int(np.sum((tr.times_s >= sn.times_s[0] - 1.0) & (tr.times_s < sn.times_s[0] + 240.0)))
    assert seen[-1][1].unit == "trace units" and seen[-1][1].responsive.any()


def test_watch_on_traces_ends_with_the_maps_of_map2d_maps(trace_session, tmp_path, capsys):
    session, _ = trace_session
    folder = tmp_path / "rec"
    for _ in replay_steps(session, folder, step_s=30.0, seconds=150.0):
        pass
    out = watch_folder(folder, idle_s=0.2, poll_s=0.05, quiet=True, trace_decay="off", fits=False)
    assert out["follower"].mode == "traces"
    off = tmp_path / "offline"
    assert main(["maps", str(folder), "--out", str(off), "--trace-decay", "off", "--no-fits", "--quiet"]) == 0
    with np.load(off / "maps.npz") as z:
        for k in ("on", "off", "linear"):
            ref = z[k]
            live = getattr(out["result"], k)
            assert np.array_equal(np.isnan(live), np.isnan(ref))
            np.testing.assert_allclose(live, ref, rtol=0, atol=1e-5 * float(np.nanmax(np.abs(ref))), err_msg=k)
            with np.load(folder / "maps" / "maps.npz") as w:             # watch's own final run
                assert np.array_equal(w[k], ref, equal_nan=True)


def test_watch_refuses_auto_decay_for_traces_with_a_fixed_value_recommended(trace_session, tmp_path, capsys):
    session, _ = trace_session
    folder = tmp_path / "rec"
    for _ in replay_steps(session, folder, step_s=30.0, seconds=30.0):
        pass
    assert main(["watch", str(folder), "--idle-s", "1", "--poll-s", "0.05"]) == 2
    err = capsys.readouterr().err
    assert "--trace-decay" in err and "auto" in err and "Traceback" not in err
    assert not (folder / "session.json").exists()


def test_half_written_trace_line_waits_and_torn_lines_are_never_misread(tmp_path):
    p = tmp_path / TRACES_FILE
    p.write_text("# start\n1.0 0.5 nan\n1.033 0.25", encoding="utf-8")
    f = AppendedFile(p)
    first, text, _ = f.read()
    t, v, bad, n = parse_trace_lines(text, None, first)
    assert t.tolist() == [1.0] and n == 2 and np.isnan(v[0, 1]) and v[0, 0] == 0.5 and bad == []
    with open(p, "a", encoding="utf-8") as fh:                # the rest of the line arrives
        fh.write(" 0.75\n1.06# writer restarted\n1.066 1 2 3\n1.1 inf 2\n1.133 x 2\n1e12 1 2\n1.166,0.5,0.5\n")
    first, text, _ = f.read()
    t, v, bad, _ = parse_trace_lines(text, n, first)
    assert t.tolist() == [1.033, 1.166] and v.tolist() == [[0.25, 0.75], [0.5, 0.5]]
    assert [no for no, _ in bad] == [4, 5, 6, 7, 8]
    assert "torn" in bad[0][1] and "expected 3 fields" in bad[1][1]
