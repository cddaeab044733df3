"""Shared, session-scoped simulated sessions (built once per test run, each in well under a second).

Fixtures
--------
``simulated``
    A cached factory: ``simulated(**kwargs) -> (Session, truth)`` calls
    :func:`map2d.simulate.simulate_session` with :data:`SMALL` updated by ``kwargs`` and caches the
    result per argument set for the whole run. Use it to ask for a longer or different session, e.g.
    ``simulated(minutes=15)`` for an accuracy check, ``simulated(cell_types=["simple"] * 4, n_cells=4)``.
    Never modify the returned objects (they are shared); copy arrays first.
``small_spikes_session``
    ``simulated()``: 12 cells (1 ON DoG, 1 OFF DoG, 5 simple, 3 complex, 2 unresponsive, in shuffled
    order, ids 0..11), 10 min of sparse noise at 20 Hz on the 16 x 20 grid at 2 deg centred at (10, 5) deg,
    then 3 min of flashed gratings (12 orientations x 4 SFs 0.02-0.16 cpd x 4 phases, 10 Hz, 10% blanks),
    then drifting trials (8 directions x 0.04, 0.08 cpd, 2 Hz, 2 s on / 1 s off, 3 repeats), spikes.
``small_traces_session``
    The same 12 model cells (same seed), answering 15 min of sparse noise and the same grating design,
    as calcium-like traces sampled at 30 Hz (decay tau 0.3 s, 0.1 per spike, noise sd 0.03).
``sim_folder`` / ``sim_traces_folder``
    The two sessions written with :func:`map2d.contract.write_session` to a temporary folder, with the
    truth as ``<folder>.truth.json`` beside it (the layout ``map2d simulate`` writes). Returns the folder.

``truth`` is the dict of :func:`map2d.simulate.simulate_session`: ``truth["cells"][i]`` (in cell-id
order) holds ``cell_id``, ``kind``, ``center_x_deg``, ``center_y_deg``, ``latency_s``,
``pref_orientation_deg`` (mod 180, wave-vector convention; None for DoG and unresponsive),
``pref_sf_cpd``, ``linear`` and the model parameters; :func:`map2d.simulate.cells_from_truth` rebuilds
the model cells, whose ``spectra(kx, ky, origin)`` gives the true complex grating response ``H``.

Signal-to-noise choices
-----------------------
Gains are high (``peak_rate_hz`` 150-220 spikes/s above baseline at the optimal grating; a single
spot drives a Gabor cell by only ~1/10 of that) and baselines low (0.5-1.5 spikes/s), so that minutes
suffice. In ``small_spikes_session`` the largest per-pixel z-score of the spike-triggered average (ON or
OFF, at the true latency) is 30-40 for the DoG cells, 8-18 for simple cells and 7-11 for complex cells;
for unresponsive cells it is ~3.5 from chance alone (the maximum over 320 pixels x 2 polarities x 5
lags), and ``tests/test_simulate.py`` checks the margin. Interval-mean trace maps are several times
weaker per minute (the calcium decay spreads every response, wanted or not, over many frames) and peak
one frame after the latency (see :mod:`map2d.simulate`), hence 15 min for ``small_traces_session``:
z ~ 12-25 for DoG, 6-11 for simple and 5-7 for complex cells, against ~4.5 for unresponsive ones (the
trace noise is autocorrelated). Latencies are 1-3 sparse-noise frames (50-150 ms).
"""

from __future__ import annotations

import json
from pathlib import Path

import pytest

from map2d.contract import write_session
from map2d.simulate import simulate_session

#: Arguments of the small sessions (see the module docstring).
SMALL = dict(n_cells=12, minutes=10.0, responses="spikes", seed=7,
             flashed_minutes=3.0, n_orientations=12, n_phases=4,
             n_directions=8, tf_hz=2.0, trial_s=2.0, trial_gap_s=1.0, repeats=3,
             peak_rate_hz=(150.0, 220.0), baseline_hz=(0.5, 1.5))
