"""Morning-review outputs: quick-look images of frames and the static HTML run report."""

from pipeline.report.html import write_report
from pipeline.report.quicklook import (
    ReportError,
    quicklook_figure,
    render_quicklook,
    render_thumbnail,
)

__all__ = ["ReportError", "quicklook_figure", "render_quicklook", "render_thumbnail",
           "write_report"]
