"""Small things a newcomer meets on the command line: --version, every default in the help, the
analyze summary naming the report and counting what each stimulus found."""

from __future__ import annotations

import argparse
import dataclasses

import pytest

from map2d import __version__
from map2d.cli import build_parser, main
from map2d.contract import write_session
from map2d.simulate import simulate_session

TINY = dict(n_cells=4, minutes=2.0, seed=3, flashed_minutes=1.0, n_orientations=6, n_phases=4,
            n_directions=4, tf_hz=2.0, trial_s=1.0, trial_gap_s=0.5, repeats=1,
            peak_rate_hz=(150.0, 220.0), baseline_hz=(0.5, 1.5))


def test_version(capsys):
    with pytest.raises(SystemExit) as info:
        main(["--version"])
    assert info.value.code == 0 and capsys.readouterr().out.strip() == f"map2d {__version__}"


def _parsers(parser):
    yield parser
    for action in parser._actions:
        if isinstance(action, argparse._SubParsersAction):
            for sub in action.choices.values():
                yield from _parsers(sub)


def test_every_option_shows_its_default_in_the_help():
    for parser in _parsers(build_parser()):
        text = " ".join(parser.format_help().split())
        for action in parser._actions:
            if (not action.option_strings or action.required or action.default in (False, argparse.SUPPRESS)
                    or isinstance(action, (argparse._HelpAction, argparse._VersionAction))):
                continue
            help_text = " ".join(parser._get_formatter()._expand_help(action).split()) if action.help else ""
            assert "default" in help_text, f"{parser.prog} {action.option_strings[0]}: no default in the help"
            assert help_text in text


@pytest.fixture(scope="module")
def tiny(tmp_path_factory):
    session, _ = simulate_session(responses="spikes", **TINY)
    folder = tmp_path_factory.mktemp("tiny")
    write_session(folder / "full", session)
    write_session(folder / "gratings_only", dataclasses.replace(session, sparse_noise=None))
    return folder


def test_analyze_names_the_report_and_counts_each_stimulus(tiny, tmp_path, capsys):
    assert main(["analyze", str(tiny / "full"), "--out", str(tmp_path / "a")]) == 0
    out = capsys.readouterr().out
    assert f"report: {tmp_path / 'a' / 'report.html'}" in out
    assert "responsive to sparse noise" in out and "to gratings" in out


def test_gratings_only_session_is_summarised_by_its_grating_responses(tiny, tmp_path, capsys):
    assert main(["analyze", str(tiny / "gratings_only"), "--out", str(tmp_path / "g")]) == 0
    line = next(ln for ln in capsys.readouterr().out.splitlines() if "cells," in ln)
    assert "sparse noise" not in line and "responsive to gratings" in line
    n = int(line.split("cells, ")[1].split(" responsive")[0])
    assert n >= 1                                   # the tiny session's model cells answer gratings


def test_drift_latency_option(tiny, tmp_path, capsys):
    """``--drift-latency``: a bad value is refused before any work (one line, exit 2, no results);
    a number is every cell's shift, in ``drift_latency_s``."""
    import csv
    assert main(["gratings", str(tiny / "full"), "--out", str(tmp_path / "bad"), "--drift-latency", "soon"]) == 2
    assert "--drift-latency" in capsys.readouterr().err and not (tmp_path / "bad").exists()
    assert main(["analyze", str(tiny / "full"), "--out", str(tmp_path / "a"), "--drift-latency", "0.05",
                 "--quiet"]) == 0
    with open(tmp_path / "a" / "cells.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert [float(r["drift_latency_s"]) for r in rows] == [0.05] * len(rows)
