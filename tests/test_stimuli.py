"""Stimulus generators, rendering and the ``map2d stimulus`` command."""

from __future__ import annotations

import collections
import json
import math
import time

import numpy as np
import pytest

from map2d import cli
from map2d.contract import GratingTable, SparseNoise, load_session, load_stimulus, write_stimulus
from map2d.geometry import Display, Grid
from map2d.stimuli import combine_tables, make_drifting_gratings, make_flashed_gratings, make_sparse_noise
from map2d.stimuli.render import (grating_frame_times, grid_lookup, render_gratings, render_sparse_noise)
from map2d.stimuli.sparse_noise import BALANCE_TOLERANCE


def _spots(frames):
    """(frames, k) flat indices and polarities of the spots, k the same in every frame."""
    n = frames.shape[0]
    flat = frames.reshape(n, -1)
    f, p = np.nonzero(flat)
    k = p.size // n
    return p.reshape(n, k), flat[f, p].reshape(n, k)


# ------------------------------------------------------------------------------------------------
# sparse noise
# ------------------------------------------------------------------------------------------------
GRID = Grid(ny=12, nx=16, center_x_deg=5.0, center_y_deg=-3.0, dx_deg=2.0, dy_deg=3.0)


@pytest.fixture(scope="module")
def noise():
    return make_sparse_noise(GRID, duration_s=120.0, rate_hz=30.0, spots_per_frame=5, min_distance_deg=7.0, rng=11)


def test_every_frame_has_exactly_the_requested_spots(noise):
    assert noise.frames.dtype == np.int8
    assert noise.frames.shape == (3600, 12, 16)
    counts = np.count_nonzero(noise.frames, axis=(1, 2))
    assert np.all(counts == 5)
    assert set(np.unique(noise.frames).tolist()) == {-1, 0, 1}


def test_spots_of_a_frame_keep_the_minimum_distance_in_degrees(noise):
    pos, _ = _spots(noise.frames)
    x, y = (a.ravel() for a in GRID.mesh_deg())
    d = np.hypot(x[pos][:, :, None] - x[pos][:, None, :], y[pos][:, :, None] - y[pos][:, None, :])
    iu = np.triu_indices(5, 1)
    assert d[:, iu[0], iu[1]].min() >= 7.0 - 1e-9
    # offsets on this grid are multiples of (2, 3) deg; (2, 6) -> 6.32 and (6, 3) -> 6.71 are too close,
    # the closest allowed pair is (4, 6) -> sqrt(52) = 7.21 deg, and with 3600 frames it occurs
    assert d[:, iu[0], iu[1]].min() == pytest.approx(math.hypot(4.0, 6.0))


def test_every_pixel_is_bright_as_often_as_dark(noise):
    bright = (noise.frames == 1).sum(axis=0)
    dark = (noise.frames == -1).sum(axis=0)
    assert BALANCE_TOLERANCE == 1
    assert np.array_equal(bright, dark)                 # even number of frames: exact
    assert bright.min() > 0
    odd = make_sparse_noise(GRID, duration_s=101 / 30.0, rate_hz=30.0, spots_per_frame=5, min_distance_deg=7.0,
                            rng=2)
    assert odd.n_frames == 101
    diff = np.abs((odd.frames == 1).sum(axis=0) - (odd.frames == -1).sum(axis=0))
    assert diff.max() <= BALANCE_TOLERANCE
    assert diff.sum() == 5                               # only the unpaired frame's spots differ


def test_polarity_twins_are_not_shown_back_to_back(noise):
    flat = noise.frames.reshape(noise.n_frames, -1).astype(np.int16)
    twin_next = np.all(flat[1:] == -flat[:-1], axis=1)
    # in random order a twin follows its frame with probability about 1 / frames
    assert twin_next.sum() <= 3


def test_pixels_are_used_about_equally_often(noise):
    used = np.count_nonzero(noise.frames, axis=0).astype(float)
    mean = 3600 * 5 / 192
    # twins double the variance of a Poisson count: sd ~ sqrt(2 mean) = 19.4; allow 5 sd
    assert np.abs(used - mean).max() < 5 * math.sqrt(2 * mean)


