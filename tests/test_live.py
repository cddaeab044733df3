"""Live maps (map2d.live), the folder follower (map2d.watch), the replay tool and ``map2d watch``.

The reference for every live map is the offline engine itself: :func:`map2d.maps.compute_maps` on the
frames and spikes written so far. The live sums are float64 and the offline ones float32, so maps are
compared to float32 rounding (relative 1e-5 of the largest map value).
"""

from __future__ import annotations

import itertools
import json

import numpy as np
import pytest

from map2d.cli import build_parser, main
from map2d.contract import SparseNoise, Spikes
from map2d.geometry import Grid
from map2d.live import LiveSparseMaps, suggest_aperture
from map2d.maps import compute_maps
from map2d.replay import replay_steps
from map2d.watch import FRAME_TIMES_FILE, SPIKES_FILE, AppendedFile, Follower, parse_lines, watch_folder

from _live_check import assert_maps_equal


def offline_so_far(session, now_s):
    """The offline maps of a session's sparse noise and spikes up to recording time ``now_s``."""
    sn, sp = session.sparse_noise, session.responses
    F = int(np.searchsorted(sn.times_s, sn.times_s[0] + now_s, side="left"))
    keep = sp.time_s < sn.times_s[0] + now_s
    noise = SparseNoise(np.asarray(sn.frames[:F]), sn.times_s[:F], sn.grid)
    return compute_maps(Spikes(sp.time_s[keep], sp.cell[keep]), noise, rng=0)


@pytest.fixture(scope="module")
def replayed(small_spikes_session, tmp_path_factory):
    """The small spikes session (10 minutes) replayed in 1-minute steps with a writer crash at 5 min:
    the live maps after each step."""
    session, truth = small_spikes_session
    folder = tmp_path_factory.mktemp("live") / "rec"
    steps = replay_steps(session, folder, step_s=60.0, crash_at_s=300.0)
    next(steps)                                    # stimulus written, first minute appended
    fol = Follower(folder)
    out = []
    for written in itertools.chain([60.0], steps):
        fol.poll()
        out.append((written, fol.live.snapshot(), fol))
    return session, truth, folder, fol, out


def test_live_maps_equal_offline_maps_of_the_data_so_far(replayed):
    session, _, _, fol, out = replayed
    assert len(out) == 11                                     # 10 minutes in 1-minute steps + the crash
    for written, live, _ in out[::3] + [out[5], out[-1]]:
        assert_maps_equal(live, offline_so_far(session, written))


def test_maps_appear_in_the_first_minute_and_responsive_calls_follow_the_offline_ones(replayed):
    session, truth, _, fol, out = replayed
    first = out[0][1]
    assert first.n_cells == 12 and np.isfinite(first.on).any()
    assert (first.n_shuffles > 0).any()                        # the live null exists after 1 minute
    assert first.responsive.any()                              # strong cells are called in the first minute
    final = out[-1][1]
    off = offline_so_far(session, out[-1][0])
    # the live null (3 fixed shifts) is not the offline one (circular shifts): calls may differ only
    # for cells near the threshold
    differ = final.responsive != off.responsive
    assert differ.sum() <= 1
    near = np.abs(np.log10(np.maximum(off.p_value[differ], 1e-300) / off.alpha)) < 1.5
    assert np.all(near)


def test_a_torn_line_and_a_restarted_writer_lose_nothing(replayed):
    _, _, _, fol, _ = replayed
    st = fol.state
    # the crash left half a frame line and half a spike line; both were skipped as torn, the frames
    # sent again were recognised, and every frame of the session was read once
    assert st.n_bad == 2 and all("torn" in r for _, _, r in st.bad_lines)
    assert st.repeated_frames == 5 and st.conflicting_frames == 0
    assert fol.onsets.size == 12000


def test_half_written_line_waits_for_its_newline(tmp_path):
    p = tmp_path / "spikes.txt"
    p.write_text("# start\n1.25 3\n2.5", encoding="utf-8")
    f = AppendedFile(p)
    assert f.read() == (1, "# start\n1.25 3\n", False)
    assert f.read() == (3, "", False)
    with open(p, "a", encoding="utf-8") as fh:
        fh.write("0 7\n")
    assert f.read() == (3, "2.50 7\n", False)


