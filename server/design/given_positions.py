"""A design starts from given positions: with no values, none can be computed.

An adjustment carries start values along the observations; a planned observation has no
value to carry, so every point a used observation names must have its approximate position
(and height where the observation needs one) on its ``point`` line.
"""

from __future__ import annotations

from server.errors import NetworkError
from server.fieldbook.model import HORIZONTAL_KINDS, SPATIAL_KINDS, Fieldbook, PointStatement


def check_given_positions(fieldbook: Fieldbook) -> None:
    """Refuse a design in which a used observation names a point without the coordinates it
    needs; the ``NetworkError`` names every such point (exit 3)."""
    declared = {p.name: p for p in fieldbook.points}
    used = [o for o in fieldbook.observations if not o.ignored]
    spatial = any(o.kind in SPATIAL_KINDS for o in used)
    missing: dict[str, str] = {}
    for obs in used:
        for name in (obs.from_point, obs.at, obs.to):
            if not name or name in missing:
                continue
            lacking = _lacking(declared.get(name), obs.kind, spatial)
            if lacking:
                missing[name] = lacking
    if missing:
        names = list(missing)
        listing = ", ".join(f"{n} ({missing[n]})" for n in names[:12])
        more = f" and {len(names) - 12} more" if len(names) > 12 else ""
        raise NetworkError(
            "a design needs the approximate coordinates of every point on its point line "
            "(planned observations have no values to compute them from); missing: "
            f"{listing}{more}",
            tuple(names),
        )


def _lacking(point: PointStatement | None, kind: str, spatial: bool) -> str:
    """What this observation needs of the point and the book does not give ("" if nothing)."""
    placed = point is not None and (
        point.latitude is not None or (point.east is not None and point.north is not None)
    )
    height = point is not None and point.height is not None
    needs_place = kind in HORIZONTAL_KINDS or kind in SPATIAL_KINDS
    needs_height = kind == "level" or (spatial and needs_place)
    wanted = [
        what
        for what, need, has in (
            ("east, north", needs_place, placed),
            ("height", needs_height, height),
        )
        if need and not has
    ]
    if point is None:
        return "no point line"
    return " and ".join(wanted)
