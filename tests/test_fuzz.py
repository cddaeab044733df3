"""Bounded, seeded fuzzing of the session loader and the CLI.

Every input file of a small valid session is damaged at random (bits flipped, bytes overwritten,
truncated, bytes inserted). The loader must either refuse with BadInput or return a session that is
consistent (shapes agree, times strictly increasing and finite, values in range); the CLI must exit 0
or 2, never with a traceback.

What cannot be caught: a flipped bit in the data of a raw ``.npy`` or in a digit of a CSV/JSON number
may give another valid value (a 0 frame pixel that becomes 1, a spike time that moves). ``.npz``
members carry a CRC-32 that the loader checks, so a loaded ``spikes.npz`` must equal the original; a
``.npy`` header states the data size, so a loaded ``.npy`` must keep its shape.
"""

from __future__ import annotations

import shutil

import numpy as np
import pytest

import map2d.cli
from map2d.contract import GRATING_COLUMNS, Session, Spikes, Traces, load_session, write_session
from map2d.errors import BadInput
from map2d.geometry import Grid
from map2d.stimuli import make_drifting_gratings, make_sparse_noise

GRID = Grid(ny=4, nx=5, center_x_deg=1.0, center_y_deg=2.0, dx_deg=4.0, dy_deg=4.0)
N_ITER = 60

SPIKE_FILES = ["session.json", "sparse_noise.npy", "sparse_noise_times.npy", "gratings.csv", "spikes.npz"]
TRACE_FILES = ["session.json", "traces.npy", "trace_times.npy"]


def _session(kind, rng=0):
    rng = np.random.default_rng(rng)
    sn = make_sparse_noise(GRID, duration_s=12.0, rate_hz=20.0, spots_per_frame=1, min_distance_deg=1.0, rng=rng)
    table = make_drifting_gratings([0, 90, 180, 270], [0.1], tf_hz=2.0, trial_s=0.5, gap_s=0.25, repeats=1,
                                   phase_origin_deg=(1.0, 2.0), start_s=12.5, rng=rng)
    if kind == "spikes":
        t = np.sort(rng.uniform(0.0, 15.0, 300))
        resp = Spikes(time_s=t, cell=rng.integers(0, 3, t.size))
    else:
        times = np.arange(0.0, 15.0, 0.1)
        resp = Traces(values=rng.normal(size=(2, times.size)).astype(np.float32), times_s=times)
    return Session(responses=resp, sparse_noise=sn, gratings=table, name="fuzz")


@pytest.fixture(scope="module")
def originals(tmp_path_factory):
    base = tmp_path_factory.mktemp("fuzz_base")
    out = {}
    for kind in ("spikes", "traces"):
        folder = base / kind
        write_session(folder, _session(kind))
        out[kind] = (folder, load_session(folder))
    return out


def _corrupt(data: bytes, rng) -> tuple[bytes, str, int]:
    """One random damage: flip bits, overwrite bytes, truncate, or insert bytes. Returns (data, what, where)."""
    n = len(data)
    op = rng.integers(4)
    buf = bytearray(data)
    if op == 0:
        k = int(rng.integers(1, 4))
        pos = rng.integers(0, n, k)
        for p in pos:
            buf[p] ^= 1 << int(rng.integers(8))
        return bytes(buf), "flip", int(pos.min())
    if op == 1:
        p = int(rng.integers(0, n))
        w = int(rng.integers(1, 9))
        buf[p:p + w] = rng.integers(0, 256, min(w, n - p), dtype=np.uint8).tobytes()
        return bytes(buf), "overwrite", p
    if op == 2:
        p = int(rng.integers(0, n))
        return bytes(buf[:p]), "truncate", p
    p = int(rng.integers(0, n + 1))
    ins = rng.integers(0, 256, int(rng.integers(1, 9)), dtype=np.uint8).tobytes()
    return bytes(buf[:p] + ins + buf[p:]), "insert", p


def _npy_data_offset(path) -> int:
    with open(path, "rb") as fh:
        major, _ = np.lib.format.read_magic(fh)
        (np.lib.format.read_array_header_1_0 if major == 1 else np.lib.format.read_array_header_2_0)(fh)
        return fh.tell()