def test_times_are_nominal_frame_onsets():
    sn = make_sparse_noise(GRID, duration_s=2.0, rate_hz=60.0, spots_per_frame=2, start_s=3.5, rng=0)
    assert sn.times_s.dtype == np.float64
    np.testing.assert_array_equal(sn.times_s, 3.5 + np.arange(120) / 60.0)


def test_crowded_grid_still_gives_exact_spots_and_distances():
    g = Grid(ny=6, nx=6, dx_deg=2.0, dy_deg=2.0)       # 4 spots 5 deg apart in 10 x 10 deg: tight
    sn = make_sparse_noise(g, duration_s=20.0, rate_hz=30.0, spots_per_frame=4, min_distance_deg=5.0, rng=1)
    pos, _ = _spots(sn.frames)
    assert pos.shape == (600, 4)
    x, y = (a.ravel() for a in g.mesh_deg())
    d = np.hypot(x[pos][:, :, None] - x[pos][:, None, :], y[pos][:, :, None] - y[pos][:, None, :])
    assert d[:, [0, 0, 0, 1, 1, 2], [1, 2, 3, 2, 3, 3]].min() >= 5.0 - 1e-9


def test_min_distance_zero_still_uses_distinct_pixels():
    g = Grid(ny=3, nx=3)
    sn = make_sparse_noise(g, duration_s=10.0, rate_hz=10.0, spots_per_frame=9, min_distance_deg=0.0, rng=0)
    assert np.all(np.count_nonzero(sn.frames, axis=(1, 2)) == 9)


def test_too_many_spots_for_the_distance_is_refused_naming_the_argument():
    g = Grid(ny=6, nx=6, dx_deg=2.0, dy_deg=2.0)
    with pytest.raises(ValueError, match="spots_per_frame"):
        make_sparse_noise(g, duration_s=10.0, rate_hz=10.0, spots_per_frame=9, min_distance_deg=5.0)
    with pytest.raises(ValueError, match="spots_per_frame"):
        make_sparse_noise(g, duration_s=10.0, rate_hz=10.0, spots_per_frame=37, min_distance_deg=0.0)


@pytest.mark.parametrize("kw, name", [(dict(duration_s=0.0), "duration_s"), (dict(rate_hz=-1.0), "rate_hz"),
                                      (dict(spots_per_frame=0), "spots_per_frame"),
                                      (dict(min_distance_deg=-1.0), "min_distance_deg"),
                                      (dict(duration_s=0.05), "frames")])
def test_bad_sparse_noise_arguments_are_named(kw, name):
    args = dict(duration_s=10.0, rate_hz=10.0)
    args.update(kw)
    with pytest.raises(ValueError, match=name):
        make_sparse_noise(GRID, **args)


def test_same_seed_same_bytes_different_seed_differs(tmp_path):
    def write(folder, seed):
        sn = make_sparse_noise(GRID, duration_s=20.0, rate_hz=30.0, spots_per_frame=3, rng=seed)
        gt = make_flashed_gratings([0, 60, 120], [0.05, 0.1], [0, 180], duration_s=5.0, rate_hz=20.0, rng=seed)
        write_stimulus(tmp_path / folder, sparse_noise=sn, gratings=gt)
        return {n: (tmp_path / folder / n).read_bytes() for n in ("sparse_noise.npy", "gratings.csv")}

    a, b, c = write("a", 7), write("b", 7), write("c", 8)
    assert a == b
    assert a["sparse_noise.npy"] != c["sparse_noise.npy"]
    assert a["gratings.csv"] != c["gratings.csv"]


def test_one_hour_at_60_hz_on_32_by_32_is_fast():
    g = Grid(ny=32, nx=32, dx_deg=2.0, dy_deg=2.0)
    t0 = time.perf_counter()
    sn = make_sparse_noise(g, duration_s=600.0, rate_hz=60.0, spots_per_frame=4, min_distance_deg=5.0, rng=0)
    elapsed = time.perf_counter() - t0
    assert sn.n_frames == 36000
    # a sixth of the hour; measured ~0.15 s on one core, so the full hour takes about a second
    assert elapsed < 5.0


