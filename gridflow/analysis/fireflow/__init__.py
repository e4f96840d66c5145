"""Fire-flow availability at every hydrant.

For each in-service hydrant, one at a time, on top of a base scenario (usually maximum day):

1. **Available flow at the residual target.** The hydrant's outlet (at the end of its lateral
   and hydrant body loss, see :mod:`.problem`) is held at its elevation plus the residual
   target ``p_r`` and the network is solved from the base solution; the flow drawn at the
   outlet is the available flow.
2. **System-wide limits** (``fireflow.system_wide``, default on). If any other supplied node
   of the hydrant's zone falls below the system minimum, the draw is reduced until the lowest
   such node is exactly at the minimum (``limited_by`` ``node_pressure``, the node in
   ``limiting_node_id``). With ``fireflow.velocity_limit`` the draw is likewise reduced until
   no main is faster than ``criteria.max_velocity_fire`` (``velocity``, ``limiting_pipe_id``).
3. **Rated flow** at 20 psi residual at the outlet, before the system-wide limits: the figure
   the NFPA 291 class rests on; and the **residual pressure at the required flow**, or, where
   that flow cannot be drawn with 0 psi or more at the outlet, no residual, ``required_achievable``
   0 and the flow achievable at 0 psi.
4. The fastest main during the draw at the available flow, flagged above
   ``criteria.max_velocity_fire``.

Nodes whose pressure is already below the system minimum in the base solution cannot be made
acceptable by any fire draw; they are excluded from the check and returned once in
``result.attrs["base_below_minimum"]``.

Modules: :mod:`.problem` (the hydrant table to arrays, laterals), :mod:`.search` (one search
routine, two ways of solving), :mod:`.backends` (serial, local processes, Dask),
:mod:`.results` (records to the table, summary, limiting nodes), :mod:`.sweep`.

Results are model estimates: field flow tests, local codes and licensed engineers decide.
"""

from gridflow.analysis.fireflow.backends import connect_scheduler
from gridflow.analysis.fireflow.problem import FireflowProblem
from gridflow.analysis.fireflow.results import RESULT_COLUMNS, limiting_nodes
from gridflow.analysis.fireflow.search import LIMIT_CODES, P20_M
from gridflow.analysis.fireflow.sweep import CAUTION, sweep
from gridflow.analysis.nfpa import extrapolate_nfpa291, nfpa_class

__all__ = [
    "CAUTION",
    "LIMIT_CODES",
    "P20_M",
    "RESULT_COLUMNS",
    "FireflowProblem",
    "connect_scheduler",
    "extrapolate_nfpa291",
    "limiting_nodes",
    "nfpa_class",
    "sweep",
]
