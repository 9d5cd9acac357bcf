"""Jobs: each command's work, tying the stages together (the Python API of the CLI)."""

from lshjob._lazy import exports

__all__ = [
    "RunOptions", "merge_files", "plan_banding", "refresh_job", "run_job", "sign_file",
]

__getattr__, __dir__ = exports(__name__, {
    "sign_file": "sign",
    "merge_files": "merge",
    "plan_banding": "plan",
    "run_job": "run",
    "RunOptions": "options",
    "refresh_job": "refresh",
})
