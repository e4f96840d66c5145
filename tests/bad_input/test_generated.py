"""The generated corpus (:mod:`tests.bad_input.generated`) through the command line.

CI profile: a fixed-seed sample (every file-system case, 45 field and 45 config cases).
Full profile, opt-in: ``GRIDFLOW_CORPUS=full python -m pytest -m corpus_full
tests/bad_input/test_generated.py``.

Every case checks: the exit code the documented rules give (2 naming the culprit; 0, with an
``implausible_value`` finding where the value is possible but implausible); never exit 1 or 3;
the inputs byte-identical; last night's output byte-identical whenever the run stops; no
temporary file left anywhere in the case's folder; no hang (60 s alarm).
"""

from __future__ import annotations

import hashlib
import os
import signal
from pathlib import Path

import pyogrio
import pytest
import tomli_w
from click.testing import CliRunner

from gridflow.cli.main import cli
from gridflow.config.layers import ROLE_FIELDS
from tests.bad_input import generated as g
from tests.bad_input.harness import previous_output
from tests.bad_input.town import Town

FULL = os.environ.get("GRIDFLOW_CORPUS") == "full"
ALL = g.all_cases()
CI = g.ci_sample(ALL)
ROOT_SKIPS = {"input_unreadable", "output_folder_readonly"}  # root reads and writes anywhere


def _digest(p: Path) -> str:
    return hashlib.sha256(p.read_bytes()).hexdigest()


def _files(folder: Path) -> dict[Path, str]:
    out = {}
    for p in folder.rglob("*"):
        if p.is_symlink() or not p.is_file() or p.parent.name == "out":
            continue
        out[p] = _digest(p)
    return out


class _Hang(Exception):
    pass


def _alarm(signum, frame):
    raise _Hang("the run did not return within 60 s")


def run_generated(c: g.GenCase, folder: Path) -> tuple[int, str, Path]:
    if c.id in ROOT_SKIPS and os.geteuid() == 0:
        pytest.skip("root reads and writes through permission bits")
    t: Town
    if c.category.startswith("field:"):
        t = g.full_town()
    elif c.category.startswith("config:"):
        t = g.spoil_config(g._config_town(c.extra["key"]), c.extra["key"], c.extra["value"])
    else:
        t = Town()
    gpkg, cfg = t.write(folder)
    target = folder / "out" / "result.gpkg"
    args: list[str] = []
    config = cfg
    if c.category.startswith("field:"):
        e = c.extra
        g.spoil_field(gpkg, e["layer"], e["id_field"], c.feature, e["col"], e["value"])
    elif c.category in ("files", "geometry"):
        res = c.spoil(folder, gpkg, cfg, t)
        special, out = res if isinstance(res, tuple) else (None, None)
        cfg.write_bytes(tomli_w.dumps(t.config).encode("utf-8"))  # the spoil's config
        if out is not None:
            target = out
        if special == "no-out":
            target = folder / "out" / "result.gpkg"
        if special == "fifo-config":
            config = g._fifo(folder, "cfg.toml")
        elif special == "folder-config":
            config = folder / "cfgdir.toml"
            config.mkdir()
        elif special == "readonly-out":
            os.chmod(folder / "out", 0o555)
        elif special == "previous-fifo":
            args += ["--previous", str(g._fifo(folder, "prev.gpkg"))]
    prev = None
    if target.parent.is_dir() and not target.exists() and os.access(target.parent, os.W_OK):
        prev = previous_output(target)
    side = {p: _digest(p) for p in target.parent.iterdir()
            if p.is_file() and not p.is_symlink()} if target.parent.is_dir() else {}
    inputs = _files(folder)
    old = signal.signal(signal.SIGALRM, _alarm)
    signal.alarm(60)
    try:
        out_args = [] if special_no_out(c) else ["--out", str(target)]
        res = CliRunner().invoke(cli, ["-q", "run", str(config), *out_args, *args])
    finally:
        signal.alarm(0)
        signal.signal(signal.SIGALRM, old)
        if (folder / "out").exists():
            os.chmod(folder / "out", 0o755)
    assert not isinstance(res.exception, _Hang), "hung"
    assert res.exception is None or isinstance(res.exception, SystemExit), repr(res.exception)
    assert "Traceback" not in res.output
    for p, h in inputs.items():
        assert p.exists() and _digest(p) == h, f"input {p.name} changed"
    stray = [p.name for p in folder.rglob("*") if ".tmp-" in p.name]
    assert not stray, stray
    if res.exit_code != 0:
        if prev is not None:
            assert target.read_bytes() == prev, "last night's output changed"
        for p, h in side.items():  # last night's whole set (report, log) untouched
            if p.suffix in (".gpkg", ".html", ".log") and ".failed." not in p.name:
                assert _digest(p) == h, f"{p.name} changed"
    return res.exit_code, " ".join((res.stderr or "").split()), target


