"""The units guard: responses that share only a sliver of time with the stimuli (times in milliseconds,
a clock offset) are refused with exit code 2 and the likely cause named, not analysed into empty maps;
a long recording around a short mapping block is not."""

from __future__ import annotations

import shutil
import warnings

import numpy as np
import pytest

from map2d.cli import main
from map2d.contract import load_session
from map2d.errors import BadInput


def _copy(src, tmp_path, name="s"):
    dst = tmp_path / name
    shutil.copytree(src, dst)
    return dst


def _load(folder):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        return load_session(folder)


def test_spike_times_in_milliseconds_are_refused_with_exit_2(sim_folder, tmp_path, capsys):
    s = _copy(sim_folder, tmp_path)
    z = dict(np.load(s / "spikes.npz"))
    np.savez(s / "spikes.npz", time_s=z["time_s"] * 1000.0, cell=z["cell"])   # ms, same origin
    assert main(["maps", str(s), "--out", str(tmp_path / "o"), "--quiet", "--no-fits"]) == 2
    err = capsys.readouterr().err
    assert "spikes.npz" in err and "time_s" in err and "milliseconds" in err
    assert "Traceback" not in err and not (tmp_path / "o").exists()


def test_trace_times_in_milliseconds_are_refused(sim_traces_folder, tmp_path):
    s = _copy(sim_traces_folder, tmp_path)
    np.save(s / "trace_times.npy", np.load(s / "trace_times.npy") * 1000.0)
    with pytest.raises(BadInput, match="trace_times.npy.*sample times in milliseconds"):
        _load(s)


def test_stimulus_times_in_milliseconds_are_named(sim_folder, tmp_path):
    s = _copy(sim_folder, tmp_path)
    np.save(s / "sparse_noise_times.npy", np.load(s / "sparse_noise_times.npy") * 1000.0)
    (s / "session.json").write_text((s / "session.json").read_text().replace('"gratings"', '"no_gratings"'))
    with pytest.raises(BadInput, match="stimulus times in milliseconds"):
        _load(s)


def test_a_clock_off_by_hours_is_refused_naming_the_offset(sim_folder, tmp_path):
    s = _copy(sim_folder, tmp_path)
    z = dict(np.load(s / "spikes.npz"))
    np.savez(s / "spikes.npz", time_s=z["time_s"] + 2 * 3600.0, cell=z["cell"])
    with pytest.raises(BadInput, match=r"different clocks, offset by about -7[0-9.]+ s \(-2 h\)"):
        _load(s)


def test_a_marginal_overlap_is_refused_naming_the_clock(sim_folder, tmp_path):
    """Shifted so that the recording covers only the last 5 % of the stimulus span."""
    s = _copy(sim_folder, tmp_path)
    session = _load(sim_folder)
    lo = session.sparse_noise.times_s[0]
    hi = max(session.gratings.offset_s.max(), session.sparse_noise.frame_ends_s()[-1])
    z = dict(np.load(s / "spikes.npz"))
    np.savez(s / "spikes.npz", time_s=z["time_s"] + 0.95 * (hi - lo), cell=z["cell"])
    with pytest.raises(BadInput, match="cover only .* % of the stimulus span.*different clocks"):
        _load(s)


def test_a_long_recording_around_a_short_mapping_block_is_accepted(sim_folder, tmp_path):
    """Three hours of recording at 5 spikes/s per cell around the ~17-minute stimulus: not a units
    problem (about 10 % of the spikes fall in the stimulus span, at plausible rates)."""
    s = _copy(sim_folder, tmp_path)
    z = dict(np.load(s / "spikes.npz"))
    rng = np.random.default_rng(0)
    cells = np.unique(z["cell"])
    n = int(5.0 * 3 * 3600 * cells.size)
    extra_t = np.concatenate([rng.uniform(-3600.0, -1.0, n // 2), rng.uniform(2000.0, 7200.0, n - n // 2)])
    t = np.concatenate([z["time_s"], extra_t])
    c = np.concatenate([z["cell"], rng.choice(cells, n)])
    np.savez(s / "spikes.npz", time_s=t, cell=c)
    session = _load(s)
    assert session.responses.time_s.size == t.size
