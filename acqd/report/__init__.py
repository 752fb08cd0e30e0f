"""Figures and the self-contained HTML run report."""

from .figures import channel_figure, distribution_figure, parameter_vs_time_figure, png_bytes, save_figures, trajectory_figure
from .html import RecordSource, spec_from_record, write_report

__all__ = ["channel_figure", "distribution_figure", "trajectory_figure", "parameter_vs_time_figure", "png_bytes", "save_figures",
           "RecordSource", "spec_from_record", "write_report"]
