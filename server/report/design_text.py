"""A design's terminal summary: fixed-width text tables."""

from __future__ import annotations

from server import __version__
from server.report.design_tables import design_context
from server.report.text import _table
from server.results.result import AdjustmentResult


def design_text(result: AdjustmentResult) -> str:
    """Point precision, relative precision and the planned observations' reliability."""
    data = design_context(result)
    unit = data["unit"]
    title = result.title or result.source or "field book"
    out = [f"Stationfit {__version__} — network design — {title}", ""]
    out += [f"{label}: {value}" for label, value in data["summary_rows"]]
    out += ["", f"Points (a priori sd and confidence ellipses, {unit})"]
    out += _table(
        ["point", "sd E", "sd N", "sd H", "a", "b", "azimuth"],
        [
            [p.name, p.sd_east, p.sd_north, p.sd_height, p.semi_major, p.semi_minor, p.azimuth]
            for p in data["points"]
        ],
        {1, 2, 3, 4, 5, 6},
    )
    if data["relative"]:
        out += ["", f"Relative precision ({unit})"]
        out += _table(
            ["from", "to", "a", "b", "allowed", "check"],
            [
                [r.from_point, r.to_point, r.semi_major, r.semi_minor, r.allowed, r.status]
                for r in data["relative"]
            ],
            {2, 3, 4},
        )
    out += [
        "",
        "Planned observations (sd, MDB in arcsec for angles; external reliability: "
        f"largest point shift from an MDB, {unit})",
    ]
    out += _table(
        ["line", "kind", "stations", "sd", "r", "MDB", "ext. rel.", "note"],
        [
            [
                str(o.line),
                o.kind,
                o.stations,
                o.sd,
                o.redundancy,
                o.mdb,
                o.external,
                _note(o.weak, o.uncontrolled, o.used, o.inseparable),
            ]
            for o in data["planned"]
        ],
        {0, 3, 4, 5, 6},
    )
    if result.warnings:
        out += ["", "Warnings"] + [f"- {w}" for w in result.warnings]
    out += ["", result.caution, ""]
    return "\n".join(out)


def _note(weak: bool, uncontrolled: bool, used: bool, inseparable: str) -> str:
    if not used:
        return "switched off"
    words = ["weak"] if weak else ["uncontrolled"] if uncontrolled else []
    return "; ".join(words + ([inseparable] if inseparable else []))
