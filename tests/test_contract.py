"""Session folder: write -> load round trip, and refusal of defective input with a message naming it."""

from __future__ import annotations

import json
import shutil
import subprocess
import sys

import numpy as np
import pytest

from map2d.contract import (GRATING_COLUMNS, Session, Spikes, Traces, load_session, load_stimulus,
                            write_session, write_stimulus)
from map2d.errors import BadInput
from map2d.geometry import Display, Grid
from map2d.stimuli import combine_tables, make_drifting_gratings, make_flashed_gratings, make_sparse_noise

GRID = Grid(ny=6, nx=8, center_x_deg=3.0, center_y_deg=-2.0, dx_deg=2.5, dy_deg=2.0)


def _stimuli():
    sn = make_sparse_noise(GRID, duration_s=6.0, rate_hz=60.0, spots_per_frame=2, min_distance_deg=4.0, rng=3)
    flashed = make_flashed_gratings([0, 45, 90, 135], [0.05, 0.1], [0, 90, 180, 270], duration_s=4.0,
                                    rate_hz=60.0, blank_fraction=0.1, phase_origin_deg=(3.0, -2.0), start_s=7.0,
                                    rng=4)
    drifting = make_drifting_gratings([0, 90, 180, 270], [0.08], tf_hz=2.0, trial_s=1.0, gap_s=0.5, repeats=2,
                                      phase_origin_deg=(3.0, -2.0), start_s=12.0, rng=5)
    return sn, combine_tables(flashed, drifting)


def _session(kind="spikes"):
    rng = np.random.default_rng(0)
    sn, table = _stimuli()
    if kind == "spikes":
        t = np.sort(rng.uniform(0, 25, 500))
        cell = rng.integers(0, 4, 500)
        resp = Spikes(time_s=t, cell=cell, cell_ids=np.arange(6))   # cells 4 and 5 never fire
    else:
        times = np.arange(0, 25, 1 / 30.0)
        resp = Traces(values=rng.normal(size=(3, times.size)).astype(np.float32), times_s=times)
    disp = Display(width_cm=52.0, height_cm=29.25, width_px=1920, height_px=1080, distance_cm=30.0,
                   eye_x_cm=1.5, eye_y_cm=-2.0)
    return Session(responses=resp, sparse_noise=sn, gratings=table, display=disp, name="roundtrip")


def _assert_same_stimuli(a, b):
    assert np.array_equal(a.sparse_noise.frames, b.sparse_noise.frames)
    assert a.sparse_noise.frames.dtype == np.int8
    assert np.array_equal(a.sparse_noise.times_s, b.sparse_noise.times_s)
    assert a.sparse_noise.grid == b.sparse_noise.grid
    for c in GRATING_COLUMNS:
        assert np.array_equal(getattr(a.gratings, c), getattr(b.gratings, c)), c
    assert tuple(a.gratings.phase_origin_deg) == tuple(b.gratings.phase_origin_deg)


@pytest.mark.parametrize("kind", ["spikes", "traces"])
def test_write_then_load_gives_identical_arrays_and_tables(tmp_path, kind):
    s = _session(kind)
    write_session(tmp_path / "s", s)
    back = load_session(tmp_path / "s")
    _assert_same_stimuli(s, back)
    assert back.display == s.display
    assert back.name == "roundtrip"
    if kind == "spikes":
        assert np.array_equal(back.responses.time_s, s.responses.time_s)
        assert np.array_equal(back.responses.cell, s.responses.cell)
        assert np.array_equal(back.responses.cell_ids, np.arange(6))     # silent cells kept
    else:
        assert np.array_equal(back.responses.values, s.responses.values)
        assert np.array_equal(back.responses.times_s, s.responses.times_s)


def test_write_session_refuses_to_overwrite_by_default(tmp_path):
    write_session(tmp_path / "s", _session())
    with pytest.raises(BadInput, match="already holds a session"):
        write_session(tmp_path / "s", _session())


def test_stimulus_files_are_byte_identical_to_session_files(tmp_path):
    s = _session()
    write_session(tmp_path / "sess", s)
    write_stimulus(tmp_path / "stim", sparse_noise=s.sparse_noise, gratings=s.gratings)
    for name in ("sparse_noise.npy", "sparse_noise_times.npy", "gratings.csv"):
        assert (tmp_path / "sess" / name).read_bytes() == (tmp_path / "stim" / name).read_bytes(), name
    sn, table, manifest = load_stimulus(tmp_path / "stim")
    _assert_same_stimuli(s, Session(responses=s.responses, sparse_noise=sn, gratings=table))
    sess_manifest = json.loads((tmp_path / "sess" / "session.json").read_text())
    assert manifest["sparse_noise"] == sess_manifest["sparse_noise"]
    assert manifest["gratings"] == sess_manifest["gratings"]


# ------------------------------------------------------------------------------------------------
# defects: each must raise BadInput naming the file and the field
# ------------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def good_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("good") / "s"
    write_session(folder, _session())
    load_session(folder)          # the untouched copy loads
    return folder


@pytest.fixture
def copy(good_folder, tmp_path):
    dst = tmp_path / "s"
    shutil.copytree(good_folder, dst)
    return dst


def _manifest(folder):
    return json.loads((folder / "session.json").read_text())


def _set_manifest(folder, m):
    (folder / "session.json").write_text(json.dumps(m))


