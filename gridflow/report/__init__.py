"""The self-contained HTML report of a run (maps, grade line profile, tables, cautions).

Public: :class:`ReportData` / :class:`ScenarioData` (what a report is made of),
:func:`write_report`, :func:`render_report`, :func:`hgl_profile`, and the table helpers
:class:`Table` / :class:`Column` for extra tables.
"""

from gridflow.report.data import ReportData, ScenarioData
from gridflow.report.document import CAUTIONS, Column, Table, render_report, write_report
from gridflow.report.profile import hgl_profile

__all__ = ["CAUTIONS", "Column", "ReportData", "ScenarioData", "Table", "hgl_profile",
           "render_report", "write_report"]
