"""Model cells answering sparse noise and gratings: a session whose answers are known.

Each cell is a linear-nonlinear model with a separable space-time kernel:

- ``on_dog`` / ``off_dog``: difference of Gaussians (Enroth-Cugell & Robson 1966), one linear
  subunit followed by half-wave rectification;
- ``simple``: a Gabor (Jones & Palmer 1987), one linear subunit followed by half-wave rectification;
- ``complex``: the energy model (Adelson & Bergen 1985), a quadrature pair of Gabors whose outputs are
  squared and summed;
- ``unresponsive``: a constant rate.

Space and time
--------------
The spatial kernel ``k(x, y)`` (units 1/deg^2, so that ``integral k s dA`` of a contrast pattern ``s`` is
a dimensionless drive) is scaled so that the largest grating drive, ``max |H|`` over all wave vectors,
is 1 at contrast 1. ``H`` follows :mod:`map2d.geometry`:
``H(kx, ky) = integral k(x, y) exp(+i 2 pi (kx (x - xc) + ky (y - yc))) dA``, which for these kernels has a
closed form (Gaussian transform pairs, Bracewell, The Fourier Transform and Its Applications), so a
static grating of phase ``phi`` drives a subunit with ``contrast * Re(H exp(i phi))`` and a drifting grating
with ``contrast * Re(H exp(i (phi - 2 pi tf (t - onset))))`` (the contract's stimulus formula).

A sparse-noise spot covers one grid pixel, so its drive is the kernel integrated over that pixel. We
integrate numerically with the midpoint rule on ``supersample x supersample`` points per pixel
(:func:`pixel_kernels`). Gratings drive the continuous kernel (the analytic ``H``). The two views differ
by the pixel's box transform: the Fourier sum of the pixel-integrated kernel equals
``H(kx, ky) sinc(kx dx) sinc(ky dy)`` to within 2% of ``max |H|`` (grid truncation, aliasing), while the
box factor itself is 0.92-0.96 at the default cells' preferred SFs (0.15-0.22 cycles per pixel) and
0.84 at 0.32 cycles per pixel (0.16 cpd on the 2-deg grid). An analysis that predicts grating
responses from a sparse-noise map should divide by the box factor; ``tests/test_simulate.py`` checks
both statements for a mix of simulated cells.

The temporal profile is a Gaussian bump ``h(tau)`` (unit area) centred at the cell's latency, which is a
whole number (1-3) of sparse-noise frame intervals, with a standard deviation of ``0.3`` frame
intervals. Stimuli are piecewise constant in time and rates are piecewise constant over bins; the weight
of a stimulus bin on a response bin ``l`` bins later is the exact double integral of ``h``
(:func:`lag_weights`), so a sparse-noise frame's response falls almost entirely into the frame that
starts ``latency_s`` after it. Sparse noise is simulated in bins equal to its frames (cheap for long
sessions and many cells); gratings in fine bins (``bin_s``, 10 ms), where drifting gratings change
within a trial.

Rates and responses
-------------------
``rate = baseline_hz + gain_hz * [drive]_+`` for DoG and simple cells, and
``rate = baseline_hz + gain_hz * (e1^2 + e2^2) ** (exponent / 2)`` for complex cells (``e1``, ``e2`` the
temporally filtered quadrature outputs). The default ``exponent = 1`` is the amplitude of the quadrature
pair: it scales with contrast like the simple cells, so spots drive complex cells as well as gratings
do relative to simple cells; ``exponent = 2`` is the pure energy. ``gain_hz`` is the rate above baseline
at the optimal grating. Spikes are Poisson, with times uniform inside each bin.

Traces are the spikes convolved with a calcium-like kernel ``amplitude * exp(-t / tau)`` for ``t >= 0``
(instant rise), sampled at an imaging rate, plus Gaussian noise. With an instant rise a trace starts to
rise exactly when the rate does, i.e. at the true latency, and its response-triggered average has its
steepest rise at the latency and its maximum at the end of the rate response; a kernel with a finite
rise time would move both later. Window-averaged trace maps therefore peak between ``latency_s`` and
``latency_s + frame interval``.

References
----------
Adelson EH, Bergen JR (1985) Spatiotemporal energy models for the perception of motion.
J Opt Soc Am A 2:284-299.
Enroth-Cugell C, Robson JG (1966) The contrast sensitivity of retinal ganglion cells of the cat.
J Physiol 187:517-552.
Jones JP, Palmer LA (1987) An evaluation of the two-dimensional Gabor filter model of simple
receptive fields in cat striate cortex. J Neurophysiol 58:1233-1258.
"""

from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import sparse as _sparse
from scipy.optimize import minimize_scalar
from scipy.signal import lfilter
from scipy.special import ndtr

from .contract import GratingTable, Session, SparseNoise, Spikes, Traces
from .geometry import Grid, fold_orientation_deg, wave_vector
from .models import dog2d, dog_peak_sf, dog_spectrum, gabor2d

__all__ = [
    "CELL_TYPES", "TYPE_FRACTIONS", "ModelCell", "default_grid", "default_sfs_cpd", "type_counts",
    "make_cells", "pixel_kernels", "lag_weights", "frame_matrix", "grating_drive", "stimulus_rates", "spikes_from_rates",
    "calcium_traces", "simulate_responses", "simulate_session", "truth_dict", "cells_from_truth",
]

CELL_TYPES = ("on_dog", "off_dog", "simple", "complex", "unresponsive")
#: Default share of each type (20 cells -> 2 ON, 2 OFF, 8 simple, 5 complex, 3 unresponsive).
TYPE_FRACTIONS = {"on_dog": 0.1, "off_dog": 0.1, "simple": 0.4, "complex": 0.25, "unresponsive": 0.15}

_TEMPORAL_SD_FRAMES = 0.3      # sd of the temporal bump, in sparse-noise frame intervals
_MARGIN_SD = 2.5               # kernels lie inside the grid out to this many envelope sds
_NAN = float("nan")


# ----------------------------------------------------------------------------------------------
# defaults tied to the grid
# ----------------------------------------------------------------------------------------------
def default_grid() -> Grid:
    """The simulator's sparse-noise grid: 16 rows x 20 columns at 2 deg, centred at (10, 5) deg.

    32 x 40 deg of visual field; the centre is deliberately not (0, 0) so that code mixing up grid
    centre, phase origin and pixel indices fails.
    """
    return Grid(ny=16, nx=20, center_x_deg=10.0, center_y_deg=5.0, dx_deg=2.0, dy_deg=2.0)


def _spacing(grid: Grid) -> float:
    return math.sqrt(grid.dx_deg * grid.dy_deg)


def default_sfs_cpd(grid: Grid) -> np.ndarray:
    """Grating spatial frequencies for a grid: octaves 0.04 - 0.32 cycles per pixel.

    For the default 2-deg grid: 0.02, 0.04, 0.08, 0.16 cycles/deg.
    """
    return np.array([0.04, 0.08, 0.16, 0.32]) / _spacing(grid)


