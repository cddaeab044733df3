"""Tests of the model-cell simulator (map2d.simulate) and `map2d simulate`."""

from __future__ import annotations

import json
import math
import types

import numpy as np
import pytest
from scipy import fft as sfft
from scipy import integrate

from map2d import pipeline
from map2d.align import interval_responses
from map2d.cli import main as cli_main
from map2d.contract import GratingTable, SparseNoise, Spikes, Traces, load_session
from map2d.errors import BadInput
from map2d.geometry import grating_image, wave_vector
from map2d.models import dog2d, dog_peak_sf, dog_spectrum, gabor2d
from map2d.simulate import (CELL_TYPES, ModelCell, calcium_traces, cells_from_truth, default_grid,
                            grating_drive, lag_weights, make_cells, pixel_kernels, simulate_session,
                            spikes_from_rates, stimulus_rates, type_counts)


def _fft_spectrum(kernel, d):
    """Continuous Fourier transform (forward, exp(-i 2 pi k.x)) of a kernel sampled at spacing ``d`` on a
    grid with the kernel's centre at index n // 2 (odd n); returns (f, F) with f ascending, F[iy, ix]."""
    n = kernel.shape[0]
    F = sfft.fftshift(sfft.fft2(sfft.ifftshift(kernel))) * d * d
    f = sfft.fftshift(sfft.fftfreq(n, d))
    return f, F


