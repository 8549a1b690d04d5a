"""Report: plots and the model-card section."""

from kablate.report.build import write_report

__all__ = ["write_report"]