# ----------------------------------------------------------------------------------------------
# model cells
# ----------------------------------------------------------------------------------------------
@dataclass
class ModelCell:
    """One model cell. Fields that do not apply to the type are NaN.

    Attributes
    ----------
    cell_id : int
    kind : str
        One of :data:`CELL_TYPES`.
    center_x_deg, center_y_deg : float
        Centre of the kernel (DoG centre, Gabor envelope centre).
    kc, rc_deg, ks, rs_deg : float
        DoG ``kc exp(-r^2/rc^2) - ks exp(-r^2/rs^2)`` (1/deg^2); negative ``kc``, ``ks`` for OFF centre.
    sigma_u_deg, sigma_v_deg, orientation_deg, sf_cpd, phase_deg, amplitude : float
        Gabor ``amplitude * env * cos(2 pi sf u + phase)`` (see :func:`map2d.models.gabor2d`); for complex
        cells the first subunit, the second has ``phase + 90``.
    latency_s, temporal_sd_s : float
        Peak and standard deviation of the temporal profile.
    baseline_hz, gain_hz, exponent : float
        Output nonlinearity (module docstring).
    """

    cell_id: int
    kind: str
    center_x_deg: float = _NAN
    center_y_deg: float = _NAN
    kc: float = _NAN
    rc_deg: float = _NAN
    ks: float = _NAN
    rs_deg: float = _NAN
    sigma_u_deg: float = _NAN
    sigma_v_deg: float = _NAN
    orientation_deg: float = _NAN
    sf_cpd: float = _NAN
    phase_deg: float = _NAN
    amplitude: float = _NAN
    latency_s: float = _NAN
    temporal_sd_s: float = _NAN
    baseline_hz: float = 0.0
    gain_hz: float = 0.0
    exponent: float = 1.0

    def __post_init__(self):
        if self.kind not in CELL_TYPES:
            raise ValueError(f"kind must be one of {CELL_TYPES}, got {self.kind!r}")

    @property
    def n_subunits(self) -> int:
        return {"on_dog": 1, "off_dog": 1, "simple": 1, "complex": 2, "unresponsive": 0}[self.kind]

    @property
    def linear(self):
        """True for DoG and simple cells, False for complex cells, None for unresponsive ones."""
        if self.kind == "unresponsive":
            return None
        return self.kind != "complex"

    def _subunit_phases(self):
        return [self.phase_deg] if self.kind == "simple" else [self.phase_deg, self.phase_deg + 90.0]

    def kernels(self, x_deg, y_deg) -> np.ndarray:
        """Spatial kernel of every subunit at points ``(x, y)``: shape ``(n_subunits,) + x.shape``, 1/deg^2."""
        x = np.asarray(x_deg, float)
        y = np.asarray(y_deg, float)
        if self.kind in ("on_dog", "off_dog"):
            return dog2d(x, y, self.center_x_deg, self.center_y_deg, self.kc, self.rc_deg,
                         self.ks, self.rs_deg)[None]
        if self.kind in ("simple", "complex"):
            return np.stack([gabor2d(x, y, self.center_x_deg, self.center_y_deg, self.sigma_u_deg,
                                     self.sigma_v_deg, self.orientation_deg, self.sf_cpd, ph, self.amplitude)
                             for ph in self._subunit_phases()])
        return np.zeros((0,) + np.broadcast(x, y).shape)

    def spectra(self, kx, ky, origin_deg=(0.0, 0.0)) -> np.ndarray:
        """Analytic ``H`` of every subunit at wave vectors ``(kx, ky)`` (cycles/deg), complex.

        Convention of :mod:`map2d.geometry` (``exp(+i 2 pi k.(x - origin))``, phase origin
        ``origin_deg``). Shape ``(n_subunits,) + kx.shape``.
        """
        kx = np.asarray(kx, float)
        ky = np.asarray(ky, float)
        shift = np.exp(2j * np.pi * (kx * (self.center_x_deg - origin_deg[0])
                                     + ky * (self.center_y_deg - origin_deg[1])))
        if self.kind in ("on_dog", "off_dog"):
            f = np.hypot(kx, ky)
            return (shift * dog_spectrum(f, self.kc, self.rc_deg, self.ks, self.rs_deg))[None]
        if self.kind in ("simple", "complex"):
            th = np.deg2rad(self.orientation_deg)
            ku = kx * np.cos(th) + ky * np.sin(th)
            kv = -kx * np.sin(th) + ky * np.cos(th)
            su, sv, f0 = self.sigma_u_deg, self.sigma_v_deg, self.sf_cpd
            norm = 2 * np.pi * su * sv * self.amplitude / 2.0
            gv = np.exp(-2 * np.pi**2 * (sv * kv) ** 2)
            plus = np.exp(-2 * np.pi**2 * (su * (ku + f0)) ** 2)     # lobe at k = -f0 n
            minus = np.exp(-2 * np.pi**2 * (su * (ku - f0)) ** 2)    # lobe at k = +f0 n
            out = []
            for ph in self._subunit_phases():
                p = np.deg2rad(ph)
                out.append(shift * norm * gv * (np.exp(1j * p) * plus + np.exp(-1j * p) * minus))
            return np.stack(out)
        return np.zeros((0,) + np.broadcast(kx, ky).shape, complex)

    def tuning_amplitude(self, kx, ky) -> np.ndarray:
        """Size of the response to a grating at ``(kx, ky)``: ``|H|``, or for a complex cell
        ``sqrt((|H1|^2 + |H2|^2) / 2)``."""
        h = self.spectra(kx, ky)
        if h.shape[0] == 0:
            return np.zeros(np.broadcast(np.asarray(kx), np.asarray(ky)).shape)
        return np.sqrt(np.mean(np.abs(h) ** 2, axis=0))

    def preferred(self) -> tuple[float, float]:
        """True preferred ``(orientation_deg mod 180, sf_cpd)`` from the kernel's Fourier transform.

        DoG: orientation NaN (circularly symmetric), SF from :func:`map2d.models.dog_peak_sf` (closed
        form). Gabor cells: the spectrum is separable in the carrier's coordinates with the across-carrier
        factor largest at 0, so the peak lies on the carrier's axis: orientation = carrier orientation
        mod 180, SF = numerical argmax of the tuning amplitude along that axis (it differs from the
        carrier SF when the two lobes overlap). Unresponsive: NaN, NaN.
        """
        if self.kind in ("on_dog", "off_dog"):
            return _NAN, float(dog_peak_sf(self.kc, self.rc_deg, self.ks, self.rs_deg))
        if self.kind in ("simple", "complex"):
            th = np.deg2rad(self.orientation_deg)

            def neg(f):
                return -float(self.tuning_amplitude(f * np.cos(th), f * np.sin(th)))

            fmax = 4.0 * self.sf_cpd
            grid = np.linspace(0.0, fmax, 4001)
            vals = self.tuning_amplitude(grid * np.cos(th), grid * np.sin(th))
            i = int(np.argmax(vals))
            lo, hi = grid[max(i - 1, 0)], grid[min(i + 1, grid.size - 1)]
            res = minimize_scalar(neg, bounds=(lo, hi), method="bounded", options={"xatol": 1e-10})
            f = float(res.x) if -res.fun >= vals[i] else float(grid[i])
            return float(fold_orientation_deg(self.orientation_deg)), f
        return _NAN, _NAN

    def to_dict(self) -> dict:
        """JSON-ready record (NaN -> None) with the true tuning added."""
        d = {k: _json_value(v) for k, v in asdict(self).items()}
        ori, sf = self.preferred()
        d["pref_orientation_deg"] = _json_value(ori)
        d["pref_sf_cpd"] = _json_value(sf)
        d["linear"] = self.linear
        return d

    @classmethod
    def from_dict(cls, d: dict) -> "ModelCell":
        names = cls.__dataclass_fields__
        kw = {k: (_NAN if v is None else v) for k, v in d.items() if k in names}
        return cls(**kw)


