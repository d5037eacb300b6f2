"""The engine's state in the geodetic 3D model: Earth-centred positions, local corrections.

The coordinate arrays of the plane state hold X, Y, Z here, and the unknowns E, N, H of a
point are corrections along its local east, north and up at the current position, so a
step moves a point by Rᵀ·(δe, δn, δu) (``model/geodetic_equations.py``).  Weighted control
observes grid east, north (metres) and the orthometric height.  Each round's start
orientation is the mean of (horizon azimuth − direction) over its targets.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from server.engine.state import State
from server.geodesy import frames
from server.model import geodetic_equations as ge
from server.model.assembly import Assembly, GeodeticRows
from server.model.geodetic import GeodeticFrame, height_only_points, observation_columns
from server.model.geodetic_kinds import geodetic_kinds
from server.model.network import Network
from server.model.whitening import CorrelatedBlock


class GeodeticState(State):
    """Positions X, Y, Z per point; unknowns along local east, north and up."""

    def __init__(self, network: Network, correlated: Sequence[CorrelatedBlock] = ()) -> None:
        frame = network.geodetic
        assert frame is not None
        self.frame: GeodeticFrame = frame
        start = {name: (float(x), float(y), float(z)) for name, (x, y, z) in frame.start.items()}
        super().__init__(network, start, geodetic_kinds(frame.crs, frame.refraction), correlated)
        self.undulation = np.array([frame.undulation.get(n, 0.0) for n in self.names])
        only = height_only_points(network.fieldbook)
        self.height_only = np.array([n in only for n in self.names], dtype=bool)

    def assembly(self, columns: dict[str, np.ndarray]) -> Assembly:
        frame = self.frame
        undulation = self.undulation

        def control(
            xyz: np.ndarray, point: np.ndarray, component: np.ndarray
        ) -> tuple[np.ndarray, np.ndarray]:
            values, jac = ge.control(frame.crs, xyz, undulation[point])
            rows = np.arange(len(point))
            return values[rows, component], jac[rows, component, :]

        model = GeodeticRows(self.kinds, frame.undulation, control)
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
            model,
            table=self.network.used_table,  # the table it would make of ``used``, made once
            name_point=self.network.name_point,
        )

    def apply(self, correction: np.ndarray) -> None:
        points = self.kind < 3
        delta = np.zeros((len(self.names), 3))
        delta[self.target[points], self.kind[points]] = correction[points]
        moved = np.flatnonzero(np.any(delta != 0.0, axis=1))
        if moved.size:
            xyz = self._xyz(moved)
            rot = ge.rotation_at(self.frame.crs.ellipsoid, xyz)
            shift = np.einsum("mji,mj->mi", rot, delta[moved])  # Rᵀ δ
            self.east[moved] += shift[:, 0]
            self.north[moved] += shift[:, 1]
            self.height[moved] += shift[:, 2]
        rounds = self.kind == 3
        self.orientation[self.target[rounds]] += correction[rounds]

    def positions(self) -> dict[str, tuple[float, float, float]]:
        return dict(
            zip(self.names, zip(self.east.tolist(), self.north.tolist(), self.height.tolist()))
        )

    def coordinates(self) -> dict[str, tuple[float, float, float]]:
        """Grid east, north (metres) and orthometric height of each point; east and north
        NaN for a point that has a height only."""
        crs = self.frame.crs
        per_unit = crs.metres_per_unit
        xyz = self._xyz(np.arange(len(self.names)))
        east, north, h = crs.ecef_to_grid(xyz)
        east = np.where(self.height_only, np.nan, np.asarray(east) * per_unit)
        north = np.where(self.height_only, np.nan, np.asarray(north) * per_unit)
        height = np.asarray(h) - self.undulation
        return dict(zip(self.names, zip(east.tolist(), north.tolist(), height.tolist())))

    def _xyz(self, index: np.ndarray) -> np.ndarray:
        return np.stack([self.east[index], self.north[index], self.height[index]], axis=1)

    def _start_orientations(self) -> np.ndarray:
        """Each round's orientation: circular mean of (horizon azimuth − direction)."""
        table, used = observation_columns(self.network.used)
        line = table.round_line[used]
        rows = used[(table.kind[used] == table.code("direction")) & (line >= 0)]
        round_of = np.array(
            [self.round_index.get(k, -1) for k in table.round_line[rows].tolist()], dtype=np.int64
        )
        rows, r = rows[round_of >= 0], round_of[round_of >= 0]
        orientation = np.zeros(len(self.round_lines))
        if not rows.size:
            return orientation
        point_of = np.array([self.point_index.get(name, -1) for name in table.names])
        i, j = point_of[table.frm[rows]], point_of[table.to[rows]]
        assert (i >= 0).all() and (j >= 0).all(), "every used observation's points are in the state"
        value = table.value[rows]
        xyz_i, xyz_j = self._xyz(i), self._xyz(j)
        ok = np.isfinite(xyz_i).all(axis=1) & np.isfinite(xyz_j).all(axis=1) & (i != j)
        ell = self.frame.crs.ellipsoid
        points = np.unique(np.concatenate([i[ok], j[ok]]))  # each point's frame once
        at_points = frames.local_frames(ell, self._xyz(points))
        row_i, row_j = np.searchsorted(points, i[ok]), np.searchsorted(points, j[ok])
        azimuth = frames.horizon_azimuth_value(
            ell,
            xyz_i[ok],
            xyz_j[ok],
            frames_from=at_points.take(row_i),
            frames_to=at_points.take(row_j),
        )
        offset = azimuth - value[ok]
        sines = np.bincount(r[ok], weights=np.sin(offset), minlength=len(self.round_lines))
        cosines = np.bincount(r[ok], weights=np.cos(offset), minlength=len(self.round_lines))
        return np.arctan2(sines, cosines)
