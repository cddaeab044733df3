"""The column dictionary (map2d/columns.py) covers every column map2d writes, and docs/columns.md is
generated from it (run ``python -m map2d.columns`` after changing the table)."""

from __future__ import annotations

import re
from pathlib import Path

import pytest

from map2d import columns
from map2d.analysis import analyze_session
from map2d.contract import read_table, write_session
from map2d.simulate import simulate_session

ROOT = Path(__file__).resolve().parents[1]
#: A tiny session with every stimulus family (sparse noise, flashed and drifting gratings).
TINY = dict(n_cells=4, minutes=2.0, seed=3, flashed_minutes=1.0, n_orientations=6, n_phases=4,
            n_directions=4, tf_hz=2.0, trial_s=1.0, trial_gap_s=0.5, repeats=1,
            peak_rate_hz=(150.0, 220.0), baseline_hz=(0.5, 1.5))


@pytest.fixture(scope="module")
def written_columns(tmp_path_factory):
    """Column names of every table map2d writes for cells, per writer, on spikes and traces."""
    from map2d.pipeline import run_gratings, run_maps

    tmp = tmp_path_factory.mktemp("columns")
    found = {}
    for kind in ("spikes", "traces"):
        session, _ = simulate_session(responses=kind, **TINY)
        found[f"analyze {kind}"] = list(analyze_session(session, n_shuffles=100, n_jobs=1).cells)
        write_session(tmp / kind, session)
        run_maps(tmp / kind, tmp / f"maps_{kind}", fits=False, quiet=True)
        found[f"maps --no-fits {kind}"] = read_table(tmp / f"maps_{kind}" / "cells.csv")[0]
    # dense noise (the sparse frames as real values): the columns naming the dense estimate
    import dataclasses

    import numpy as np
    sn = session.sparse_noise
    dense = dataclasses.replace(session, gratings=None,
                                sparse_noise=dataclasses.replace(sn, frames=sn.frames.astype(np.float32)))
    write_session(tmp / "dense", dense)
    run_maps(tmp / "dense", tmp / "maps_dense", fits=False, quiet=True)
    found["maps --no-fits dense"] = read_table(tmp / "maps_dense" / "cells.csv")[0]
    run_gratings(tmp / "spikes", tmp / "gratings", quiet=True)
    found["gratings"] = read_table(tmp / "gratings" / "cells.csv")[0]
    return found


def test_every_written_column_is_in_the_dictionary(written_columns):
    for writer, names in written_columns.items():
        missing = [n for n in names if columns.describe(n) is None]
        assert not missing, f"{writer} writes columns missing from map2d/columns.py: {missing}"


def test_every_dictionary_column_is_written_somewhere(written_columns):
    """No stale entries: each described column comes out of some writer (``session`` from batch)."""
    seen = {n for names in written_columns.values() for n in names} | {"session"}
    stale = [c.name for _, group in columns.COLUMNS for c in group if c.name not in seen]
    assert not stale, f"map2d/columns.py describes columns nothing writes: {stale}"


def test_contract_columns_come_first_in_order(written_columns):
    from map2d.analysis import CONTRACT_COLUMNS

    first = [c.name for c in columns.COLUMNS[0][1]]
    assert tuple(first) == CONTRACT_COLUMNS
    assert tuple(written_columns["analyze spikes"][:len(CONTRACT_COLUMNS)]) == CONTRACT_COLUMNS


def test_docs_page_is_generated_from_the_table():
    page = ROOT / "docs" / "columns.md"
    assert page.read_text(encoding="utf-8") == columns.markdown(), \
        "docs/columns.md is stale: run `python -m map2d.columns`"


def test_names_follow_the_rules():
    """Unit suffix on every quantity; interval ends `_ci_low_<unit>` / `_ci_high_<unit>`; half-widths
    `_ci_halfwidth_<unit>`; p-values end in `_value`; no name appears twice."""
    names = [c.name for _, group in columns.COLUMNS for c in group]
    assert len(names) == len(set(names))
    for _, group in columns.COLUMNS:
        for c in group:
            assert c.unit in columns.UNITS, c
            assert c.meaning and c.source, c
            if c.unit in ("deg", "s", "cpd", "oct", "hz", "deg_s"):
                assert c.name.endswith("_" + c.unit), f"{c.name} lacks its unit suffix _{c.unit}"
            else:
                assert not re.search(r"_(deg|s|cpd|oct|hz)$", c.name), f"{c.name}: suffix but unit {c.unit}"
            assert "ci95" not in c.name
            if "_ci_" in c.name and c.unit == "1":      # an interval of a number without unit
                assert re.search(r"_ci_(low|high|halfwidth)$", c.name), c.name
            elif "_ci_" in c.name:
                assert re.search(r"_ci_(low|high|halfwidth)_(deg|s|cpd|oct|hz)$", c.name), c.name
            if c.name.endswith("_p") or "p_value" in c.name:
                assert c.name.endswith("p_value"), c.name


def test_meaning_gives_hover_text():
    assert columns.meaning("center_x_deg").endswith("[deg]")
    assert "F1/F0" in columns.meaning("f1_f0")
    assert columns.meaning("no_such_column") == ""


def test_readme_lists_the_renames():
    readme = (ROOT / "README.md").read_text(encoding="utf-8")
    for old in columns.RENAMED:
        assert f"`{old}`" in readme, f"README does not list the renamed column {old}"
    for old in columns.RENAMED:
        assert columns.describe(old) is None, f"{old} was renamed but is still in the table"


def test_report_table_shows_each_columns_meaning_on_hover():
    from types import SimpleNamespace

    from map2d.report.html import _all_cells_table

    an = SimpleNamespace(cell_ids=[0, 1], cells={"cell": [0, 1], "peak_lag_s": [0.05, None]})
    page = _all_cells_table(an)
    assert '<th title="Cell id:' in page
    assert 'title="Lag between stimulus and response at which the map&#x27;s largest |z| lies. [s]">peak_lag_s' in page
