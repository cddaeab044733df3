"""Hostile values: every case is refused with one line naming the file and field (or argument), exit
code 2, or gives correct results; never an internal error, a silent misreading or an unbounded read.

The table covers the fault-injection cases: deep or huge JSON, numbers of thousands of digits,
Python's lenient number syntax (``0_08`` is 8 to ``float``), physical values far outside any
experiment, duplicate columns, out-of-range ids and labels, absurd arguments, long and non-UTF-8
names, image and archive members too large to read. The bounds themselves are
:data:`map2d.contract.LIMITS` (common practice: generous limits that only wrong units meet).
"""

from __future__ import annotations

import io
import json
import os
import shutil
import zipfile

import numpy as np
import pytest

import map2d.cli
import map2d.contract as contract
from map2d.contract import load_session, parse_number, write_session
from map2d.errors import BadInput
from test_robustness import make_session


@pytest.fixture(scope="module")
def good(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hostile") / "session"
    write_session(folder, make_session())
    return folder


@pytest.fixture
def copy(good, tmp_path):
    dst = tmp_path / "s"
    shutil.copytree(good, dst)
    return dst


def _manifest(folder):
    return json.loads((folder / "session.json").read_text())


def _set(folder, *path, value):
    m = _manifest(folder)
    d = m
    for k in path[:-1]:
        d = d.setdefault(k, {})
    d[path[-1]] = value
    (folder / "session.json").write_text(json.dumps(m))


def _csv(folder, column, text, row=1):
    lines = (folder / "gratings.csv").read_text().splitlines()
    header = lines[0].split(",")
    cells = lines[row].split(",")
    cells[header.index(column)] = text
    lines[row] = ",".join(cells)
    (folder / "gratings.csv").write_text("\n".join(lines) + "\n", encoding="utf-8")


def _json_text(folder, text):
    (folder / "session.json").write_text(text)


def _replace_in_json(old, new):
    def edit(folder):
        text = (folder / "session.json").read_text()
        assert old in text
        _json_text(folder, text.replace(old, new, 1))
    return edit


def _dup_column(folder):
    lines = (folder / "gratings.csv").read_text().splitlines()
    sf = lines[0].split(",").index("sf_cpd")
    lines = [ln + "," + (ln.split(",")[sf] if i else "sf_cpd") for i, ln in enumerate(lines)]
    (folder / "gratings.csv").write_text("\n".join(lines) + "\n")


def _rois(labels, offset=None):
    def edit(folder):
        import tifffile
        tifffile.imwrite(folder / "rois.tif", np.asarray(labels))
        _set(folder, "rois", value="rois.tif" if offset is None else {"file": "rois.tif", "label_offset": offset})
    return edit


def _spike_cells(value):
    def edit(folder):
        with np.load(folder / "spikes.npz") as z:
            t, c = z["time_s"], z["cell"].astype(np.int64)
        c[0] = value
        np.savez(folder / "spikes.npz", time_s=t, cell=c)
        _set(folder, "responses", "cell_ids", value=sorted({int(v) for v in c} | {3}))
    return edit


def _spike_time(i, value):
    def edit(folder):
        with np.load(folder / "spikes.npz") as z:
            t, c = z["time_s"].copy(), z["cell"]
        t[i] = value
        np.savez(folder / "spikes.npz", time_s=t, cell=c)
    return edit


def _scaled(name, factor):
    def edit(folder):
        np.save(folder / name, np.load(folder / name) * factor)
    return edit


# (case, edit of a valid session folder, words the one-line refusal must hold)
CASES = [
    ("JSON 100000 levels deep", lambda f: _json_text(f, "[" * 100000 + "]" * 100000), ["session.json", "nests"]),
    ("JSON number of 5000 digits", _replace_in_json('"responses"', '"x": ' + "9" * 5000 + ', "responses"'),
     ["session.json", "5000 characters"]),
    ("JSON 1e400", _replace_in_json('"responses"', '"x": 1e400, "responses"'), ["session.json", "range"]),
    ("JSON NaN", _replace_in_json('"responses"', '"x": NaN, "responses"'), ["session.json", "NaN"]),
    ("sf_cpd 1e300", lambda f: _csv(f, "sf_cpd", "1e300"), ["gratings.csv", "sf_cpd", "row 1", "100"]),
    ("sf_cpd 1e-300", lambda f: _csv(f, "sf_cpd", "1e-300"), ["gratings.csv", "sf_cpd", "row 1", "0.0001"]),
    ("sf_cpd 0_08", lambda f: _csv(f, "sf_cpd", "0_08"), ["gratings.csv", "sf_cpd", "'0_08' is not a number"]),
    ("sf_cpd in Arabic-Indic digits", lambda f: _csv(f, "sf_cpd", "\u0660.\u0661"), ["sf_cpd", "not a number"]),
    ("sf_cpd in full-width digits", lambda f: _csv(f, "sf_cpd", "\uff10.\uff11"), ["sf_cpd", "not a number"]),
    ("sf_cpd nan", lambda f: _csv(f, "sf_cpd", "nan"), ["sf_cpd", "not a number"]),
    ("sf_cpd infinity", lambda f: _csv(f, "sf_cpd", "Infinity"), ["sf_cpd", "not a number"]),
    ("sf_cpd hexadecimal", lambda f: _csv(f, "sf_cpd", "0x1p-3"), ["sf_cpd", "not a number"]),
    ("sf_cpd of 5000 digits", lambda f: _csv(f, "sf_cpd", "0." + "1" * 5000), ["sf_cpd", "5002 characters"]),
    ("sf_cpd 1e-400 underflow", lambda f: _csv(f, "sf_cpd", "1e-400"), ["sf_cpd", "range of a 64-bit"]),
    ("contrast 1e300", lambda f: _csv(f, "contrast", "1e300"), ["gratings.csv", "contrast", "outside 0 to 1"]),
    ("contrast in percent", lambda f: _csv(f, "contrast", "100"), ["contrast", "outside 0 to 1"]),
    ("orientation 1e300", lambda f: _csv(f, "orientation_deg", "1e300"), ["orientation_deg", "3600"]),
    ("phase 1e300", lambda f: _csv(f, "phase_deg", "-1e300"), ["phase_deg", "3600"]),
    ("tf 1e300", lambda f: _csv(f, "tf_hz", "1e300"), ["tf_hz", "1000 Hz"]),
    ("onset 1e300", lambda f: _csv(f, "onset_s", "-1e300"), ["onset_s", "1e+10"]),
    ("presentation of a year", lambda f: _csv(f, "offset_s", "3.2e7"), ["offset_s", "86400 s"]),
    ("duplicate column", _dup_column, ["gratings.csv", "sf_cpd", "more than once"]),
    ("spike time 1e300", _spike_time(-1, 1e300), ["spikes.npz", "field time_s", "1e+10 s"]),
    ("frame times times 1e300", _scaled("sparse_noise_times.npy", 1e300), ["sparse_noise_times.npy", "field times",
                                                                           "row 1", "1e+10 s"]),
    ("spacing 1e-300", lambda f: _set(f, "sparse_noise", "grid", "spacing_deg", value=[1e-300, 1e-300]),
     ["sparse_noise.grid.spacing_deg", "0.0001"]),
    ("spacing 1e300", lambda f: _set(f, "sparse_noise", "grid", "spacing_deg", value=[1e300, 1]),
     ["sparse_noise.grid.spacing_deg", "180"]),
    ("spacing true", lambda f: _set(f, "sparse_noise", "grid", "spacing_deg", value=[True, 1]),
     ["sparse_noise.grid.spacing_deg", "two numbers"]),
    ("centre 1e300", lambda f: _set(f, "sparse_noise", "grid", "center_deg", value=[1e300, 0]),
     ["sparse_noise.grid.center_deg", "360"]),
    ("phase origin 1e300", lambda f: _set(f, "gratings", "phase_origin_deg", value=[0, -1e300]),
     ["gratings.phase_origin_deg", "360"]),
    ("display 1e300 px", lambda f: _set(f, "display", value={"width_cm": 50, "height_cm": 30, "width_px": 1e300,
                                                              "height_px": 1080, "distance_cm": 30}),
     ["display.width_px", "1e+06"]),
    ("display width as text", lambda f: _set(f, "display", value={"width_cm": "5_2", "height_cm": 30, "width_px": 1920,
                                                                   "height_px": 1080, "distance_cm": 30}),
     ["display.width_cm", "must be a number"]),
    ("ROI label negative", _rois(np.array([[0, -3], [1, 2]], np.int32)), ["rois.tif", "label -3", "(0, 1)"]),
    ("ROI label above 2^62", _rois(np.array([[0, 2 ** 62], [1, 2]], np.int64)), ["rois.tif", "label 4611686"]),
    ("ROI label_offset 2^70", _rois(np.array([[0, 1], [1, 2]], np.int32), offset=2 ** 70),
     ["rois.label_offset", "outside"]),
    ("cell id 2^62", _spike_cells(2 ** 62), ["spikes.npz", "field cell", "outside"]),
    ("cell_ids 2^62", lambda f: _set(f, "responses", "cell_ids", value=[0, 1, 2, 3, 2 ** 62]),
     ["responses.cell_ids", "outside"]),
    ("file name of 5000 characters", lambda f: _set(f, "sparse_noise", "frames", value="x" * 5000),
     ["sparse_noise.frames", "not a usable file name"]),
    ("session name of 5000 characters", lambda f: _set(f, "name", value="n" * 5000), ["field name", "5000"]),
]


@pytest.mark.parametrize("edit,words", [c[1:] for c in CASES], ids=[c[0] for c in CASES])
def test_hostile_value_is_refused_naming_file_and_field(copy, edit, words):
    edit(copy)
    with pytest.raises(BadInput) as info:
        load_session(copy)
    msg = str(info.value)
    assert "\n" not in msg and len(msg) < 400, msg
    for w in words:
        assert w in msg, (w, msg)


def test_the_table_loads_when_the_values_are_sane(copy):
    """The same edits with ordinary values load (the refusals above are about the values)."""
    _csv(copy, "sf_cpd", "8e-2")
    _csv(copy, "contrast", "+.5")
    _rois(np.array([[0, 1], [2, 3]], np.int32), offset=1)(copy)
    _set(copy, "display", value={"width_cm": 50, "height_cm": 30, "width_px": 1920, "height_px": 1080,
                                 "distance_cm": 30, "eye_cm": [-2.0, 1.0]})
    s = load_session(copy)
    assert s.gratings.sf_cpd[0] == 0.08 and s.gratings.contrast[0] == 0.5
    assert s.roi_label_offset == 1 and s.display.eye_x_cm == -2.0


@pytest.mark.parametrize("text,value", [("0.08", 0.08), (" -1.5e-3 ", -0.0015), ("3", 3.0), ("+.5", 0.5),
                                        ("1E2", 100.0), ("7.", 7.0)])
def test_parse_number_reads_plain_and_exponent_notation(text, value):
    assert parse_number(text) == value            # the same value as Python's float (reference)


@pytest.mark.parametrize("text", ["0_08", "1_000", "\u0661", "nan", "-inf", "0x10", "", " ", "1e", ".", "1,5",
                                  "1.5.2", "--1", "1e999", "1" * 41])
def test_parse_number_refuses_everything_else(text):
    with pytest.raises(ValueError):
        parse_number(text)


# -- bounded reads ---------------------------------------------------------------------------------
def test_roi_image_too_large_is_refused_before_decoding(copy, monkeypatch):
    import tifffile
    _rois(np.zeros((40, 50), np.int32))(copy)
    monkeypatch.setattr(contract, "MAX_ROI_PIXELS", 1000)
    decoded = []
    monkeypatch.setattr(tifffile.TiffPageSeries, "asarray", lambda self, *a, **k: decoded.append(1))
    with pytest.raises(BadInput) as info:
        load_session(copy)
    assert "40 x 50 pixels" in str(info.value) and "rois" in str(info.value)
    assert decoded == []


def test_roi_image_beyond_free_memory_is_refused(copy, monkeypatch):
    _rois(np.zeros((40, 50), np.int32))(copy)
    monkeypatch.setattr(contract, "_memory_available", lambda: 4000)
    with pytest.raises(BadInput, match="can be read here"):
        load_session(copy)


def test_npz_member_above_the_cap_is_refused_before_its_checksum(copy, monkeypatch):
    monkeypatch.setattr(contract, "MAX_NPZ_MEMBER_BYTES", 100)
    read = []
    original = zipfile.ZipExtFile.read
    monkeypatch.setattr(zipfile.ZipExtFile, "read", lambda self, n=-1: read.append(n) or original(self, n))
    with pytest.raises(BadInput) as info:
        load_session(copy)
    assert "spikes.npz" in str(info.value) and "MiB" in str(info.value)
    assert read == []                               # not one byte decompressed


def test_npz_member_whose_header_disagrees_with_its_size_is_refused(copy):
    with np.load(copy / "spikes.npz") as z:
        t, c = z["time_s"], z["cell"]
    buf = io.BytesIO()
    np.save(buf, t)
    raw = buf.getvalue()
    n = str(t.size).encode()
    big = str(t.size * 1000).encode()
    raw = raw.replace(b"(" + n + b",)", b"(" + big + b",)" + b" " * 0, 1)
    raw = raw.replace(b" " * (len(big) - len(n)) + b"\n", b"\n", 1)     # keep the header length
    with zipfile.ZipFile(copy / "spikes.npz", "w") as zf:
        zf.writestr("time_s.npy", raw)
        buf = io.BytesIO()
        np.save(buf, c)
        zf.writestr("cell.npy", buf.getvalue())
    with pytest.raises(BadInput) as info:
        load_session(copy)
    assert "time_s" in str(info.value) and "header describes" in str(info.value)


def test_npz_members_not_used_are_never_read(copy):
    with np.load(copy / "spikes.npz") as z:
        arrays = {k: z[k] for k in z.files}
    with zipfile.ZipFile(copy / "spikes.npz", "w") as zf:
        for k, v in arrays.items():
            buf = io.BytesIO()
            np.save(buf, v)
            zf.writestr(f"{k}.npy", buf.getvalue())
        zf.writestr("junk.npy", b"not an array at all" * 1000)
    s = load_session(copy)
    assert s.responses.time_s.size == arrays["time_s"].size


# -- names -------------------------------------------------------------------------------------------
@pytest.mark.skipif(os.name != "posix", reason="byte file names")
def test_non_utf8_folder_name_without_a_session_name_runs(good, tmp_path, capsys):
    folder = os.path.join(os.fsencode(tmp_path), b"sess\xff\xfe")
    shutil.copytree(good, os.fsdecode(folder))
    m = _manifest(good)
    m.pop("name", None)
    with open(os.path.join(folder, b"session.json"), "w") as fh:
        json.dump(m, fh)
    s = load_session(os.fsdecode(folder))
    assert s.name == "sess\ufffd\ufffd"
    out = os.fsdecode(os.path.join(os.fsencode(tmp_path), b"out\xff"))
    assert map2d.cli.main(["maps", os.fsdecode(folder), "--out", out, "--no-fits"]) == 0
    assert os.path.isfile(os.path.join(out, "cells.csv"))


def test_session_path_of_5000_characters_is_one_line_exit_2(tmp_path, capsys):
    code = map2d.cli.main(["maps", str(tmp_path / ("p" * 5000)), "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and len(err) < 500, err
    assert "ppppp" in err


# -- arguments of every command ----------------------------------------------------------------------
LAG_AND_SEED = [("--max-lag", v) for v in ("-1", "nan", "inf", "100", "1_0", "1e999")] + \
               [("--seed", v) for v in ("-1", str(2 ** 70), "1.5", "1_0")]


@pytest.mark.parametrize("command", ["maps", "gratings", "analyze", "batch", "watch"])
@pytest.mark.parametrize("option,value", LAG_AND_SEED)
def test_max_lag_and_seed_validated_in_every_analysis_command(good, tmp_path, capsys, command, option, value):
    code = map2d.cli.main([command, str(good), "--out", str(tmp_path / "o"), "--quiet", option, value])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and option in err, err
    assert not (tmp_path / "o").exists()


@pytest.mark.parametrize("argv", [["simulate", "{out}", "--seed", "-1"],
                                  ["simulate", "{out}", "--cells", "1_0"],
                                  ["stimulus", "sparse-noise", "--out", "{out}", "--seed", "-1"],
                                  ["stimulus", "gratings", "--out", "{out}", "--sf-cpd", "0_08"],
                                  ["stimulus", "gratings", "--out", "{out}", "--contrast", "1e300"],
                                  ["stimulus", "sparse-noise", "--out", "{out}", "--spacing-deg", "1e-300", "1"],
                                  ["stimulus", "sparse-noise", "--out", "{out}", "--center-deg", "1e300", "0"],
                                  ["batch", "{out}", "--out", "{out}", "--workers", "0"]])
def test_hostile_arguments_of_the_other_commands(tmp_path, capsys, argv):
    argv = [a.replace("{out}", str(tmp_path / "o")) for a in argv]
    code = map2d.cli.main(argv)
    err = [ln for ln in capsys.readouterr().err.splitlines() if not ln.startswith("Caution")]
    assert code == 2 and len(err) == 1 and "argument" in err[0], err
    assert not (tmp_path / "o").exists()


def test_a_long_multiline_message_is_cut_to_one_line(good, tmp_path, capsys, monkeypatch):
    import map2d.nwb

    def fail(source, config=None):
        raise BadInput("x.nwb", None, "not a readable NWB file (" + "detail\n" * 300 + ")")
    monkeypatch.setattr(map2d.nwb, "load_source", fail)
    assert map2d.cli.main(["analyze", str(good), "--out", str(tmp_path / "o"), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert len(err.splitlines()) == 1 and len(err) <= 420 and "x.nwb" in err and "--debug" in err, err


def test_spike_arrays_of_unequal_length_are_refused_from_their_headers(copy, monkeypatch):
    with np.load(copy / "spikes.npz") as z:
        t, c = z["time_s"], z["cell"]
    np.savez(copy / "spikes.npz", time_s=np.zeros(2_000_000), cell=c)       # 16 MB of zeros
    read = []
    original = zipfile.ZipExtFile.read
    monkeypatch.setattr(zipfile.ZipExtFile, "read", lambda self, n=-1: read.append(n) or original(self, n))
    with pytest.raises(BadInput) as info:
        load_session(copy)
    assert f"has {c.size} entries but time_s has 2000000" in str(info.value)
    assert contract._CHUNK_BYTES not in read and -1 not in read     # only the headers were read


@pytest.mark.parametrize("command", ["maps", "analyze"])
def test_two_frame_sparse_noise_is_refused_naming_max_lag(copy, tmp_path, capsys, command):
    np.save(copy / "sparse_noise.npy", np.load(copy / "sparse_noise.npy")[:2])
    np.save(copy / "sparse_noise_times.npy", np.load(copy / "sparse_noise_times.npy")[:2])
    code = map2d.cli.main([command, str(copy), "--out", str(tmp_path / "o"), "--quiet"])
    err = [ln for ln in capsys.readouterr().err.splitlines() if "warning" not in ln]
    assert code == 2 and len(err) == 1 and "--max-lag" in err[0] and "2 sparse-noise frames" in err[0], err


@pytest.mark.parametrize("text,words", [("[" * 100000 + "]" * 100000, "nests 100000 levels"),
                                        ('{"x": ' + "9" * 5000 + "}", "5000 characters")])
@pytest.mark.parametrize("command", ["maps", "analyze"])
def test_hostile_json_through_the_command_line(copy, tmp_path, capsys, command, text, words):
    (copy / "session.json").write_text(text)
    code = map2d.cli.main([command, str(copy), "--out", str(tmp_path / "o"), "--quiet"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and len(err.splitlines()) == 1 and "session.json" in err and words in err, err


def test_json_larger_than_the_bound_is_refused(copy, monkeypatch):
    monkeypatch.setattr(contract, "MAX_JSON_BYTES", 64)
    with pytest.raises(BadInput, match="bytes"):
        load_session(copy)


def test_a_file_name_with_a_line_break_stays_one_line():
    """A manifest's file name may hold a line break (found by the property test of random manifest
    values): the message shows it escaped, on one line."""
    from map2d.errors import BadInput
    msg = str(BadInput("/data/s/0\n", "file", "file not found"))
    assert msg == "/data/s/0\\n: field file: file not found" and "\n" not in msg
