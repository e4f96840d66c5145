"""The network model: a frozen struct of numpy arrays, independent of GIS."""

from gridflow.network.model import *  # noqa: F401,F403
from gridflow.network.model import __all__ as _model_all
from gridflow.network.pumps import fit_pump_curve

__all__ = [*_model_all, "fit_pump_curve"]
