"""Reports: terminal summaries and S-curve charts."""

from lshjob._lazy import exports

__all__ = [
    "audit_report", "plan_report", "run_report", "text_s_curve", "write_chart",
]

__getattr__, __dir__ = exports(__name__, {
    "plan_report": "text",
    "run_report": "text",
    "audit_report": "text",
    "text_s_curve": "charts",
    "write_chart": "charts",
})
