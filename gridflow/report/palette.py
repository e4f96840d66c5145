"""gridflow's own report colours (chosen for this project; colour-blind-aware ordering).

Sequential pressure ramp from wine (low) through straw to indigo (high); categorical colours
for flags, finding severities and hydrant fire-flow classes.
"""

from __future__ import annotations

from matplotlib.colors import LinearSegmentedColormap

INK = "#22313f"
MUTED = "#6b7785"
PIPE_BACKGROUND = "#c3c9d1"
PAPER = "#ffffff"

PRESSURE_STOPS = ["#7a1e2c", "#d0623a", "#f2d27c", "#8fc7a6", "#2f7f8f", "#263f73"]
PRESSURE_CMAP = LinearSegmentedColormap.from_list("gridflow_pressure", PRESSURE_STOPS)

FLAG = {"high_velocity": "#c2452d", "high_headloss": "#e39b2d", "both": "#6d1f4f"}
SEVERITY = {"info": "#5b8bb5", "warning": "#e0a030", "error": "#b8323f"}
FIRE_CLASS = {"AA": "#1f4e79", "A": "#3f9c8a", "B": "#e3a63b", "C": "#b33c3c", "": "#9aa3ad"}
FAIL_RING = "#111111"

GROUND_FILL, GROUND_EDGE = "#d9c9a8", "#8a7450"
HGL_LINE = "#1f5fa8"
RATING_LINE = "#b8323f"
MIN_PRESSURE_LINE = "#e0a030"

SCENARIO_CYCLE = ["#2f7f8f", "#d0623a", "#6d5fa8", "#8a7450", "#3f9c8a", "#b8323f"]
