"""The batched spatial fits (map2d.fit.batched) against the reference fitter.

The reference is :func:`scipy.optimize.least_squares` (trust-region reflective), one map and one model at
a time (``solver='reference'``), with the same starts, bounds, criteria and intervals. The batched solver
is a vectorised Levenberg-Marquardt (Madsen, Nielsen & Tingleff 2004, Methods for Non-Linear Least
Squares Problems, section 3.2). Agreement is asked where it matters: the same centre method and model for
each cell, and every reported parameter inside the reference's 95 % interval.
"""

import numpy as np
import pytest

from map2d.fit import batched as B
from map2d.fit import spatial as S
from map2d.geometry import Grid
from map2d.models import dog2d, gabor2d, gaussian2d

GRID = Grid(ny=15, nx=21, center_x_deg=10.0, center_y_deg=-4.0, dx_deg=1.2, dy_deg=0.9)

#: (column, interval name) of the parameters compared.
PAIRS = (("center_x_deg", "center_x"), ("center_y_deg", "center_y"), ("sigma_major_deg", "sigma_major"),
         ("sigma_minor_deg", "sigma_minor"), ("rc_deg", "rc"), ("rs_deg", "rs"), ("gabor_sf_cpd", "gabor_sf"))


def compare(ref, got, cells):
    """(checked parameters, parameters outside the reference interval, cells whose method or model differ)."""
    checked, outside, differ = 0, [], []
    for c in cells:
        if ref["model"][c] != got["model"][c] or ref.get("center_method", ref["model"])[c] != got.get(
                "center_method", got["model"])[c]:
            differ.append(c)
            continue
        for col, ci in PAIRS:
            unit = col.rsplit("_", 1)[1]
            lo, hi = ref[f"{ci}_ci_low_{unit}"][c], ref[f"{ci}_ci_high_{unit}"][c]
            if np.isfinite(lo) and np.isfinite(hi):
                checked += 1
                if not lo <= got[col][c] <= hi:
                    outside.append((c, col, got[col][c], lo, hi))
    return checked, outside, differ


# --- the Jacobians of the batched residuals --------------------------------------------------------

