"""Robustness: every defect in a session folder is refused with one message naming file, field and row;
oddities that can be handled are handled with a counted warning; the CLI never shows a traceback for
bad input and never destroys earlier results."""

from __future__ import annotations

import hashlib
import json
import shutil
import warnings

import numpy as np
import pytest

import map2d.cli
from map2d import pipeline
from map2d.contract import (InputWarning, Session, Spikes, Traces, count_spikes_outside, find_frame_gaps,
                            load_session, write_session)
from map2d.errors import BadInput
from map2d.geometry import Grid
from map2d.stimuli import make_drifting_gratings, make_sparse_noise

GRID = Grid(ny=5, nx=6, center_x_deg=2.0, center_y_deg=-1.0, dx_deg=3.0, dy_deg=3.0)
RATE = 20.0
DURATION = 30.0


def make_session(kind="spikes", rng=0, silent_cell=True) -> Session:
    """A short valid session: 600 sparse-noise frames, a few drifting trials, 3 (or 4) cells.

    Cell 0 fires more one frame after a bright spot at pixel (2, 3) (a linear-nonlinear-Poisson
    cell), cells 1 and 2 fire at a constant rate, cell 3 (when ``silent_cell``) never fires.
    """
    rng = np.random.default_rng(rng)
    sn = make_sparse_noise(GRID, duration_s=DURATION, rate_hz=RATE, spots_per_frame=2, min_distance_deg=4.0,
                           rng=rng)
    table = make_drifting_gratings([0, 90, 180, 270], [0.1], tf_hz=2.0, trial_s=1.0, gap_s=0.5, repeats=1,
                                   phase_origin_deg=(2.0, -1.0), start_s=DURATION + 1.0, rng=rng)
    dt = 1.0 / RATE
    F = sn.n_frames
    drive = np.zeros(F)
    drive[1:] = sn.frames[:-1, 2, 3] == 1
    rates = np.stack([5.0 + 60.0 * drive, np.full(F, 8.0), np.full(F, 3.0)])
    if kind == "spikes":
        counts = rng.poisson(rates * dt)
        cells = np.repeat(np.repeat(np.arange(3), F), counts.ravel())
        starts = np.tile(sn.times_s, 3)
        t = np.repeat(starts, counts.ravel()) + rng.uniform(0, dt, counts.sum())
        ids = np.arange(4) if silent_cell else None
        resp = Spikes(time_s=t, cell=cells, cell_ids=ids)
    else:
        times = np.arange(0.0, DURATION + 8.0, 1 / 30.0)
        k = np.clip(np.searchsorted(sn.times_s, times, side="right") - 1, 0, F - 1)
        values = (rates[:, k] / 10.0 + rng.normal(0, 0.2, (3, times.size))).astype(np.float32)
        resp = Traces(values=values, times_s=times)
    return Session(responses=resp, sparse_noise=sn, gratings=table, name="robust")


@pytest.fixture(scope="module")
def good_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("good") / "session"
    write_session(folder, make_session())
    return folder


@pytest.fixture(scope="module")
def good_traces_folder(tmp_path_factory):
    folder = tmp_path_factory.mktemp("good_traces") / "session"
    write_session(folder, make_session("traces"))
    return folder


@pytest.fixture
def copy(good_folder, tmp_path):
    dst = tmp_path / "s"
    shutil.copytree(good_folder, dst)
    return dst


@pytest.fixture
def tcopy(good_traces_folder, tmp_path):
    dst = tmp_path / "t"
    shutil.copytree(good_traces_folder, dst)
    return dst


def _manifest(folder):
    return json.loads((folder / "session.json").read_text())


def _set_manifest(folder, m):
    (folder / "session.json").write_text(json.dumps(m))


def _refused(folder, *words):
    with pytest.raises(BadInput) as info:
        load_session(folder)
    msg = str(info.value)
    assert "\n" not in msg, msg                                # one short line
    for w in words:
        assert w in msg, (w, msg)
    return msg


def _warned(folder, *words):
    with pytest.warns(InputWarning) as rec:
        s = load_session(folder)
    msgs = [str(w.message) for w in rec if issubclass(w.category, InputWarning)]
    hits = [m for m in msgs if all(w in m for w in words)]
    assert hits, (words, msgs)
    assert hits[0] in s.notes                                   # recorded in the session as well
    return s, hits[0]


def _edit_csv(folder, fn):
    lines = (folder / "gratings.csv").read_text().splitlines()
    lines = fn(lines)
    (folder / "gratings.csv").write_text("\n".join(lines) + "\n")


