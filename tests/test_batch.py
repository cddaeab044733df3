"""``map2d batch``: many sessions in process (sync), on the embedded local Dask cluster and on a scheduler
started here on 127.0.0.1; the same files either way; a failing session is named and the others finish."""

from __future__ import annotations

import csv
import hashlib
import json
import warnings
from pathlib import Path

import pytest

import map2d.cli
from map2d import batch
from map2d.contract import read_table, write_session
from map2d.errors import BadInput
from map2d.simulate import simulate_session

#: Three tiny sessions (different seeds): 3 cells, 1.5 min of sparse noise, short gratings.
TINY = dict(n_cells=3, minutes=1.5, cell_types=["on_dog", "simple", "complex"], flashed_minutes=0.5,
            n_orientations=6, n_phases=4, n_directions=4, repeats=1, peak_rate_hz=(150.0, 220.0),
            baseline_hz=(0.5, 1.5))
NAMES = ["a_day1", "b_day2", "c_day3"]


@pytest.fixture(scope="module")
def sessions(tmp_path_factory):
    """A folder holding the three sessions and ``d_broken`` (its spikes.npz is not an archive)."""
    root = tmp_path_factory.mktemp("batch_sessions")
    for k, name in enumerate(NAMES):
        write_session(root / name, simulate_session(seed=20 + k, **TINY)[0])
    write_session(root / "d_broken", simulate_session(seed=30, **TINY)[0])
    (root / "d_broken" / "spikes.npz").write_bytes(b"this is not a zip archive")
    return root


def _digest(folder: Path) -> dict:
    """Every result file that must not depend on where it ran: bytes of the tables, arrays and both
    TIFF stacks (the OME-TIFF's UUID derives from its content); batch.csv (timings) left out."""
    out = {}
    for p in sorted(folder.rglob("*")):
        key = str(p.relative_to(folder))
        if p.is_file() and p.suffix in (".csv", ".npz", ".tif") and p.name != "batch.csv":
            out[key] = hashlib.sha256(p.read_bytes()).hexdigest()
    return out


@pytest.fixture(scope="module")
def sync_run(sessions, tmp_path_factory):
    out = tmp_path_factory.mktemp("sync") / "out"
    rc = batch.run_batch([sessions], out, scheduler="sync", report=False, quiet=True)
    return rc, out


def test_sync_batch_reports_the_broken_session_and_finishes_the_others(sync_run, capsys):
    rc, out = sync_run
    assert rc == 2                                   # the only failure is bad input
    header, rows = read_table(out / "batch.csv")
    status = {r[0]: dict(zip(header, r)) for r in rows}
    assert [status[n]["status"] for n in NAMES] == ["ok"] * 3
    assert status["d_broken"]["status"] == "bad input"
    assert "spikes.npz" in status["d_broken"]["message"] and "not a readable .npz" in status["d_broken"]["message"]
    for name in NAMES:
        assert (out / name / "cells.csv").is_file() and (out / name / "maps.tif").is_file()
    assert not (out / "d_broken").exists()           # nothing partial for the failed session
    # the combined table: the session column first, then every row of each session's cells.csv in order
    h, body = read_table(out / "sessions.csv")
    assert h[0] == "session" and h[1] == "cell"
    expected = []
    for name in NAMES:
        hh, bb = read_table(out / name / "cells.csv")
        assert hh == h[1:]
        expected += [[name] + r for r in bb]
    assert body == expected and len(body) == 3 * TINY["n_cells"]
    png = (out / "population.png").read_bytes()
    assert png[:8] == b"\x89PNG\r\n\x1a\n"


def test_local_cluster_gives_identical_results(sessions, sync_run, tmp_path, capfd):
    pytest.importorskip("distributed")
    _, sync_out = sync_run
    out = tmp_path / "local"
    capfd.readouterr()
    rc = batch.run_batch([sessions / n for n in NAMES] + [sessions / "d_broken"], out, report=False,
                         quiet=True)                  # default: the embedded local cluster
    assert rc == 2
    err = capfd.readouterr().err                     # quiet: no log lines of the cluster, even at shutdown
    assert "distributed." not in err and "Traceback" not in err, err
    a, b = _digest(sync_out), _digest(out)
    assert len(a) >= 3 * 4 and a == b                # cells.csv, maps.tif, maps.ome.tif, results.npz each
    assert (out / "batch.csv").read_text().count("bad input") == 1


