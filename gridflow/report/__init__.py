"""The self-contained HTML report of a run (maps, grade line profile, tables, cautions).

Public functions: :func:`write_report` and :func:`hgl_profile`.
"""

from gridflow.report.document import CAUTIONS, write_report
from gridflow.report.profile import hgl_profile

__all__ = ["CAUTIONS", "hgl_profile", "write_report"]