def test_lines_that_do_not_parse_are_reported_never_guessed():
    lines = ["1.5 3", "1.5", "abc 2", "1.5 2.5", "1.2# writer restarted", "nan 1", "2.0,4", " 3.0\t5 ", ""]
    (t, c), bad = parse_lines("\n".join(lines), ("float", "int"), first_line=10)
    assert t.tolist() == [1.5, 2.0, 3.0] and c.tolist() == [3, 4, 5]
    assert [n for n, _ in bad] == [11, 12, 13, 14, 15]
    assert "torn" in bad[3][1]
    # a block of good lines and comments is read at once, to the same values
    good = "# writer started\n" + "\n".join(f"{v!r} {i}" for i, v in enumerate([0.1, 2.0 / 3, 1e-3, 7.0])) + "\n"
    (t, c), bad = parse_lines(good, ("float", "int"))
    assert t.tolist() == [0.1, 2.0 / 3, 1e-3, 7.0] and c.tolist() == [0, 1, 2, 3] and bad == []


def test_a_replaced_file_is_read_again_and_the_maps_rebuilt(small_spikes_session, tmp_path):
    session, _ = small_spikes_session
    folder = tmp_path / "rec"
    for _ in replay_steps(session, folder, step_s=60.0, seconds=120.0):
        pass
    fol = Follower(folder)
    fol.poll()
    # the writer restarts into a new file holding only the spikes of cells 0-5
    sp = session.responses
    sn = session.sparse_noise
    keep = (sp.cell < 6) & (sp.time_s < sn.times_s[0] + 120.0) & (sp.time_s >= sn.times_s[0])
    new = folder / "spikes.new"
    new.write_text("".join(f"{float(t)!r} {int(c)}\n" for t, c in zip(sp.time_s[keep], sp.cell[keep])),
                   encoding="utf-8")
    new.replace(folder / SPIKES_FILE)
    assert fol.poll()
    assert fol.state.restarts == 1
    F = fol.onsets.size
    off = compute_maps(Spikes(sp.time_s[keep], sp.cell[keep]),
                       SparseNoise(np.asarray(sn.frames[:F]), sn.times_s[:F], sn.grid), rng=0)
    assert_maps_equal(fol.live.snapshot(), off)


def test_frame_lines_out_of_order_repeated_or_conflicting(tmp_path):
    from map2d.contract import write_stimulus
    rng = np.random.default_rng(1)
    frames = rng.choice(np.array([-1, 0, 1], np.int8), size=(400, 4, 5), p=[.1, .8, .1])
    grid = Grid(4, 5, 0.0, 0.0, 2.0, 2.0)
    write_stimulus(tmp_path, sparse_noise=SparseNoise(frames, np.arange(400) * 0.05, grid))
    (tmp_path / FRAME_TIMES_FILE).write_text("0 0.0\n2 0.1\n1 0.05\n1 0.05\n2 0.2\n3 0.15\n5 0.25\n",
                                             encoding="utf-8")
    fol = Follower(tmp_path, min_shift_s=2.0)
    fol.poll()
    assert fol.onsets.tolist() == [0.0, 0.05, 0.1, 0.15]       # frame 4 missing: 5 waits
    assert fol.state.repeated_frames == 1 and fol.state.conflicting_frames == 1
    assert fol.state.held_frames == 1
    with open(tmp_path / FRAME_TIMES_FILE, "a", encoding="utf-8") as fh:
        fh.write("4 0.2\n")
    fol.poll()
    assert fol.onsets.tolist() == [0.0, 0.05, 0.1, 0.15, 0.2, 0.25]


def test_late_and_out_of_order_spikes_give_the_same_sums():
    rng = np.random.default_rng(2)
    frames = rng.choice(np.array([-1, 0, 1], np.int8), size=(800, 5, 6), p=[.08, .84, .08])
    grid = Grid(5, 6, 0.0, 0.0, 2.0, 2.0)
    times = np.cumsum(rng.uniform(0.045, 0.055, 800))
    t = rng.uniform(times[0] - 1, times[-1] + 1, 6000)
    c = rng.integers(10, 15, 6000)
    a = LiveSparseMaps(frames, grid, max_lag_s=0.15, frame_s=0.05, min_shift_s=5.0)
    a.add_frame_times(times)
    a.add_spikes(np.sort(t), c[np.argsort(t)])
    b = LiveSparseMaps(frames, grid, max_lag_s=0.15, frame_s=0.05, min_shift_s=5.0)
    for part in np.array_split(rng.permutation(6000), 7):            # spikes before their frames, and late
        b.add_spikes(t[part], c[part])
        b.add_frame_times(times[b.F:b.F + 130])
    b.add_frame_times(times[b.F:])
    ra, rb = a.snapshot(), b.snapshot()
    off = compute_maps(Spikes(t, c), SparseNoise(frames, times, grid), max_lag_s=0.15, rng=0)
    assert_maps_equal(ra, off)
    assert_maps_equal(rb, off)
    np.testing.assert_allclose(ra.on_z, rb.on_z, atol=1e-4, equal_nan=True)


