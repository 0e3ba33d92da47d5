"""Reports: figures of a scored run (:mod:`.figures`) and self-contained HTML pages
(:mod:`.html`)."""
from adapt.report.figures import (
                      beam_pattern_figure,
                      convergence_figure,
                      figure_to_png,
                      mean_beam_pattern_db,
                      null_depth_figure,
                      save_png,
                      series_styles,
                      standard_figures,
)
from adapt.report.html import build_page, compare_report

__all__ = ["convergence_figure", "beam_pattern_figure", "null_depth_figure",
           "mean_beam_pattern_db", "figure_to_png", "save_png", "series_styles",
           "standard_figures", "build_page", "compare_report"]
