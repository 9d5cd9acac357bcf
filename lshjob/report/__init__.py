"""Reports: terminal summaries, S-curve charts and the index report page."""

from lshjob._lazy import exports

__all__ = [
    "audit_report", "build_page", "plan_report", "run_report", "text_s_curve", "write_chart", "write_page",
]

__getattr__, __dir__ = exports(__name__, {
    "plan_report": "text",
    "run_report": "text",
    "audit_report": "text",
    "text_s_curve": "charts",
    "write_chart": "charts",
    "build_page": "page",
    "write_page": "page",
})