def _json_value(v):
    if isinstance(v, (bool, np.bool_)) or v is None:
        return None if v is None else bool(v)
    if isinstance(v, (int, np.integer)):
        return int(v)
    if isinstance(v, (float, np.floating)):
        return float(v) if math.isfinite(float(v)) else None
    return v


def type_counts(n_cells: int, fractions=None) -> dict:
    """How many cells of each type: largest-remainder rounding of ``n_cells * fraction``, and at least
    one of every type when ``n_cells >= len(CELL_TYPES)``.

    Examples
    --------
    >>> type_counts(20)
    {'on_dog': 2, 'off_dog': 2, 'simple': 8, 'complex': 5, 'unresponsive': 3}
    >>> type_counts(5)
    {'on_dog': 1, 'off_dog': 1, 'simple': 1, 'complex': 1, 'unresponsive': 1}
    """
    fr = dict(TYPE_FRACTIONS if fractions is None else fractions)
    if set(fr) - set(CELL_TYPES):
        raise ValueError(f"fractions: unknown cell types {sorted(set(fr) - set(CELL_TYPES))}")
    total = sum(fr.values())
    if not total > 0:
        raise ValueError("fractions must sum to a positive number")
    names = [t for t in CELL_TYPES if fr.get(t, 0) > 0]
    want = np.array([n_cells * fr[t] / total for t in names])
    counts = np.floor(want).astype(int)
    for i in np.argsort(-(want - counts), kind="stable")[: n_cells - counts.sum()]:
        counts[i] += 1
    out = dict(zip(names, counts.tolist()))
    if n_cells >= len(names):
        for t in names:
            while out[t] < 1:
                donor = max(out, key=lambda k: out[k])
                out[donor] -= 1
                out[t] += 1
    return out


def _centre(rng, grid: Grid, half_x, half_y):
    """Random centre such that ``centre +- half`` stays inside the grid's outer pixel edges."""
    left, right, bottom, top = grid.extent_deg
    xs = (left + half_x, right - half_x)
    ys = (bottom + half_y, top - half_y)
    x = rng.uniform(*xs) if xs[0] < xs[1] else 0.5 * (left + right)
    y = rng.uniform(*ys) if ys[0] < ys[1] else 0.5 * (bottom + top)
    return float(x), float(y)


def make_cells(n_cells: int, grid: Grid | None = None, frame_interval_s: float = 0.05,
               sf_range_cpd=None, sfs_cpd=None, cell_types=None, peak_rate_hz=(25.0, 60.0),
               baseline_hz=(0.5, 2.0), unresponsive_hz=(2.0, 10.0), latency_frames=(1, 2, 3),
               complex_exponent: float = 1.0, cell_ids=None, rng=None) -> list[ModelCell]:
    """Draw model cells with sensible random parameters.

    Parameters
    ----------
    n_cells : int
        Number of cells (>= 0).
    grid : Grid, optional
        Sparse-noise grid (default :func:`default_grid`). Centres are drawn so that each kernel's
        envelope out to 2.5 standard deviations (the surround's, ``rs / sqrt(2)``, for a DoG) stays
        inside the grid (centred when it cannot).
    frame_interval_s : float
        Sparse-noise frame interval; latencies are whole multiples of it.
    sf_range_cpd : (float, float), optional
        Range of Gabor carrier SFs (log-uniform). Default ``(0.154, 0.22)`` cycles per pixel (periods of
        4.5 - 6.5 pixels: resolved by the grid, yet with subregions only ~2-3 pixels wide so that single
        spots drive the cell well), clipped to the range of ``sfs_cpd``.
    sfs_cpd : sequence of float, optional
        The grating SFs the session will use (default :func:`default_sfs_cpd`).
    cell_types : sequence of str, optional
        Explicit type of each cell (length ``n_cells``); default :func:`type_counts`, shuffled.
    peak_rate_hz : (float, float)
        Range of ``gain_hz`` (rate above baseline at the optimal grating).
    baseline_hz, unresponsive_hz : (float, float)
        Baseline range of responsive cells, and constant-rate range of unresponsive ones.
    latency_frames : sequence of int
        Allowed latencies in frame intervals (drawn uniformly).
    complex_exponent : float
        Output exponent of complex cells (module docstring).
    cell_ids : sequence of int, optional
        Ids (default ``0 .. n_cells - 1``).
    rng : numpy.random.Generator or int, optional

    Returns
    -------
    list of ModelCell
        Kernels scaled so the largest grating drive is 1.

    Notes
    -----
    Ranges (grid spacing ``d``): DoG ``rc`` 1.0-1.5 d, ``rs / rc`` 1.8-2.5, integrated surround
    strength ``Ks / Kc`` 0.5-0.85 (band-pass, as Enroth-Cugell & Robson found for most X cells); Gabor
    ``sigma_u * sf`` 0.28-0.36 (about one octave of SF bandwidth), ``sigma_v / sigma_u`` 1-1.25,
    orientation uniform in [0, 180), phase uniform in [0, 360).
    """
    grid = default_grid() if grid is None else grid
    rng = np.random.default_rng(rng)
    if int(n_cells) != n_cells or n_cells < 0:
        raise ValueError(f"n_cells must be a non-negative integer, got {n_cells}")
    n_cells = int(n_cells)
    d = _spacing(grid)
    sfs = default_sfs_cpd(grid) if sfs_cpd is None else np.asarray(sfs_cpd, float)
    lo, hi = (0.154 / d, 0.22 / d) if sf_range_cpd is None else (float(sf_range_cpd[0]), float(sf_range_cpd[1]))
    lo, hi = max(lo, float(np.min(sfs))), min(hi, float(np.max(sfs)))
    if not (0 < lo <= hi):
        raise ValueError(f"sf_range_cpd ({lo}, {hi}) does not overlap the grating SFs {sfs.tolist()}")
    if cell_types is None:
        counts = type_counts(n_cells)
        kinds = [t for t in CELL_TYPES for _ in range(counts.get(t, 0))]
        kinds = [kinds[i] for i in rng.permutation(len(kinds))]
    else:
        kinds = list(cell_types)
        if len(kinds) != n_cells:
            raise ValueError(f"cell_types has {len(kinds)} entries, n_cells is {n_cells}")
    ids = np.arange(n_cells) if cell_ids is None else np.asarray(cell_ids, dtype=np.int64)
    if ids.shape != (n_cells,) or np.unique(ids).size != n_cells:
        raise ValueError("cell_ids must hold n_cells distinct integers")
    lat_choices = np.asarray(latency_frames, dtype=int)
    if lat_choices.size == 0 or np.any(lat_choices < 1):
        raise ValueError(f"latency_frames must be positive integers, got {latency_frames}")
    cells = []
    for cid, kind in zip(ids.tolist(), kinds):
        lat = round(float(rng.choice(lat_choices)) * frame_interval_s, 12)
        if kind == "unresponsive":
            cells.append(ModelCell(cell_id=int(cid), kind=kind, baseline_hz=float(rng.uniform(*unresponsive_hz))))
            continue
        common = dict(cell_id=int(cid), kind=kind, latency_s=lat,
                      temporal_sd_s=_TEMPORAL_SD_FRAMES * frame_interval_s)
        base = float(rng.uniform(*baseline_hz))
        gain = float(rng.uniform(*peak_rate_hz))
        if kind in ("on_dog", "off_dog"):
            rc = rng.uniform(1.0, 1.5) * d
            rs = rc * rng.uniform(1.8, 2.5)
            ratio = rng.uniform(0.5, 0.85)                  # Ks / Kc, integrated strengths
            ks = ratio * rc**2 / rs**2                      # with kc = 1
            half = _MARGIN_SD * rs / math.sqrt(2.0)       # surround sd = rs / sqrt(2)
            x, y = _centre(rng, grid, half, half)
            sign = 1.0 if kind == "on_dog" else -1.0
            cell = ModelCell(**common, center_x_deg=x, center_y_deg=y, kc=sign, rc_deg=float(rc),
                             ks=float(sign * ks), rs_deg=float(rs), baseline_hz=base, gain_hz=gain)
            _, fpk = cell.preferred()
            scale = 1.0 / abs(float(dog_spectrum(fpk, cell.kc, rc, cell.ks, rs)))
            cell.kc *= scale
            cell.ks *= scale
        else:
            f0 = math.exp(rng.uniform(math.log(lo), math.log(hi)))
            su = rng.uniform(0.28, 0.36) / f0
            sv = su * rng.uniform(1.0, 1.25)
            th = rng.uniform(0.0, 180.0)
            ph = rng.uniform(0.0, 360.0)
            t = math.radians(th)
            half_x = _MARGIN_SD * math.hypot(su * math.cos(t), sv * math.sin(t))
            half_y = _MARGIN_SD * math.hypot(su * math.sin(t), sv * math.cos(t))
            x, y = _centre(rng, grid, half_x, half_y)
            cell = ModelCell(**common, center_x_deg=x, center_y_deg=y, sigma_u_deg=float(su),
                             sigma_v_deg=float(sv), orientation_deg=float(th), sf_cpd=float(f0),
                             phase_deg=float(ph), amplitude=1.0, baseline_hz=base, gain_hz=gain,
                             exponent=float(complex_exponent) if kind == "complex" else 1.0)
            _, fpk = cell.preferred()
            kx, ky = wave_vector(th, fpk)
            cell.amplitude = 1.0 / float(cell.tuning_amplitude(kx, ky))
        cells.append(cell)
    return cells


