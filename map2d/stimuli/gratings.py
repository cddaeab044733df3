"""Grating sequences: flashed (one static grating per frame) and drifting trials, seeded.

Both return a :class:`map2d.contract.GratingTable` whose rows follow ``gratings.csv`` of the contract:
``s(x, y, t) = contrast * cos(2 pi sf u - 2 pi tf (t - onset) + phase)`` with
``u = (x - xc) cos(ori) + (y - yc) sin(ori)``; ``ori`` is the wave-vector angle (0 = vertical stripes),
and a drifting grating moves toward ``ori``.

Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people. Follow
local guidance and your local animal-care approvals when presenting these stimuli.
"""

from __future__ import annotations

import numpy as np

from ..contract import GRATING_COLUMNS, GratingTable

__all__ = ["make_flashed_gratings", "make_drifting_gratings", "combine_tables"]


def _values(name, values, lo=None, hi=None, positive=False):
    a = np.atleast_1d(np.asarray(values, dtype=float)).ravel()
    if a.size == 0:
        raise ValueError(f"{name} must not be empty")
    if not np.all(np.isfinite(a)):
        raise ValueError(f"{name} must be finite, got {a.tolist()}")
    if positive and np.any(a <= 0):
        raise ValueError(f"{name} must be positive, got {a.tolist()}")
    if lo is not None and (np.any(a < lo) or np.any(a >= hi)):
        raise ValueError(f"{name} must lie in [{lo}, {hi}), got {a.tolist()}")
    if np.unique(a).size != a.size:
        raise ValueError(f"{name} holds repeated values: {a.tolist()}")
    return a


def _positive(name, value):
    if not (np.isfinite(value) and value > 0):
        raise ValueError(f"{name} must be positive, got {value}")


def _finite(name, value):
    if not np.isfinite(value):
        raise ValueError(f"{name} must be finite, got {value}")


def _origin(phase_origin_deg):
    try:
        xc, yc = (float(v) for v in phase_origin_deg)
    except Exception:
        raise ValueError(f"phase_origin_deg must be two numbers, got {phase_origin_deg!r}") from None
    if not (np.isfinite(xc) and np.isfinite(yc)):
        raise ValueError(f"phase_origin_deg must be finite, got {phase_origin_deg!r}")
    return xc, yc


def _contrast(contrast):
    if not (np.isfinite(contrast) and 0 < contrast <= 1):
        raise ValueError(f"contrast must be in (0, 1], got {contrast}")
    return float(contrast)


