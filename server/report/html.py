"""The printable HTML report of a result (Jinja2 over templates/report/), its style and hash."""

from __future__ import annotations

import base64
import hashlib
import threading
from collections.abc import Sequence
from datetime import UTC, datetime
from typing import Any

import jinja2
from markupsafe import Markup

from server import resources
from server.report.origin import ApprovalNote, ImportedFrom
from server.report.plot import network_plot_data
from server.report.tables import ObservationRow, context
from server.results.result import AdjustmentResult
from server.review.standards import Preset

TEMPLATE_DIR = resources.TEMPLATE_DIR / "report"
REPORT_CSS = TEMPLATE_DIR / "report.css"

# --------------------------------------------------------------------------------------
# HTML


# reports are drawn on worker threads: one of them makes the environment, the others wait
_environment_lock = threading.Lock()
_environment: list[jinja2.Environment] = []  # made once, on first use


def _env() -> jinja2.Environment:
    with _environment_lock:
        if not _environment:
            _environment.append(_make_environment())
        return _environment[0]


def _make_environment() -> jinja2.Environment:
    return jinja2.Environment(
        # the report's own folder first, then the shared partials (network plot, histogram)
        loader=jinja2.ChoiceLoader(
            [jinja2.FileSystemLoader(TEMPLATE_DIR), jinja2.FileSystemLoader(TEMPLATE_DIR.parent)]
        ),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )


def report_css() -> str:
    """The report's style sheet, read at render time so the file can be edited without a restart."""
    css = REPORT_CSS.read_text(encoding="utf-8")
    if "</" in css:
        raise ValueError(f"{REPORT_CSS} must not contain '</'; it is inlined in a <style> element")
    return css


def style_hash(css: str | None = None) -> str:
    """The CSP source expression (``'sha256-…'``) that allows the report's inline style."""
    digest = hashlib.sha256((css if css is not None else report_css()).encode("utf-8")).digest()
    return f"'sha256-{base64.b64encode(digest).decode('ascii')}'"


def source_name(source: str) -> str:
    """The field book's file name without its folders: a report leaves the office."""
    return source.replace("\\", "/").rsplit("/", 1)[-1]


def report_warnings(result: AdjustmentResult) -> list[str]:
    """The warnings as a report prints them: ``FILE:LINE:`` without the folders of FILE."""
    name = source_name(result.source)
    if name == result.source:
        return list(result.warnings)
    prefix = f"{result.source}:"
    return [f"{name}:{w[len(prefix) :]}" if w.startswith(prefix) else w for w in result.warnings]


def generated_text(generated: datetime | None) -> str:
    """The moment a report was made, as "YYYY-MM-DD HH:MM UTC" (now when None)."""
    moment = generated if generated is not None else datetime.now(UTC)
    if moment.tzinfo is None:
        return moment.strftime("%Y-%m-%d %H:%M")
    return moment.astimezone(UTC).strftime("%Y-%m-%d %H:%M UTC")


def report_html(
    result: AdjustmentResult,
    *,
    generated: datetime | None = None,
    presets: Sequence[Preset] = (),
    imported_from: ImportedFrom | None = None,
    observation_rows: Sequence[ObservationRow] | None = None,
    plot_data: dict[str, Any] | None = None,
    approval: ApprovalNote | None = None,
) -> str:
    """A self-contained printable HTML report (inline CSS and SVG, no scripts, nothing external).

    ``imported_from`` names the survey XML or CSV the field book was imported from;
    ``approval`` states who approved the run for issue, when, and of which field book.
    ``observation_rows`` (every observation's) and ``plot_data`` (``network_plot_data``) of
    this result, when the caller has them already, are used instead of being made again.
    """

    data = context(result, presets, all_observation_rows=observation_rows)
    if plot_data is None:
        # the drawing only (no side panel in a report), from the rows formatted above
        plot_data = network_plot_data(
            result,
            obs_rows=data["observation_rows"],  # type: ignore[arg-type]
            details=False,
        )
    data["network_plot"] = plot_data
    data["np_static"] = True
    # The CSS is our own file, never user input; Markup keeps autoescape off its '>' selectors.
    data["css"] = Markup(report_css())  # noqa: S704 (our own file, see above)
    data["generated"] = generated_text(generated)
    data["source_name"] = source_name(result.source)
    data["report_warnings"] = report_warnings(result)
    data["imported_from"] = imported_from
    data["imported_name"] = source_name(imported_from.filename) if imported_from else ""
    data["approval"] = approval
    return _env().get_template("report.html").render(data)
