"""``map2d assemble`` and the frame-time match (map2d/timing.py) on simulated rig timing.

The rig: the stimulus computer's schedule (nominal) is displayed with 1 ms jitter, a few frames a
refresh late (the previous one repeated) and a few frames dropped (never shown: the previous frame
stays up); the recording clock runs 1e-4 fast and starts seconds apart; the photodiode misses two
pulses and adds three spurious ones. Model cells answer what was displayed, when it was displayed.
Assembling the nominal files with the measured onsets must give the same cells and centres as the
true timing.
"""

from __future__ import annotations

import dataclasses
import warnings

import numpy as np
import pytest

from map2d.analysis import analyze_session
from map2d.cli import main
from map2d.contract import GratingTable, Session, SparseNoise, load_session, write_stimulus
from map2d.errors import BadInput
from map2d.simulate import cells_from_truth, simulate_responses
from map2d.timing import match_frame_times

OFFSET_S, DRIFT, JITTER_S, REFRESH_S = 4.321, 1e-4, 1e-3, 1 / 60


def _quiet(f, *a, **k):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return f(*a, **k)


@pytest.fixture(scope="module")
def rig(small_spikes_session, tmp_path_factory):
    """(stimulus folder, spikes CSV, frame-times file, true-timing session, what was done)."""
    nominal, truth = small_spikes_session
    rng = np.random.default_rng(11)
    sn, g = nominal.sparse_noise, nominal.gratings
    n_sn = sn.n_frames
    # every onset on the stimulus clock as displayed: jitter, a few late by a refresh
    disp_sn = sn.times_s + rng.normal(0, JITTER_S, n_sn)
    disp_g = g.onset_s + rng.normal(0, JITTER_S, len(g))
    late_sn = rng.choice(np.arange(100, n_sn - 100), 4, replace=False)
    disp_sn[late_sn] += REFRESH_S
    flashed = np.flatnonzero(g.tf_hz == 0)
    late_g = rng.choice(flashed[10:-10], 1)
    disp_g[late_g] += REFRESH_S
    # dropped (never shown): 3 sparse-noise frames and 1 flashed grating
    drop_sn = rng.choice(np.setdiff1d(np.arange(100, n_sn - 100), np.r_[late_sn, late_sn + 1]), 3, replace=False)
    drop_g = rng.choice(np.setdiff1d(flashed[10:-10], np.r_[late_g, late_g + 1]), 1)
    keep_sn = np.ones(n_sn, bool)
    keep_sn[drop_sn] = False
    keep_g = np.ones(len(g), bool)
    keep_g[drop_g] = False

    def rec(t):                                  # stimulus clock -> recording clock
        return OFFSET_S + (1 + DRIFT) * t

    shown_sn = SparseNoise(frames=np.asarray(sn.frames)[keep_sn], times_s=rec(disp_sn[keep_sn]), grid=sn.grid)
    off = rec(disp_g + (g.offset_s - g.onset_s))
    nxt = np.r_[rec(disp_g[1:]), np.inf]
    back = np.r_[np.abs(g.onset_s[1:] - g.offset_s[:-1]) < 1e-9, False]
    off = np.where(back, nxt, off)                           # a flashed grating lasts until the next
    prev = drop_g - 1                                        # the grating before a dropped one stays up
    off[prev] = off[drop_g]
    cols = {c: np.asarray(getattr(g, c), float)[keep_g] for c in ("orientation_deg", "sf_cpd", "phase_deg",
                                                                   "contrast", "tf_hz")}
    shown_g = GratingTable.from_columns(phase_origin_deg=g.phase_origin_deg, onset_s=rec(disp_g)[keep_g],
                                        offset_s=off[keep_g], **cols)
    spikes = simulate_responses(cells_from_truth(truth), shown_sn, shown_g, rng=5)
    true_session = Session(responses=spikes, sparse_noise=shown_sn, gratings=shown_g, name="true timing")

    pulses = np.sort(np.r_[shown_sn.times_s, shown_g.onset_s])
    missing = rng.choice(np.arange(50, pulses.size - 50), 2, replace=False)
    missing_sn = int(np.isin(pulses[missing], shown_sn.times_s).sum())
    pulses = np.delete(pulses, missing)
    spurious = rng.uniform(pulses[0], pulses[-1], 3)
    pulses = np.sort(np.r_[pulses, spurious])

    folder = tmp_path_factory.mktemp("rig") / "stim"
    write_stimulus(folder, sparse_noise=sn, gratings=g)
    csv_path = folder.parent / "spikes.csv"
    with open(csv_path, "w") as fh:
        fh.write("time_s,cell\n")
        for t, c in zip(spikes.time_s, spikes.cell):
            fh.write(f"{float(t)!r},{int(c)}\n")
    ft = folder.parent / "photodiode.npy"
    np.save(ft, pulses)
    done = dict(late=late_sn.size + late_g.size, untimed=drop_sn.size + drop_g.size + missing.size,
                extra=spurious.size, untimed_sn=drop_sn.size + missing_sn, shown_g=len(shown_g),
                missing_g=missing.size - missing_sn)
    return folder, csv_path, ft, true_session, done


@pytest.fixture(scope="module")
def assembled(rig):
    folder, csv_path, ft, _, _ = rig
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        code = main(["assemble", str(folder), "--spikes", str(csv_path), "--frame-times", str(ft), "--quiet"])
    assert code == 0
    assert not any(".map2d-assemble-tmp" in str(w.message) for w in caught)   # notes name the files in place
    return _quiet(load_session, folder)


