"""The README stays true: its config reference lists every config key the schema accepts."""

from pathlib import Path

from gridflow.config import Config
from gridflow.config.schema import reference_rows

README = (Path(__file__).resolve().parents[1] / "README.md").read_text()


def test_readme_config_reference_lists_every_key():
    missing = []
    for key, _default, _doc in reference_rows(Config):
        parts = key.split(".")
        if parts[0] == "layers" and len(parts) > 2:
            key = "layers.<role>." + ".".join(parts[2:])
        if f"`{key}`" not in README:
            missing.append(key)
    assert not missing, f"README config reference lacks: {missing}"


def test_readme_opens_with_the_job_and_the_two_commands():
    head = README[:2500]
    assert "hydrant" in head and "pressure" in head
    assert "bash scripts/run_sample.sh" in README and "bash scripts/test.sh" in README
    ci = (Path(__file__).resolve().parents[1] / ".ci" / "run").read_text()
    assert "bash scripts/test.sh" in ci