def _assert_consistent(s: Session, original: Session, name: str, what: str, where: int, offset: int):
    """Every invariant a loaded session promises, and what the checksums and headers guarantee."""
    sn = s.sparse_noise
    if sn is not None:
        F = sn.frames.shape[0]
        assert sn.frames.ndim == 3 and F >= 2
        assert sn.frames.shape[1:] == sn.grid.shape
        if sn.frames.dtype.kind in "iu":
            assert sn.frames.dtype == np.int8 and np.isin(sn.frames, (-1, 0, 1)).all()
        else:
            assert np.isfinite(sn.frames).all()
        assert sn.times_s.dtype == np.float64 and sn.times_s.shape == (F,)
        assert np.isfinite(sn.times_s).all() and np.all(np.diff(sn.times_s) > 0)
        g = sn.grid
        assert np.isfinite([g.center_x_deg, g.center_y_deg]).all() and g.dx_deg > 0 and g.dy_deg > 0
        assert np.isfinite([g.dx_deg, g.dy_deg]).all()
        if sn.valid is not None:
            assert sn.valid.shape == (F,) and sn.valid.dtype == bool
    gr = s.gratings
    if gr is not None:
        cols = [getattr(gr, c) for c in GRATING_COLUMNS]
        assert len({c.size for c in cols}) == 1 and len(gr) >= 1
        assert all(np.isfinite(c).all() for c in cols)
        assert np.all(gr.offset_s > gr.onset_s) and np.all(np.diff(gr.onset_s) >= 0)
        assert np.all(gr.sf_cpd >= 0) and np.all(gr.contrast >= 0)
        assert np.all((gr.sf_cpd > 0) | (gr.contrast == 0))
        assert np.isfinite(gr.phase_origin_deg).all()
    r = s.responses
    if isinstance(r, Spikes):
        assert r.time_s.dtype == np.float64 and r.cell.shape == r.time_s.shape
        assert np.isfinite(r.time_s).all() and np.all(np.diff(r.time_s) >= 0)
        assert r.cell_ids.size >= 1 and np.all(np.diff(r.cell_ids) > 0)
        assert np.isin(r.cell, r.cell_ids).all()
        if name == "spikes.npz":        # CRC-32 checked: the arrays are the original ones
            assert np.array_equal(r.time_s, original.responses.time_s), (what, where)
            assert np.array_equal(r.cell, original.responses.cell), (what, where)
    else:
        assert r.values.ndim == 2 and r.values.shape[0] >= 1 and r.values.shape[1] >= 2
        assert r.times_s.shape == (r.values.shape[1],)
        assert np.isfinite(r.times_s).all() and np.all(np.diff(r.times_s) > 0)
    if name.endswith(".npy") and what in ("flip", "overwrite") and where < offset:
        # header damage that still loads must not change the shape
        arrays = {"sparse_noise.npy": (sn.frames if sn is not None else None, original.sparse_noise.frames),
                  "sparse_noise_times.npy": (sn.times_s if sn is not None else None,
                                             original.sparse_noise.times_s),
                  "traces.npy": (getattr(r, "values", None), getattr(original.responses, "values", None)),
                  "trace_times.npy": (getattr(r, "times_s", None), getattr(original.responses, "times_s", None))}
        got, want = arrays[name]
        assert got is not None and got.shape == want.shape, (name, what, where)


def test_damaged_files_are_refused_or_load_consistently(originals, tmp_path):
    rng = np.random.default_rng(20240611)
    outcomes = {"refused": 0, "loaded": 0}
    for it in range(N_ITER):
        kind = "spikes" if it % 3 else "traces"
        src, original = originals[kind]
        files = SPIKE_FILES if kind == "spikes" else TRACE_FILES
        name = files[int(rng.integers(len(files)))]
        folder = tmp_path / f"it{it:03d}"
        shutil.copytree(src, folder)
        path = folder / name
        offset = _npy_data_offset(path) if name.endswith(".npy") else 0
        damaged, what, where = _corrupt(path.read_bytes(), rng)
        path.write_bytes(damaged)
        try:
            s = load_session(folder)
        except BadInput as exc:
            msg = str(exc)
            assert "\n" not in msg and len(msg) < 400 + len(str(folder)), msg
            assert str(folder) in msg, msg                   # names the file (or the folder's manifest)
            outcomes["refused"] += 1
        except Exception as exc:  # pragma: no cover - the failure this test exists to find
            raise AssertionError(f"iteration {it}: {what} at byte {where} of {name} raised "
                                 f"{type(exc).__name__}: {exc}") from exc
        else:
            _assert_consistent(s, original, name, what, where, offset)
            outcomes["loaded"] += 1
        shutil.rmtree(folder)
    # the loop exercised both branches (a fuzz loop that refuses everything tests little)
    assert outcomes["refused"] >= 10 and outcomes["loaded"] >= 5, outcomes


def test_cli_never_shows_a_traceback_on_damaged_files(originals, tmp_path, capsys):
    rng = np.random.default_rng(7)
    codes = []
    for it in range(16):
        src, _ = originals["spikes"]
        name = SPIKE_FILES[it % len(SPIKE_FILES)]
        folder = tmp_path / f"cli{it:02d}"
        shutil.copytree(src, folder)
        path = folder / name
        path.write_bytes(_corrupt(path.read_bytes(), rng)[0])
        out = tmp_path / f"out{it:02d}"
        try:
            code = map2d.cli.main(["maps", str(folder), "--out", str(out), "--quiet", "--max-lag", "0.1"])
        except NotImplementedError:
            pytest.skip("map2d maps is not built yet")
        err = capsys.readouterr().err
        if "NotImplementedError" in err:
            pytest.skip("map2d maps is not built yet")
        assert code in (0, 2), (it, name, err)
        assert "Traceback" not in err and "internal error" not in err, (it, name, err)
        assert out.exists() == (code == 0)                      # a refused run leaves no folder
        assert not [p for p in tmp_path.iterdir() if "partial" in p.name]
        codes.append(code)
        shutil.rmtree(folder)
    assert 2 in codes, codes