def _refused(folder, *words):
    with pytest.raises(BadInput) as info:
        load_session(folder)
    msg = str(info.value)
    for w in words:
        assert w in msg, (w, msg)
    return msg


def test_refuses_non_increasing_frame_times(copy):
    t = np.load(copy / "sparse_noise_times.npy")
    t[5] = t[4]
    np.save(copy / "sparse_noise_times.npy", t)
    _refused(copy, "sparse_noise_times.npy", "times", "row 5", "increasing")


def test_refuses_frame_values_outside_minus_one_zero_one(copy):
    f = np.load(copy / "sparse_noise.npy")
    f[7, 2, 3] = 2
    np.save(copy / "sparse_noise.npy", f)
    _refused(copy, "sparse_noise.npy", "frames", "row 7")


def test_refuses_frames_and_times_of_different_length(copy):
    t = np.load(copy / "sparse_noise_times.npy")
    np.save(copy / "sparse_noise_times.npy", t[:-1])
    _refused(copy, "sparse_noise_times.npy", "times", f"{t.size - 1} entries")


def test_refuses_missing_gratings_column(copy):
    lines = (copy / "gratings.csv").read_text().splitlines()
    header = lines[0].split(",")
    k = header.index("sf_cpd")
    out = [",".join(v for i, v in enumerate(line.split(",")) if i != k) for line in lines]
    (copy / "gratings.csv").write_text("\n".join(out) + "\n")
    _refused(copy, "gratings.csv", "sf_cpd", "missing")


def test_refuses_text_in_a_number_field_naming_the_row(copy):
    lines = (copy / "gratings.csv").read_text().splitlines()
    header = lines[0].split(",")
    fields = lines[3].split(",")                       # data row 3
    fields[header.index("phase_deg")] = "ninety"
    lines[3] = ",".join(fields)
    (copy / "gratings.csv").write_text("\n".join(lines) + "\n")
    _refused(copy, "gratings.csv", "phase_deg", "row 3", "ninety")


def test_refuses_spikes_without_cell_array(copy):
    z = dict(np.load(copy / "spikes.npz"))
    np.savez(copy / "spikes.npz", time_s=z["time_s"])
    _refused(copy, "spikes.npz", "cell", "missing")


def test_refuses_spike_arrays_of_unequal_length(copy):
    z = dict(np.load(copy / "spikes.npz"))
    np.savez(copy / "spikes.npz", time_s=z["time_s"], cell=z["cell"][:-3])
    _refused(copy, "spikes.npz", "cell", "entries")


@pytest.mark.parametrize("spacing", [[0.0, 2.0], [2.5, -1.0]])
def test_refuses_non_positive_grid_spacing(copy, spacing):
    m = _manifest(copy)
    m["sparse_noise"]["grid"]["spacing_deg"] = spacing
    _set_manifest(copy, m)
    _refused(copy, "session.json", "spacing_deg", "positive")


def test_refuses_manifest_that_is_not_json(copy):
    (copy / "session.json").write_text('{"responses": {"kind": "spikes", "file": "spikes.npz"},,}')
    _refused(copy, "session.json", "not valid JSON")


def test_refuses_manifest_without_responses(copy):
    m = _manifest(copy)
    del m["responses"]
    _set_manifest(copy, m)
    _refused(copy, "session.json", "responses", "missing")


def test_refuses_grating_with_contrast_but_zero_sf(copy):
    lines = (copy / "gratings.csv").read_text().splitlines()
    header = lines[0].split(",")
    for r in range(1, len(lines)):
        fields = lines[r].split(",")
        if float(fields[header.index("contrast")]) > 0:
            fields[header.index("sf_cpd")] = "0"
            lines[r] = ",".join(fields)
            break
    (copy / "gratings.csv").write_text("\n".join(lines) + "\n")
    _refused(copy, "gratings.csv", "sf_cpd", f"row {r}")


def test_blank_rows_with_zero_sf_are_accepted(good_folder):
    g = load_session(good_folder).gratings
    assert np.any(g.is_blank)
    assert np.all(g.sf_cpd[g.is_blank] == 0)


# ------------------------------------------------------------------------------------------------
# the command line: exit code 2, one line, no traceback
# ------------------------------------------------------------------------------------------------
def _cli(*argv):
    return subprocess.run([sys.executable, "-m", "map2d.cli", *map(str, argv)], capture_output=True, text=True,
                          timeout=120)


def test_cli_bad_output_folder_exits_2_without_traceback(tmp_path):
    out = tmp_path / "precious"
    out.mkdir()
    (out / "thesis.txt").write_text("do not delete")
    r = _cli("stimulus", "sparse-noise", "--out", out, "--minutes", "0.05", "--nx", "6", "--ny", "6")
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr
    assert "--out" in r.stderr and "precious" in r.stderr
    assert (out / "thesis.txt").read_text() == "do not delete"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["precious"]     # no partial folder left


def test_cli_defective_session_exits_2_naming_file(copy, tmp_path):
    t = np.load(copy / "sparse_noise_times.npy")
    t[5] = t[4]
    np.save(copy / "sparse_noise_times.npy", t)
    r = _cli("maps", copy, "--out", tmp_path / "res")
    if "NotImplementedError" in r.stderr:
        pytest.skip("map2d maps is not built yet")
    assert r.returncode == 2, r.stderr
    assert "Traceback" not in r.stderr
    assert "sparse_noise_times.npy" in r.stderr and "times" in r.stderr
    assert not (tmp_path / "res").exists()
