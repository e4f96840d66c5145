"""The README's table of valid field values is the one the validator uses."""

import subprocess
import sys
from pathlib import Path

ROOT = Path(__file__).resolve().parents[1]


def test_readme_field_table_is_generated():
    out = subprocess.run([sys.executable, str(ROOT / "scripts" / "config_reference.py"),
                          "--fields"], capture_output=True, text=True, check=True).stdout
    assert out.strip() in (ROOT / "README.md").read_text(encoding="utf-8")


def test_readme_config_reference_is_generated():
    out = subprocess.run([sys.executable, str(ROOT / "scripts" / "config_reference.py")],
                         capture_output=True, text=True, check=True).stdout
    assert out.strip() in (ROOT / "README.md").read_text(encoding="utf-8")
