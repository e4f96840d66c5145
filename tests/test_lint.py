"""House style: the code passes ruff with the project's rule set (pyproject.toml)."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_ruff_passes():
    out = subprocess.run([sys.executable, "-m", "ruff", "check", "gridflow", "tests", "scripts"],
                         cwd=ROOT, capture_output=True, text=True)
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-1000:]


def test_mypy_passes():
    out = subprocess.run([sys.executable, "-m", "mypy", "gridflow"], cwd=ROOT,
                         capture_output=True, text=True)
    assert out.returncode == 0, out.stdout[-3000:] + out.stderr[-1000:]
