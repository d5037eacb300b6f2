"""One epoch of a monitoring job: its book adjusted, the marks' coordinates and cofactor matrix.

The congruence test needs the full cofactor block Qxx of the marks' coordinates, which the
frozen result does not keep; so each book runs through the same stages as
``pipeline.adjust_parsed`` and the engine's ``Solution`` is read here once.

Components per mark: heights (1D leveling), east and north (2D), or east, north, height
(joint plane networks, and the geodetic 3D model along each mark's local east, north, up).
In the geodetic model a mark's coordinates are its Earth-centred offset from ``reference``
(the first epoch's position) turned into the local axes there, so that all epochs share axes.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import UTC, date, datetime

import numpy as np

from server.engine.gauss_newton import Solution, adjust
from server.errors import NetworkError
from server.fieldbook.model import Fieldbook
from server.model.network import build_network
from server.pipeline import (
    UNLIMITED,
    check_adjustable_now,
    check_observation_limit,
    check_unknown_limit,
    paused_gc,
)
from server.results.result import AdjustmentResult, build_result
from server.settings import WorkLimits
from server.statistics import quality as st

#: Component letters by the comparison's dimension.
COMPONENTS = {1: ("H",), 2: ("E", "N"), 3: ("E", "N", "H")}


@dataclass(frozen=True, slots=True)
class Epoch:
    """One adjusted book: SI coordinates of its marks and their cofactor (σ₀ = 1)."""

    source: str
    when: datetime | None
    result: AdjustmentResult
    dimension: int
    marks: tuple[str, ...]
    #: marks × components, metres (geodetic model: local offsets, see the module docstring)
    values: np.ndarray
    #: (marks·components)², a priori cofactor; zero rows for held components
    cofactor: np.ndarray
    #: marks × 2: east and north (metres) for the rotation's lever arms; zeros in 1D
    plan: np.ndarray
    vtpv: float
    redundancy: int
    #: Earth-centred positions of the geodetic model (None in the plane model)
    positions: dict[str, tuple[float, float, float]] | None = None
    #: marks without every component (a height-only mark of a 3D network): not compared
    partial: tuple[str, ...] = ()

    @property
    def length_unit(self) -> str:
        return self.result.length_unit

    @property
    def variance_factor(self) -> float:
        """σ̂₀² of this epoch's adjustment (1 without redundancy)."""
        return self.vtpv / self.redundancy if self.redundancy > 0 else 1.0


def epoch_time(fieldbook: Fieldbook) -> datetime | None:
    """The book's ``epoch`` as an aware UTC datetime (a date is taken at 00:00 UTC)."""
    when = fieldbook.epoch
    if when is None:
        return None
    if isinstance(when, datetime):
        return when if when.tzinfo is not None else when.replace(tzinfo=UTC)
    assert isinstance(when, date)
    return datetime(when.year, when.month, when.day, tzinfo=UTC)


def adjust_epoch(
    fieldbook: Fieldbook, reference: Epoch | None = None, limits: WorkLimits = UNLIMITED
) -> Epoch:
    """Adjust one epoch's book and keep its marks' coordinates and cofactor block.

    ``reference`` (the first epoch) gives the geodetic model its local axes.
    Raises ``NetworkError`` when the book cannot be adjusted, ``FieldbookError`` or
    ``NetworkError`` when it is larger than ``limits`` allow.
    """
    with paused_gc():
        check_observation_limit(fieldbook, limits)
        check_adjustable_now(fieldbook)
        network = build_network(fieldbook)
        check_unknown_limit(network, limits)
        solution = adjust(network)
        result = build_result(network, solution, (), [])
    geodetic = network.geodetic is not None
    dimension = 3 if geodetic else network.dimension
    letters = COMPONENTS[dimension]
    column = {(p.point, p.kind): i for i, p in enumerate(network.parameters)}
    marks = tuple(
        name for name in solution.coordinates if _has_all(solution, name, letters, geodetic)
    )
    values = _values(solution, marks, letters, geodetic, reference)
    index = [column.get((name, kind), -1) for name in marks for kind in letters]
    cofactor = _cofactor_block(solution, np.array(index, dtype=np.int64))
    plan = np.array(
        [solution.coordinates[name][:2] if dimension > 1 else (0.0, 0.0) for name in marks],
        dtype=float,
    ).reshape(-1, 2)
    vtpv = st.weighted_square_sum(solution.residuals, solution.sigmas)
    redundancy = len(solution.sigmas) - len(network.parameters) + network.datum_defect
    return Epoch(
        source=fieldbook.source,
        when=epoch_time(fieldbook),
        result=result,
        dimension=dimension,
        marks=marks,
        values=values,
        cofactor=cofactor,
        plan=plan,
        vtpv=vtpv,
        redundancy=redundancy,
        positions=solution.positions if geodetic else None,
        partial=tuple(name for name in solution.coordinates if name not in marks),
    )


def _has_all(solution: Solution, name: str, letters: tuple[str, ...], geodetic: bool) -> bool:
    if geodetic and (solution.positions is None or name not in solution.positions):
        return False
    # a height-only mark of the geodetic model has no grid position: it is left out
    east, north, height = solution.coordinates[name]
    have = {"E": math.isfinite(east), "N": math.isfinite(north), "H": math.isfinite(height)}
    return all(have[k] for k in letters)


def _values(
    solution: Solution,
    marks: tuple[str, ...],
    letters: tuple[str, ...],
    geodetic: bool,
    reference: Epoch | None,
) -> np.ndarray:
    if not geodetic:
        pick = {"E": 0, "N": 1, "H": 2}
        return np.array(
            [[solution.coordinates[m][pick[k]] for k in letters] for m in marks], dtype=float
        ).reshape(len(marks), len(letters))
    assert solution.positions is not None
    base = reference.positions if reference is not None else None
    rows = []
    for name in marks:
        here = np.array(solution.positions[name])
        origin = np.array(base[name]) if base is not None and name in base else here
        rows.append(local_axes(origin) @ (here - origin))
    return np.array(rows, dtype=float).reshape(len(marks), 3)


def local_axes(position: np.ndarray) -> np.ndarray:
    """Rows east, north, up at an Earth-centred position (geodetic latitude on GRS80)."""
    from server.geodesy.ellipsoid import GRS80

    lat_a, lon_a, _ = GRS80.from_ecef(position.reshape(1, 3))
    lat, lon = float(np.ravel(lat_a)[0]), float(np.ravel(lon_a)[0])
    sl, cl, sp, cp = math.sin(lon), math.cos(lon), math.sin(lat), math.cos(lat)
    return np.array([[-sl, cl, 0.0], [-sp * cl, -sp * sl, cp], [cp * cl, cp * sl, sp]])


def _cofactor_block(solution: Solution, index: np.ndarray) -> np.ndarray:
    """Qxx of the given unknowns; an index of −1 (a held component) gives zero rows."""
    q = np.zeros((index.size, index.size))
    free = np.flatnonzero(index >= 0)
    if free.size:
        q[np.ix_(free, free)] = solution.covariance_block(index[free])
    return 0.5 * (q + q.T)


class CannotCompare(NetworkError):
    """The epochs cannot be compared (no common marks, mixed dimensions…); exit 3."""
