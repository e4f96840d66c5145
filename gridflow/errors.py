"""The error tree of gridflow.

Every error gridflow raises on purpose derives from :class:`GridflowError` and carries
structured fields (file, layer, feature id, field, node and link ids) so that the command line
can print one clear line and map the error to the contract's exit code in one place
(:func:`gridflow.cli.main.exit_code_for`). Each branch also derives from the matching built-in
exception, so callers that catch ``ValueError`` or ``OSError`` keep working.

All errors pickle with their fields intact, because Dask workers send them across processes.

Exit codes (see the README):

====================  ====
error                 code
====================  ====
ConfigError           2
InputError            2
TopologyError         2
OutputError           2
ConvergenceError      3
SolverError (other)   1
====================  ====
"""

from __future__ import annotations

from typing import Any

__all__ = [
    "GridflowError",
    "ConfigError",
    "InputError",
    "TopologyError",
    "NetworkError",
    "SolverError",
    "ConvergenceError",
    "OutputError",
]


class GridflowError(Exception):
    """Root of gridflow's errors.

    Parameters
    ----------
    message : str
        What is wrong and, where possible, how to fix it.
    **fields
        Structured context: ``file``, ``layer``, ``feature_id``, ``field``, ``key``,
        ``node_id``, ``link_id`` ... Kept as attributes and in :attr:`fields`.
    """

    exit_code: int = 1

    def __init__(self, message: str, **fields: Any) -> None:
        super().__init__(message)
        self.message = message
        self.fields = {k: v for k, v in fields.items() if v is not None}
        for k, v in self.fields.items():
            setattr(self, k, v)

    def __reduce__(self):  # picklable with its fields (Dask sends errors between processes)
        return (_rebuild, (type(self), self.message, self.fields))

    def __str__(self) -> str:
        parts = [f"{k}={self.fields[k]!r}" for k in _CONTEXT_ORDER
                 if k in self.fields and str(self.fields[k]) not in self.message]
        if not parts:
            return self.message
        return f"{self.message} [{', '.join(parts)}]"


_CONTEXT_ORDER = ("file", "layer", "feature_id", "field", "key", "node_id", "link_id")


def _rebuild(cls: type, message: str, fields: dict) -> GridflowError:
    return cls(message, **fields)


class ConfigError(GridflowError, ValueError):
    """The config file is unusable: unknown key, wrong type, missing value."""

    exit_code = 2


class InputError(GridflowError, ValueError):
    """An input file, layer, feature or field is unusable."""

    exit_code = 2


class TopologyError(InputError):
    """The mapped network cannot be made into a solvable network."""


class NetworkError(InputError):
    """The network arrays are invalid (bad diameter, length, roughness, pump curve...)."""


class SolverError(GridflowError, RuntimeError):
    """The hydraulic solver failed for a reason other than non-convergence."""

    exit_code = 1


class ConvergenceError(SolverError):
    """A scenario did not converge; ``node_id`` and ``link_id`` name the worst residuals."""

    exit_code = 3


class OutputError(GridflowError, OSError):
    """The output cannot be written where asked (unwritable folder, output equals input...)."""

    exit_code = 2
