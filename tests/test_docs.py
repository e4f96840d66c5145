"""The README stays true: its config reference lists every config key the schema accepts."""

from pathlib import Path

import pytest

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


def test_reference_defaults_read_back_in_both_unit_systems():
    """Each quantity default is shown as a US and an SI user would write it; both read back
    through the config's own parser to the default (to the 3 figures shown)."""
    import dataclasses
    import re

    def sections(cls, where=""):
        for f in dataclasses.fields(cls):
            if "parse" not in f.metadata:
                continue
            yield f"{where}.{f.name}".strip("."), f
            sub = getattr(f.metadata["parse"], "section_cls", None)
            if sub is not None:
                yield from sections(sub, f"{where}.{f.name}")

    shown = dict((k, d) for k, d, _ in reference_rows(Config))
    checked = 0
    for key, f in sections(Config):
        m = re.fullmatch(r"'([^']+)' / '([^']+)'", shown.get(key, ""))
        if not m or not isinstance(f.default, float):
            continue
        us, si = m.groups()
        assert re.search(r"(psi|gpm|ft|ft/s|in|ft/kft)$", us), (key, us)
        assert re.search(r"(kPa|L/s|m|m/s|mm|m/km)$", si), (key, si)
        for text in (us, si):
            back = f.metadata["parse"](text, key)
            assert back == pytest.approx(f.default, rel=5e-3, abs=1e-12), (key, text)
        checked += 1
    assert checked >= 15
    assert "| `criteria.min_pressure` | '35 psi' / '241 kPa' |" in README