def test_live_null_keeps_unresponsive_cells_quiet():
    """Poisson spikes that ignore the stimulus: live z-scores have sd about 1 and the live call
    rejects about alpha of them (max-statistic, Nichols & Holmes 2002)."""
    rng = np.random.default_rng(3)
    F = 6000                                                    # 5 minutes at 20 Hz
    frames = np.zeros((F, 12, 16), np.int8)
    idx = rng.integers(0, 12 * 16, size=(F, 3))
    sign = rng.choice(np.array([-1, 1], np.int8), size=(F, 3))
    np.put_along_axis(frames.reshape(F, -1), idx, sign, axis=1)
    times = np.arange(F) * 0.05
    n_cells = 80
    counts = rng.poisson(4.0 * 300, n_cells)
    t = np.concatenate([rng.uniform(0, 300, n) for n in counts])
    c = np.repeat(np.arange(n_cells), counts)
    live = LiveSparseMaps(frames, Grid(12, 16, 0.0, 0.0, 2.0, 2.0), frame_s=0.05)
    live.add_frame_times(times)
    live.add_spikes(t, c)
    res = live.snapshot()
    sd = np.nanstd(np.stack([res.on_z, res.off_z, res.linear_z]))
    assert 0.93 < sd < 1.07
    assert res.responsive.sum() <= 3            # alpha 0.01: 0.8 expected of 80; 3 or fewer has P > 0.95


def test_aperture_covers_the_fields_and_its_command_parses():
    rng = np.random.default_rng(4)
    F = 12000
    ny, nx = 10, 14
    frames = np.zeros((F, ny, nx), np.int8)
    idx = rng.integers(0, ny * nx, size=(F, 4))
    sign = rng.choice(np.array([-1, 1], np.int8), size=(F, 4))
    np.put_along_axis(frames.reshape(F, -1), idx, sign, axis=1)
    times = np.arange(F) * 0.05
    grid = Grid(ny, nx, 4.0, -2.0, 2.0, 2.0)
    # two ON cells with one-pixel fields at rows/cols (2, 3) and (7, 10), answering one frame later
    spikes_t, spikes_c = [rng.uniform(0, 600, 600)], [np.zeros(600, int)]
    for cell, (i, j) in enumerate([(2, 3), (7, 10)]):
        hit = np.flatnonzero(frames[:, i, j] > 0)
        spikes_t.append(times[hit] + 0.05 + 0.02)
        spikes_c.append(np.full(hit.size, cell))
        base = rng.uniform(0, 600, 1200)
        spikes_t.append(base)
        spikes_c.append(np.full(base.size, cell))
    live = LiveSparseMaps(frames, grid, frame_s=0.05)
    live.add_frame_times(times)
    live.add_spikes(np.concatenate(spikes_t), np.concatenate(spikes_c))
    res = live.snapshot()
    assert res.responsive.all()
    ap = suggest_aperture(res)
    x, y = grid.point_of(np.array([2, 7]), np.array([3, 10]))
    # centre midway between the two fields; diameter reaches the far corners of both pixels
    assert ap.center_x_deg == pytest.approx(x.mean(), abs=0.3)
    assert ap.center_y_deg == pytest.approx(y.mean(), abs=0.3)
    far = np.hypot(x - ap.center_x_deg, y - ap.center_y_deg).max() + np.hypot(1.0, 1.0)
    assert ap.diameter_deg >= 2 * far - 1e-9
    assert ap.diameter_deg <= 2 * far + 4.0
    assert 0 < max(ap.center_se_deg) < 1.0 and ap.diameter_se_deg > 0
    one = suggest_aperture(res, cells=[1])
    assert one.cells == (1,) and one.diameter_deg < ap.diameter_deg
    args = build_parser().parse_args(ap.command().split()[1:])
    assert args.aperture_deg == pytest.approx([round(ap.center_x_deg, 1), round(ap.center_y_deg, 1),
                                               round(ap.diameter_deg, 1)])


