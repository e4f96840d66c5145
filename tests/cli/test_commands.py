"""The command line: every command added in one place, shared options in one module, no import
cycle, and the same typed errors as the Python interface mapped to exit codes."""

from __future__ import annotations

import subprocess
import sys

import click
import networkx as nx
from click.testing import CliRunner

import gridflow
from gridflow.cli import main as cli_main
from gridflow.cli.guard import exit_code_for

from ..test_import_cycles import import_graph


def test_cli_has_no_import_cycle():
    # the whole package has none (tests/test_import_cycles.py); here: the command line's shape
    g = import_graph()
    cli_mods = [m for m in g if m.startswith("gridflow.cli")]
    assert "gridflow.cli.main" in cli_mods and "gridflow.cli.options" in cli_mods
    for scc in nx.strongly_connected_components(g):
        if len(scc) > 1:
            assert not scc & (set(cli_mods) | {"gridflow._model", "gridflow.config.draft",
                                               "gridflow.jobs.stages"}), sorted(scc)
    # command modules never import the group: they are added to it, they do not add themselves
    for m in cli_mods:
        if m not in ("gridflow.cli", "gridflow.cli.main"):
            assert "gridflow.cli.main" not in g.successors(m), m


def test_the_import_graph_sees_function_level_imports():
    # the cycle check can fail: imports inside functions count (the commands import their
    # jobs lazily), so a command importing the group back would be an edge here
    g = import_graph()
    assert g.has_edge("gridflow.cli.run", "gridflow.jobs.run")
    assert g.has_edge("gridflow._model", "gridflow.jobs.stages")


def test_commands_are_listed_in_one_place():
    names = [c.name for c in cli_main.COMMANDS]
    assert names == ["run", "check", "init", "calibrate"]
    assert set(cli_main.cli.commands) == set(names)
    assert all(isinstance(c, click.Command) for c in cli_main.COMMANDS)
    res = CliRunner().invoke(cli_main.cli, ["--help"])
    assert res.exit_code == 0
    for name in names:
        assert name in res.output


def test_shared_options_are_one_object():
    from gridflow.cli import options

    run_opts = {p.name for p in cli_main.cli.commands["run"].params}
    check_opts = {p.name for p in cli_main.cli.commands["check"].params}
    assert {"config", "out", "previous", "workers", "scheduler"} <= run_opts
    assert {"config", "out"} <= check_opts
    assert callable(options.config_arg) and callable(options.out_opt)


def test_program_entry_point_runs_in_a_fresh_interpreter():
    res = subprocess.run([sys.executable, "-m", "gridflow", "init", "--help"],
                         capture_output=True, text=True, timeout=120)
    assert res.returncode == 0, res.stderr
    assert "never overwritten" in res.stdout


def test_exit_codes_come_from_the_error_classes():
    assert exit_code_for(gridflow.ConfigError("x")) == 2
    assert exit_code_for(gridflow.InputError("x")) == 2
    assert exit_code_for(gridflow.OutputError("x")) == 2
    assert exit_code_for(gridflow.ConvergenceError("x")) == 3
    assert exit_code_for(gridflow.SolverError("x")) == 1
    assert exit_code_for(RuntimeError("x")) == 1
