"""Ids in the Millbrook sample, from the manifest its generator writes (never copied by hand)."""

from __future__ import annotations

import json
from functools import cache
from pathlib import Path

MANIFEST = Path(__file__).resolve().parents[1] / "sample_gis" / "manifest.json"


@cache
def sample_ids() -> dict:
    """The manifest's entries: planted defects, weak spots, flow tests (see
    ``scripts/make_sample_gis.py``: ``planted``)."""
    doc = json.loads(MANIFEST.read_text(encoding="utf-8"))
    doc.pop("about", None)
    return doc