# ------------------------------------------------------------------------------------------------
# the valid session loads silently apart from the expected notes
# ------------------------------------------------------------------------------------------------
def test_valid_session_loads_with_only_the_silent_cell_note(good_folder):
    with warnings.catch_warnings(record=True) as rec:
        warnings.simplefilter("always")
        s = load_session(good_folder)
    notes = [str(w.message) for w in rec if issubclass(w.category, InputWarning)]
    # the gratings start after the noise ends: spikes in the gap between them are outside every window
    assert all(("no spikes" in n) or ("outside every stimulus window" in n) for n in notes), notes
    assert s.sparse_noise.valid is None
    assert list(s.cell_ids) == [0, 1, 2, 3]


# ------------------------------------------------------------------------------------------------
# 1. refused, one message naming file, field and row
# ------------------------------------------------------------------------------------------------
def test_missing_session_folder(tmp_path):
    _refused(tmp_path / "nowhere", "nowhere", "not found")


def test_missing_manifest(copy):
    (copy / "session.json").unlink()
    _refused(copy, "session.json", "not found")


@pytest.mark.parametrize("name,field", [("spikes.npz", "file"), ("sparse_noise.npy", "frames"),
                                        ("sparse_noise_times.npy", "times"), ("gratings.csv", "table")])
def test_missing_data_file(copy, name, field):
    (copy / name).unlink()
    _refused(copy, name, f"field {field}", "not found")


def test_manifest_not_json(copy):
    (copy / "session.json").write_text('{"responses": {"kind": "spikes", "file": "spikes.npz"}')
    _refused(copy, "session.json", "not valid JSON")


def test_manifest_not_an_object(copy):
    (copy / "session.json").write_text("[1, 2, 3]")
    _refused(copy, "session.json", "JSON object")


def test_manifest_without_responses(copy):
    m = _manifest(copy)
    del m["responses"]
    _set_manifest(copy, m)
    _refused(copy, "session.json", "field responses", "missing")


@pytest.mark.parametrize("section,value", [("responses", "spikes.npz"), ("sparse_noise", [1, 2]),
                                           ("gratings", "gratings.csv")])
def test_manifest_section_that_is_not_an_object(copy, section, value):
    m = _manifest(copy)
    m[section] = value
    _set_manifest(copy, m)
    _refused(copy, "session.json", f"field {section}", "JSON object")


def test_manifest_file_name_that_is_not_text(copy):
    m = _manifest(copy)
    m["sparse_noise"]["frames"] = 7
    _set_manifest(copy, m)
    _refused(copy, "session.json", "sparse_noise.frames", "file name")


def test_unknown_responses_kind(copy):
    m = _manifest(copy)
    m["responses"]["kind"] = "spikez"
    _set_manifest(copy, m)
    _refused(copy, "session.json", "responses.kind", "spikez")


def test_unknown_keys_are_a_warning_not_an_error(copy):
    m = _manifest(copy)
    m["stimulus_notes"] = "hand edited"
    m["sparse_noise"]["grid"]["rotation_deg"] = 0
    m["responses"]["sorter"] = "x"
    _set_manifest(copy, m)
    with pytest.warns(InputWarning) as rec:
        s = load_session(copy)
    msgs = " | ".join(str(w.message) for w in rec)
    for key in ("'stimulus_notes'", "'sparse_noise.grid.rotation_deg'", "'responses.sorter'"):
        assert key in msgs, (key, msgs)
        assert any(key in n for n in s.notes)


def test_frame_values_outside_minus_one_zero_one(copy):
    f = np.load(copy / "sparse_noise.npy")
    f[11, 1, 4] = -2
    np.save(copy / "sparse_noise.npy", f)
    _refused(copy, "sparse_noise.npy", "field frames", "row 11", "-1, 0 or +1")


def test_frames_of_wrong_type(copy):
    f = np.load(copy / "sparse_noise.npy")
    np.save(copy / "sparse_noise.npy", f.astype(bool))
    _refused(copy, "sparse_noise.npy", "field frames", "bool")


def test_frames_with_an_empty_grid(copy):
    np.save(copy / "sparse_noise.npy", np.zeros((600, 0, 6), np.int8))
    _refused(copy, "sparse_noise.npy", "field frames", "empty")


def test_frame_times_not_strictly_increasing(copy):
    t = np.load(copy / "sparse_noise_times.npy")
    t[40] = t[39] - 0.001
    np.save(copy / "sparse_noise_times.npy", t)
    _refused(copy, "sparse_noise_times.npy", "field times", "row 40", "strictly increasing")