def test_timing_report_recovers_the_rig(assembled, rig):
    t = assembled.timing
    done = rig[4]
    assert t["offset_s"] == pytest.approx(OFFSET_S, abs=1e-3)       # simulated values (this file)
    assert t["drift"] == pytest.approx(DRIFT, abs=2e-6)
    assert 0.8 < t["jitter_ms"] < 1.2
    assert t["late"] == done["late"] and t["extra_pulses"] == done["extra"]
    assert t["untimed"] == done["untimed"] and t["slips"] == 0
    # untimed frames are left out of the maps; untimed presentations out of the table
    assert int(np.count_nonzero(~assembled.sparse_noise.valid)) == done["untimed_sn"]
    assert len(assembled.gratings) == done["shown_g"] - done["missing_g"]


def test_assembled_session_gives_the_same_cells_and_centres_as_true_timing(assembled, rig):
    true_session = rig[3]
    a = _quiet(analyze_session, assembled, rng=0, n_jobs=1)
    b = _quiet(analyze_session, true_session, rng=0, n_jobs=1)
    ra, rb = np.asarray(a.cells["responsive"], bool), np.asarray(b.cells["responsive"], bool)
    assert ra.sum() >= 8 and np.array_equal(ra, rb)
    dx = np.asarray(a.cells["center_x_deg"], float)[ra] - np.asarray(b.cells["center_x_deg"], float)[rb]
    dy = np.asarray(a.cells["center_y_deg"], float)[ra] - np.asarray(b.cells["center_y_deg"], float)[rb]
    assert np.max(np.hypot(dx, dy)) < 0.1                      # deg; grid pixels are 2 deg
    ga = np.asarray(a.cells["grating_responsive"], bool)
    assert np.array_equal(ga, np.asarray(b.cells["grating_responsive"], bool))


def test_report_shows_the_timing(assembled):
    from map2d.report.html import _session_facts

    an = _quiet(analyze_session, dataclasses.replace(assembled, gratings=None), rng=0, n_jobs=1)
    rows, _ = _session_facts(an, assembled)
    text = dict(rows)["frame timing (measured)"]
    assert "clock offset 4.32" in text and "untimed" in text


def test_unmatchable_frame_times_are_refused_and_change_nothing(rig, tmp_path, capsys):
    folder, csv_path, _, _, _ = rig
    before = sorted(p.name for p in folder.iterdir())
    other = tmp_path / "other.txt"
    rng = np.random.default_rng(0)
    other.write_text("\n".join(repr(float(v)) for v in np.sort(rng.uniform(0, 900, 14000))))
    code = main(["assemble", str(folder), "--spikes", str(csv_path), "--frame-times", str(other), "--overwrite"])
    assert code == 2
    assert "cannot be matched to the stimulus" in capsys.readouterr().err
    assert sorted(p.name for p in folder.iterdir()) == before


def test_frame_times_in_milliseconds_are_refused():
    nominal = np.arange(500) * 0.05
    with pytest.raises(BadInput, match="milliseconds"):
        match_frame_times(nominal, 1000.0 * (3.0 + nominal))


def test_a_second_assembly_needs_overwrite(rig, assembled, capsys):
    folder, csv_path, ft, _, _ = rig
    code = main(["assemble", str(folder), "--spikes", str(csv_path), "--frame-times", str(ft), "--quiet"])
    assert code == 2 and "--overwrite" in capsys.readouterr().err


def test_a_player_that_falls_behind_is_followed():
    """Count-locked players slip a refresh for good; the match follows and counts the slips."""
    rng = np.random.default_rng(3)
    nominal = 1.0 + np.arange(6000) / 30.0
    shown = nominal + rng.normal(0, 5e-4, nominal.size)
    shown[2000:] += REFRESH_S
    shown[4500:] += REFRESH_S
    t = match_frame_times(nominal, 2.5 + (1 - 3e-5) * shown)
    assert t.n_untimed == 0 and t.n_extra == 0 and t.n_slips == 2
    assert t.offset_s == pytest.approx(2.5, abs=1e-3) and t.drift == pytest.approx(-3e-5, abs=2e-6)


def test_traces_and_rois_without_frame_times(tmp_path, capsys):
    """--traces/--trace-times/--rois: the nominal times are kept (one clock), the folder loads as a
    traces session with its ROI image; the command says the nominal times were used."""
    from map2d.simulate import roi_label_image, simulate_session

    session, _ = simulate_session(n_cells=3, minutes=1.0, responses="traces", seed=2, flashed_minutes=0.5,
                                  repeats=0)
    write_stimulus(tmp_path / "stim", sparse_noise=session.sparse_noise, gratings=session.gratings)
    np.save(tmp_path / "traces.npy", session.responses.values)
    (tmp_path / "times.txt").write_text("t_s\n" + "\n".join(repr(float(t)) for t in session.responses.times_s))
    import tifffile
    tifffile.imwrite(tmp_path / "rois.tif", roi_label_image(session.cell_ids, shape=(40, 40), radius_px=4.0, rng=0))
    assert main(["assemble", str(tmp_path / "stim"), "--traces", str(tmp_path / "traces.npy"),
                 "--trace-times", str(tmp_path / "times.txt"), "--rois", str(tmp_path / "rois.tif")]) == 0
    assert "nominal stimulus times are used" in capsys.readouterr().out
    s = _quiet(load_session, tmp_path / "stim")
    assert s.responses.values.shape == session.responses.values.shape and s.rois is not None
    np.testing.assert_array_equal(s.sparse_noise.times_s, session.sparse_noise.times_s)
    assert s.timing is None and len(s.gratings) == len(session.gratings)
