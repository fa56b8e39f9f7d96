"""Reports: one self-contained HTML page per fit and per model comparison.

``write_fit_report(out_dir)`` turns a saved fit folder into ``report.html`` with
figures (PNG and SVG under ``figures/``) and tables (CSV under ``tables/``);
``write_comparison_report(comparison, out_dir)`` does the same for a LOO model
comparison. The pages embed everything and open offline.
"""

from cladewise.report.compare_report import write_comparison_report
from cladewise.report.fit_report import ReportResult, build_fit_report, write_fit_report
from cladewise.report.progress import Progress
from cladewise.report.tree_plot import COMPACT_ABOVE, plot_tree, tree_layout

__all__ = [
    "write_fit_report",
    "build_fit_report",
    "ReportResult",
    "write_comparison_report",
    "plot_tree",
    "tree_layout",
    "COMPACT_ABOVE",
    "Progress",
]