def make_flashed_gratings(orientations_deg, sfs_cpd, phases_deg, duration_s, rate_hz=10.0,
                          blank_fraction=0.1, contrast=1.0, phase_origin_deg=(0.0, 0.0), start_s=0.0,
                          rng=None) -> GratingTable:
    """A flashed-grating sequence: one static grating per frame, in random, balanced order.

    Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people.
    Follow local guidance and your local animal-care approvals when presenting these stimuli.

    Parameters
    ----------
    orientations_deg : sequence of float
        Wave-vector orientations in ``[0, 180)`` (0 = vertical stripes).
    sfs_cpd : sequence of float
        Spatial frequencies (> 0), cycles per degree.
    phases_deg : sequence of float
        Spatial phases in ``[0, 360)``; at phase 0 a bright crest lies on the phase origin.
    duration_s : float
        Length of the sequence; it has ``floor(duration_s * rate_hz)`` frames (at least 1).
    rate_hz : float
        Frames per second: frame ``k`` is shown from ``start_s + k / rate_hz`` to
        ``start_s + (k + 1) / rate_hz``.
    blank_fraction : float
        Fraction of frames that are blank (in ``[0, 1)``). A blank row has ``contrast = 0``,
        ``sf_cpd = 0``, ``orientation_deg = 0`` and ``phase_deg = 0`` (numbers, as the contract asks).
    contrast : float
        Contrast of the non-blank gratings, in ``(0, 1]``.
    phase_origin_deg : (float, float)
        ``(xc, yc)`` of the phase origin, degrees.
    start_s : float
        Onset of the first frame.
    rng : numpy.random.Generator or int, optional
        Seed or generator.

    Returns
    -------
    GratingTable
        With ``tf_hz = 0`` on every row.

    Notes
    -----
    The order is built from blocks. A block holds every orientation x SF x phase condition once plus
    ``b = round(blank_fraction * C / (1 - blank_fraction))`` blanks (``C`` conditions), shuffled; blocks
    follow each other. Over whole blocks every condition appears equally often (and blanks
    ``b`` times per block); when the sequence ends inside a block, counts differ by at most one.

    Examples
    --------
    >>> t = make_flashed_gratings([0, 90], [0.1], [0, 180], duration_s=1.0, rate_hz=10, blank_fraction=0.2,
    ...                           rng=0)
    >>> len(t), int((t.contrast == 0).sum())
    (10, 2)
    """
    ori = _values("orientations_deg", orientations_deg, 0.0, 180.0)
    sf = _values("sfs_cpd", sfs_cpd, positive=True)
    ph = _values("phases_deg", phases_deg, 0.0, 360.0)
    _positive("duration_s", duration_s)
    _positive("rate_hz", rate_hz)
    if not (np.isfinite(blank_fraction) and 0 <= blank_fraction < 1):
        raise ValueError(f"blank_fraction must be in [0, 1), got {blank_fraction}")
    _finite("start_s", start_s)
    c = _contrast(contrast)
    origin = _origin(phase_origin_deg)
    rng = np.random.default_rng(rng)
    n_frames = int(np.floor(duration_s * rate_hz + 1e-9))
    if n_frames < 1:
        raise ValueError(f"duration_s * rate_hz gives {n_frames} frames; at least 1 is needed")

    oo, ss, pp = (a.ravel() for a in np.meshgrid(ori, sf, ph, indexing="ij"))
    n_cond = oo.size
    n_blank = int(round(blank_fraction * n_cond / (1.0 - blank_fraction)))
    block = n_cond + n_blank
    n_blocks = -(-n_frames // block)
    # index n_cond .. block-1 are blanks; each block is its own random permutation
    idx = np.argsort(rng.random((n_blocks, block)), axis=1).ravel()[:n_frames]
    blank = idx >= n_cond
    safe = np.where(blank, 0, idx)
    onset = float(start_s) + np.arange(n_frames, dtype=float) / float(rate_hz)
    offset = float(start_s) + np.arange(1, n_frames + 1, dtype=float) / float(rate_hz)
    return GratingTable(onset_s=onset, offset_s=offset,
                        orientation_deg=np.where(blank, 0.0, oo[safe]),
                        sf_cpd=np.where(blank, 0.0, ss[safe]),
                        phase_deg=np.where(blank, 0.0, pp[safe]),
                        contrast=np.where(blank, 0.0, c),
                        tf_hz=np.zeros(n_frames),
                        phase_origin_deg=origin)


def make_drifting_gratings(directions_deg, sfs_cpd, tf_hz, trial_s=2.0, gap_s=1.0, repeats=5,
                           contrast=1.0, phase_origin_deg=(0.0, 0.0), start_s=0.0, rng=None) -> GratingTable:
    """Drifting-grating trials: every direction x SF, ``repeats`` times, in random order.

    Caution: flashing and high-contrast patterns can trigger seizures in photosensitive people.
    Follow local guidance and your local animal-care approvals when presenting these stimuli.

    Parameters
    ----------
    directions_deg : sequence of float
        Drift directions in ``[0, 360)``; the grating moves toward this wave-vector angle.
    sfs_cpd : sequence of float
        Spatial frequencies (> 0), cycles per degree.
    tf_hz : float
        Temporal frequency (> 0), cycles per second.
    trial_s, gap_s : float
        Trial duration (> 0) and grey gap after each trial (>= 0).
    repeats : int
        Repeats of every condition; each repeat is a block holding every condition once, shuffled.
    contrast : float
        In ``(0, 1]``.
    phase_origin_deg : (float, float)
        ``(xc, yc)`` of the phase origin, degrees.
    start_s : float
        Onset of the first trial; trial ``i`` starts at ``start_s + i * (trial_s + gap_s)``.
    rng : numpy.random.Generator or int, optional
        Seed or generator.

    Returns
    -------
    GratingTable
        ``phase_deg = 0`` at onset on every row (a bright crest on the origin), ``tf_hz`` as given.

    Examples
    --------
    >>> t = make_drifting_gratings([0, 90, 180, 270], [0.04], tf_hz=2.0, repeats=3, rng=0)
    >>> len(t), float(t.onset_s[1]), float(t.offset_s[0])
    (12, 3.0, 2.0)
    """
    dirs = _values("directions_deg", directions_deg, 0.0, 360.0)
    sf = _values("sfs_cpd", sfs_cpd, positive=True)
    _positive("tf_hz", tf_hz)
    _positive("trial_s", trial_s)
    if not (np.isfinite(gap_s) and gap_s >= 0):
        raise ValueError(f"gap_s must be >= 0, got {gap_s}")
    if int(repeats) != repeats or repeats < 1:
        raise ValueError(f"repeats must be a positive integer, got {repeats}")
    _finite("start_s", start_s)
    c = _contrast(contrast)
    origin = _origin(phase_origin_deg)
    rng = np.random.default_rng(rng)
    dd, ss = (a.ravel() for a in np.meshgrid(dirs, sf, indexing="ij"))
    n_cond = dd.size
    idx = np.argsort(rng.random((int(repeats), n_cond)), axis=1).ravel()
    n = idx.size
    onset = float(start_s) + np.arange(n, dtype=float) * (float(trial_s) + float(gap_s))
    return GratingTable(onset_s=onset, offset_s=onset + float(trial_s),
                        orientation_deg=dd[idx], sf_cpd=ss[idx], phase_deg=np.zeros(n),
                        contrast=np.full(n, c), tf_hz=np.full(n, float(tf_hz)),
                        phase_origin_deg=origin)


def combine_tables(*tables) -> GratingTable:
    """Concatenate grating tables (e.g. a flashed sequence then drifting trials), sorted by onset.

    All tables must share one phase origin. Extra columns are kept; a row from a table without that
    column gets an empty value.

    Examples
    --------
    >>> a = make_flashed_gratings([0], [0.1], [0], duration_s=1.0, rate_hz=2, blank_fraction=0, rng=0)
    >>> b = make_drifting_gratings([0], [0.1], tf_hz=1.0, repeats=1, start_s=5.0, rng=0)
    >>> t = combine_tables(a, b)
    >>> t.onset_s.tolist(), t.tf_hz.tolist()
    ([0.0, 0.5, 5.0], [0.0, 0.0, 1.0])
    """
    if len(tables) == 1 and not isinstance(tables[0], GratingTable):
        tables = tuple(tables[0])
    if not tables:
        raise ValueError("tables: give at least one GratingTable")
    for t in tables:
        if not isinstance(t, GratingTable):
            raise ValueError(f"tables must be GratingTable objects, got {type(t).__name__}")
    origins = {tuple(float(v) for v in t.phase_origin_deg) for t in tables}
    if len(origins) != 1:
        raise ValueError(f"tables have different phase origins {sorted(origins)}; they cannot share one file")
    cols = {c: np.concatenate([np.asarray(getattr(t, c), dtype=float) for t in tables]) for c in GRATING_COLUMNS}
    order = np.argsort(cols["onset_s"], kind="stable")
    cols = {c: v[order] for c, v in cols.items()}
    keys = []
    for t in tables:
        keys += [k for k in t.extra if k not in keys]
    extra = {}
    for k in keys:
        vals = []
        for t in tables:
            vals += list(t.extra[k]) if k in t.extra else [""] * len(t)
        extra[k] = [vals[i] for i in order]
    return GratingTable(**cols, phase_origin_deg=origins.pop(), extra=extra)