def test_rendered_gratings_are_grey_outside_the_aperture():
    from map2d.contract import GratingTable
    from map2d.geometry import Display
    from map2d.stimuli.render import GREY, render_gratings, screen_mesh_deg
    screen = Display(width_cm=40.0, height_cm=30.0, width_px=80, height_px=60, distance_cm=20.0)
    t = GratingTable.from_columns(onset_s=[0.0], offset_s=[1.0], orientation_deg=[30.0], sf_cpd=[0.05],
                                  phase_deg=[0.0], contrast=[1.0], tf_hz=[0.0])
    full = render_gratings(t, screen, [0.5])[0]
    part = render_gratings(t, screen, [0.5], aperture_deg=(10.0, 5.0, 30.0))[0]
    az, el = screen_mesh_deg(screen)
    inside = np.hypot(az - 10.0, el - 5.0) <= 15.0
    assert inside.any() and (~inside).any()
    assert np.array_equal(part[inside], full[inside]) and np.all(part[~inside] == GREY)


def test_watch_ends_with_the_offline_maps_and_a_session(small_spikes_session, tmp_path, capsys):
    session, _ = small_spikes_session
    folder = tmp_path / "rec"
    for _ in replay_steps(session, folder, step_s=30.0, seconds=180.0):
        pass
    now = [0.0]
    res = watch_folder(folder, max_lag_s=0.2, idle_s=3.0, poll_s=1.0, refresh_s=1.0, summary_s=1.0, fits=False,
                       clock=lambda: now[0], sleep=lambda s: now.__setitem__(0, now[0] + s))
    out = capsys.readouterr().out
    assert "recording ended (no new data for 3 s)" in out and "gratings next: map2d stimulus gratings" in out
    assert res["max_difference"] <= 1e-5 * 60
    # the session it wrote analyses to the same maps with map2d maps
    assert main(["maps", str(folder), "--out", str(tmp_path / "off"), "--no-fits", "--quiet"]) == 0
    with np.load(tmp_path / "off" / "maps.npz") as z:
        for k in ("on", "off", "linear"):
            np.testing.assert_allclose(res["result"].maps(k), z[k], rtol=0, atol=1e-5 * np.nanmax(np.abs(z[k])))
    assert (tmp_path / "off" / "cells.csv").read_text() == (folder / "maps" / "cells.csv").read_text()
    manifest = json.loads((folder / "session.json").read_text())
    assert manifest["responses"]["file"] == "spikes.npz"
    assert manifest["sparse_noise"]["frames"] == "sparse_noise_recorded.npy"    # 3 of 10 minutes shown
    page = (folder / "live.html").read_text()
    assert 'data-state="final (recording ended)"' in page and "cell-" in page
    n_off = sum(v == "true" for v in (line.split(",")[1] for line in
                                       (folder / "maps" / "cells.csv").read_text().splitlines()[1:]))
    assert f"Offline analysis (map2d maps, circular-shift null): {n_off} of 12 cells responsive" in page


def test_ctrl_c_ends_the_watch_with_the_data_so_far(small_spikes_session, tmp_path):
    session, _ = small_spikes_session
    folder = tmp_path / "rec"
    steps = replay_steps(session, folder, step_s=45.0)
    next(steps)
    now = [0.0]

    def sleep(s):                       # the recording goes on for three polls, then Ctrl-C
        now[0] += s
        if now[0] > 3:
            raise KeyboardInterrupt
        next(steps)

    res = watch_folder(folder, idle_s=60.0, poll_s=1.0, refresh_s=1.0, fits=False, quiet=True,
                       clock=lambda: now[0], sleep=sleep)
    assert res["interrupted"]
    written = 45.0 * 4
    assert_maps_equal(res["result"], offline_so_far(session, written))
    assert res["max_difference"] <= 1e-5 * np.nanmax(np.abs(res["result"].on))


def test_watch_refuses_a_folder_without_sparse_noise(tmp_path, capsys):
    assert main(["watch", str(tmp_path), "--idle-s", "1"]) == 2
    err = capsys.readouterr().err
    assert "stimulus.json" in err and "map2d stimulus sparse-noise" in err and "Traceback" not in err
