"""The gallery scripts in examples/ run on the demo data and print what they promise."""

import subprocess
import sys
from pathlib import Path

import pytest

EXAMPLES = Path(__file__).resolve().parent.parent / "examples"

CASES = {
    "load_session.py": ["24 cells", "top-left pixel centre: azimuth -9.0 deg, elevation 20.0 deg"],
    "map_receptive_fields.py": ["cells responsive", "centred at"],
    "grating_tuning.py": ["(cells, orientations, SFs)", "F1/F0"],
    "reconcile_map_and_gratings.py": ["agreement", "linear True", "linear False"],
    "export_tiff.py": ["TZCYX", "unit deg", "azimuth of column 0: -9.0 deg"],
}


@pytest.mark.parametrize("script", sorted(CASES))
def test_example_runs_on_demo_data(script, tmp_path):
    done = subprocess.run([sys.executable, str(EXAMPLES / script)], cwd=tmp_path, capture_output=True,
                          text=True, timeout=300)
    assert done.returncode == 0, done.stderr
    for text in CASES[script]:
        assert text in done.stdout, (text, done.stdout)


def test_every_example_is_covered():
    scripts = {p.name for p in EXAMPLES.glob("*.py")} - {"make_demo_data.py"}
    assert scripts == set(CASES)
