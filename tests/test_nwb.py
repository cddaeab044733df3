"""NWB input: sessions written with pynwb read back into the same arrays, analysed into the same
cells.csv as the session folder; defects in the file or the mapping are refused naming the table,
column, series or key."""

from __future__ import annotations

import datetime
import json
import shutil
import warnings

import numpy as np
import pytest

pynwb = pytest.importorskip("pynwb")

import map2d.cli  # noqa: E402
from map2d.contract import GRATING_COLUMNS, InputWarning, load_session, write_session  # noqa: E402
from map2d.errors import BadInput  # noqa: E402
from map2d.nwb import load_nwb, load_source, session_to_nwb  # noqa: E402
from map2d.simulate import simulate_session  # noqa: E402

#: A tiny session: one cell of each responsive kind, 2 min of sparse noise, short gratings.
TINY = dict(n_cells=4, minutes=2.0, cell_types=["on_dog", "off_dog", "simple", "complex"], seed=11,
            flashed_minutes=1.0, n_orientations=6, n_phases=4, n_directions=4, repeats=1,
            peak_rate_hz=(150.0, 220.0), baseline_hz=(0.5, 1.5))


def _quiet(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return fn(*args, **kwargs)


@pytest.fixture(scope="module")
def tiny():
    return {kind: simulate_session(responses=kind, **TINY)[0] for kind in ("spikes", "traces")}


@pytest.fixture(scope="module")
def tiny_nwb(tiny, tmp_path_factory):
    """{kind: (nwb path, mapping path, session folder)} for both response kinds."""
    root = tmp_path_factory.mktemp("nwb")
    out = {}
    for kind, session in tiny.items():
        folder = write_session(root / f"folder_{kind}", session)
        nwb, mapping = root / f"{kind}.nwb", root / f"{kind}.mapping.json"
        session_to_nwb(session, nwb, mapping_path=mapping)
        out[kind] = (nwb, mapping, folder)
    return out


def _same_session(a, b):
    if a.responses.kind == "spikes":
        np.testing.assert_array_equal(a.responses.time_s, b.responses.time_s)
        # spikes at equal times may come in another cell order: compare per cell
        for c in a.cell_ids:
            np.testing.assert_array_equal(a.responses.time_s[a.responses.cell == c],
                                          b.responses.time_s[b.responses.cell == c])
    else:
        np.testing.assert_array_equal(np.asarray(a.responses.values, np.float32), b.responses.values)
        np.testing.assert_array_equal(a.responses.times_s, b.responses.times_s)
    np.testing.assert_array_equal(a.cell_ids, b.cell_ids)
    np.testing.assert_array_equal(a.sparse_noise.frames, b.sparse_noise.frames)
    np.testing.assert_array_equal(a.sparse_noise.times_s, b.sparse_noise.times_s)
    assert a.sparse_noise.grid == b.sparse_noise.grid
    for c in GRATING_COLUMNS:
        np.testing.assert_array_equal(getattr(a.gratings, c), getattr(b.gratings, c))
    assert tuple(a.gratings.phase_origin_deg) == tuple(b.gratings.phase_origin_deg)


@pytest.mark.parametrize("kind", ["spikes", "traces"])
def test_round_trip_gives_the_same_arrays(tiny, tiny_nwb, kind):
    nwb, mapping, folder = tiny_nwb[kind]
    back = _quiet(load_nwb, nwb, mapping)
    _same_session(tiny[kind], back)
    _same_session(_quiet(load_session, folder), back)
    assert back.name == tiny[kind].name and back.path == nwb


def test_in_memory_nwbfile_written_by_hand_is_read(tmp_path):
    """A file made directly with pynwb (not by our converter): unit ids, empty units, a rate-sampled
    RoiResponseSeries, renamed columns with a scale and a constant, and sparse noise from .npy files."""
    from pynwb import NWBHDF5IO, NWBFile, TimeSeries
    from pynwb.epoch import TimeIntervals
    from pynwb.ophys import Fluorescence, ImageSegmentation, OpticalChannel, RoiResponseSeries

    f = NWBFile(session_description="hand made", identifier="hand-1", session_id="hand",
                session_start_time=datetime.datetime(2021, 5, 1, tzinfo=datetime.timezone.utc))
    f.add_unit(spike_times=[1.05, 1.25, 2.5], id=17)
    f.add_unit(spike_times=[], id=3)
    f.add_unit(spike_times=[1.5], id=40)
    table = TimeIntervals(name="drift_trials", description="trials")
    for col in ("ori", "spatial_frequency", "phase_cycles", "c"):
        table.add_column(col, col)
    rows = [(1.0, 2.0, 90.0, 0.04, 0.25, 1.0), (2.5, 3.5, 0.0, 0.08, 0.5, 0.0)]
    for start, stop, ori, sf, ph, c in rows:
        table.add_row(start_time=start, stop_time=stop, ori=ori, spatial_frequency=sf, phase_cycles=ph, c=c)
    f.add_time_intervals(table)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        dev = f.create_device("scope")
        plane = f.create_imaging_plane("plane", OpticalChannel(name="oc", description="green", emission_lambda=510.0),
                                       description="L2/3", device=dev, excitation_lambda=920.0,
                                       indicator="GCaMP", location="V1")
        mod = f.create_processing_module("ophys", "ophys")
        seg = ImageSegmentation()
        mod.add(seg)
        ps = seg.create_plane_segmentation("rois", plane, name="cells")
        for _ in range(2):
            ps.add_roi(image_mask=np.ones((3, 3)))
        region = ps.create_roi_table_region("both", region=[0, 1])
        data = np.arange(20.0).reshape(10, 2)                      # (samples, rois)
        mod.add(Fluorescence(roi_response_series=RoiResponseSeries(
            name="dff", data=data, rois=region, unit="1", rate=4.0, starting_time=1.0)))
    f.add_stimulus(TimeSeries(name="unused", data=np.zeros(3), unit="1", timestamps=[0.0, 1.0, 2.0]))
    path = tmp_path / "hand.nwb"
    with NWBHDF5IO(str(path), "w") as io:
        io.write(f)
    frames = np.zeros((4, 2, 3), np.int8)
    frames[1, 0, 2] = 1
    frames[2, 1, 0] = -1
    np.save(tmp_path / "sn.npy", frames)
    np.save(tmp_path / "sn_t.npy", np.array([0.0, 0.5, 1.0, 1.5]))
    columns = {"orientation_deg": "ori", "sf_cpd": "spatial_frequency",
               "phase_deg": {"column": "phase_cycles", "scale": 360}, "contrast": "c", "tf_hz": 2.0}
    mapping = {"responses": {"kind": "spikes"},
               "gratings": {"table": "drift_trials", "columns": columns},
               "sparse_noise": {"frames": "sn.npy", "times": "sn_t.npy",
                                "grid": {"center_deg": [4, -2], "spacing_deg": [5, 5]}}}
    (tmp_path / "m.json").write_text(json.dumps(mapping))
    s = _quiet(load_nwb, path, tmp_path / "m.json")
    assert s.name == "hand"                                   # the file's session_id
    np.testing.assert_array_equal(s.cell_ids, [3, 17, 40])     # unit ids, the empty unit kept
    np.testing.assert_array_equal(s.responses.time_s, [1.05, 1.25, 1.5, 2.5])
    np.testing.assert_array_equal(s.responses.cell, [17, 17, 40, 17])
    np.testing.assert_array_equal(s.gratings.phase_deg, [90.0, 180.0])    # cycles x 360
    np.testing.assert_array_equal(s.gratings.tf_hz, [2.0, 2.0])           # the constant
    np.testing.assert_array_equal(s.gratings.orientation_deg, [90.0, 0.0])
    assert tuple(s.gratings.phase_origin_deg) == (4.0, -2.0)              # default: grid centre (contract)
    np.testing.assert_array_equal(s.sparse_noise.frames, frames)
    assert (s.sparse_noise.grid.ny, s.sparse_noise.grid.nx) == (2, 3)
    assert any("no spikes" in n for n in s.notes)

    mapping["responses"] = {"kind": "traces", "series": "processing/ophys/Fluorescence/dff"}
    s = _quiet(load_nwb, path, {**mapping, "_base": str(tmp_path)})
    np.testing.assert_array_equal(s.responses.values, data.T)              # (rois, samples)
    np.testing.assert_allclose(s.responses.times_s, 1.0 + np.arange(10) / 4.0)   # starting_time + k / rate
    s2 = _quiet(load_nwb, path, {**mapping, "responses": {"kind": "traces", "series": "dff"},
                                 "_base": str(tmp_path)})                   # a unique bare name works too
    np.testing.assert_array_equal(s2.responses.values, s.responses.values)


def test_analyze_nwb_gives_the_same_cells_csv_as_the_folder(tiny_nwb, tmp_path, capsys):
    """``map2d analyze file.nwb --config`` (the whole command) against the folder's analysis, whose
    cells.csv is written by the same writer ``map2d analyze`` uses (the report is the slow part and is
    not what is compared)."""
    from map2d.analysis import analyze_session
    from map2d.contract import write_table
    nwb, mapping, folder = tiny_nwb["spikes"]
    assert map2d.cli.main(["analyze", str(nwb), "--config", str(mapping), "--out", str(tmp_path / "from_nwb"),
                           "--quiet"]) == 0
    write_table(tmp_path / "folder_cells.csv", analyze_session(_quiet(load_session, folder)).cells)
    a = (tmp_path / "folder_cells.csv").read_bytes()
    b = (tmp_path / "from_nwb" / "cells.csv").read_bytes()
    assert a == b
    rows = a.decode().splitlines()
    assert len(rows) == 1 + TINY["n_cells"] and "true" in a.decode()   # some cell is responsive: a real test


def test_traces_from_nwb_analyse_like_the_folder(tiny_nwb):
    from map2d.analysis import analyze_session
    nwb, mapping, folder = tiny_nwb["traces"]
    a = analyze_session(_quiet(load_session, folder), n_jobs=1)
    b = analyze_session(_quiet(load_nwb, nwb, mapping), n_jobs=1)
    assert list(a.cells) == list(b.cells)
    for k in a.cells:
        va, vb = np.asarray(a.cells[k], dtype=object), np.asarray(b.cells[k], dtype=object)
        assert [str(v) for v in va] == [str(v) for v in vb], k


def test_manifest_pointing_at_an_nwb_file(tiny, tiny_nwb, tmp_path):
    nwb, mapping, _ = tiny_nwb["spikes"]
    folder = tmp_path / "sess"
    folder.mkdir()
    shutil.copy(nwb, folder / "rec.nwb")
    shutil.copy(mapping, folder / "mapping.json")
    (folder / "session.json").write_text(json.dumps({"name": "day1", "nwb": {"file": "rec.nwb",
                                                                             "mapping": "mapping.json"}}))
    s = _quiet(load_source, folder)
    assert s.name == "day1"
    _same_session(tiny["spikes"], s)
    # the mapping may be inline too
    inline = json.loads(mapping.read_text())
    del inline["name"]
    (folder / "session.json").write_text(json.dumps({"nwb": {"file": "rec.nwb", "mapping": inline}}))
    s = _quiet(load_source, folder)
    assert s.name == "sess"                    # no name in the manifest nor the mapping: the folder name
    _same_session(tiny["spikes"], s)


def _mapping(path):
    return json.loads(path.read_text())


@pytest.mark.parametrize("edit, names", [
    (lambda m: m["gratings"].update(table="gratingz"), ["gratingz", "gratings.table", "intervals/gratings"]),
    (lambda m: m["gratings"]["columns"].update(sf_cpd="spatial_frequency"),
     ["gratings.spatial_frequency", "gratings.columns.sf_cpd", "column is missing"]),
    (lambda m: m["gratings"]["columns"].pop("tf_hz"), []),  # left out: looked up under the contract name, which the converter used -> loads
    (lambda m: m["sparse_noise"].update(series="noise"), ["noise", "sparse_noise.series", "not found"]),
    (lambda m: m["sparse_noise"].pop("grid"), ["sparse_noise.grid", "is missing"]),
    (lambda m: m["responses"].update(units="sorted_units"), ["sorted_units", "responses.units"]),
    (lambda m: m.update(responses={"kind": "traces", "series": "dff"}), ["dff", "responses.series"]),
    (lambda m: m.update(responses={"kind": "lfp"}), ["responses.kind"]),
    (lambda m: m.pop("responses"), ["responses", "is missing"]),
    (lambda m: m["gratings"]["columns"].update(phase_deg={"scale": 360}), ["gratings.columns.phase_deg.column"]),
])
def test_missing_table_column_or_key_is_named(tiny_nwb, tmp_path, edit, names):
    nwb, mapping, _ = tiny_nwb["spikes"]
    m = _mapping(mapping)
    edit(m)
    if not names:
        assert len(_quiet(load_nwb, nwb, m).gratings) > 0
        return
    with pytest.raises(BadInput) as err:
        _quiet(load_nwb, nwb, m)
    for name in names:
        assert name in str(err.value)


def test_cli_names_a_missing_column_without_traceback(tiny_nwb, tmp_path, capsys):
    nwb, mapping, _ = tiny_nwb["spikes"]
    m = _mapping(mapping)
    m["gratings"]["columns"]["orientation_deg"] = "direction"
    bad = tmp_path / "bad.json"
    bad.write_text(json.dumps(m))
    rc = map2d.cli.main(["analyze", str(nwb), "--config", str(bad), "--out", str(tmp_path / "r")])
    err = capsys.readouterr().err
    assert rc == 2 and "gratings.direction" in err and "column is missing" in err and "Traceback" not in err
    assert not (tmp_path / "r").exists()
    rc = map2d.cli.main(["analyze", str(nwb), "--out", str(tmp_path / "r")])   # no mapping
    assert rc == 2 and "--config" in capsys.readouterr().err


def test_bad_values_are_refused_with_the_row(tmp_path, tiny):
    s = tiny["spikes"]
    nwb = tmp_path / "x.nwb"
    m = session_to_nwb(s, nwb)
    m["gratings"]["columns"]["contrast"] = -1.0                  # a constant applies to every row
    with pytest.raises(BadInput, match=r"contrast.*row id 0: must not be negative"):
        _quiet(load_nwb, nwb, m)
    m = session_to_nwb(s, nwb)
    m["sparse_noise"]["grid"]["spacing_deg"] = [0, 2]
    with pytest.raises(BadInput, match="spacing_deg"):
        _quiet(load_nwb, nwb, m)
    (tmp_path / "junk.nwb").write_bytes(b"not hdf5 at all")
    with pytest.raises(BadInput, match="not a readable NWB file"):
        load_nwb(tmp_path / "junk.nwb", m)


def test_responses_on_another_clock_are_refused(tmp_path, tiny):
    from dataclasses import replace
    s = tiny["spikes"]
    shifted = replace(s, responses=replace(s.responses, time_s=s.responses.time_s + 1e4))
    nwb = tmp_path / "late.nwb"
    m = session_to_nwb(shifted, nwb)
    with pytest.raises(BadInput, match="check time units and clock"):
        _quiet(load_nwb, nwb, m)


def test_spike_times_and_unit_ids_beyond_their_bounds_are_refused(tmp_path, tiny):
    """NWB spike times and unit ids meet the same bounds as a session folder's (contract.LIMITS)."""
    from dataclasses import replace
    s = tiny["spikes"]
    t = s.responses.time_s.copy()
    t[-1] = 1e12                                  # a damaged or hostile value, far past any clock
    nwb = tmp_path / "far.nwb"
    m = session_to_nwb(replace(s, responses=replace(s.responses, time_s=t)), nwb)
    with pytest.raises(BadInput, match=r"spike_times.*1e\+12 s is outside"):
        _quiet(load_nwb, nwb, m)
