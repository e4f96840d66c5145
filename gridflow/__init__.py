"""gridflow: nightly hydraulic and fire-flow analysis of a water utility's GIS.

The pipeline, one subpackage per stage: ``io`` -> ``topology`` -> ``network`` ->
``demand`` / ``hydraulics`` -> ``analysis`` -> ``report``, with ``cli`` on top and ``config``,
``units`` and ``errors`` beside.
"""

__version__ = "0.1.0"
