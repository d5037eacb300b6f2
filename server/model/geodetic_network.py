"""Field book → network in the geodetic 3D model: points, unknowns and control.

Every point that a slope, zenith, baseline, direction, angle, distance or azimuth touches has
three unknowns, its corrections along local east, north and up (E, N, H); a point only level
lines touch has H alone.  ``fix en`` removes E and N (grid east and north held), ``fix h``
removes H (the orthometric height held); weighted control weights grid east, north and the
orthometric height.  A point given by latitude and longitude gets its grid east and north
here, so that the rest of the program sees one kind of control.

The model needs control: without a point held (or weighted) in position and one in height
there is no datum, and the network is refused naming the points it could be held on.
"""

from __future__ import annotations

from server.errors import NetworkError
from server.fieldbook.model import Fieldbook, Observation
from server.model.geodetic import geodetic_frame, touched_names
from server.model.network import (
    EAST,
    HEIGHT,
    NORTH,
    Network,
    NetworkPoint,
    Parameter,
    _collect_points,
    _shown,
    with_grid_positions,
)


def build_geodetic_network(fieldbook: Fieldbook, used: tuple[Observation, ...]) -> Network:
    """The network of a geodetic field book, or ``NetworkError`` naming the points at fault."""
    frame = geodetic_frame(fieldbook)
    points = with_grid_positions(_collect_points(fieldbook, used), fieldbook, frame.crs)
    warnings = [
        f"point {p.name} (line {p.line}) is not touched by any used observation; "
        "it is reported with its given values"
        for p in points
        if not p.in_use
    ]
    if (
        not frame.geoid_given
        and any(o.kind == "level" for o in used)
        and any(o.kind == "baseline" for o in used)
    ):
        warnings.append(
            "no geoid undulation is given, so ellipsoidal and orthometric heights "
            "were taken as equal; give 'geoid undulation=' or point geoid= values"
        )
    parameters = _parameters(points, used)
    _check_datum(points, used)
    return Network(
        fieldbook=fieldbook,
        dimension=3,
        points=points,
        used=used,
        parameters=parameters,
        warnings=tuple(warnings),
        geodetic=frame,
    )


def _parameters(
    points: tuple[NetworkPoint, ...], used: tuple[Observation, ...]
) -> tuple[Parameter, ...]:
    """E, N, H per spatially observed point (H alone where only level lines touch it),
    then one orientation per direction round."""
    spatial = touched_names([o for o in used if o.kind != "level"])
    leveled = touched_names([o for o in used if o.kind == "level"])
    params: list[Parameter] = []
    for p in points:
        if p.name in spatial and "en" not in p.fixed:
            params += [Parameter(EAST, p.name), Parameter(NORTH, p.name)]
        if (p.name in spatial or p.name in leveled) and "h" not in p.fixed:
            params.append(Parameter(HEIGHT, p.name))
    first_at: dict[int, str | None] = {}
    for o in reversed(used):  # the first entry of each round is written last
        if o.round_line is not None and o.kind == "direction":
            first_at[o.round_line] = o.at
    for line in sorted(first_at):
        params.append(Parameter("O", first_at[line], round_line=line))
    return tuple(params)


def _check_datum(points: tuple[NetworkPoint, ...], used: tuple[Observation, ...]) -> None:
    """Refuse a geodetic network with no position or no height control, naming candidates."""
    touched = touched_names(used)
    held_en = [p for p in points if p.in_use and ("en" in p.fixed or "en" in p.weighted)]
    held_h = [p for p in points if p.in_use and ("h" in p.fixed or "h" in p.weighted)]
    given = [p.name for p in points if p.name in touched and p.east is not None]
    spatial = any(o.kind != "level" for o in used)
    if not held_en and spatial:
        raise NetworkError(
            "the geodetic network has no control in position: hold at least one point fixed "
            "in east and north (fix en), or weight it; points with given coordinates: "
            + (_shown(given) or "none"),
            given,
        )
    if not held_h and spatial:
        heights = [p.name for p in points if p.name in touched and p.height is not None]
        raise NetworkError(
            "the geodetic network has no control in height: hold at least one point's height "
            "(fix h), or weight it; points with given heights: " + (_shown(heights) or "none"),
            heights,
        )
