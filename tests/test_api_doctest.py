"""The Python interface's examples run as written, on the Millbrook sample: the docstrings of
its modules and the README's session."""

from __future__ import annotations

import doctest
import re
from pathlib import Path

import pytest

import gridflow._model
import gridflow.config.draft

ROOT = Path(__file__).resolve().parents[1]
FLAGS = doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE


@pytest.mark.parametrize(("module", "at_least"), [(gridflow._model, 25),
                                                  (gridflow.config.draft, 4)],
                         ids=["model", "draft"])
def test_docstring_examples(module, at_least, monkeypatch):
    monkeypatch.chdir(ROOT)  # the examples name sample_gis/... relative to the repository
    res = doctest.testmod(module, optionflags=FLAGS, raise_on_error=False, verbose=False)
    assert res.attempted >= at_least
    assert res.failed == 0


def test_readme_session(monkeypatch, tmp_path):
    text = (ROOT / "README.md").read_text()
    blocks = re.findall(r"```pycon\n(.*?)```", text, re.S)
    assert blocks, "the README shows a Python session"
    monkeypatch.chdir(ROOT)
    parser = doctest.DocTestParser()
    runner = doctest.DocTestRunner(optionflags=FLAGS)
    for i, block in enumerate(blocks):
        test = parser.get_doctest(block, {}, f"README.md session {i + 1}", "README.md", 0)
        runner.run(test)
    res = runner.summarize(verbose=False)
    assert res.attempted >= 10
    assert res.failed == 0