# ------------------------------------------------------------------------------------------------
# gratings
# ------------------------------------------------------------------------------------------------
ORIS = [0.0, 30.0, 60.0, 90.0, 120.0, 150.0]
SFS = [0.04, 0.08, 0.16]
PHASES = [0.0, 90.0, 180.0, 270.0]


def test_flashed_conditions_are_equally_represented_over_whole_blocks():
    # 72 conditions; blank_fraction 0.1 -> round(0.1 * 72 / 0.9) = 8 blanks per block of 80
    t = make_flashed_gratings(ORIS, SFS, PHASES, duration_s=80 * 5 / 20.0, rate_hz=20.0, blank_fraction=0.1,
                              contrast=0.8, rng=3)
    assert len(t) == 400
    blank = t.contrast == 0
    assert blank.sum() == 40
    counts = collections.Counter(zip(t.orientation_deg[~blank], t.sf_cpd[~blank], t.phase_deg[~blank]))
    assert len(counts) == 72 and set(counts.values()) == {5}
    assert set(t.contrast[~blank].tolist()) == {0.8}
    # blanks carry numbers (sf 0), and every row is static
    assert np.all(t.sf_cpd[blank] == 0) and np.all(t.tf_hz == 0)
    np.testing.assert_array_equal(t.onset_s, np.arange(400) / 20.0)
    np.testing.assert_array_equal(t.offset_s, np.arange(1, 401) / 20.0)
    # each block of 80 frames holds every condition once
    first = collections.Counter(zip(t.orientation_deg[:80][~blank[:80]], t.sf_cpd[:80][~blank[:80]],
                                    t.phase_deg[:80][~blank[:80]]))
    assert len(first) == 72


def test_flashed_partial_block_counts_differ_by_at_most_one():
    t = make_flashed_gratings(ORIS, SFS, PHASES, duration_s=10.0, rate_hz=10.0, blank_fraction=0.0, rng=4)
    counts = collections.Counter(zip(t.orientation_deg, t.sf_cpd, t.phase_deg))
    assert len(t) == 100 and max(counts.values()) - min(counts.values()) <= 1


def test_flashed_order_is_random_and_seeded():
    a = make_flashed_gratings(ORIS, SFS, PHASES, duration_s=10.0, rate_hz=10.0, rng=5)
    b = make_flashed_gratings(ORIS, SFS, PHASES, duration_s=10.0, rate_hz=10.0, rng=5)
    c = make_flashed_gratings(ORIS, SFS, PHASES, duration_s=10.0, rate_hz=10.0, rng=6)
    assert np.array_equal(a.orientation_deg, b.orientation_deg)
    assert not np.array_equal(a.orientation_deg, c.orientation_deg)
    assert np.any(np.diff(a.orientation_deg) < 0)       # not in sorted order


@pytest.mark.parametrize("kw, name", [(dict(orientations_deg=[0, 180]), "orientations_deg"),
                                      (dict(sfs_cpd=[0.0]), "sfs_cpd"), (dict(phases_deg=[360]), "phases_deg"),
                                      (dict(blank_fraction=1.0), "blank_fraction"), (dict(contrast=0), "contrast")])
def test_bad_flashed_arguments_are_named(kw, name):
    args = dict(orientations_deg=ORIS, sfs_cpd=SFS, phases_deg=PHASES, duration_s=5.0)
    args.update(kw)
    with pytest.raises(ValueError, match=name):
        make_flashed_gratings(**args)


