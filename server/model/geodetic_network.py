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

import numpy as np

from server.errors import NetworkError
from server.fieldbook.model import Fieldbook, Observation
from server.model.geodetic import (
    geodetic_frame,
    names_in,
    observation_columns,
    with_grid_positions,
)
from server.model.network import (
    EAST,
    HEIGHT,
    NORTH,
    Network,
    NetworkPoint,
    Parameter,
    _collect_points,
    _shown,
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
    table, rows = observation_columns(used)
    level = table.kind[rows] == table.code("level")
    spatial = names_in(table, rows[~level])
    leveled = names_in(table, rows[level])
    params: list[Parameter] = []
    for p in points:
        if p.name in spatial and "en" not in p.fixed:
            params += [Parameter(EAST, p.name), Parameter(NORTH, p.name)]
        if (p.name in spatial or p.name in leveled) and "h" not in p.fixed:
            params.append(Parameter(HEIGHT, p.name))
    # each round's orientation at the AT of its first entry (in the order of ``used``)
    rounds = rows[(table.kind[rows] == table.code("direction")) & (table.round_line[rows] >= 0)]
    lines, first = np.unique(table.round_line[rounds], return_index=True)
    names = table.names
    for line, at in zip(lines.tolist(), table.at[rounds[first]].tolist()):
        params.append(Parameter("O", None if at < 0 else names[at], round_line=line))
    return tuple(params)


def _check_datum(points: tuple[NetworkPoint, ...], used: tuple[Observation, ...]) -> None:
    """Refuse a geodetic network with no position or no height control, naming candidates."""
    table, rows = observation_columns(used)
    touched = names_in(table, rows)
    held_en = [p for p in points if p.in_use and ("en" in p.fixed or "en" in p.weighted)]
    held_h = [p for p in points if p.in_use and ("h" in p.fixed or "h" in p.weighted)]
    given = [p.name for p in points if p.name in touched and p.east is not None]
    spatial = bool((table.kind[rows] != table.code("level")).any())
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