def special_no_out(c: g.GenCase) -> bool:
    return c.id == "run_output_is_folder"  # the config's [run] output names the folder


def _record(c: g.GenCase, outcome: str) -> None:
    """With GRIDFLOW_CORPUS_LOG set, one line per case: id, category, expectation, outcome."""
    log = os.environ.get("GRIDFLOW_CORPUS_LOG")
    if log:
        with open(log, "a", encoding="utf-8") as fh:
            fh.write(f"{c.id}\t{c.category}\t{c.expect}\t{outcome}\n")


def check_case(c: g.GenCase, folder: Path) -> None:
    code, msg, target = run_generated(c, folder)
    _record(c, f"exit {code}")
    assert code in (0, 2), f"exit {code}: {msg}"
    if c.expect == "stop":
        assert code == 2, f"expected exit 2, got {code}: {msg}"
    if code == 2:
        for w in c.names:
            assert w in msg, f"{w!r} not in message: {msg}"
        return
    assert c.expect in ("run", "implausible", "missing"), f"expected exit 2: {msg}"
    f = pyogrio.read_dataframe(target, layer="findings", read_geometry=False)
    on_feature = set(f.loc[f["feature_id"].astype(str).str.startswith(c.feature), "kind"]) \
        if c.feature else set()
    _record(c, "finding" if on_feature else "no finding")
    if c.finding is not None:
        assert c.finding[0] in on_feature, (c.id, sorted(on_feature))
    if c.expect == "implausible":
        assert "implausible_value" in on_feature, (c.id, sorted(on_feature))
    if c.expect == "missing" and c.category.startswith("field:"):
        role = c.category.split(":")[1]
        fname = c.id.split(".")[1].split("=")[0]
        if f"{fname}*" in ROLE_FIELDS[role]:
            assert on_feature, f"a required field left empty on {c.feature} without a finding"


@pytest.mark.parametrize("c", CI, ids=[c.id for c in CI])
def test_generated_ci(c, tmp_path):
    check_case(c, tmp_path)


FULL_CASES = ALL if FULL else []


@pytest.mark.corpus_full
@pytest.mark.skipif(not FULL, reason="full profile: GRIDFLOW_CORPUS=full")
@pytest.mark.parametrize("c", FULL_CASES or [None], ids=[c.id for c in FULL_CASES] or ["off"])
def test_generated_full(c, tmp_path):
    check_case(c, tmp_path)


def test_corpus_covers_every_field_and_key():
    """Every numeric field of every role and every numeric config key has cases, and every
    field gets every spoilt value."""
    from gridflow.config.ranges import CONFIG_RANGES
    from gridflow.io.validate import FIELD_RANGES

    fields = {c.id.split("=")[0] for c in ALL if c.category.startswith("field:")}
    want = {f"{r}.{f}" for r, fs in FIELD_RANGES.items() for f in fs}
    assert want <= fields, sorted(want - fields)
    for f in want:
        assert sum(c.id.startswith(f + "=") for c in ALL) >= len(g.FIELD_VALUES)
    keys = {c.extra["key"] for c in ALL if c.category.startswith("config:")}
    assert len(keys) == len(CONFIG_RANGES)