def test_frame_times_of_another_length(copy):
    t = np.load(copy / "sparse_noise_times.npy")
    np.save(copy / "sparse_noise_times.npy", np.append(t, t[-1] + 0.05))
    _refused(copy, "sparse_noise_times.npy", "field times", f"{t.size + 1} entries", f"{t.size} were expected")


def test_nan_in_frame_times(copy):
    t = np.load(copy / "sparse_noise_times.npy")
    t[17] = np.nan
    np.save(copy / "sparse_noise_times.npy", t)
    _refused(copy, "sparse_noise_times.npy", "field times", "row 17", "not finite")


def test_empty_frame_times(copy):
    np.save(copy / "sparse_noise_times.npy", np.zeros(0))
    _refused(copy, "sparse_noise_times.npy", "field times")


@pytest.mark.parametrize("spacing", [[0, 3], [3, -1], ["a", 3], [3]])
def test_grid_spacing_not_positive_numbers(copy, spacing):
    m = _manifest(copy)
    m["sparse_noise"]["grid"]["spacing_deg"] = spacing
    _set_manifest(copy, m)
    _refused(copy, "session.json", "sparse_noise.grid.spacing_deg")


@pytest.mark.parametrize("missing", ["time_s", "cell"])
def test_spikes_without_an_array(copy, missing):
    z = dict(np.load(copy / "spikes.npz"))
    del z[missing]
    np.savez(copy / "spikes.npz", **z)
    _refused(copy, "spikes.npz", f"field {missing}", "missing")


def test_spike_arrays_of_unequal_length(copy):
    z = dict(np.load(copy / "spikes.npz"))
    np.savez(copy / "spikes.npz", time_s=z["time_s"][:-2], cell=z["cell"])
    _refused(copy, "spikes.npz", "field cell", "entries")


@pytest.mark.parametrize("bad", [np.inf, np.nan])
def test_non_finite_spike_time(copy, bad):
    z = dict(np.load(copy / "spikes.npz"))
    z["time_s"][9] = bad
    np.savez(copy / "spikes.npz", **z)
    _refused(copy, "spikes.npz", "field time_s", "row 9", "not finite")


def test_fractional_cell_id(copy):
    z = dict(np.load(copy / "spikes.npz"))
    cell = z["cell"].astype(float)
    cell[4] = 1.5
    np.savez(copy / "spikes.npz", time_s=z["time_s"], cell=cell)
    _refused(copy, "spikes.npz", "field cell", "row 4", "integers")


def test_no_spikes_and_no_cells(copy):
    np.savez(copy / "spikes.npz", time_s=np.zeros(0), cell=np.zeros(0, np.int64))
    m = _manifest(copy)
    m["responses"].pop("cell_ids", None)
    _set_manifest(copy, m)
    _refused(copy, "spikes.npz", "field time_s", "no spikes")


def test_gratings_missing_a_column(copy):
    def drop(lines):
        k = lines[0].split(",").index("tf_hz")
        return [",".join(v for i, v in enumerate(line.split(",")) if i != k) for line in lines]
    _edit_csv(copy, drop)
    _refused(copy, "gratings.csv", "field tf_hz", "missing")


def test_gratings_text_in_a_number_field(copy):
    def text(lines):
        k = lines[0].split(",").index("orientation_deg")
        fields = lines[2].split(",")
        fields[k] = "vertical"
        lines[2] = ",".join(fields)
        return lines
    _edit_csv(copy, text)
    _refused(copy, "gratings.csv", "field orientation_deg", "row 2", "'vertical' is not a number")


def test_gratings_header_without_rows(copy):
    _edit_csv(copy, lambda lines: lines[:1])
    _refused(copy, "gratings.csv", "no presentations")


def test_gratings_with_a_nul_byte(copy):
    data = (copy / "gratings.csv").read_bytes()
    (copy / "gratings.csv").write_bytes(data[:40] + b"\x00" + data[40:])
    _refused(copy, "gratings.csv", "CSV")


