"""docs/session-format.md cannot drift from the loader: its example is run and analysed here, and every
manifest key and gratings.csv column the loader knows is documented on the page."""

from __future__ import annotations

import re
from pathlib import Path

import numpy as np
import pytest

from map2d.analysis import analyze_session
from map2d.contract import GRATING_COLUMNS, KNOWN_SUB_KEYS, KNOWN_TOP_KEYS, load_session

PAGE = Path(__file__).resolve().parents[1] / "docs" / "session-format.md"


def _example_code() -> str:
    text = PAGE.read_text(encoding="utf-8")
    m = re.search(r"```python\n(# example: build a session folder.*?)```", text, re.S)
    assert m, "the example block is missing from docs/session-format.md"
    return m.group(1)


@pytest.fixture(scope="module")
def example_session(tmp_path_factory):
    folder = tmp_path_factory.mktemp("example")
    code = _example_code()
    assert "import map2d" not in code and "from map2d" not in code       # plain numpy, json, csv
    cwd = Path.cwd()
    try:
        import os
        os.chdir(folder)
        exec(compile(code, str(PAGE), "exec"), {"__name__": "example"})
    finally:
        os.chdir(cwd)
    with pytest.warns(UserWarning):     # a few spikes after the last frame (the page says so)
        return load_session(folder / "my_session")


def test_example_builds_a_session_that_analyses_as_the_page_says(example_session):
    an = analyze_session(example_session, rng=0, n_jobs=1)
    cells = an.cells
    assert cells["cell"] == [0]
    assert cells["responsive"] == [True]
    # the page: centre near (7, 8) deg, the centre of the pixel in row 4, column 6 (grid formula)
    assert np.hypot(cells["center_x_deg"][0] - 7.0, cells["center_y_deg"][0] - 8.0) < 0.5
    assert cells["peak_lag_s"][0] == pytest.approx(0.05)
    # a linear cell: the map predicts the gratings
    assert cells["agreement"][0] > 0.8 and cells["linear"] == [True]


def test_page_documents_every_manifest_key_and_grating_column():
    text = PAGE.read_text(encoding="utf-8")
    for key in KNOWN_TOP_KEYS:
        assert f"`{key}`" in text, f"manifest key {key} is not documented"
    for section, keys in KNOWN_SUB_KEYS.items():
        for key in keys:
            assert f"`{key}`" in text or f".{key}`" in text, f"{section}.{key} is not documented"
    for col in GRATING_COLUMNS:
        assert f"`{col}`" in text, f"gratings.csv column {col} is not documented"