# ----------------------------------------------------------------------------------------------
# stimulus -> drive
# ----------------------------------------------------------------------------------------------
def _subunit_owner(cells) -> np.ndarray:
    return np.repeat(np.arange(len(cells)), [c.n_subunits for c in cells]).astype(int)


def pixel_kernels(cells, grid: Grid, supersample: int = 5) -> np.ndarray:
    """Each subunit's kernel integrated over each grid pixel (midpoint rule, ``supersample^2`` points).

    Returns
    -------
    numpy.ndarray, shape (n_subunits_total, ny, nx)
        Dimensionless: the drive of a contrast-1 spot filling that pixel. Subunits are in cell order
        (a complex cell contributes two rows).
    """
    s = int(supersample)
    if s < 1:
        raise ValueError(f"supersample must be >= 1, got {supersample}")
    off = ((np.arange(s) + 0.5) / s - 0.5)
    xf = (grid.x_deg[:, None] + off[None, :] * grid.dx_deg).ravel()       # (nx * s,)
    yf = (grid.y_deg[:, None] - off[None, :] * grid.dy_deg).ravel()       # (ny * s,), top row first
    X, Y = np.meshgrid(xf, yf)
    area = grid.dx_deg * grid.dy_deg / s**2
    rows = [c.kernels(X, Y) for c in cells if c.n_subunits]
    if not rows:
        return np.zeros((0, grid.ny, grid.nx))
    k = np.concatenate(rows, axis=0)
    return k.reshape(k.shape[0], grid.ny, s, grid.nx, s).sum(axis=(2, 4)) * area


def _second_integral(tau, mean, sd):
    """``G`` with ``G'' = `` normal pdf: ``(tau - mean) Phi(z) + sd phi(z)``."""
    z = (tau - mean) / sd
    return (tau - mean) * ndtr(z) + sd * np.exp(-0.5 * z * z) / math.sqrt(2 * math.pi)


def lag_weights(interval_s: float, latency_s, sd_s, n_lags: int | None = None) -> np.ndarray:
    """Weights of a stimulus bin on the response ``l`` bins later, for bins of width ``interval_s``.

    With the temporal profile ``h`` a unit-area Gaussian (mean ``latency_s``, sd ``sd_s``), a stimulus
    constant over one bin and a response averaged over a bin ``l`` bins later,
    ``w_l = (1/T) int_{lT}^{(l+1)T} int_0^T h(t - s) ds dt = (G((l+1)T) - 2 G(lT) + G((l-1)T)) / T``
    with ``G'' = h``. The weights sum to 1 (the steady-state gain).

    Parameters
    ----------
    interval_s : float
    latency_s, sd_s : float or array (n_units,)
    n_lags : int, optional
        Default: enough to cover ``latency + 5 sd`` plus one bin.

    Returns
    -------
    numpy.ndarray, shape (n_lags,) or (n_lags, n_units)

    Examples
    --------
    >>> w = lag_weights(0.05, 0.1, 0.015)
    >>> int(np.argmax(w)), round(float(w.sum()), 6)
    (2, 1.0)
    """
    lat = np.asarray(latency_s, float)
    sd = np.asarray(sd_s, float)
    T = float(interval_s)
    if not T > 0:
        raise ValueError(f"interval_s must be positive, got {interval_s}")
    if n_lags is None:
        n_lags = int(np.ceil(np.max(lat + 5 * sd) / T)) + 2 if lat.size else 1
    l = np.arange(n_lags, dtype=float).reshape((-1,) + (1,) * lat.ndim) * T
    w = (_second_integral(l + T, lat, sd) - 2 * _second_integral(l, lat, sd)
         + _second_integral(l - T, lat, sd)) / T
    return w