def test_drifting_trials_repeat_every_condition_in_shuffled_blocks():
    dirs = [0.0, 45.0, 90.0, 135.0, 180.0, 225.0, 270.0, 315.0]
    t = make_drifting_gratings(dirs, [0.04, 0.08], tf_hz=2.0, trial_s=1.5, gap_s=0.5, repeats=4, contrast=0.5,
                               start_s=10.0, rng=9)
    assert len(t) == 64
    for r in range(4):                                   # each repeat block holds every condition once
        block = set(zip(t.orientation_deg[16 * r:16 * (r + 1)], t.sf_cpd[16 * r:16 * (r + 1)]))
        assert len(block) == 16
    np.testing.assert_allclose(t.onset_s, 10.0 + 2.0 * np.arange(64))
    np.testing.assert_allclose(t.offset_s - t.onset_s, 1.5)
    assert np.all(t.phase_deg == 0) and np.all(t.tf_hz == 2.0) and np.all(t.contrast == 0.5)
    assert not np.array_equal(t.orientation_deg[:16], t.orientation_deg[16:32])
    with pytest.raises(ValueError, match="directions_deg"):
        make_drifting_gratings([360.0], [0.1], tf_hz=1.0)
    with pytest.raises(ValueError, match="tf_hz"):
        make_drifting_gratings([0.0], [0.1], tf_hz=0.0)


def test_combine_tables_sorts_by_onset_and_keeps_the_origin():
    f = make_flashed_gratings([0, 90], [0.1], [0, 180], duration_s=2.0, rate_hz=4.0, start_s=10.0,
                              phase_origin_deg=(2.0, 1.0), rng=0)
    d = make_drifting_gratings([0, 180], [0.1], tf_hz=1.0, repeats=2, phase_origin_deg=(2.0, 1.0), rng=0)
    t = combine_tables(d, f)
    assert len(t) == len(f) + len(d)
    assert np.all(np.diff(t.onset_s) >= 0)
    assert t.phase_origin_deg == (2.0, 1.0)
    assert t.is_drifting.sum() == 4
    with pytest.raises(ValueError, match="phase origin"):
        combine_tables(f, make_drifting_gratings([0], [0.1], tf_hz=1.0, repeats=1, rng=0))


# ------------------------------------------------------------------------------------------------
# rendering (exact flat-screen geometry)
# ------------------------------------------------------------------------------------------------
# 8 x 8 cm screen of 80 x 80 px (0.1 cm per pixel) at 10 cm. Pixel column c has its centre at
# x = (c + 0.5) * 0.1 - 4 cm, row r at y = 4 - (r + 0.5) * 0.1 cm.
SCREEN = Display(width_cm=8.0, height_cm=8.0, width_px=80, height_px=80, distance_cm=10.0)
GRID3 = Grid(ny=3, nx=3, dx_deg=10.0, dy_deg=10.0)          # cells span -15..15 deg both ways


def _noise_frame():
    f = np.zeros((2, 3, 3), dtype=np.int8)
    f[0, 1, 2] = 1          # middle row, right column: bright
    f[0, 0, 1] = -1         # top row, middle column: dark
    f[1] = -f[0]
    return SparseNoise(frames=f, times_s=np.array([0.0, 0.1]), grid=GRID3)


def test_rendered_sparse_noise_has_expected_values_at_known_pixels():
    out = render_sparse_noise(_noise_frame(), SCREEN)
    assert out.dtype == np.uint8 and out.shape == (2, 80, 80)
    # row 39: y = -0.05 cm, elevation -0.29 deg -> middle grid row
    # column 66: x = 2.65 cm, azimuth atan(0.265) = 0.2590 rad = 14.84 deg (< 15: right column, bright);
    # a linear rule (2.65 cm * 5.73 deg/cm = 15.18 deg) would put it outside the grid.
    assert out[0, 39, 66] == 255 and out[1, 39, 66] == 0
    # column 67: x = 2.75 cm, atan(0.275) = 0.2683 rad = 15.38 deg: outside the grid, grey
    assert out[0, 39, 67] == 128
    # column 39 (x = -0.05 cm), row 29 (y = 1.05 cm): elevation atan(1.05 / 10.0001) = 5.99 deg -> top row,
    # middle column: dark
    assert out[0, 29, 39] == 0 and out[1, 29, 39] == 255
    # row 30 (y = 0.95 cm): 5.43 deg, still top row; row 35 (y = 0.45 cm): 2.58 deg, middle row: background
    assert out[0, 30, 39] == 0 and out[0, 35, 39] == 128
    assert set(np.unique(out).tolist()) == {0, 128, 255}


