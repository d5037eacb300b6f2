"""The printable HTML report of a design (templates/report/design.html): inline style, no
scripts, the caution at the top and the end like every report."""

from __future__ import annotations

from datetime import datetime

from markupsafe import Markup

from server import __version__
from server.report.design_tables import design_context
from server.report.html import _env, generated_text, report_css, report_warnings, source_name
from server.results.result import AdjustmentResult


def design_html(result: AdjustmentResult, *, generated: datetime | None = None) -> str:
    """A self-contained HTML report of the design figures."""
    data = design_context(result)
    data["css"] = Markup(report_css())  # noqa: S704 (our own file, never user input)
    data["generated"] = generated_text(generated)
    data["source_name"] = source_name(result.source)
    data["report_warnings"] = report_warnings(result)
    data["version"] = __version__
    return _env().get_template("design.html").render(data)
