"""Stimulus movies as stored luminance: uint8 / uint16 frames with a stated background level and
contrast scale become contrast on load; three-level movies go to the sparse engine, any other to the
dense one; binary +-1 noise is dense noise."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

from map2d.contract import InputWarning, load_session, write_session
from map2d.errors import BadInput
from map2d.maps import compute_maps
from map2d.simulate import simulate_session


@pytest.fixture(scope="module")
def small():
    session, _ = simulate_session(n_cells=2, minutes=1.0, cell_types=["on_dog", "simple"], seed=4,
                                  flashed_minutes=0.2, n_orientations=4, n_phases=2, n_directions=2, repeats=1)
    return session


def _folder(tmp_path, session, frames, luminance=None):
    folder = write_session(tmp_path / "s", session, overwrite=True)
    np.save(folder / "sparse_noise.npy", frames)
    manifest = json.loads((folder / "session.json").read_text())
    if luminance is not None:
        manifest["sparse_noise"]["luminance"] = luminance
    (folder / "session.json").write_text(json.dumps(manifest))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        return load_session(folder)


def test_three_level_uint8_movie_is_the_sparse_session(small, tmp_path):
    signs = small.sparse_noise.frames
    lum = np.where(signs > 0, 255, np.where(signs < 0, 0, 127)).astype(np.uint8)
    s = _folder(tmp_path, small, lum, {"background": 127, "contrast_scale": 128})
    assert s.sparse_noise.frames.dtype == np.int8
    np.testing.assert_array_equal(s.sparse_noise.frames, signs)


def test_uint16_movie_with_more_levels_is_dense_contrast(small, tmp_path):
    rng = np.random.default_rng(0)
    f = rng.standard_normal(small.sparse_noise.frames.shape)
    lum = np.round(30000 + 8000 * f).astype(np.uint16)
    s = _folder(tmp_path, small, lum, {"background": 30000, "contrast_scale": 8000})
    frames = s.sparse_noise.frames
    assert frames.dtype == np.float32
    np.testing.assert_allclose(np.asarray(frames), (lum.astype(np.float64) - 30000) / 8000, atol=1e-6)
    res = compute_maps(small.responses, s.sparse_noise, n_shuffles=20, alpha=0.05, rng=0)
    assert res.stimulus == "dense"


def test_uint8_without_luminance_is_refused_with_the_key_to_set(small, tmp_path):
    lum = np.where(small.sparse_noise.frames > 0, 255, 127).astype(np.uint8)
    with pytest.raises(BadInput, match=r"row 0: values must be -1, 0 or \+1 \(a luminance movie needs "
                                       r"sparse_noise.luminance"):
        _folder(tmp_path, small, lum)
    with pytest.raises(BadInput, match=r"sparse_noise.luminance.contrast_scale: must be positive"):
        _folder(tmp_path, small, lum, {"background": 127, "contrast_scale": 0})


def test_binary_int8_noise_goes_to_the_dense_engine(small, tmp_path):
    rng = np.random.default_rng(1)
    pm = rng.choice(np.array([-1, 1], np.int8), size=small.sparse_noise.frames.shape)
    s = _folder(tmp_path, small, pm)
    assert s.sparse_noise.frames.dtype == np.float32
    res = compute_maps(small.responses, s.sparse_noise, n_shuffles=20, alpha=0.05, rng=0)
    assert res.stimulus == "dense" and np.isnan(res.on).all()      # no ON/OFF maps for dense noise


# ----------------------------------------------------------------------------------------------
# correlated binary dense noise and a luminance dense movie, analysed end to end
# ----------------------------------------------------------------------------------------------
def _dense_session(tmp_path, name, stored, frames_contrast, grid, kernels, rng, luminance=None):
    """A session folder whose movie is ``stored`` (what the file holds) while the model cells see
    ``frames_contrast``: rate = 2 + 40 * max(0, s . k) spikes/s, one frame later (50 ms)."""
    from map2d.contract import Session, SparseNoise, Spikes
    F = frames_contrast.shape[0]
    dt = 0.05
    S = frames_contrast.reshape(F, -1).astype(np.float64)
    times, cells = [], []
    for c, k in enumerate(kernels):
        drive = np.zeros(F)
        drive[1:] = S[:-1] @ k.ravel()
        rate = 2.0 + 40.0 * np.maximum(drive, 0.0)
        n = rng.poisson(rate * dt)
        t = np.repeat(np.arange(F) * dt, n) + rng.uniform(0, dt, n.sum())
        times.append(t)
        cells.append(np.full(t.size, c))
    t, c = np.concatenate(times), np.concatenate(cells)
    order = np.argsort(t)
    sn = SparseNoise(frames=np.zeros((2, 1, 1), np.int8), times_s=np.arange(F) * dt, grid=grid)
    session = Session(responses=Spikes(time_s=t[order], cell=c[order]), sparse_noise=sn, name=name)
    folder = write_session(tmp_path / name, session)
    np.save(folder / "sparse_noise.npy", stored)
    np.save(folder / "sparse_noise_times.npy", np.arange(F) * dt)
    manifest = json.loads((folder / "session.json").read_text())
    manifest["sparse_noise"]["grid"] = grid.to_manifest()
    if luminance is not None:
        manifest["sparse_noise"]["luminance"] = luminance
    (folder / "session.json").write_text(json.dumps(manifest))
    return folder


@pytest.fixture(scope="module")
def dense_sessions(tmp_path_factory):
    """Correlated noise (Gaussian-smoothed white noise, sigma 1 pixel): as int8 +-1 signs, and as a
    uint8 luminance movie 128 + 40 f; two Gabor cells (SF 0.1 cpd, 2-deg pixels)."""
    from scipy import ndimage

    from map2d.geometry import Grid
    from map2d.models import gabor2d
    rng = np.random.default_rng(8)
    grid = Grid(ny=8, nx=10, dx_deg=2.0, dy_deg=2.0, center_x_deg=5.0, center_y_deg=-3.0)
    F = 5000
    smooth = ndimage.gaussian_filter(rng.standard_normal((F, 8, 10)), sigma=(0, 1.0, 1.0), mode="wrap")
    smooth /= smooth.std()
    xg, yg = grid.mesh_deg()
    centres = [(3.0, -1.0), (8.0, -5.0)]
    kernels = [gabor2d(xg, yg, x0, y0, 3.0, 3.5, th, 0.1, 0.0) for (x0, y0), th in zip(centres, (0.0, 60.0))]
    kernels = [k / np.abs(k).sum() * 8 for k in kernels]
    root = tmp_path_factory.mktemp("dense")
    signs = np.where(smooth >= 0, 1, -1).astype(np.int8)
    binary = _dense_session(root, "binary", signs, signs, grid, kernels, rng)
    lum = np.clip(np.round(128 + 40 * smooth), 0, 255).astype(np.uint8)
    luminance = _dense_session(root, "luminance", lum, (lum.astype(np.float64) - 128) / 40, grid, kernels, rng,
                               luminance={"background": 128, "contrast_scale": 40})
    return {"binary": binary, "luminance": luminance, "centres": centres}


def test_correlated_binary_session_is_whitened_and_says_so(dense_sessions, tmp_path, capsys):
    """Correlated +-1 noise stored as int8: the whitened estimate, named in the cells table
    (dense_estimate, dense_ridge_penalty) and in the notes (printed by the commands and shown in the
    report); centres within a pixel of the truth. ``--dense-estimate sta`` is obeyed and named, and
    every analysis command takes the option."""
    import csv

    import map2d.cli
    from map2d.analysis import analyze_session
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        s = load_session(dense_sessions["binary"])
    assert s.sparse_noise.frames.dtype == np.float32                       # the dense engine's input
    an = analyze_session(s, max_lag_s=0.1, n_jobs=1)
    assert an.cells["dense_estimate"] == ["whitened", "whitened"]
    assert all(p > 0 for p in an.cells["dense_ridge_penalty"])
    note = [n for n in an.notes if n.startswith("dense noise:")]
    assert len(note) == 1 and "ridge-whitened estimate" in note[0] and "largest pixel correlation" in note[0]
    for c, (x0, y0) in enumerate(dense_sessions["centres"]):
        assert an.cells["responsive"][c]
        assert np.hypot(an.cells["center_x_deg"][c] - x0, an.cells["center_y_deg"][c] - y0) < 2.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        assert map2d.cli.main(["maps", str(dense_sessions["binary"]), "--out", str(tmp_path / "m"), "--no-fits",
                               "--dense-estimate", "sta", "--max-lag", "0.1"]) == 0
    assert "linear maps by the spike-triggered average" in capsys.readouterr().out
    rows = list(csv.DictReader(open(tmp_path / "m" / "cells.csv")))
    assert [r["dense_estimate"] for r in rows] == ["sta", "sta"] and rows[0]["dense_ridge_penalty"] == ""
    parser = map2d.cli.build_parser()
    for cmd in (["analyze", "s"], ["maps", "s"], ["batch", "s"]):
        assert parser.parse_args(cmd + ["--out", "o", "--dense-estimate", "whitened"]).dense_estimate == "whitened"


def test_luminance_dense_movie_analyses_as_contrast(dense_sessions):
    """The uint8 movie 128 + 40 f with its luminance key: dense, whitened, centres within a pixel."""
    from map2d.analysis import analyze_session
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", InputWarning)
        s = load_session(dense_sessions["luminance"])
    an = analyze_session(s, max_lag_s=0.1, n_jobs=1)
    assert an.cells["dense_estimate"] == ["whitened", "whitened"]
    assert any("ridge-whitened estimate" in n for n in an.notes)
    for c, (x0, y0) in enumerate(dense_sessions["centres"]):
        assert an.cells["responsive"][c]
        assert np.hypot(an.cells["center_x_deg"][c] - x0, an.cells["center_y_deg"][c] - y0) < 2.0