def test_scheduler_on_loopback_runs_a_batch(sessions, sync_run, tmp_path, capsys):
    """One folder session and one NWB file (converted from the third session, read with --config in
    the worker) on a scheduler with one worker process, both started here on 127.0.0.1."""
    distributed = pytest.importorskip("distributed")
    pytest.importorskip("pynwb")
    from map2d.contract import load_session
    from map2d.nwb import session_to_nwb
    _, sync_out = sync_run
    nwb = tmp_path / "nwb" / f"{NAMES[2]}.nwb"
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        session_to_nwb(load_session(sessions / NAMES[2]), nwb, mapping_path=tmp_path / "mapping.json")
    with distributed.LocalCluster(host="127.0.0.1", n_workers=1, threads_per_worker=1, processes=True,
                                  dashboard_address=None, memory_limit="4GB") as cluster:
        address = cluster.scheduler_address
        assert address.startswith("tcp://127.0.0.1:")
        out = tmp_path / "remote"
        rc = map2d.cli.main(["batch", str(sessions / NAMES[0]), str(nwb), "--config", str(tmp_path / "mapping.json"),
                             "--out", str(out), "--scheduler", address, "--no-report"])
        assert rc == 0, capsys.readouterr().err
        with distributed.Client(address) as client:    # the work ran on that scheduler's worker
            assert len(client.scheduler_info()["workers"]) == 1
    assert "2 of 2 sessions analyzed" in capsys.readouterr().out
    for name in (NAMES[0], NAMES[2]):
        assert (out / name / "cells.csv").read_bytes() == (sync_out / name / "cells.csv").read_bytes()


def test_cli_batch_writes_the_full_results_folder(sessions, tmp_path, capsys):
    out = tmp_path / "one"
    assert map2d.cli.main(["batch", str(sessions / NAMES[1]), "--out", str(out), "--scheduler", "sync"]) == 0
    assert (out / NAMES[1] / "report.html").is_file() and (out / NAMES[1] / ".map2d-results").is_file()
    assert "1 of 1 sessions analyzed" in capsys.readouterr().out
    # a second run into the same folder replaces the session's results (the batch mark allows it)
    assert map2d.cli.main(["batch", str(sessions / NAMES[1]), "--out", str(out), "--scheduler", "sync",
                           "--no-report", "--quiet"]) == 0
    assert not (out / NAMES[1] / "report.html").exists()


def test_internal_error_in_one_session_gives_exit_code_1(sessions, tmp_path, monkeypatch, capsys):
    import map2d.analysis

    def broken(session, **kwargs):
        raise RuntimeError(f"simulated failure in {session.name}")
    monkeypatch.setattr(map2d.analysis, "analyze_session", broken)
    out = tmp_path / "err"
    rc = map2d.cli.main(["batch", str(sessions / NAMES[0]), str(sessions / "d_broken"), "--out", str(out),
                         "--scheduler", "sync", "--quiet"])
    err = capsys.readouterr().err
    assert rc == 1
    assert f"session {NAMES[0]} failed (error)" in err and "RuntimeError: simulated failure" in err
    assert "session d_broken failed (bad input)" in err
    assert not (out / "sessions.csv").exists()       # nothing analyzed: no combined table


def test_bad_arguments_are_refused_before_anything_runs(sessions, tmp_path, capsys):
    with pytest.raises(BadInput, match="session not found"):
        batch.run_batch([tmp_path / "nope"], tmp_path / "o", scheduler="sync")
    (tmp_path / "x" / NAMES[0]).mkdir(parents=True)
    (tmp_path / "x" / NAMES[0] / "session.json").write_text(json.dumps({"responses": {}}))
    with pytest.raises(BadInput, match="same name"):
        batch.run_batch([sessions / NAMES[0], tmp_path / "x" / NAMES[0]], tmp_path / "o", scheduler="sync")
    with pytest.raises(BadInput, match="--scheduler"):
        batch.run_batch([sessions / NAMES[0]], tmp_path / "o", scheduler="localhost:8786")
    (tmp_path / "rec.nwb").write_bytes(b"")
    with pytest.raises(BadInput, match="--config"):
        batch.run_batch([tmp_path / "rec.nwb"], tmp_path / "o", scheduler="sync")
    other = tmp_path / "mine"
    other.mkdir()
    (other / "notes.txt").write_text("keep me")
    rc = map2d.cli.main(["batch", str(sessions / NAMES[0]), "--out", str(other), "--scheduler", "sync"])
    assert rc == 2 and "not written by map2d batch" in capsys.readouterr().err
    assert (other / "notes.txt").read_text() == "keep me" and len(list(other.iterdir())) == 1
    assert not (tmp_path / "o").exists()


def test_find_sessions_expands_a_folder_of_sessions(sessions):
    found = batch.find_sessions([sessions])
    assert [p.name for p in found] == NAMES + ["d_broken"]
    assert batch.find_sessions([sessions / NAMES[1]]) == [sessions / NAMES[1]]


def test_trace_decay_option_reaches_every_session(tmp_path, capsys):
    """``--trace-decay`` as for ``map2d analyze``: a given time constant is used for an imaging session
    (the table says which), a bad value is refused before anything runs."""
    src = tmp_path / "img"
    write_session(src / "t1", simulate_session(seed=5, responses="traces", **TINY)[0])
    with pytest.raises(BadInput, match="--trace-decay"):
        batch.run_batch([src], tmp_path / "bad", scheduler="sync", trace_decay="soon", quiet=True)
    assert not (tmp_path / "bad").exists()
    out = tmp_path / "out"
    assert map2d.cli.main(["batch", str(src), "--out", str(out), "--scheduler", "sync", "--no-report",
                           "--trace-decay", "0.37", "--quiet"]) == 0
    with open(out / "t1" / "cells.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert rows and all(float(r["trace_decay_tau_s"]) == pytest.approx(0.37) for r in rows)