def test_render_scale_takes_every_nth_pixel_and_frames_select():
    sn = _noise_frame()
    full = render_sparse_noise(sn, SCREEN)
    part = render_sparse_noise(sn, SCREEN, frames=[1], scale=3)
    np.testing.assert_array_equal(part[0], full[1, ::3, ::3])
    lut = grid_lookup(GRID3, SCREEN)
    assert lut[39, 66] == 1 * 3 + 2 and lut[39, 67] == -1


def test_rendered_grating_values_and_drift():
    t = GratingTable.from_columns(onset_s=[1.0], offset_s=[2.0], orientation_deg=[0.0], sf_cpd=[0.1],
                                  phase_deg=[0.0], contrast=[1.0], tf_hz=[1.0])
    out = render_gratings(t, SCREEN, [0.5, 1.0, 1.25, 2.5])
    assert np.all(out[0] == 128) and np.all(out[3] == 128)      # before onset and after offset: grey
    # column 40: x = 0.05 cm, azimuth atan(0.005) = 0.2865 deg; s = cos(2 pi 0.1 0.2865) = cos(0.1800) = 0.9838
    # -> 128 + 127 * 0.9838 = 252.9 -> 253
    assert out[1, 39, 40] == 253
    # column 48: x = 0.85 cm, atan(0.085) = 0.0848 rad = 4.8585 deg; s = cos(3.0527) = -0.9961 -> 1.5 (+-1)
    assert abs(int(out[1, 39, 48]) - 1.5) <= 1
    # a quarter cycle later (tf 1 Hz, 0.25 s) the crest has moved 2.5 deg toward +x: column 40 -> cos(-pi/2 +
    # 0.18) = 0.179 -> 150.7 -> 151
    assert abs(int(out[2, 39, 40]) - 151) <= 1
    # elevation does not matter for vertical stripes (orientation 0) along a column of constant azimuth
    assert np.all(out[1, :, 40] == 253)
    assert grating_frame_times(t, rate_hz=4.0).tolist() == [1.0, 1.25, 1.5, 1.75]


# ------------------------------------------------------------------------------------------------
# command line
# ------------------------------------------------------------------------------------------------
def _run(argv, capsys):
    code = cli.main([str(a) for a in argv])
    cap = capsys.readouterr()
    return code, cap.out, cap.err


def _as_session(folder):
    """Turn a stimulus folder into a session by adding responses (as a user would)."""
    m = json.loads((folder / "stimulus.json").read_text())
    np.savez(folder / "spikes.npz", time_s=np.array([0.5, 1.0]), cell=np.array([0, 1]))
    m = {k: v for k, v in m.items() if k in ("sparse_noise", "gratings", "display")}
    m["responses"] = {"kind": "spikes", "file": "spikes.npz"}
    (folder / "session.json").write_text(json.dumps(m))
    return load_session(folder)


