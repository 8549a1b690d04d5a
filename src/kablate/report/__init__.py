"""Report: plots and the model-card section."""

from kablate.report.compose import write_report

__all__ = ["write_report"]