@pytest.mark.parametrize("model", ["gaussian", "dog", "gabor"])
def test_batched_jacobian_matches_the_reference_jacobian(model):
    # the reference's analytic Jacobians are checked against finite differences in test_fit_spatial
    rng = np.random.default_rng(1)
    m = rng.standard_normal(GRID.shape)
    pr = S._Problem(m, GRID, 0.5)
    p = {"gaussian": np.array([[11.0, -3.0, 2.5, 1.4, 0.6, -0.8], [8.0, -6.0, 1.2, 3.0, -1.0, 2.0]]),
         "dog": np.array([[9.0, -5.0, 1.0, 1.8, 0.3, 2.5], [12.0, -2.0, -2.0, 1.2, -0.5, 1.7]]),
         "gabor": np.array([[10.5, -4.5, 2.6, 1.7, 0.15, -0.2, 0.6, -0.4],
                            [7.5, -1.5, 1.6, 2.7, -0.25, 0.1, -0.3, 0.9]])}[model]
    res = {"gaussian": S._gauss_res, "dog": S._dog_res, "gabor": S._gabor_res}[model]
    jac = {"gaussian": S._gauss_jac, "dog": S._dog_jac, "gabor": S._gabor_jac}[model]
    x, y = GRID.x_deg[None, None, :], GRID.y_deg[None, :, None]
    d = np.broadcast_to(m, (2,) + m.shape)
    w = np.full(d.shape, 2.0)
    r, J = B._RJ[model](p, x, y, d, w)
    for i in range(2):
        np.testing.assert_allclose(r[i].ravel(), res(p[i], pr), rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(J[i].reshape(p.shape[1], -1).T, jac(p[i], pr), rtol=1e-9, atol=1e-10)


# --- the same answers as the reference ---------------------------------------------------------------

def _maps(n, rng):
    """Noisy maps of every model: Gaussians, DoGs, Gabors of random placement, size and phase."""
    X, Y = GRID.mesh_deg()
    out, kinds = [], []
    for i in range(n):
        x0, y0 = rng.uniform(4, 16), rng.uniform(-8, 0)
        kind = ("gaussian", "dog", "gabor")[i % 3]
        if kind == "gaussian":
            m = gaussian2d(X, Y, x0, y0, rng.uniform(1.2, 3), rng.uniform(1, 2), rng.uniform(0, 180),
                           rng.choice([-1, 1]))
        elif kind == "dog":
            rc = rng.uniform(1.5, 2.5)
            m = rng.choice([-1, 1]) * dog2d(X, Y, x0, y0, 1.0, rc, 0.15, 2.5 * rc)
        else:
            m = gabor2d(X, Y, x0, y0, rng.uniform(1.5, 2.5), rng.uniform(1.5, 2.5), rng.uniform(0, 180),
                        rng.uniform(0.15, 0.3), rng.uniform(0, 360))
        out.append(m + rng.uniform(0.05, 0.2) * rng.standard_normal(m.shape))
        kinds.append(kind)
    return np.array(out), kinds


def test_batched_fits_agree_with_the_reference_on_noisy_maps():
    maps, _ = _maps(18, np.random.default_rng(5))
    resp = np.ones(len(maps), bool)
    got = S.fit_maps(maps, GRID, resp, n_jobs=1, solver="batched")
    ref = S.fit_maps(maps, GRID, resp, n_jobs=1, solver="reference")
    checked, outside, differ = compare(ref, got, range(len(maps)))
    assert differ == [] and outside == [], (differ, outside)
    assert checked >= 3 * len(maps)
    # the information criteria (so the model choice) agree to well below one unit, but for a model that
    # lost by more than REFINE_MARGIN_BIC: its fit is not run to convergence (map2d.fit.batched.fit_choosing),
    # so its BIC may be higher, by less than the margin, and it still loses by more than the margin
    chosen = np.array([got[f"bic_{m}"][i] for i, m in enumerate(got["model"])])
    for m in S.MODELS:
        diff = got[f"bic_{m}"] - ref[f"bic_{m}"]
        far = np.abs(diff) > 0.5
        assert np.all(diff[far] > 0) and np.all(diff[far] < S.REFINE_MARGIN_BIC), (m, diff)
        assert np.all(got[f"bic_{m}"][far] > chosen[far] + S.REFINE_MARGIN_BIC), m
        assert far.sum() <= 2, (m, diff)


def test_every_start_and_model_in_one_batch_matches_one_map_at_a_time():
    # a batch of one map gives what the same map gives inside a batch of many (rows do not interact)
    maps, _ = _maps(6, np.random.default_rng(9))
    prs = [S._Problem(m, GRID, None) for m in maps]
    for model in S.MODELS:
        many = B.fit_models(prs, model)
        for i in (0, 4):
            one = B.fit_models([prs[i]], model)[0]
            for k, v in one.params.items():
                assert many[i].params[k] == pytest.approx(v, rel=1e-7, abs=1e-9), (model, k)


def test_chunks_bound_the_memory_and_do_not_change_the_answer(monkeypatch):
    maps, _ = _maps(9, np.random.default_rng(2))
    prs = [S._Problem(m, GRID, None) for m in maps]
    whole = B.fit_models(prs, "gabor")
    monkeypatch.setattr(B, "CHUNK_BYTES", 1)          # one row per chunk
    seen = []
    lm = B._lm

    def spy(model, p, *args, **kw):
        seen.append(p.shape[0])
        return lm(model, p, *args, **kw)

    monkeypatch.setattr(B, "_lm", spy)
    chunked = B.fit_models(prs, "gabor")
    assert max(seen) == 1
    for a, b in zip(whole, chunked):
        for k, v in a.params.items():
            assert b.params[k] == pytest.approx(v, rel=1e-7, abs=1e-9)


def test_batched_fits_agree_with_the_reference_on_a_simulated_session(small_spikes_session):
    from map2d.maps import compute_maps

    session, _ = small_spikes_session
    res = compute_maps(session.responses, session.sparse_noise, max_lag_s=0.2, n_shuffles=100, rng=0)
    got = S.locate_fields(res, n_jobs=1, solver="batched")
    ref = S.locate_fields(res, n_jobs=1, solver="reference")
    cells = np.flatnonzero(ref.columns["center_method"] != "")
    assert cells.size >= 6
    checked, outside, differ = compare(ref.columns, got.columns, cells)
    assert differ == [] and outside == [], (differ, outside)
    assert checked >= 2 * cells.size
    np.testing.assert_allclose(got.onoff_overlap, ref.onoff_overlap, atol=0.02)


def test_batched_fits_agree_with_the_reference_on_the_held_out_sessions(heldout_matrix):
    # sessions written by tests/heldout_rf.py (imports nothing from map2d); analysed with the batched solver
    total, differ_all, outside_all = 0, [], []
    for name in ("quiet", "edge", "anisotropic", "on-off"):
        res = heldout_matrix[name]
        ref = S.locate_fields(res["maps"], n_jobs=1, solver="reference").columns
        got = res["fields"]
        cells = np.flatnonzero(ref["center_method"] != "")
        checked, outside, differ = compare(ref, got, cells)
        total += checked
        differ_all += [(name, c) for c in differ]
        outside_all += [(name,) + o for o in outside]
    assert total >= 40
    assert differ_all == [] and outside_all == [], (differ_all, outside_all)


# --- work the outputs do not use is not done ------------------------------------------------------

def test_map2d_maps_does_not_predict_size_tuning(small_spikes_session, tmp_path, monkeypatch):
    # maps.npz and cells.csv hold no size tuning (map2d analyze does: tests/test_analysis.py)
    from map2d import pipeline, reconcile
    from map2d.contract import write_session

    session, _ = small_spikes_session
    folder = tmp_path / "session"
    write_session(folder, session)

    def refuse(*args, **kwargs):
        raise AssertionError("size tuning computed by map2d maps")

    monkeypatch.setattr(reconcile, "size_tuning", refuse)
    assert pipeline.run_maps(folder, tmp_path / "out", max_lag_s=0.2, quiet=True) == 0
    with np.load(tmp_path / "out" / "maps.npz") as z:
        assert "size_disk" not in z.files and np.isfinite(z["model_maps"]).any()


def test_stacked_wald_covariances_equal_the_one_map_ones():
    # every row's covariance as map2d.fit.spatial._wald_cov computes it, including an unidentified
    # direction (two equal columns) and a parameter without any effect (a zero column)
    rng = np.random.default_rng(0)
    A, s2 = [], rng.uniform(0.5, 2.0, 60)
    for i in range(60):
        J = rng.standard_normal((40, 6))
        if i % 5 == 0:
            J[:, 2] = J[:, 3]
        if i % 7 == 0:
            J[:, 4] = 0.0
        A.append(J.T @ J)
    A = np.array(A)
    got = B._wald_covs(A, s2)
    ref = np.array([S._wald_cov(a, v) for a, v in zip(A, s2)])
    assert np.array_equal(np.isnan(got), np.isnan(ref))
    np.testing.assert_allclose(got, ref, rtol=1e-9, equal_nan=True)


def test_stacked_sandwich_covariances_equal_the_one_map_ones():
    # every row's HC3 covariance as map2d.fit.spatial._sandwich_cov computes it (unequal noise, some rows
    # with an unidentified direction or a parameter without effect, some floored at the Wald variance)
    rng = np.random.default_rng(1)
    m, k, n = 40, 6, 50
    J = rng.standard_normal((m, k, n))
    J[::5, 2] = J[::5, 3]
    J[::7, 4] = 0.0
    r = rng.standard_normal((m, n)) * rng.uniform(0.2, 3.0, (m, n))
    s2 = np.where(np.arange(m) % 3 == 0, 4.0, 0.5)
    got = np.array(B._sandwich_covs(J, r, s2))                       # (sandwich, Wald) x rows
    ref = np.array([S._sandwich_cov(J[i].T, r[i], s2[i]) for i in range(m)]).swapaxes(0, 1)
    assert np.array_equal(np.isnan(got), np.isnan(ref)) and np.isnan(got[:, 0]).any() and np.isfinite(got[:, 1]).all()
    np.testing.assert_allclose(got, ref, rtol=1e-9, equal_nan=True)


def test_starts_of_many_maps_equal_the_one_map_starts():
    # the blob starts (Gaussian, DoG) and the Gabor's starts (energy envelope, spectral peaks, linear
    # amplitudes) computed for all maps at once equal those computed map by map (spatial.py's functions)
    maps, _ = _maps(9, np.random.default_rng(4))
    maps[2, 3:5, 6:9] = np.nan                       # unused pixels
    maps[5] = np.where(np.arange(GRID.nx) < 4, np.nan, maps[5])
    prs = [S._Problem(m, GRID, None) for m in maps]
    ref = np.array([pr.blob_start() for pr in prs])
    np.testing.assert_allclose(np.array(B._blob_starts(prs)), ref, rtol=1e-12, atol=1e-12)
    for (st, lo, hi), (st1, lo1, hi1) in zip(B._gabor_setups(prs), [S._gabor_setup(pr) for pr in prs]):
        assert lo == lo1 and hi == hi1 and len(st) == len(st1) == 3
        np.testing.assert_allclose(np.array(st), np.array(st1), rtol=1e-9, atol=1e-12)


def test_the_noise_scaled_stop_leaves_every_parameter_far_inside_its_interval(monkeypatch):
    # without the stop at STOP_SDS standard errors (MINPACK's tests only) the answers move by a small
    # fraction of their 95 % half-widths (angles compared on their circle)
    maps, _ = _maps(9, np.random.default_rng(6))
    prs = [S._Problem(m, GRID, None) for m in maps]
    period = {"theta_deg": 180.0, "orientation_deg": 180.0, "phase_deg": 360.0}
    got = {m: B.fit_models(prs, m) for m in S.MODELS}
    lm = B._lm
    monkeypatch.setattr(B, "_lm", lambda *a, **k: lm(*a, **{**k, "sds": 0.0}))
    checked = 0
    for model in S.MODELS:
        for a, b in zip(got[model], B.fit_models(prs, model)):
            for name, (lo, hi) in b.ci.items():
                if np.isfinite(lo) and np.isfinite(hi) and hi > lo:
                    d = a.params[name] - b.params[name]
                    if name in period:
                        d = (d + period[name] / 2) % period[name] - period[name] / 2
                    assert abs(d) <= 0.05 * (hi - lo) / 2, (model, name)
                    checked += 1
    assert checked >= 100


def test_lobes_of_many_maps_equal_the_one_map_lobes():
    # the ON/OFF subfields' lobes cut for all maps at once equal _lobe map by map (8-connected component
    # of z >= 2 holding the peak, grown by a pixel of positive z; none below the threshold)
    rng = np.random.default_rng(3)
    maps, _ = _maps(8, rng)
    z = 6 * maps / np.abs(maps).max(axis=(1, 2), keepdims=True) + rng.standard_normal(maps.shape)
    z[1, 2, 2] = np.nan
    z[3] *= 0.2                                      # below the threshold: no lobe
    got = S._lobes(maps, z, 3.0)
    for m, zz, g in zip(maps, z, got):
        ref = S._lobe(m, zz, 3.0)
        assert (ref is None) == (g is None)
        assert ref is None or np.array_equal(ref, g)
    assert sum(g is None for g in got) >= 1 and sum(g is not None for g in got) >= 3


def test_one_blas_thread_within_the_block_and_the_former_count_after():
    # the fit stage runs OpenBLAS on one thread (map2d._blas); the counts are those OpenBLAS reports
    from map2d import _blas

    before = [n for _, n in _blas._controls()]
    if not before:
        pytest.skip("no OpenBLAS with thread functions in this process")
    with _blas.one_blas_thread():
        assert [n for _, n in _blas._controls()] == [1] * len(before)
        np.linalg.svd(np.ones((13, 64)))
    assert [n for _, n in _blas._controls()] == before