#: The traces session differs only in these.
TRACES = dict(responses="traces", minutes=15.0, calcium_tau_s=0.3)


@pytest.fixture(scope="session")
def simulated():
    """Cached factory ``simulated(**kwargs) -> (Session, truth)`` over :data:`SMALL` (do not mutate)."""
    cache = {}

    def make(**kwargs):
        args = {**SMALL, **kwargs}
        key = json.dumps({k: (list(v) if isinstance(v, tuple) else v) for k, v in sorted(args.items())},
                         sort_keys=True, default=str)
        if key not in cache:
            cache[key] = simulate_session(**args)
        return cache[key]

    return make


@pytest.fixture(scope="session")
def small_spikes_session(simulated):
    """(Session, truth): 12 cells, 10 min sparse noise + flashed + drifting gratings, spikes."""
    return simulated()


@pytest.fixture(scope="session")
def small_traces_session(simulated):
    """(Session, truth): the same 12 cells as traces, 15 min sparse noise + the same grating design."""
    return simulated(**TRACES)


def _write(tmp_path_factory, name, session, truth) -> Path:
    folder = tmp_path_factory.mktemp("sim") / name
    write_session(folder, session)
    Path(str(folder) + ".truth.json").write_text(json.dumps(truth, indent=2, allow_nan=False) + "\n",
                                                  encoding="utf-8")
    return folder


@pytest.fixture(scope="session")
def sim_folder(tmp_path_factory, small_spikes_session) -> Path:
    """Folder holding ``small_spikes_session``; its truth is ``Path(str(folder) + ".truth.json")``."""
    return _write(tmp_path_factory, "session_spikes", *small_spikes_session)


@pytest.fixture(scope="session")
def sim_traces_folder(tmp_path_factory, small_traces_session) -> Path:
    """Folder holding ``small_traces_session``; its truth is ``Path(str(folder) + ".truth.json")``."""
    return _write(tmp_path_factory, "session_traces", *small_traces_session)


@pytest.fixture(scope="session")
def browser():
    """Headless Chromium driven by selenium (:mod:`tests.browser`); skips, saying why, only when the
    browser cannot be installed."""
    from browser import start_browser

    b, reason = start_browser()
    if b is None:
        pytest.skip(f"no browser: {reason}")
    yield b
    b.quit()


@pytest.fixture(scope="session")
def heldout_matrix(tmp_path_factory):
    """The spatial validation matrix: every regime of ``tests/heldout_rf.py`` (a generator written from
    the session format alone; some regimes with flashed gratings), seed 0, analysed with
    :func:`map2d.analysis.analyze_session`.

    Returns ``{regime: {"rows": heldout_rf.score(...), "spacing": (dx, dy), "alpha": alpha, "maps": MapResult,
    "fields": the fit columns of locate_fields, ...}}``.
    """
    import sys
    import warnings

    import numpy as np

    from map2d.analysis import analyze_session
    from map2d.contract import load_session

    sys.path.insert(0, str(Path(__file__).parent))
    import heldout_rf

    out = {}
    root = tmp_path_factory.mktemp("heldout_rf")
    for name, regime in heldout_rf.REGIMES.items():
        folder = root / name.replace(" ", "_")
        truth = heldout_rf.make_session(folder, regime, seed=0)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")      # spikes after the last frame are reported, not an error
            session = load_session(folder)
        an = analyze_session(session, rng=0)
        m = an.maps
        peak_z = np.nanmax(np.abs(np.stack([m.on_z, m.off_z, m.linear_z])), axis=(0, 2, 3, 4))
        out[name] = {"rows": heldout_rf.score(an.cells, truth, (m.grid.dx_deg, m.grid.dy_deg), peak_z),
                     "spacing": (m.grid.dx_deg, m.grid.dy_deg), "alpha": m.alpha,
                     "latency_s": truth["latency_s"], "frame_s": truth["frame_s"],
                     "spikes": regime.get("responses", "spikes") == "spikes", "gratings": truth["gratings"],
                     "maps": m, "fields": an.fields.columns}
    return out
