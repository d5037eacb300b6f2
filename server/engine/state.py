"""The engine's current estimate: coordinates and orientations as arrays, and their columns.

Every point has an east, north and height entry (NaN where the network has
none) and every direction round an orientation; ``column`` maps each to its
unknown (−1 where held).  Weighted control becomes ``ControlRow`` objects, the
direct observations of one coordinate component each that the assembly adds
after the field observations.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from itertools import repeat
from operator import attrgetter

import numpy as np

from server.model.assembly import Assembly, ControlEquation
from server.model.kinds import KINDS, Kind
from server.model.network import Network, Parameter
from server.model.whitening import CorrelatedBlock

_COMPONENT = {"E": 0, "N": 1, "H": 2}
_CODE = {**_COMPONENT, "O": 3}
#: Codes of the unknowns in ``State.kind``.
EAST, NORTH, HEIGHT, ORIENTATION = 0, 1, 2, 3


@dataclass(frozen=True, slots=True)
class ControlRow:
    """Weighted control treated as a direct observation of one coordinate component."""

    point: str
    component: str  # "E", "N" or "H"
    given: float
    sigma: float


class State:
    """Coordinates and orientations as arrays, and the column of each unknown."""

    def __init__(
        self,
        network: Network,
        coords: Mapping[str, tuple[float, float, float]] | np.ndarray,
        kinds: Mapping[str, Kind] = KINDS,
        correlated: Sequence[CorrelatedBlock] = (),
    ) -> None:
        self.kinds, self.correlated = kinds, correlated
        self.network = network
        self.names = list(map(attrgetter("name"), network.points))
        self.point_index = dict(zip(self.names, range(len(self.names))))
        if isinstance(coords, np.ndarray):  # points × (east, north, height), in point order
            values = np.asarray(coords, dtype=float).reshape(-1, 3)
        else:
            values = np.array([coords[name] for name in self.names], dtype=float).reshape(-1, 3)
        self.east, self.north, self.height = (values[:, c].copy() for c in range(3))
        kind, target = self._unknowns(network.parameters)
        n_points = len(self.names)
        self.column = {c: np.full(n_points, -1, np.int64) for c in "ENH"}
        self.column["O"] = np.full(len(self.round_lines), -1, np.int64)
        for code, letter in enumerate("ENHO"):
            pick = np.flatnonzero(kind == code)
            self.column[letter][target[pick]] = pick
        self.kind, self.target = kind, target
        self.orientation = self._start_orientations()
        self.control_rows = control_rows(network)
        self.control = [
            ControlEquation(self.point_index[c.point], _COMPONENT[c.component], c.given, c.sigma)
            for c in self.control_rows
        ]

    def _unknowns(self, params: Sequence[Parameter]) -> tuple[np.ndarray, np.ndarray]:
        """EAST, NORTH, HEIGHT or ORIENTATION, and the point or round index, of each unknown;
        sets the rounds (``round_lines``, sorted, and ``round_index``)."""
        count = len(params)
        letters = list(map(attrgetter("kind"), params))
        kind = np.fromiter(map(_CODE.__getitem__, letters), np.int64, count)
        # C-level lookups per unknown (a network has one per coordinate component)
        points = map(self.point_index.get, map(attrgetter("point"), params), repeat(-1))
        target = np.fromiter(points, np.int64, count)
        rounds = np.flatnonzero(kind == ORIENTATION).tolist()
        lines = [params[k].round_line for k in rounds]
        self.round_lines = sorted({line for line in lines if line})
        self.round_index = {line: k for k, line in enumerate(self.round_lines)}
        target[rounds] = [self.round_index[line] for line in lines]  # type: ignore[index]
        missing = np.flatnonzero(target < 0)
        if missing.size:  # as a lookup by name would: an unknown of no point is an error
            raise KeyError(params[int(missing[0])].point)
        return kind, target

    def arrays(self) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        return self.east, self.north, self.height, self.orientation

    def assembly(self, columns: dict[str, np.ndarray]) -> Assembly:
        return Assembly(
            self.network.used,
            self.point_index,
            self.round_index,
            columns["E"],
            columns["N"],
            columns["H"],
            columns["O"],
            self.control,
            self.kinds,
            self.correlated,
            table=self.network.used_table,
            name_point=self.network.name_point,  # the same lookup, made once by the network
        )

    def apply(self, correction: np.ndarray) -> None:
        for code, array in enumerate((self.east, self.north, self.height, self.orientation)):
            pick = self.kind == code
            array[self.target[pick]] += correction[pick]  # one unknown per component: no repeats

    def largest_move(self, correction: np.ndarray) -> float:
        """Largest correction in metres; orientations count at a 1 km lever arm."""
        if correction.size == 0:
            return 0.0
        lever = np.where(self.kind == ORIENTATION, 1000.0, 1.0)
        return float(np.max(np.abs(correction) * lever))

    def coordinates(self) -> dict[str, tuple[float, float, float]]:
        columns = zip(self.east.tolist(), self.north.tolist(), self.height.tolist())
        return dict(zip(self.names, columns))

    def positions(self) -> dict[str, tuple[float, float, float]] | None:
        """Earth-centred positions (the geodetic model's state only)."""
        return None

    def orientation_dict(self) -> dict[int, float]:
        return dict(zip(self.round_lines, self.orientation.tolist()))

    def _start_orientations(self) -> np.ndarray:
        """Each round's orientation as the mean of (azimuth − direction) over its targets."""
        table = self.network.used_table
        with_round = [name for name, kind in self.kinds.items() if kind.has_round]
        lines = table.round_line
        pick = table.is_kind(*with_round) & np.isin(lines, self.round_lines)
        orientation = np.zeros(len(self.round_lines))
        if not pick.any():
            return orientation
        point = self.network.name_point
        r = np.searchsorted(self.round_lines, lines[pick])  # round_lines is sorted
        i, j, value = point[table.frm[pick]], point[table.to[pick]], table.value[pick]
        d_east = self.east[j] - self.east[i]
        d_north = self.north[j] - self.north[i]
        ok = np.isfinite(d_east) & np.isfinite(d_north)
        offset = np.arctan2(d_east[ok], d_north[ok]) - value[ok]
        # average on the circle: offsets near 0 and 2π must not cancel
        sines = np.bincount(r[ok], weights=np.sin(offset), minlength=len(self.round_lines))
        cosines = np.bincount(r[ok], weights=np.cos(offset), minlength=len(self.round_lines))
        return np.arctan2(sines, cosines)


def control_rows(network: Network) -> tuple[ControlRow, ...]:
    """Weighted control of estimated components, as rows: E and N together, then H."""
    rows: list[ControlRow] = []
    weighted = [p for p in network.points if p.weighted]
    if not weighted:  # the usual case: spares a set of every unknown
        return ()
    estimated = {(p.point, p.kind) for p in network.parameters}
    for p in weighted:
        if "en" in p.weighted and (p.name, "E") in estimated:
            assert p.east is not None and p.north is not None and p.sd_en is not None
            rows += [
                ControlRow(p.name, "E", p.east, p.sd_en),
                ControlRow(p.name, "N", p.north, p.sd_en),
            ]
        if "h" in p.weighted and (p.name, "H") in estimated:
            assert p.height is not None and p.sd_h is not None
            rows.append(ControlRow(p.name, "H", p.height, p.sd_h))
    return tuple(rows)
