"""The inspection report: one self-contained ``report.html`` per result folder.

Public API
----------
write_report(result_dir, out_path=None, *, orthos=None, modules=None, flight=None,
             stats=None, settings=None, ortho_paths=None, progress=None, overview=None) -> Path
read_overview_ahead(flight, settings, executor) -> OverviewRead | None
build_report(result_dir, *, orthos=None, modules=None, flight=None, settings=None,
             ortho_paths=None, progress=None) -> str
load_result(result_dir) -> ResultData
"""
from __future__ import annotations

from pvscan.report._build import build_report, read_overview_ahead, write_report
from pvscan.report._result import SEVERITIES, ResultData, detection_limit, load_result, validity_checks
from pvscan.report._text import DEFECT_TEXT, SAFETY_CAUTIONS

__all__ = ["write_report", "build_report", "read_overview_ahead", "load_result", "ResultData", "validity_checks",
           "detection_limit",
           "SEVERITIES", "SAFETY_CAUTIONS", "DEFECT_TEXT"]