def _causal_filter(x, w):
    """``y[t, u] = sum_l w[l, u] x[t - l, u]`` along axis 0 (zeros before the start)."""
    y = np.zeros_like(x)
    n = x.shape[0]
    for lag in range(min(w.shape[0], n)):
        y[lag:] += w[lag] * x[: n - lag]
    return y


def grating_drive(cells, table: GratingTable, times_s) -> np.ndarray:
    """Linear drive of every subunit at times ``times_s`` (before temporal filtering).

    ``contrast * Re(H exp(i (phase - 2 pi tf (t - onset))))`` for the presentation shown at ``t``
    (0 between presentations and during blanks), with ``H`` from :meth:`ModelCell.spectra` at the
    table's phase origin.

    Returns
    -------
    numpy.ndarray, shape (times, n_subunits_total)
    """
    t = np.asarray(times_s, float)
    n_sub = sum(c.n_subunits for c in cells)
    out = np.zeros((t.size, n_sub))
    if len(table) == 0 or n_sub == 0:
        return out
    order = np.argsort(table.onset_s, kind="stable")
    onset, offset = table.onset_s[order], table.offset_s[order]
    kx, ky = wave_vector(table.orientation_deg[order], table.sf_cpd[order])
    H = np.concatenate([c.spectra(kx, ky, table.phase_origin_deg) for c in cells if c.n_subunits], axis=0)
    row = np.searchsorted(onset, t, side="right") - 1
    on = row >= 0
    on[on] &= t[on] < offset[row[on]]
    r = row[on]
    c = table.contrast[order][r]
    ph = np.deg2rad(table.phase_deg[order][r]) - 2 * np.pi * table.tf_hz[order][r] * (t[on] - onset[r])
    out[on] = c[:, None] * np.real(H[:, r].T * np.exp(1j * ph)[:, None])
    return out


def _nonlinearity(cells, filtered, owner):
    """Rates ``(bins, cells)`` from filtered subunit drives ``(bins, subunits)``."""
    nb = filtered.shape[0]
    rates = np.empty((nb, len(cells)))
    for i, cell in enumerate(cells):
        if cell.n_subunits == 0:
            rates[:, i] = cell.baseline_hz
            continue
        e = filtered[:, owner == i]
        if cell.kind == "complex":
            amp = np.sum(e * e, axis=1) ** (0.5 * cell.exponent)
        else:
            amp = np.maximum(e[:, 0], 0.0)
        rates[:, i] = cell.baseline_hz + cell.gain_hz * amp
    return rates


