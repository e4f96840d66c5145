"""gridflow: nightly hydraulic and fire-flow analysis of a water utility's GIS.

The public Python surface is :data:`__all__`: open a model from a config
(:func:`open_model`), ask it for its cleaned network, findings, scenario solves and fire flow
(:class:`Model`, :class:`ScenarioResult`), draft a config from a GIS file
(:func:`draft_config`), and the typed errors, which are the ones the command line maps to its
exit codes. Everything else (the subpackages below) is internal and may change.

The pipeline, one subpackage per stage: ``io`` -> ``topology`` -> ``network`` ->
``demand`` / ``hydraulics`` -> ``analysis`` -> ``report``, with ``cli`` on top and ``config``,
``units`` and ``errors`` beside.

Results are model estimates of the GIS as mapped; field flow tests, local codes and licensed
engineers decide.
"""

from __future__ import annotations

from typing import TYPE_CHECKING, Any

from gridflow.errors import (
    ConfigError,
    ConvergenceError,
    GridflowError,
    InputError,
    NetworkError,
    OutputError,
    SolverError,
    TopologyError,
)

__version__ = "0.1.0"

__all__ = [
    "open_model",
    "Model",
    "ScenarioResult",
    "draft_config",
    "GridflowError",
    "ConfigError",
    "InputError",
    "TopologyError",
    "NetworkError",
    "SolverError",
    "ConvergenceError",
    "OutputError",
    "__version__",
]

if TYPE_CHECKING:
    from gridflow._model import Model, ScenarioResult, open_model
    from gridflow.config.draft import draft_config

# imported on first use, so that ``import gridflow.hydraulics`` stays free of GIS libraries
_LAZY = {"open_model": "gridflow._model", "Model": "gridflow._model",
         "ScenarioResult": "gridflow._model", "draft_config": "gridflow.config.draft"}


def __getattr__(name: str) -> Any:
    if name in _LAZY:
        import importlib

        value = getattr(importlib.import_module(_LAZY[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'gridflow' has no attribute {name!r}")


def __dir__() -> list[str]:
    return sorted(set(globals()) | set(__all__))