def test_truncated_npy(copy):
    data = (copy / "sparse_noise.npy").read_bytes()
    (copy / "sparse_noise.npy").write_bytes(data[: len(data) // 2])
    _refused(copy, "sparse_noise.npy", "field frames", "not a readable .npy")


def test_npz_under_an_npy_name(copy):
    shutil.copy(copy / "spikes.npz", copy / "sparse_noise.npy")
    _refused(copy, "sparse_noise.npy", "field frames", "archive")


def test_corrupt_npz(copy):
    data = bytearray((copy / "spikes.npz").read_bytes())
    data[len(data) // 2: len(data) // 2 + 64] = b"\xff" * 64
    (copy / "spikes.npz").write_bytes(bytes(data[: len(data) - 30]))
    _refused(copy, "spikes.npz", "field file", "not a readable .npz")


def test_corrupt_roi_tiff(tcopy):
    import tifffile
    tifffile.imwrite(tcopy / "rois.tif", np.arange(12, dtype=np.int32).reshape(3, 4))
    m = _manifest(tcopy)
    m["rois"] = "rois.tif"
    _set_manifest(tcopy, m)
    assert load_session(tcopy).rois.shape == (3, 4)             # the intact image loads
    data = (tcopy / "rois.tif").read_bytes()
    (tcopy / "rois.tif").write_bytes(data[:20])
    _refused(tcopy, "rois.tif", "field rois", "TIFF")


def test_trace_times_that_do_not_match_the_samples(tcopy):
    t = np.load(tcopy / "trace_times.npy")
    np.save(tcopy / "trace_times.npy", t[:-5])
    _refused(tcopy, "trace_times.npy", "field times", f"{t.size - 5} entries", f"{t.size} were expected")


def test_trace_times_not_increasing(tcopy):
    t = np.load(tcopy / "trace_times.npy")
    t[100] = t[98]
    np.save(tcopy / "trace_times.npy", t)
    _refused(tcopy, "trace_times.npy", "field times", "row 100", "strictly increasing")


def test_traces_without_cells(tcopy):
    t = np.load(tcopy / "trace_times.npy")
    np.save(tcopy / "traces.npy", np.zeros((0, t.size), np.float32))
    _refused(tcopy, "traces.npy", "field traces", "no cells")


def test_complex_traces(tcopy):
    v = np.load(tcopy / "traces.npy")
    np.save(tcopy / "traces.npy", v.astype(np.complex64))
    _refused(tcopy, "traces.npy", "field traces", "numeric")


# ------------------------------------------------------------------------------------------------
# 2. handled with a counted warning (also kept in session.notes), not refused
# ------------------------------------------------------------------------------------------------
def test_nan_trace_samples_are_counted_and_masked(tcopy):
    from map2d.align import interval_responses
    v = np.load(tcopy / "traces.npy")
    v[1, 300:340] = np.nan
    v[2, 5] = np.inf
    np.save(tcopy / "traces.npy", v)
    s, msg = _warned(tcopy, "traces.npy", "41 samples", "NaN")
    assert "row 1, sample 300" in msg
    # masked: an interval holding NaN samples still averages the valid ones (finite, not NaN)
    t = s.responses.times_s
    r = interval_responses(s.responses, np.array([t[290]]), np.array([t[350]]))
    assert np.isfinite(r).all()


def test_cells_without_spikes_are_kept(good_folder):
    s, msg = _warned(good_folder, "spikes.npz", "1 of 4 cells have no spikes", "cell 3")
    assert 3 in s.cell_ids
    assert not np.any(s.responses.cell == 3)


def test_spikes_outside_every_stimulus_window_are_counted(copy):
    s = load_session(copy)
    n0 = count_spikes_outside(s)
    z = dict(np.load(copy / "spikes.npz"))
    # 7 spikes before the noise starts, 5 long after the last grating, 3 inside the first frame
    last = float(s.gratings.offset_s.max())
    extra_t = np.r_[np.full(7, -5.0), np.full(5, last + 100.0), np.full(3, s.sparse_noise.times_s[0] + 1e-3)]
    np.savez(copy / "spikes.npz", time_s=np.r_[z["time_s"], extra_t], cell=np.r_[z["cell"], np.zeros(15, int)])
    s2, msg = _warned(copy, "spikes.npz", "field time_s", f"{n0 + 12} of", "outside every stimulus window")
    assert count_spikes_outside(s2) == n0 + 12


def test_count_spikes_outside_by_hand():
    sn = make_sparse_noise(GRID, duration_s=1.0, rate_hz=10.0, spots_per_frame=1, min_distance_deg=1.0, rng=1)
    from map2d.contract import GratingTable
    g = GratingTable.from_columns(onset_s=[2.0, 2.5], offset_s=[3.0, 2.8], orientation_deg=[0, 0],
                                  sf_cpd=[0.1, 0.1], phase_deg=[0, 0], contrast=[1, 1], tf_hz=[2, 2])
    # noise covers [0, 1.0) (last frame lasts the median 0.1 s), gratings [2, 3)
    t = np.array([-0.1, 0.0, 0.55, 0.999, 1.0, 1.5, 2.0, 2.9, 3.0, 7.0])
    s = Session(responses=Spikes(time_s=t, cell=np.zeros(t.size, int)), sparse_noise=sn, gratings=g)
    assert count_spikes_outside(s) == 5                       # -0.1, 1.0, 1.5, 3.0, 7.0
    sn.valid = np.ones(sn.n_frames, bool)
    sn.valid[5] = False                                        # frame [0.5, 0.6) no longer a window
    assert count_spikes_outside(s) == 6


def test_dropped_frames_are_reported_with_count_and_position(copy):
    t = np.load(copy / "sparse_noise_times.npy")
    t[120:] += 0.05                                            # one frame dropped after frame 119
    t[300:] += 0.10                                            # two more after frame 299
    np.save(copy / "sparse_noise_times.npy", t)
    s, msg = _warned(copy, "sparse_noise_times.npy", "field times", "2 frame intervals", "after frame 119, 299")
    assert "exclude_gaps" in msg
    assert s.sparse_noise.valid is None                        # reported only, by default


def test_dropped_frames_can_be_excluded(copy):
    t = np.load(copy / "sparse_noise_times.npy")
    t[120:] += 0.05
    np.save(copy / "sparse_noise_times.npy", t)
    m = _manifest(copy)
    m["sparse_noise"]["exclude_gaps"] = True
    _set_manifest(copy, m)
    s, msg = _warned(copy, "sparse_noise_times.npy", "1 frame interval is longer", "excluded")
    valid = s.sparse_noise.valid
    assert valid.dtype == bool and valid.shape == (t.size,)
    assert np.flatnonzero(~valid).tolist() == [119]
    assert find_frame_gaps(t).tolist() == [119]
    # the option survives a round trip
    write_session(copy.parent / "again", s)
    assert _manifest(copy.parent / "again")["sparse_noise"]["exclude_gaps"] is True


def test_exclude_gaps_must_be_boolean(copy):
    m = _manifest(copy)
    m["sparse_noise"]["exclude_gaps"] = "yes"
    _set_manifest(copy, m)
    _refused(copy, "session.json", "sparse_noise.exclude_gaps")


def test_frame_jitter_is_not_a_gap():
    rng = np.random.default_rng(2)
    t = np.arange(500) / 60.0 + rng.uniform(-0.002, 0.002, 500)   # +-2 ms jitter at 60 Hz
    assert find_frame_gaps(t).size == 0


def test_overlapping_grating_presentations_warn(copy):
    def overlap(lines):
        h = lines[0].split(",")
        f = lines[2].split(",")
        prev = lines[1].split(",")
        f[h.index("onset_s")] = str(float(prev[h.index("offset_s")]) - 0.2)
        lines[2] = ",".join(f)
        return lines
    _edit_csv(copy, overlap)
    s, msg = _warned(copy, "gratings.csv", "1 presentations overlap", "row 2")
    assert len(s.gratings) == 4


def test_duplicate_grating_rows_are_dropped(copy):
    _edit_csv(copy, lambda lines: lines + [lines[2], lines[3], lines[2]])
    s, msg = _warned(copy, "gratings.csv", "3 rows repeat an earlier row", "first at row 5", "same as row 2")
    assert len(s.gratings) == 4
    assert not any("overlap" in n for n in s.notes)           # the repeats are gone before the overlap check


# ------------------------------------------------------------------------------------------------
# 3. the command line: exit codes, no traceback, nothing lost
# ------------------------------------------------------------------------------------------------
def _tree_digest(folder):
    """Names and bytes of every file below ``folder``."""
    h = hashlib.sha256()
    for p in sorted(folder.rglob("*")):
        h.update(str(p.relative_to(folder)).encode())
        if p.is_file():
            h.update(p.read_bytes())
    return h.hexdigest()


@pytest.fixture
def earlier_results(tmp_path):
    """An --out folder holding earlier map2d results."""
    out = tmp_path / "results"
    with pipeline.results_folder(out) as tmp:
        (tmp / "cells.csv").write_text("cell,responsive\n0,true\n")
        (tmp / "maps.npz").write_bytes(b"earlier maps")
    return out


def _run_maps(capsys, folder, out, *extra):
    try:
        code = map2d.cli.main(["maps", str(folder), "--out", str(out), "--quiet", *extra])
    except NotImplementedError:
        pytest.skip("map2d maps is not built yet")
    err = capsys.readouterr().err
    if "NotImplementedError" in err:
        pytest.skip("map2d maps is not built yet")
    return code, err


def test_cli_bad_input_exits_2_one_line_and_keeps_earlier_results(copy, earlier_results, capsys):
    t = np.load(copy / "sparse_noise_times.npy")
    t[33] = np.nan
    np.save(copy / "sparse_noise_times.npy", t)
    before = _tree_digest(earlier_results)
    siblings = sorted(p.name for p in earlier_results.parent.iterdir())
    code, err = _run_maps(capsys, copy, earlier_results)
    assert code == 2, err
    assert "Traceback" not in err
    lines = [ln for ln in err.splitlines() if ln.startswith("map2d: error")]
    assert len(lines) == 1 and "sparse_noise_times.npy" in lines[0] and "row 33" in lines[0], err
    assert _tree_digest(earlier_results) == before               # earlier results byte-identical
    assert sorted(p.name for p in earlier_results.parent.iterdir()) == siblings   # no partial folder


def test_cli_bad_input_leaves_no_output_folder(copy, tmp_path, capsys):
    (copy / "spikes.npz").write_bytes(b"PK\x03\x04 not really a zip")
    out = tmp_path / "fresh"
    code, err = _run_maps(capsys, copy, out)
    assert code == 2 and "spikes.npz" in err and "Traceback" not in err
    assert not out.exists()
    assert not [p for p in tmp_path.iterdir() if "partial" in p.name]


def test_cli_debug_shows_the_bad_input_traceback(copy, tmp_path, capsys):
    (copy / "session.json").write_text("{not json")
    with pytest.raises(BadInput, match="session.json"):
        _run_maps(capsys, copy, tmp_path / "out", "--debug")


def test_cli_internal_error_exits_1_with_hint_and_keeps_earlier_results(good_folder, earlier_results, capsys,
                                                                       monkeypatch):
    import map2d.maps

    def broken(*args, **kwargs):
        raise RuntimeError("simulated fault in the engine")

    monkeypatch.setattr(map2d.maps, "compute_maps", broken)
    before = _tree_digest(earlier_results)
    siblings = sorted(p.name for p in earlier_results.parent.iterdir())
    code, err = _run_maps(capsys, good_folder, earlier_results)
    assert code == 1, err
    assert "Traceback" not in err
    lines = [ln for ln in err.splitlines() if ln.strip()]
    assert len(lines) == 1, err
    assert "internal error" in lines[0] and "RuntimeError" in lines[0] and "--debug" in lines[0]
    assert _tree_digest(earlier_results) == before
    assert sorted(p.name for p in earlier_results.parent.iterdir()) == siblings
    with pytest.raises(RuntimeError):
        map2d.cli.main(["maps", str(good_folder), "--out", str(earlier_results), "--quiet", "--debug"])


def test_cli_success_replaces_earlier_results_and_reruns_are_byte_identical(good_folder, earlier_results,
                                                                           tmp_path, capsys):
    import csv
    code, err = _run_maps(capsys, good_folder, earlier_results, "--seed", "3")
    assert code == 0, err
    first = (earlier_results / "cells.csv").read_bytes()
    assert first != b"cell,responsive\n0,true\n"
    rows = list(csv.DictReader(first.decode().splitlines()))
    assert [r["cell"] for r in rows] == ["0", "1", "2", "3"]
    assert rows[3]["center_x_deg"] == "" and rows[3]["peak_lag_s"] == ""   # silent cell kept, empty results
    again = tmp_path / "again"
    code, err = _run_maps(capsys, good_folder, again, "--seed", "3")
    assert code == 0, err
    assert (again / "cells.csv").read_bytes() == first


def test_spikes_on_another_clock_are_refused(copy):
    z = dict(np.load(copy / "spikes.npz"))
    np.savez(copy / "spikes.npz", time_s=z["time_s"] * 1000.0 + 5e4, cell=z["cell"])   # ms, another origin
    _refused(copy, "spikes.npz", "field time_s", "no spike falls in any stimulus window", "time units")


def test_trace_times_on_another_clock_are_refused(tcopy):
    t = np.load(tcopy / "trace_times.npy")
    np.save(tcopy / "trace_times.npy", t + 3600.0)
    _refused(tcopy, "trace_times.npy", "field times", "overlap no stimulus window")