def _chunks(cells, n_bins, budget=2_000_000):
    """Groups of cells so that ``bins x subunits`` of a group stays near ``budget``."""
    per = max(1, int(budget // max(n_bins, 1)))
    out, cur, nsub = [], [], 0
    for i, c in enumerate(cells):
        if cur and nsub + max(c.n_subunits, 1) > per:
            out.append(cur)
            cur, nsub = [], 0
        cur.append(i)
        nsub += max(c.n_subunits, 1)
    if cur:
        out.append(cur)
    return out


def _tails(cells, sparse_noise, bin_s):
    """Number of lag weights (bins) for the sparse-noise and the fine grating segments, all cells."""
    owner = _subunit_owner(cells)
    lat = np.array([cells[i].latency_s for i in owner])
    sd = np.array([cells[i].temporal_sd_s for i in owner])
    if lat.size == 0:
        return 1, 1
    t_sparse = 1
    if sparse_noise is not None and sparse_noise.n_frames >= 2:
        t_sparse = lag_weights(sparse_noise.frame_interval_s, lat, sd).shape[0]
    return t_sparse, lag_weights(bin_s, lat, sd).shape[0]


def _segment_edges(cells, sparse_noise, gratings, bin_s):
    """Bin edges of the sparse-noise and grating segments (``None`` when absent)."""
    tail_sparse, tail_fine = _tails(cells, sparse_noise, bin_s)
    sparse_edges = grating_edges = None
    if sparse_noise is not None and sparse_noise.n_frames:
        if sparse_noise.n_frames < 2:
            raise ValueError("sparse_noise needs at least two frames")
        T = sparse_noise.frame_interval_s
        sparse_edges = np.concatenate([sparse_noise.times_s,
                                       sparse_noise.frame_ends_s()[-1] + T * np.arange(tail_sparse)])
    if gratings is not None and len(gratings):
        t0 = float(np.min(gratings.onset_s))
        t1 = float(np.max(gratings.offset_s)) + tail_fine * bin_s
        nb = int(np.ceil((t1 - t0) / bin_s - 1e-9))
        grating_edges = t0 + bin_s * np.arange(nb + 1)
    return sparse_edges, grating_edges


def frame_matrix(sparse_noise: SparseNoise, n_bins: int | None = None):
    """Sparse-noise frames as a sparse ``(n_bins, pixels)`` matrix (rows past the last frame empty)."""
    frames = sparse_noise.frames.reshape(sparse_noise.n_frames, -1)
    n_bins = sparse_noise.n_frames if n_bins is None else int(n_bins)
    fi, pi = np.nonzero(frames)
    return _sparse.csr_matrix((frames[fi, pi].astype(float), (fi, pi)), shape=(n_bins, frames.shape[1]))


def stimulus_rates(cells, sparse_noise: SparseNoise | None = None, gratings: GratingTable | None = None,
                   bin_s: float = 0.01, supersample: int = 5, cell_subset=None, frames_csr=None):
    """Firing rates in time bins, segment by segment (sparse noise first, then gratings).

    Parameters
    ----------
    cells : list of ModelCell
    sparse_noise : SparseNoise, optional
        Simulated in bins equal to its frames, plus a tail of bins that lets the last responses finish.
    gratings : GratingTable, optional
        Simulated in bins of ``bin_s`` from the first onset to the last offset plus the tail. The drive
        is evaluated at bin centres.
    bin_s : float
        Fine bin width for gratings (s).
    supersample : int
        Points per pixel side for :func:`pixel_kernels`.
    cell_subset : sequence of int, optional
        Indices into ``cells`` to compute (default all); the bins do not depend on it.
    frames_csr : scipy.sparse matrix, optional
        :func:`frame_matrix` of ``sparse_noise`` with as many rows as sparse-noise bins, when the caller
        computes rates chunk by chunk and builds it once.

    Yields
    ------
    edges : numpy.ndarray (bins + 1,)
    rates : numpy.ndarray (bins, len(subset)), spikes/s
    """
    if not bin_s > 0:
        raise ValueError(f"bin_s must be positive, got {bin_s}")
    sparse_edges, grating_edges = _segment_edges(cells, sparse_noise, gratings, bin_s)
    sel = list(range(len(cells))) if cell_subset is None else list(cell_subset)
    sub_cells = [cells[i] for i in sel]
    owner = _subunit_owner(sub_cells)
    lat = np.array([sub_cells[i].latency_s for i in owner])
    sd = np.array([sub_cells[i].temporal_sd_s for i in owner])
    if sparse_edges is not None:
        n_bins = sparse_edges.size - 1
        drive = np.zeros((n_bins, owner.size))
        if owner.size:
            S = frame_matrix(sparse_noise, n_bins) if frames_csr is None else frames_csr
            K = pixel_kernels(sub_cells, sparse_noise.grid, supersample).reshape(owner.size, -1)
            drive = np.asarray(S @ K.T)
            w = lag_weights(sparse_noise.frame_interval_s, lat, sd, n_lags=n_bins - sparse_noise.n_frames + 1)
            drive = _causal_filter(drive, w)
        yield sparse_edges, _nonlinearity(sub_cells, drive, owner)
    if grating_edges is not None:
        centres = grating_edges[:-1] + 0.5 * bin_s
        drive = grating_drive(sub_cells, gratings, centres)
        if owner.size:
            w = lag_weights(bin_s, lat, sd)
            drive = _causal_filter(drive, w)
        yield grating_edges, _nonlinearity(sub_cells, drive, owner)


def spikes_from_rates(edges, rates, rng=None):
    """Poisson spikes from piecewise-constant rates, times uniform inside each bin.

    Parameters
    ----------
    edges : array (bins + 1,)
    rates : array (bins, cells), spikes/s (>= 0)
    rng : numpy.random.Generator or int, optional

    Returns
    -------
    time_s : float64 array, cell_index : int64 array (column of ``rates``), both sorted by time.
    """
    rng = np.random.default_rng(rng)
    edges = np.asarray(edges, float)
    width = np.diff(edges)
    counts = rng.poisson(np.asarray(rates, float) * width[:, None])
    b, c = np.nonzero(counts)
    n = counts[b, c]
    b = np.repeat(b, n)
    c = np.repeat(c, n)
    t = edges[b] + rng.random(b.size) * width[b]
    order = np.lexsort((c, t))
    return t[order], c[order].astype(np.int64)


def calcium_traces(time_s, cell_index, n_cells: int, sample_times_s, tau_s: float = 0.4,
                   spike_amplitude: float = 0.1, noise_sd: float = 0.03, rng=None) -> np.ndarray:
    """Calcium-like traces: ``spike_amplitude * sum exp(-(t - t_spike) / tau)`` over past spikes, plus noise.

    The kernel rises instantly (see the module docstring). Exact at the sample times: spikes are
    binned into the sampling intervals with their decay to the next sample, then a first-order
    recursion carries the sum from sample to sample.

    Parameters
    ----------
    time_s, cell_index : arrays
        Spike times and row (0 .. n_cells - 1) of each spike.
    n_cells : int
    sample_times_s : array (samples,)
        Regularly spaced sample times.
    tau_s, spike_amplitude, noise_sd : float
    rng : numpy.random.Generator or int, optional

    Returns
    -------
    numpy.ndarray float32 (cells, samples)
    """
    rng = np.random.default_rng(rng)
    ts = np.asarray(sample_times_s, float)
    dt = float(np.median(np.diff(ts)))
    t = np.asarray(time_s, float)
    ci = np.asarray(cell_index, np.int64)
    k = np.searchsorted(ts, t, side="left")          # first sample at or after the spike
    ok = k < ts.size
    x = np.zeros((n_cells, ts.size))
    np.add.at(x, (ci[ok], k[ok]), np.exp(-(ts[k[ok]] - t[ok]) / tau_s))
    a = math.exp(-dt / tau_s)
    c = lfilter([1.0], [1.0, -a], x, axis=1)
    noise = rng.normal(0.0, noise_sd, size=c.shape) if noise_sd > 0 else 0.0
    return (spike_amplitude * c + noise).astype(np.float32)


def simulate_responses(cells, sparse_noise: SparseNoise | None = None, gratings: GratingTable | None = None,
                       responses: str = "spikes", t_end_s: float | None = None, bin_s: float = 0.01,
                       imaging_rate_hz: float = 30.0, calcium_tau_s: float = 0.4, spike_amplitude: float = 0.1,
                       noise_sd: float = 0.03, supersample: int = 5, rng=None):
    """Spikes (or traces) of model cells answering the given stimuli.

    The timeline runs from 0 to ``t_end_s`` (default: 1 s after the last stimulus response). Outside
    the stimulus segments cells fire at their baseline. Segments must not overlap (a grating table that
    starts before the sparse-noise responses have ended is refused).

    Parameters
    ----------
    cells : list of ModelCell
    sparse_noise, gratings : optional
    responses : {"spikes", "traces"}
    t_end_s : float, optional
    bin_s : float
        Fine bin for gratings (s).
    imaging_rate_hz, calcium_tau_s, spike_amplitude, noise_sd : float
        Traces only (:func:`calcium_traces`); the first sample is at a random time in
        ``[0, 1 / imaging_rate_hz)``.
    supersample : int
    rng : numpy.random.Generator or int, optional

    Returns
    -------
    Spikes (ids from the cells, all kept even without spikes) or Traces (rows in cell order).
    """
    if responses not in ("spikes", "traces"):
        raise ValueError(f"responses must be 'spikes' or 'traces', got {responses!r}")
    rng = np.random.default_rng(rng)
    n = len(cells)
    ids = np.array([c.cell_id for c in cells], dtype=np.int64)
    if np.unique(ids).size != n:
        raise ValueError("cells must have distinct cell_id values")
    sparse_edges, grating_edges = _segment_edges(cells, sparse_noise, gratings, bin_s)
    spans = sorted((float(e[0]), float(e[-1])) for e in (sparse_edges, grating_edges) if e is not None)
    for a, b in zip(spans, spans[1:]):
        if b[0] < a[1] - 1e-9:
            raise ValueError(f"the grating segment starts at {b[0]:.3f} s, before the sparse-noise "
                             f"responses end at {a[1]:.3f} s; leave a gap longer than the latencies")
    last = max([s[1] for s in spans], default=0.0)
    t_end = last + 1.0 if t_end_s is None else float(t_end_s)
    if t_end < last:
        raise ValueError(f"t_end_s ({t_end}) is before the end of the stimulus responses ({last})")
    baseline = np.array([c.baseline_hz for c in cells])
    times, rows = [], []
    bounds = [0.0] + [v for s in spans for v in s] + [t_end]
    for a, b in zip(bounds[0::2], bounds[1::2]):          # baseline-only gaps
        if b > a and n:
            t, c = spikes_from_rates([a, b], baseline[None, :], rng)
            times.append(t)
            rows.append(c)
    longest = max([e.size for e in (sparse_edges, grating_edges) if e is not None], default=1)
    S = frame_matrix(sparse_noise, sparse_edges.size - 1) if sparse_edges is not None else None
    for chunk in _chunks(cells, longest):
        for edges, rates in stimulus_rates(cells, sparse_noise, gratings, bin_s, supersample, chunk, S):
            t, c = spikes_from_rates(edges, rates, rng)
            times.append(t)
            rows.append(np.asarray(chunk, dtype=np.int64)[c])
    t = np.concatenate(times) if times else np.zeros(0)
    r = np.concatenate(rows) if rows else np.zeros(0, np.int64)
    order = np.lexsort((r, t))
    t, r = t[order], r[order]
    if responses == "spikes":
        return Spikes(time_s=t, cell=ids[r], cell_ids=np.sort(ids))
    dt = 1.0 / float(imaging_rate_hz)
    first = float(rng.uniform(0.0, dt))
    sample_t = first + dt * np.arange(int(np.floor((t_end - first) / dt)) + 1)
    values = calcium_traces(t, r, n, sample_t, calcium_tau_s, spike_amplitude, noise_sd, rng)
    return Traces(values=values, times_s=sample_t)


# ----------------------------------------------------------------------------------------------
# whole session
# ----------------------------------------------------------------------------------------------
def truth_dict(cells, **session_parameters) -> dict:
    """JSON-ready truth: ``{"cells": [ModelCell.to_dict() ...], "session": {...}}`` (NaN -> None)."""
    return {"cells": [c.to_dict() for c in cells], "session": _jsonable(session_parameters)}


def _jsonable(v):
    if isinstance(v, dict):
        return {str(k): _jsonable(x) for k, x in v.items()}
    if isinstance(v, (list, tuple, np.ndarray)):
        return [_jsonable(x) for x in np.asarray(v, dtype=object).tolist()] if isinstance(v, np.ndarray) \
            else [_jsonable(x) for x in v]
    return _json_value(v)


def cells_from_truth(truth: dict) -> list[ModelCell]:
    """Rebuild the model cells from a truth dict (e.g. read back from ``OUT.truth.json``)."""
    return [ModelCell.from_dict(d) for d in truth["cells"]]


def simulate_session(n_cells: int = 20, minutes: float = 20.0, responses: str = "spikes", seed=0, *,
                     grid: Grid | None = None, sparse_rate_hz: float = 20.0, spots_per_frame: int = 4,
                     min_distance_deg: float = 5.0,
                     flashed_minutes: float = 5.0, flashed_rate_hz: float = 10.0, n_orientations: int = 12,
                     sfs_cpd=None, n_phases: int = 4, blank_fraction: float = 0.1,
                     n_directions: int = 8, drifting_sfs_cpd=None, tf_hz: float = 2.0, trial_s: float = 2.0,
                     trial_gap_s: float = 1.0, repeats: int = 5, segment_gap_s: float = 2.0,
                     cell_types=None, peak_rate_hz=(120.0, 240.0), baseline_hz=(0.5, 2.0),
                     unresponsive_hz=(2.0, 10.0), latency_frames=(1, 2, 3), complex_exponent: float = 1.0,
                     bin_s: float = 0.01, imaging_rate_hz: float = 30.0, calcium_tau_s: float = 0.4,
                     spike_amplitude: float = 0.1, noise_sd: float = 0.03, supersample: int = 5,
                     name: str | None = None):
    """Simulate a whole session: sparse noise, then flashed gratings, then drifting-grating trials.

    Parameters
    ----------
    n_cells : int
        Number of model cells (types from :func:`type_counts` unless ``cell_types`` is given).
    minutes : float
        Sparse-noise duration (0: no sparse noise).
    responses : {"spikes", "traces"}
    seed : int or numpy.random.Generator
        Everything random derives from it: the same seed gives the same cells, stimuli and responses.
        Cells, sparse noise, flashed gratings, drifting order and responses use separate streams, so
        changing a duration does not change the cells.
    grid : Grid, optional
        Sparse-noise grid, default :func:`default_grid` (16 x 20 at 2 deg, centre (10, 5) deg).
    sparse_rate_hz, spots_per_frame, min_distance_deg :
        Sparse noise (:func:`map2d.stimuli.sparse_noise.make_sparse_noise`); starts at 1 s.
    flashed_minutes, flashed_rate_hz, n_orientations, sfs_cpd, n_phases, blank_fraction :
        Flashed gratings (0 minutes: none): orientations ``0, 180/n, ...``, SFs default
        :func:`default_sfs_cpd`, phases ``0, 360/n, ...``.
    n_directions, drifting_sfs_cpd, tf_hz, trial_s, trial_gap_s, repeats :
        Drifting trials (0 repeats: none): directions ``0, 360/n, ...``; SFs default the middle two of
        the flashed set (0.04 and 0.08 cpd on the default grid).
    segment_gap_s : float
        Grey gap between sparse noise, flashed and drifting segments.
    cell_types, peak_rate_hz, baseline_hz, unresponsive_hz, latency_frames, complex_exponent :
        Passed to :func:`make_cells`. The default gains (120-240 spikes/s above baseline at the optimal
        grating; a 2-deg spot drives a Gabor cell ~1/10 of that) are chosen so that a default 20-minute
        session resolves every model cell within the tolerances map2d is tested to (centres 0.5 deg,
        widths 15 %); at 25-60 spikes/s, typical of cortical cells, simple-cell maps are noise-limited
        and only about half of them reach significance in 20 minutes.
    bin_s, imaging_rate_hz, calcium_tau_s, spike_amplitude, noise_sd, supersample :
        Passed to :func:`simulate_responses`.
    name : str, optional
        Session name (default ``"simulated-seed<seed>"``).

    Returns
    -------
    session : Session
    truth : dict
        ``truth["cells"]``: one dict per cell, in cell-id order, with ``cell_id``, ``kind``, centre,
        DoG or Gabor parameters, ``latency_s``, ``baseline_hz``, ``gain_hz``, ``pref_orientation_deg``
        (mod 180, wave-vector convention; NaN/None for DoG and unresponsive cells), ``pref_sf_cpd`` and
        ``linear``. ``truth["session"]``: the parameters above, the grid, segment times and the seed.
        JSON-serialisable (NaN written as None).

    Examples
    --------
    >>> s, truth = simulate_session(n_cells=5, minutes=0.2, flashed_minutes=0.1, repeats=1, seed=1)
    >>> len(truth["cells"]), sorted({c["kind"] for c in truth["cells"]})[:2]
    (5, ['complex', 'off_dog'])
    """
    from .stimuli.gratings import combine_tables, make_drifting_gratings, make_flashed_gratings
    from .stimuli.sparse_noise import make_sparse_noise

    if responses not in ("spikes", "traces"):
        raise ValueError(f"responses must be 'spikes' or 'traces', got {responses!r}")
    for nm, v in (("minutes", minutes), ("flashed_minutes", flashed_minutes)):
        if not (np.isfinite(v) and v >= 0):
            raise ValueError(f"{nm} must be >= 0, got {v}")
    grid = default_grid() if grid is None else grid
    seed_value = seed if isinstance(seed, (int, np.integer)) else None
    root = np.random.default_rng(seed)
    r_cells, r_sparse, r_flash, r_drift, r_resp = (np.random.default_rng(s)
                                                    for s in root.integers(0, 2**63 - 1, size=5))
    sfs = default_sfs_cpd(grid) if sfs_cpd is None else np.asarray(sfs_cpd, float)
    dsfs = (np.sort(sfs)[len(sfs) // 2 - 1: len(sfs) // 2 + 1] if drifting_sfs_cpd is None and len(sfs) >= 2
            else np.asarray(sfs if drifting_sfs_cpd is None else drifting_sfs_cpd, float))
    frame_interval = 1.0 / float(sparse_rate_hz)
    cells = make_cells(n_cells, grid, frame_interval, sfs_cpd=sfs, cell_types=cell_types,
                       peak_rate_hz=peak_rate_hz, baseline_hz=baseline_hz, unresponsive_hz=unresponsive_hz,
                       latency_frames=latency_frames, complex_exponent=complex_exponent, rng=r_cells)
    origin = (grid.center_x_deg, grid.center_y_deg)
    t = 1.0
    segments = {}
    sparse = None
    if minutes > 0:
        sparse = make_sparse_noise(grid, minutes * 60.0, rate_hz=sparse_rate_hz, spots_per_frame=spots_per_frame,
                                   min_distance_deg=min_distance_deg, start_s=t, rng=r_sparse)
        end = float(sparse.frame_ends_s()[-1])
        segments["sparse_noise_s"] = [t, end]
        t = _round_ms(end + segment_gap_s)
    tables = []
    if flashed_minutes > 0:
        ori = np.arange(n_orientations) * 180.0 / n_orientations
        ph = np.arange(n_phases) * 360.0 / n_phases
        fl = make_flashed_gratings(ori, sfs, ph, flashed_minutes * 60.0, rate_hz=flashed_rate_hz,
                                   blank_fraction=blank_fraction, phase_origin_deg=origin, start_s=t, rng=r_flash)
        tables.append(fl)
        end = float(np.max(fl.offset_s))
        segments["flashed_gratings_s"] = [t, end]
        t = _round_ms(end + segment_gap_s)
    if repeats > 0:
        dirs = np.arange(n_directions) * 360.0 / n_directions
        dr = make_drifting_gratings(dirs, dsfs, tf_hz, trial_s=trial_s, gap_s=trial_gap_s, repeats=repeats,
                                    phase_origin_deg=origin, start_s=t, rng=r_drift)
        tables.append(dr)
        segments["drifting_gratings_s"] = [t, float(np.max(dr.offset_s))]
    gratings = None
    if tables:
        gratings = combine_tables(*tables)
        gratings.onset_s = _round_ms(gratings.onset_s)
        gratings.offset_s = _round_ms(gratings.offset_s)
    resp = simulate_responses(cells, sparse, gratings, responses, bin_s=bin_s, imaging_rate_hz=imaging_rate_hz,
                              calcium_tau_s=calcium_tau_s, spike_amplitude=spike_amplitude, noise_sd=noise_sd,
                              supersample=supersample, rng=r_resp)
    session = Session(responses=resp, sparse_noise=sparse, gratings=gratings,
                      name=name or f"simulated-seed{seed_value if seed_value is not None else 'rng'}")
    truth = truth_dict(
        sorted(cells, key=lambda c: c.cell_id),
        seed=seed_value, n_cells=n_cells, responses=responses,
        grid={"ny": grid.ny, "nx": grid.nx, **grid.to_manifest()},
        phase_origin_deg=list(origin),
        sparse_noise={"minutes": minutes, "rate_hz": sparse_rate_hz, "frame_interval_s": frame_interval,
                      "spots_per_frame": spots_per_frame, "min_distance_deg": min_distance_deg},
        flashed_gratings={"minutes": flashed_minutes, "rate_hz": flashed_rate_hz,
                          "n_orientations": n_orientations, "sfs_cpd": list(map(float, sfs)),
                          "n_phases": n_phases, "blank_fraction": blank_fraction},
        drifting_gratings={"n_directions": n_directions, "sfs_cpd": list(map(float, dsfs)), "tf_hz": tf_hz,
                           "trial_s": trial_s, "gap_s": trial_gap_s, "repeats": repeats},
        segments=segments,
        model={"bin_s": bin_s, "supersample": supersample, "complex_exponent": complex_exponent,
               "temporal_sd_frames": _TEMPORAL_SD_FRAMES,
               "rate": "baseline_hz + gain_hz * [drive]_+ (complex: gain_hz * (e1^2+e2^2)^(exponent/2))",
               "kernel_scale": "max |H| = 1 at contrast 1",
               "latency": "peak of the temporal profile; a sparse-noise frame's response falls into the "
                          "frame that starts latency_s after it"},
        traces=({"imaging_rate_hz": imaging_rate_hz, "calcium_tau_s": calcium_tau_s,
                 "spike_amplitude": spike_amplitude, "noise_sd": noise_sd} if responses == "traces" else None),
    )
    return session, truth


def _round_ms(t):
    """Times rounded to 1 ms, so that the 7-significant-digit CSV holds them exactly (< 10000 s)."""
    return np.round(np.asarray(t, float), 3) if np.ndim(t) else float(np.round(float(t), 3))


def roi_label_image(cell_ids, shape=(192, 192), radius_px: float = 6.0, label_offset: int = 1,
                    rng=None) -> np.ndarray:
    """A simulated imaging field of view: one disk-shaped ROI per cell, labelled ``cell id + offset``.

    Disks are placed at random, without overlap (at least one pixel of background between them),
    so that field-of-view maps (:func:`map2d.export.fov.write_fov`) have something to paint.

    Parameters
    ----------
    cell_ids : array_like of int
    shape : (int, int)
        Image height and width in pixels.
    radius_px : float
        ROI radius.
    label_offset : int
        Label of cell ``k`` is ``k + label_offset`` (label 0 is background, so cell 0 needs an offset).
    rng : numpy.random.Generator or int, optional

    Returns
    -------
    numpy.ndarray of int32, ``shape``

    Examples
    --------
    >>> lab = roi_label_image([0, 1, 2], shape=(64, 64), radius_px=4, rng=0)
    >>> sorted(np.unique(lab).tolist())
    [0, 1, 2, 3]
    """
    rng = np.random.default_rng(rng)
    ids = np.asarray(cell_ids, dtype=np.int64)
    h, w = int(shape[0]), int(shape[1])
    r = float(radius_px)
    if ids.size and (ids.min() + label_offset) < 1:
        raise ValueError("label_offset must make every label >= 1 (0 is background)")
    labels = np.zeros((h, w), dtype=np.int32)
    rows, cols = np.mgrid[0:h, 0:w]
    centres = []
    for cid in ids:
        for _ in range(2000):
            cy, cx = rng.uniform(r + 1, h - r - 2), rng.uniform(r + 1, w - r - 2)
            if all((cy - y) ** 2 + (cx - x) ** 2 >= (2 * r + 2) ** 2 for y, x in centres):
                break
        else:
            raise ValueError(f"cannot fit {ids.size} ROIs of radius {r} px into {shape}")
        centres.append((cy, cx))
        labels[(rows - cy) ** 2 + (cols - cx) ** 2 <= r * r] = int(cid) + label_offset
    return labels
