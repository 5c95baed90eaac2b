"""Session logs on disk: crash-safe writer, tolerant reader, offline re-analysis, export, report.

Layout and guarantees: see FORMAT.md in this folder.
"""

from .format import FORMAT_VERSION, LogbookError, LogbookVersionError
from .reader import (ExperimentRecord, SessionRecord, SessionSummary, list_sessions,
                     read_experiment, read_session)
from .records import columns_from_telemetry, relay_record_from_rows
from .writer import ExperimentLog, Logbook, SessionLog, default_log_dir


def analyze_session(path, experiment=None):
    """Re-run identification and tuning from a logged session; see :mod:`.offline`."""
    from .offline import analyze_session as _impl
    return _impl(path, experiment)


def export_session(path, fmt, out_dir):
    """One file per experiment (csv or npz); see :mod:`.offline`."""
    from .offline import export_session as _impl
    return _impl(path, fmt, out_dir)


def report_session(path, out_html):
    """Self-contained HTML report with plots; see :mod:`.report`."""
    from .report import report_session as _impl
    return _impl(path, out_html)


__all__ = ["FORMAT_VERSION", "LogbookError", "LogbookVersionError", "ExperimentRecord",
           "SessionRecord", "SessionSummary", "list_sessions", "read_experiment", "read_session",
           "columns_from_telemetry", "relay_record_from_rows", "ExperimentLog", "Logbook",
           "SessionLog", "default_log_dir", "analyze_session", "export_session", "report_session"]