def test_cli_sparse_noise_writes_loadable_reproducible_files(tmp_path, capsys):
    args = ["stimulus", "sparse-noise", "--ny", 6, "--nx", 9, "--spacing-deg", 3, 2, "--center-deg", 10, -5,
            "--spots", 2, "--min-distance-deg", 4, "--rate-hz", 30, "--minutes", 0.1, "--seed", 4]
    code, out, err = _run(args + ["--out", tmp_path / "a"], capsys)
    assert code == 0, err
    assert "seizure" in err
    assert "sparse_noise.npy" in out
    s = _as_session(tmp_path / "a")
    assert s.sparse_noise.frames.shape == (180, 6, 9)
    assert s.sparse_noise.grid == Grid(ny=6, nx=9, center_x_deg=10.0, center_y_deg=-5.0, dx_deg=3.0, dy_deg=2.0)
    ref = make_sparse_noise(s.sparse_noise.grid, duration_s=6.0, rate_hz=30.0, spots_per_frame=2,
                            min_distance_deg=4.0, rng=4)
    np.testing.assert_array_equal(s.sparse_noise.frames, ref.frames)
    code, _, _ = _run(args + ["--out", tmp_path / "b"], capsys)
    assert code == 0
    for name in ("sparse_noise.npy", "sparse_noise_times.npy"):
        assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes()
    # a second sparse noise into the same folder is refused (exit 2, nothing changed) unless --overwrite
    code, _, err = _run(args[:-1] + [5, "--out", tmp_path / "a"], capsys)
    assert code == 2 and "--overwrite" in err
    assert (tmp_path / "a" / "sparse_noise.npy").read_bytes() == (tmp_path / "b" / "sparse_noise.npy").read_bytes()
    code, _, _ = _run(args[:-1] + [5, "--out", tmp_path / "a", "--overwrite"], capsys)
    assert code == 0
    assert (tmp_path / "a" / "sparse_noise.npy").read_bytes() != (tmp_path / "b" / "sparse_noise.npy").read_bytes()


@pytest.mark.parametrize("mode", ["flashed", "drifting"])
def test_cli_gratings_write_loadable_files(tmp_path, capsys, mode):
    code, out, err = _run(["stimulus", "gratings", "--mode", mode, "--orientations", 4, "--sf-cpd", 0.05, 0.1,
                           "--phases", 2, "--minutes", 0.2, "--repeats", 2, "--phase-origin-deg", 1, 2,
                           "--out", tmp_path / mode], capsys)
    assert code == 0, err
    s = _as_session(tmp_path / mode)
    g = s.gratings
    assert g.phase_origin_deg == (1.0, 2.0)
    if mode == "flashed":
        assert len(g) == 120 and np.all(g.tf_hz == 0)
        assert sorted(set(g.orientation_deg[~g.is_blank].tolist())) == [0.0, 45.0, 90.0, 135.0]
    else:
        assert len(g) == 16 and np.all(g.tf_hz == 2.0)
        assert sorted(set(g.orientation_deg.tolist())) == [0.0, 90.0, 180.0, 270.0]


def test_cli_render_writes_a_uint8_stack(tmp_path, capsys):
    tifffile = pytest.importorskip("tifffile")
    code, out, err = _run(["stimulus", "sparse-noise", "--ny", 4, "--nx", 6, "--minutes", 0.05, "--spots", 1,
                           "--render", "--render-frames", 3, "--render-start", 2, "--render-scale", 16,
                           "--out", tmp_path / "r"], capsys)
    assert code == 0, err
    stack = tifffile.imread(tmp_path / "r" / "frames.tif")
    assert stack.dtype == np.uint8 and stack.shape == (3, 68, 120)      # 1080 / 16, 1920 / 16 rounded up
    sn, _, manifest = load_stimulus(tmp_path / "r")
    expect = render_sparse_noise(sn, SCREEN_DEFAULT, frames=[2, 3, 4], scale=16)
    np.testing.assert_array_equal(stack, expect)
    assert manifest["generator"][-1]["rendered"]["first_frame"] == 2
    # frame rate and degrees per pixel (at the screen centre, 16 screen pixels per rendered one) in
    # the stack's metadata: 52 cm / 1920 px seen from 30 cm is atan(0.02708 / 30) = 0.0517 deg a pixel
    with tifffile.TiffFile(tmp_path / "r" / "frames.tif") as tif:
        meta = tif.imagej_metadata
        xres = tif.pages[0].tags["XResolution"].value
    assert meta["finterval"] == pytest.approx(1 / 20.0) and meta["unit"] == "deg"
    assert float(meta["Properties"]["frame_rate_hz"]) == 20.0
    deg_px = 16 * np.degrees(np.arctan(52.0 / 1920 / 30.0))
    assert float(meta["Properties"]["deg_per_px_x"]) == pytest.approx(deg_px, rel=1e-6)
    assert xres[1] / xres[0] == pytest.approx(deg_px, rel=1e-6)
    assert manifest["display"]["distance_cm"] == 30.0


