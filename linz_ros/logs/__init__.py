"""Field-log analysis: read logs and bags, find the near-singular and saturated episodes,
and report them as text, JSON, CSV, PNG plots and one HTML page (the recording itself is
:mod:`linz_ros.runtime.fieldlog`)."""

from linz_ros.logs.analysis import Episode, Thresholds, episodes, runs, summarise, thresholds_of
from linz_ros.logs.reader import LogError, StepLog, log_files, read_logs
from linz_ros.logs.report import plot_log, summary_text, write_csv, write_html

__all__ = ["Episode", "Thresholds", "episodes", "runs", "summarise", "thresholds_of", "LogError", "StepLog",
           "log_files", "read_logs", "plot_log", "summary_text", "write_csv", "write_html"]
