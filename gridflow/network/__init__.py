"""The network model: a frozen struct of numpy arrays, independent of GIS."""

from gridflow.network.model import *  # noqa: F401,F403
from gridflow.network.model import STATUS_CV, VALVE_PRV, VALVE_TCV  # noqa: F401  (old names)
from gridflow.network.model import __all__ as _model_all
from gridflow.network.pumps import SHUTOFF_RATIO_DEFAULT, PumpCurve, fit_pump_curve

__all__ = [*_model_all, "fit_pump_curve", "PumpCurve", "SHUTOFF_RATIO_DEFAULT"]