def test_stimulus_commands_add_to_one_protocol(tmp_path, capsys):
    """Sparse noise, then flashed, then drifting gratings into one folder: one protocol, one
    gratings.csv, session.json's stimulus part kept current; overlap and replacement refused."""
    d = tmp_path / "rig"
    sn = ["stimulus", "sparse-noise", "--ny", 4, "--nx", 6, "--minutes", 0.1, "--spots", 1, "--out", d]
    fl = ["stimulus", "gratings", "--orientations", 4, "--sf-cpd", 0.05, 0.1, "--phases", 2, "--minutes", 0.1,
          "--out", d]
    dr = ["stimulus", "gratings", "--mode", "drifting", "--orientations", 4, "--sf-cpd", 0.05, "--repeats", 1,
          "--out", d]
    assert _run(sn, capsys)[0] == 0
    code, _, err = _run(fl, capsys)                      # starts at 0: overlaps the sparse noise
    assert code == 2 and "overlap" in err
    assert _run(fl + ["--start-s", 7], capsys)[0] == 0
    code, _, err = _run(dr + ["--start-s", 8], capsys)   # overlaps the flashed block (7-13 s)
    assert code == 2 and "overlap" in err and "gratings.csv" in err
    assert _run(dr + ["--start-s", 14], capsys)[0] == 0
    _, g, manifest = load_stimulus(d)
    assert (d / "sparse_noise.npy").is_file()
    assert len(g) == 60 + 4 and np.all(np.diff(g.onset_s) > 0)
    assert np.count_nonzero(g.tf_hz == 0) == 60 and np.count_nonzero(g.tf_hz == 2.0) == 4
    assert [r["command"] for r in manifest["generator"]] == ["stimulus sparse-noise", "stimulus gratings",
                                                           "stimulus gratings"]
    session = json.loads((d / "session.json").read_text())
    assert {k: session[k] for k in ("sparse_noise", "gratings")} == {k: manifest[k] for k in ("sparse_noise",
                                                                                             "gratings")}
    # adding responses to session.json makes the folder a session (what was shown is what is analysed)
    np.savez(d / "spikes.npz", time_s=np.array([0.5, 7.5, 14.5]), cell=np.array([0, 0, 1]))
    session["responses"] = {"kind": "spikes", "file": "spikes.npz"}
    (d / "session.json").write_text(json.dumps(session))
    s = load_session(d)
    assert s.sparse_noise.n_frames == 120 and len(s.gratings) == 64
    # gratings --overwrite replaces the table; the sparse noise stays; responses stay in session.json
    assert _run(fl + ["--start-s", 7, "--overwrite"], capsys)[0] == 0
    assert len(load_stimulus(d)[1]) == 60 and (d / "sparse_noise.npy").is_file()
    assert json.loads((d / "session.json").read_text())["responses"]["file"] == "spikes.npz"


SCREEN_DEFAULT = Display(width_cm=52.0, height_cm=29.25, width_px=1920, height_px=1080, distance_cm=30.0)


def test_cli_refuses_impossible_spots_with_exit_2(tmp_path, capsys):
    code, out, err = _run(["stimulus", "sparse-noise", "--ny", 3, "--nx", 3, "--spots", 5,
                           "--min-distance-deg", 5, "--out", tmp_path / "x"], capsys)
    assert code == 2
    assert "spots_per_frame" in err and "Traceback" not in err
    assert not (tmp_path / "x").exists()


@pytest.mark.parametrize("kind", [[], ["sparse-noise"], ["gratings"]])
def test_help_contains_the_seizure_caution(capsys, kind):
    with pytest.raises(SystemExit) as info:
        cli.main(["stimulus", *kind, "--help"])
    assert info.value.code == 0
    text = "".join(capsys.readouterr().out.split())      # argparse re-wraps lines (even at hyphens)
    assert "".join(cli.CAUTION.split()) in text
