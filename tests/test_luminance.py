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