# ----------------------------------------------------------------------------------------------
# spatial kernels against textbook transforms and a reference library
# ----------------------------------------------------------------------------------------------
def test_dog_fft_matches_gaussian_transform_pair():
    # Gaussian transform pair: exp(-r^2/r0^2) <-> pi r0^2 exp(-(pi r0 f)^2)
    # (Bracewell, The Fourier Transform and Its Applications), as coded in models.dog_spectrum
    kc, rc, ks, rs = 1.0, 2.0, 0.12, 6.0
    d, n = 0.25, 401                                  # 100 deg wide: the surround is negligible at the edge
    x = (np.arange(n) - n // 2) * d
    X, Y = np.meshgrid(x, x)
    f, F = _fft_spectrum(dog2d(X, Y, 0.0, 0.0, kc, rc, ks, rs), d)
    FX, FY = np.meshgrid(f, f)
    expected = dog_spectrum(np.hypot(FX, FY), kc, rc, ks, rs)
    peak = np.abs(expected).max()
    assert np.abs(F.imag).max() < 1e-9 * peak           # a real even kernel has a real transform
    assert np.abs(F.real - expected).max() < 1e-3 * peak


def test_dog_peak_matches_closed_form():
    # f_peak = sqrt(ln(Kc rc^2 / (Ks rs^2)) / (pi^2 (rc^2 - rs^2))), Kc = kc pi rc^2, Ks = ks pi rs^2:
    # derivative of the Enroth-Cugell & Robson (1966) DoG spectrum set to zero (models.dog_peak_sf)
    for kc, rc, ks, rs in [(1.0, 2.0, 0.12, 6.0), (1.0, 3.0, 0.1, 7.0), (-2.0, 1.5, -0.2, 3.5)]:
        f = np.linspace(0.0, 0.5, 200001)
        s = np.abs(dog_spectrum(f, kc, rc, ks, rs))
        assert dog_peak_sf(kc, rc, ks, rs) == pytest.approx(f[np.argmax(s)], abs=1e-5)
    # and the FFT of a sampled DoG peaks there too (within one frequency step of a padded FFT)
    kc, rc, ks, rs = 1.0, 2.0, 0.12, 6.0
    d, n = 0.5, 1025
    x = (np.arange(n) - n // 2) * d
    X, Y = np.meshgrid(x, x)
    f, F = _fft_spectrum(dog2d(X, Y, 0.0, 0.0, kc, rc, ks, rs), d)
    row = np.abs(F[n // 2, n // 2:])
    assert f[n // 2 + np.argmax(row)] == pytest.approx(dog_peak_sf(kc, rc, ks, rs), abs=1.0 / (n * d))
    # a surround too weak for a band-pass spectrum peaks at DC: closed form gives 0
    assert dog_peak_sf(1.0, 2.0, 0.01, 6.0) == 0.0


@pytest.mark.parametrize("theta, phase", [(0.0, 0.0), (30.0, 90.0), (120.0, 45.0), (250.0, 300.0)])
def test_gabor_matches_skimage_gabor_kernel(theta, phase):
    # reference library: skimage.filters.gabor_kernel(frequency, theta, sigma_x, sigma_y, offset) is
    # exp(-(rx^2/sx^2 + ry^2/sy^2)/2) / (2 pi sx sy) * exp(i (2 pi f rx + offset)), rx = x cos t + y sin t,
    # with x = column and y = ROW (pointing down). Our y points up, so theta_skimage = -theta_ours;
    # frequency is in cycles per pixel = sf * d; sigma_x (along the carrier) = sigma_u / d.
    from skimage.filters import gabor_kernel
    d, sf, su, sv = 0.5, 0.15, 3.0, 4.5
    g = gabor_kernel(sf * d, theta=np.deg2rad(-theta), sigma_x=su / d, sigma_y=sv / d, n_stds=3,
                     offset=np.deg2rad(phase))
    ny, nx = g.shape
    col = np.arange(nx) - nx // 2
    row = np.arange(ny) - ny // 2
    C, R = np.meshgrid(col, row)
    x, y = C * d, -R * d
    scale = 2 * np.pi * (su / d) * (sv / d)
    even = gabor2d(x, y, 0.0, 0.0, su, sv, theta, sf, phase)
    odd = gabor2d(x, y, 0.0, 0.0, su, sv, theta, sf, phase - 90.0)   # sin(a) = cos(a - 90 deg)
    np.testing.assert_allclose(g.real * scale, even, atol=1e-12)
    np.testing.assert_allclose(g.imag * scale, odd, atol=1e-12)


def test_gabor_spectrum_peak_and_analytic_transform():
    # the spectrum of a Gabor peaks at +-sf along its wave vector (Jones & Palmer 1987); our analytic H
    # (geometry convention, the complex conjugate of the forward transform) equals the sampled FFT
    cell = ModelCell(cell_id=0, kind="simple", center_x_deg=0.0, center_y_deg=0.0, sigma_u_deg=3.0,
                     sigma_v_deg=4.0, orientation_deg=35.0, sf_cpd=0.12, phase_deg=70.0, amplitude=1.0)
    d, n = 0.25, 801
    x = (np.arange(n) - n // 2) * d
    X, Y = np.meshgrid(x, x)                         # rows = ascending y, so FFT axis 0 is ky
    f, F = _fft_spectrum(cell.kernels(X, Y)[0], d)
    iy, ix = np.unravel_index(np.argmax(np.abs(F)), F.shape)
    kx, ky = f[ix], f[iy]
    ori = math.degrees(math.atan2(ky, kx)) % 180.0
    step = 1.0 / (n * d)
    assert ori == pytest.approx(35.0, abs=math.degrees(step / 0.12) + 0.1)
    assert math.hypot(kx, ky) == pytest.approx(0.12, abs=step)
    p_ori, p_sf = cell.preferred()
    assert p_ori == pytest.approx(35.0)
    assert p_sf == pytest.approx(0.12, abs=step)
    FX, FY = np.meshgrid(f, f)
    H = cell.spectra(FX, FY)[0]
    np.testing.assert_allclose(np.conj(F), H, atol=1e-6 * np.abs(H).max())


def test_energy_pair_is_in_quadrature():
    # Adelson & Bergen (1985): the second subunit is the first shifted by 90 deg of phase
    c = ModelCell(cell_id=0, kind="complex", center_x_deg=1.0, center_y_deg=-2.0, sigma_u_deg=3.0,
                  sigma_v_deg=3.5, orientation_deg=60.0, sf_cpd=0.15, phase_deg=10.0, amplitude=1.0)
    kx, ky = wave_vector(60.0, 0.15)
    h1, h2 = c.spectra(kx, ky, (1.0, -2.0))
    assert abs(h1) == pytest.approx(abs(h2), rel=1e-3)
    assert np.angle(h2 / h1) == pytest.approx(-np.pi / 2, abs=1e-3)
    assert c.linear is False and c.n_subunits == 2


# ----------------------------------------------------------------------------------------------
# drives: contract formula, pixel integration, temporal weights
# ----------------------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def cells():
    """A mix of every type on the default grid, with their grid."""
    grid = default_grid()
    return make_cells(15, grid, 0.05, rng=3), grid


def test_grating_drive_is_the_integral_of_kernel_times_contract_stimulus(cells):
    # drive = integral of k(x, y) s(x, y, t) dA with s from the contract formula (geometry.grating_image),
    # by brute-force summation on a fine grid; checks the sign and origin of phase and drift direction
    cs, grid = cells
    origin = (grid.center_x_deg, grid.center_y_deg)
    table = GratingTable.from_columns(
        phase_origin_deg=origin, onset_s=[0.0, 1.0, 2.0], offset_s=[1.0, 2.0, 4.0],
        orientation_deg=[20.0, 130.0, 250.0], sf_cpd=[0.08, 0.04, 0.08], phase_deg=[45.0, 200.0, 90.0],
        contrast=[1.0, 0.5, 0.8], tf_hz=[0.0, 0.0, 2.0])
    t = np.array([0.5, 1.5, 2.3])
    drive = grating_drive(cs, table, t)
    d = 0.2                                             # kernels have sds >= 2 deg: the sum is ~exact
    x = grid.center_x_deg + np.arange(-160, 161) * d
    y = grid.center_y_deg + np.arange(-130, 131) * d
    X, Y = np.meshgrid(x, y)
    col = 0
    for cell in cs:
        for k in cell.kernels(X, Y):
            for i in range(3):
                s = grating_image(X, Y, table.orientation_deg[i], table.sf_cpd[i], table.phase_deg[i],
                                  table.contrast[i], origin, table.tf_hz[i], t[i] - table.onset_s[i])
                assert drive[i, col] == pytest.approx(np.sum(k * s) * d * d, abs=2e-3)
            col += 1
    assert col == drive.shape[1]
    assert np.all(grating_drive(cs, table, np.array([-1.0, 4.5])) == 0)     # nothing shown


def test_pixel_kernels_agree_with_analytic_spectrum(cells):
    # The sparse-noise map sees the kernel integrated over each pixel; its Fourier sum is the analytic H
    # times the pixel's box transform sinc(kx dx) sinc(ky dy) (convolution theorem) up to the kernel's
    # tail outside the grid and aliasing: within 2% of max |H|. Without the box correction the two
    # differ by the pixel blur only (< 12% of max |H| for SFs up to 0.16 cpd on the 2-deg grid).
    cs, grid = cells
    origin = (grid.center_x_deg, grid.center_y_deg)
    K = pixel_kernels(cs, grid)
    X, Y = grid.mesh_deg()
    S, O = np.meshgrid([0.02, 0.04, 0.08, 0.16], np.arange(0.0, 360.0, 15.0))
    kx, ky = wave_vector(O, S)
    E = np.exp(2j * np.pi * (kx[..., None, None] * (X - origin[0]) + ky[..., None, None] * (Y - origin[1])))
    Hpix = np.einsum("abyx,uyx->uab", E, K)
    Ha = np.concatenate([c.spectra(kx, ky, origin) for c in cs if c.n_subunits])
    box = np.sinc(kx * grid.dx_deg) * np.sinc(ky * grid.dy_deg)
    assert np.abs(Hpix / box - Ha).max() < 0.02
    assert np.abs(Hpix - Ha).max() < 0.12
    # total weight: sum of pixel values = H at k = 0
    np.testing.assert_allclose(K.sum(axis=(1, 2)), np.concatenate([c.spectra(0.0, 0.0) for c in cs
                                                                       if c.n_subunits]).real, atol=0.02)


def test_kernels_are_scaled_to_unit_peak_response_and_lie_in_the_grid(cells):
    cs, grid = cells
    left, right, bottom, top = grid.extent_deg
    for c in cs:
        if c.kind == "unresponsive":
            assert math.isnan(c.preferred()[1]) and c.linear is None
            continue
        ori, sf = c.preferred()
        kx, ky = wave_vector(0.0 if math.isnan(ori) else ori, sf)
        assert float(c.tuning_amplitude(kx, ky)) == pytest.approx(1.0, rel=1e-6)
        f = np.linspace(0.001, 0.5, 400)
        th = np.deg2rad(np.arange(0, 180, 5.0))
        F, T = np.meshgrid(f, th)
        assert c.tuning_amplitude(F * np.cos(T), F * np.sin(T)).max() <= 1.0 + 1e-6
        assert left < c.center_x_deg < right and bottom < c.center_y_deg < top
        assert 0.02 <= sf <= 0.16                       # inside the default grating SF set
        if c.kind.endswith("dog"):
            assert math.isnan(ori) and sf == pytest.approx(dog_peak_sf(c.kc, c.rc_deg, c.ks, c.rs_deg))
        else:
            assert ori == pytest.approx(c.orientation_deg % 180.0)


def test_lag_weights_are_the_double_integral_of_the_temporal_profile():
    # definition: w_l = (1/T) int_{lT}^{(l+1)T} int_0^T h(t - s) ds dt, h a unit-area Gaussian
    T, lat, sd = 0.05, 0.1, 0.015
    w = lag_weights(T, lat, sd)
    h = lambda tau: np.exp(-0.5 * ((tau - lat) / sd) ** 2) / (sd * math.sqrt(2 * math.pi))
    for lag in range(4):
        ref, _ = integrate.dblquad(lambda s, t: h(t - s), lag * T, (lag + 1) * T, 0.0, T, epsabs=1e-12)
        assert w[lag] == pytest.approx(ref / T, abs=1e-7)
    assert w.sum() == pytest.approx(1.0, abs=1e-9)
    assert int(np.argmax(w)) == 2 and w[2] > 0.7
    w2 = lag_weights(0.01, np.array([0.05, 0.15]), np.array([0.015, 0.015]))
    assert w2.shape[1] == 2 and np.argmax(w2[:, 0]) in (4, 5) and np.argmax(w2[:, 1]) in (14, 15)


def test_single_spot_response_peaks_at_the_latency_with_the_linear_size():
    grid = default_grid()
    cell = make_cells(1, grid, 0.05, cell_types=["on_dog"], latency_frames=(2,), rng=4)[0]
    K = pixel_kernels([cell], grid)[0]
    i, j = np.unravel_index(np.argmax(K), K.shape)
    frames = np.zeros((20, grid.ny, grid.nx), np.int8)
    frames[5, i, j] = 1
    frames[12, i, j] = -1                               # dark spot on an ON centre: rectified away
    sn = SparseNoise(frames=frames, times_s=np.arange(20) * 0.05, grid=grid)
    (edges, rates), = list(stimulus_rates([cell], sn))
    w = lag_weights(0.05, cell.latency_s, cell.temporal_sd_s)
    assert int(np.argmax(rates[:, 0])) == 5 + 2
    assert rates[7, 0] == pytest.approx(cell.baseline_hz + cell.gain_hz * K[i, j] * w[2], rel=1e-9)
    assert np.allclose(rates[12:, 0], cell.baseline_hz)
    assert edges[-1] > sn.frame_ends_s()[-1]             # a tail lets the last responses finish


def test_drifting_gratings_separate_simple_and_complex_cells():
    # F1/F0 > 1 for simple, < 1 for complex cells (Skottun et al. 1991, Vision Res 31:1079-1086);
    # a half-wave rectified sinusoid has F1/F0 = pi/2 without baseline (common practice, from memory)
    grid = default_grid()
    cs = make_cells(4, grid, 0.05, cell_types=["simple", "complex", "on_dog", "unresponsive"], rng=11)
    for c in cs:
        if c.kind == "unresponsive":
            continue
        ori, sf = c.preferred()
        table = GratingTable.from_columns(phase_origin_deg=(10.0, 5.0), onset_s=[0.0], offset_s=[3.0],
                                          orientation_deg=[0.0 if math.isnan(ori) else ori], sf_cpd=[sf],
                                          phase_deg=[0.0], contrast=[1.0], tf_hz=[2.0])
        (edges, rates), = list(stimulus_rates([c], None, table, bin_s=0.005))
        t = 0.5 * (edges[1:] + edges[:-1])
        r = rates[(t >= 1.0) & (t < 3.0), 0]             # whole cycles, after the latency
        tt = t[(t >= 1.0) & (t < 3.0)]
        f0 = r.mean()
        f1 = 2 * abs(np.mean(r * np.exp(-2j * np.pi * 2.0 * tt)))
        # peak drive |H| = 1, times the Gaussian temporal profile's transfer at tf (Fourier pair)
        peak = c.baseline_hz + c.gain_hz * math.exp(-0.5 * (2 * math.pi * 2.0 * c.temporal_sd_s) ** 2)
        if c.kind == "complex":
            assert f1 / f0 < 0.3
            assert r.max() == pytest.approx(peak, rel=0.01)
        else:
            assert 1.0 < f1 / f0 < math.pi / 2 + 1e-6
            assert r.max() == pytest.approx(peak, rel=0.003)


# ----------------------------------------------------------------------------------------------
# spikes and traces
# ----------------------------------------------------------------------------------------------
def test_spikes_follow_the_rates():
    edges = np.array([0.0, 10.0, 30.0, 31.0])
    rates = np.array([[5.0, 0.0], [0.0, 2.0], [100.0, 0.0]])
    t, c = spikes_from_rates(edges, rates, rng=0)
    assert np.all(np.diff(t) >= 0)
    n0 = np.sum((c == 0) & (t < 10)), np.sum((c == 0) & (t >= 30))
    # Poisson counts: mean 50 and 100, sd sqrt(mean); 5 sd bounds (common practice)
    assert abs(n0[0] - 50) < 5 * math.sqrt(50) and abs(n0[1] - 100) < 5 * math.sqrt(100)
    assert np.sum((c == 0) & (t >= 10) & (t < 30)) == 0
    assert np.all((t[c == 1] >= 10) & (t[c == 1] < 30))


def test_calcium_trace_is_an_instant_rise_and_exponential_decay():
    ts = 0.013 + np.arange(300) / 30.0
    tr = calcium_traces(np.array([2.0, 2.0, 5.5]), np.array([0, 0, 1]), 2, ts, tau_s=0.4,
                        spike_amplitude=0.1, noise_sd=0.0, rng=0)
    expect0 = np.where(ts >= 2.0, 0.2 * np.exp(-(ts - 2.0) / 0.4), 0.0)
    expect1 = np.where(ts >= 5.5, 0.1 * np.exp(-(ts - 5.5) / 0.4), 0.0)
    np.testing.assert_allclose(tr[0], expect0, atol=1e-6)
    np.testing.assert_allclose(tr[1], expect1, atol=1e-6)
    noisy = calcium_traces(np.zeros(0), np.zeros(0, int), 1, ts, noise_sd=0.05, rng=1)
    assert noisy.std() == pytest.approx(0.05, rel=0.15)


def test_type_counts_include_every_type():
    assert type_counts(20) == {"on_dog": 2, "off_dog": 2, "simple": 8, "complex": 5, "unresponsive": 3}
    for n in range(5, 40):
        counts = type_counts(n)
        assert sum(counts.values()) == n and min(counts.values()) >= 1 and set(counts) == set(CELL_TYPES)
    assert sum(type_counts(3).values()) == 3


# ----------------------------------------------------------------------------------------------
# whole sessions
# ----------------------------------------------------------------------------------------------
def test_session_layout_and_truth(small_spikes_session):
    session, truth = small_spikes_session
    json.dumps(truth, allow_nan=False)                  # JSON-serialisable, no NaN
    sn, g = session.sparse_noise, session.gratings
    assert isinstance(session.responses, Spikes)
    assert session.responses.cell_ids.tolist() == list(range(12))
    assert [c["cell_id"] for c in truth["cells"]] == list(range(12))
    assert {c["kind"] for c in truth["cells"]} == set(CELL_TYPES)
    assert g.phase_origin_deg == (sn.grid.center_x_deg, sn.grid.center_y_deg)
    # segments in order, not overlapping: sparse noise, flashed, drifting
    assert sn.frame_ends_s()[-1] < g.onset_s.min()
    static, drifting = g.is_static, g.tf_hz > 0
    assert g.offset_s[static].max() < g.onset_s[drifting].min()
    assert np.all(g.onset_s[1:] >= g.offset_s[:-1] - 1e-9)
    for c in truth["cells"]:
        if c["kind"] == "unresponsive":
            assert c["linear"] is None and c["pref_sf_cpd"] is None
        else:
            assert c["linear"] == (c["kind"] != "complex")
            assert round(c["latency_s"] / 0.05) in (1, 2, 3)
    rebuilt = cells_from_truth(truth)
    assert [c.to_dict() for c in rebuilt] == truth["cells"]


def test_small_session_maps_are_clearly_significant(small_spikes_session):
    # per-pixel z of the spike-triggered average (common practice) at the true latency: every
    # responsive cell stands far above what unresponsive cells reach by chance
    session, truth = small_spikes_session
    sn = session.sparse_noise
    r = interval_responses(session.responses, sn.times_s, sn.frame_ends_s()).astype(float)
    F = sn.frames.reshape(sn.n_frames, -1)
    z_null, z_resp = [], []
    for ci, c in enumerate(truth["cells"]):
        lags = [1, 2, 3] if c["latency_s"] is None else [round(c["latency_s"] / sn.frame_interval_s)]
        best = 0.0
        for lag in lags:
            rr, FF = r[ci, lag:], F[: sn.n_frames - lag]
            for sign in (1, -1):
                m = FF == sign
                n = m.sum(0)
                z = ((m * rr[:, None]).sum(0) / n - rr.mean()) / (rr.std() / np.sqrt(n))
                best = max(best, np.abs(z).max())
        (z_null if c["kind"] == "unresponsive" else z_resp).append(best)
    assert max(z_null) < 5.0
    assert min(z_resp) > 7.0


def test_traces_session_loads_and_shares_the_cells(small_traces_session, small_spikes_session, sim_traces_folder):
    session, truth = small_traces_session
    assert isinstance(session.responses, Traces)
    v, ts = session.responses.values, session.responses.times_s
    assert v.shape == (12, ts.size) and v.dtype == np.float32
    assert np.median(np.diff(ts)) == pytest.approx(1 / 30.0)
    assert ts[-1] > session.gratings.offset_s.max()
    assert [c["center_x_deg"] for c in truth["cells"]] == [c["center_x_deg"] for c in small_spikes_session[1]["cells"]]
    loaded = load_session(sim_traces_folder)
    np.testing.assert_array_equal(loaded.responses.values, v)


def test_sim_folder_round_trip(sim_folder, small_spikes_session):
    session, truth = small_spikes_session
    loaded = load_session(sim_folder)
    np.testing.assert_array_equal(loaded.responses.time_s, session.responses.time_s)
    np.testing.assert_array_equal(loaded.sparse_noise.frames, session.sparse_noise.frames)
    np.testing.assert_array_equal(loaded.gratings.onset_s, session.gratings.onset_s)
    np.testing.assert_array_equal(loaded.gratings.phase_deg, session.gratings.phase_deg)
    saved = json.loads((sim_folder.parent / (sim_folder.name + ".truth.json")).read_text())
    assert saved == truth


def test_silent_cells_are_kept():
    s, truth = simulate_session(n_cells=3, minutes=0.05, flashed_minutes=0, repeats=0, seed=2,
                                cell_types=["unresponsive"] * 3, unresponsive_hz=(0.0, 0.0))
    assert s.responses.time_s.size == 0 and s.responses.cell_ids.tolist() == [0, 1, 2]


# ----------------------------------------------------------------------------------------------
# `map2d simulate`
# ----------------------------------------------------------------------------------------------
def _args(out, **kw):
    base = dict(out=out, seed=0, cells=6, minutes=0.5, responses="spikes", overwrite=False, quiet=True)
    base.update(kw)
    return types.SimpleNamespace(**base)


def _files(folder):
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir())}


def test_run_simulate_is_reproducible_and_writes_truth_beside(tmp_path):
    a, b, c = tmp_path / "a", tmp_path / "b", tmp_path / "c"
    assert pipeline.run_simulate(_args(a)) == 0
    assert pipeline.run_simulate(_args(b)) == 0
    assert pipeline.run_simulate(_args(c, seed=1)) == 0
    assert _files(a) == _files(b)
    assert (tmp_path / "a.truth.json").read_bytes() == (tmp_path / "b.truth.json").read_bytes()
    assert _files(a)["spikes.npz"] != _files(c)["spikes.npz"]
    assert (tmp_path / "a.truth.json").read_bytes() != (tmp_path / "c.truth.json").read_bytes()
    assert not any(p.name.endswith(".json") and "truth" in p.name for p in a.iterdir())
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a", "a.truth.json", "b", "b.truth.json",
                                                           "c", "c.truth.json"]
    s = load_session(a)
    truth = json.loads((tmp_path / "a.truth.json").read_text())
    assert s.responses.cell_ids.tolist() == [c["cell_id"] for c in truth["cells"]]


def test_run_simulate_refuses_a_non_empty_folder_unless_overwrite(tmp_path):
    out = tmp_path / "s"
    out.mkdir()
    (out / "keep.txt").write_text("mine")
    with pytest.raises(BadInput):
        pipeline.run_simulate(_args(out))
    assert (out / "keep.txt").read_text() == "mine"
    assert not (tmp_path / "s.truth.json").exists()
    assert pipeline.run_simulate(_args(out, overwrite=True, responses="traces")) == 0
    assert not (out / "keep.txt").exists()
    assert isinstance(load_session(out).responses, Traces)
    assert [p.name for p in tmp_path.iterdir() if p.name.startswith(".")] == []   # no temporary leftovers
    with pytest.raises(BadInput):
        pipeline.run_simulate(_args(tmp_path / "t", cells=0))


def test_cli_simulate(tmp_path, capsys):
    out = tmp_path / "sess"
    assert cli_main(["simulate", str(out), "--cells", "5", "--minutes", "0.3", "--seed", "3",
                     "--responses", "traces"]) == 0
    assert "sess.truth.json" in capsys.readouterr().out
    s = load_session(out)
    assert s.responses.values.shape[0] == 5
    assert cli_main(["simulate", str(out), "--cells", "5", "--minutes", "0.3"]) == 2     # exists
    assert cli_main(["simulate", str(tmp_path / "x"), "--minutes", "-1"]) == 2
