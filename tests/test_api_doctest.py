"""The Python interface's examples run as written, on the Millbrook sample."""

from __future__ import annotations

import doctest
from pathlib import Path

import pytest

import gridflow
import gridflow._model

ROOT = Path(__file__).resolve().parents[1]


@pytest.mark.parametrize("module", [gridflow._model], ids=lambda m: m.__name__)
def test_docstring_examples(module, monkeypatch):
    monkeypatch.chdir(ROOT)  # the examples name sample_gis/... relative to the repository
    res = doctest.testmod(module, optionflags=doctest.ELLIPSIS | doctest.NORMALIZE_WHITESPACE,
                          raise_on_error=False, verbose=False)
    assert res.attempted >= 15
    assert res.failed == 0
