"""The observation equations of ``observations.py`` evaluated for all rows at once.

``observations.py`` is the reference: one function per kind, one
observation at a time, with the model derived in its docstring.  This
module computes the same values and partial derivatives with whole-array
numpy operations, kind by kind, and lays them out as the rows of the design
matrix A in a fixed sparse layout (``row_ptr``, ``slot_col``): the columns
of every row are known before the first iteration, only the numbers change.
Rows are the used field observations in ``network.used`` order, then the
weighted control rows.  ``tests/test_sparse.py`` checks it against the
reference function by function.

Columns are indices into ``columns`` (normally the network's parameters);
a component whose column is −1 (held fixed, or removed for a minimal datum)
contributes nothing and takes no slot.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from server.errors import NetworkError
from server.fieldbook.model import Observation

TWO_PI = 2.0 * math.pi


@dataclass(frozen=True, slots=True)
class ControlEquation:
    """A weighted control row: a direct observation of one coordinate component."""

    point: int  # index into the point arrays
    component: int  # 0 east, 1 north, 2 height
    given: float
    sigma: float


@dataclass
class _Group:
    """The rows of one kind: their row numbers, point indices and slot columns."""

    kind: str
    rows: np.ndarray
    frm: np.ndarray
    at: np.ndarray
    to: np.ndarray
    rnd: np.ndarray
    value: np.ndarray
    cols: np.ndarray  # (m, k) columns of the kind's partials, −1 where not estimated
    valid: np.ndarray  # cols ≥ 0
    dest: np.ndarray  # slot positions of the valid entries, row-major
    constant: np.ndarray
    centering: np.ndarray
    extra: np.ndarray  # kind-specific σ input (ppm for distances, level σ², …)


@dataclass
class Evaluation:
    """One linearisation: slot values of A, misclosures l = observed − computed, σ."""

    slot_val: np.ndarray
    misclosure: np.ndarray
    computed: np.ndarray
    sigmas: np.ndarray


class Assembly:
    """Fixed layout of A for a network; ``evaluate`` fills in the numbers.

    Parameters
    ----------
    used : sequence of Observation
        The used field observations, in row order.
    point_index : dict
        Point name → index into the coordinate arrays.
    round_index : dict
        Round line → index into the orientation array.
    column_e, column_n, column_h : ndarray
        Per point, the column of its east, north and height unknown (−1: none).
    column_o : ndarray
        Per round, the column of its orientation unknown (−1: none).
    control : sequence of ControlEquation
        Weighted control rows, after the observations.
    """

    def __init__(
        self,
        used: Sequence[Observation],
        point_index: dict[str, int],
        round_index: dict[int, int],
        column_e: np.ndarray,
        column_n: np.ndarray,
        column_h: np.ndarray,
        column_o: np.ndarray,
        control: Sequence[ControlEquation],
    ) -> None:
        self.n_rows = len(used) + len(control)
        self.n_used = len(used)
        self.used = used
        self.groups: list[_Group] = []
        by_kind: dict[str, list[int]] = {}
        for row, obs in enumerate(used):
            by_kind.setdefault(obs.kind, []).append(row)
        ce, cn, ch, co = column_e, column_n, column_h, column_o
        for kind in ("level", "distance", "azimuth", "direction", "angle"):
            rows_list = by_kind.pop(kind, None)
            if not rows_list:
                continue
            rows = np.array(rows_list, dtype=np.int64)
            obs_list = [used[r] for r in rows_list]
            frm = np.array([point_index[o.from_point] for o in obs_list], dtype=np.int64)
            to = np.array([point_index[o.to] for o in obs_list], dtype=np.int64)
            at = (
                np.array([point_index[o.at] for o in obs_list], dtype=np.int64)  # type: ignore[index]
                if kind == "angle"
                else frm
            )
            rnd = (
                np.array([round_index[o.round_line] for o in obs_list], dtype=np.int64)  # type: ignore[index]
                if kind == "direction"
                else np.zeros(len(rows), np.int64)
            )
            value = np.array([o.value for o in obs_list])
            constant = np.array([o.sigma.constant for o in obs_list])
            centering = np.array([o.centering for o in obs_list])
            if kind == "level":
                cols = np.stack([ch[to], ch[frm]], axis=1)
                # σ² = c² + k²·L + s²·K, summed in the order of Quantity.sigma_level
                k = np.array([o.sigma.per_sqrtkm for o in obs_list])
                s = np.array([o.sigma.per_setup for o in obs_list])
                length = np.array([o.length_km or 0.0 for o in obs_list])
                setups = np.array([o.setups or 0 for o in obs_list], dtype=float)
                variance = constant**2
                variance = np.where(k != 0.0, variance + k**2 * length, variance)
                variance = np.where(s != 0.0, variance + s**2 * setups, variance)
                extra = variance
            elif kind == "distance":
                cols = np.stack([ce[to], cn[to], ce[frm], cn[frm]], axis=1)
                extra = np.array([o.sigma.ppm for o in obs_list])
            elif kind == "azimuth":
                cols = np.stack([ce[to], cn[to], ce[frm], cn[frm]], axis=1)
                extra = np.zeros(0)
            elif kind == "direction":
                cols = np.stack([ce[to], cn[to], ce[frm], cn[frm], co[rnd]], axis=1)
                extra = np.zeros(0)
            else:  # angle: FORE, BACK, AT (AT's two azimuth partials combined)
                cols = np.stack([ce[to], cn[to], ce[frm], cn[frm], ce[at], cn[at]], axis=1)
                extra = np.zeros(0)
            self.groups.append(
                _Group(kind, rows, frm, at, to, rnd, value, cols, cols >= 0, np.zeros(0, np.int64),
                       constant, centering, extra)
            )
        if by_kind:
            raise ValueError(f"no observation equation for {sorted(by_kind)}")
        self.control = tuple(control)
        if control:
            rows = np.arange(len(used), self.n_rows, dtype=np.int64)
            point = np.array([c.point for c in control], dtype=np.int64)
            component = np.array([c.component for c in control], dtype=np.int64)
            cols = np.choose(component, [ce[point], cn[point], ch[point]])[:, None]
            self.groups.append(
                _Group("control", rows, point, point, point, component,
                       np.array([c.given for c in control]), cols, cols >= 0,
                       np.zeros(0, np.int64), np.array([c.sigma for c in control]),
                       np.zeros(len(control)), np.zeros(0))
            )
        # the fixed layout: slots of each row, in row order
        counts = np.zeros(self.n_rows, np.int64)
        for g in self.groups:
            counts[g.rows] = g.valid.sum(axis=1)
        self.row_ptr = np.zeros(self.n_rows + 1, np.int64)
        np.cumsum(counts, out=self.row_ptr[1:])
        self.slot_col = np.empty(int(self.row_ptr[-1]), np.int64)
        for g in self.groups:
            rank = np.cumsum(g.valid, axis=1) - 1
            g.dest = (self.row_ptr[g.rows][:, None] + rank)[g.valid]
            self.slot_col[g.dest] = g.cols[g.valid]

    def evaluate(
        self, east: np.ndarray, north: np.ndarray, height: np.ndarray, orientation: np.ndarray
    ) -> Evaluation:
        """Linearise every row about the given coordinates (metres) and orientations (radians)."""
        slot_val = np.empty(self.slot_col.shape[0])
        misclosure = np.empty(self.n_rows)
        computed = np.empty(self.n_rows)
        sigmas = np.empty(self.n_rows)
        for g in self.groups:
            coefficients, value, sigma = _EQUATIONS[g.kind](self, g, east, north, height, orientation)
            slot_val[g.dest] = coefficients[g.valid]
            if g.kind == "control":
                misclosure[g.rows] = g.value - value
                computed[g.rows] = value
            else:
                difference = g.value - value
                if g.kind in ("azimuth", "direction", "angle"):
                    difference = wrap_pi(difference)
                misclosure[g.rows] = difference
                computed[g.rows] = g.value - difference
            sigmas[g.rows] = sigma
        return Evaluation(slot_val, misclosure, computed, sigmas)

    def design_matrix(self, slot_val: np.ndarray, n_columns: int):  # -> scipy.sparse.csr_matrix
        """A as a scipy CSR matrix (for checks and small dense solves)."""
        import scipy.sparse

        return scipy.sparse.csr_matrix(
            (slot_val, self.slot_col, self.row_ptr), shape=(self.n_rows, n_columns)
        )

    def coincident(self, g: _Group, s2: np.ndarray) -> None:
        """Raise ``NetworkError`` for the first row whose two points coincide."""
        bad = np.flatnonzero(~(s2 > 0.0))
        if bad.size:
            obs = self.used[int(g.rows[bad[0]])]
            names = list(dict.fromkeys(n for n in (obs.from_point, obs.at, obs.to) if n))
            raise NetworkError(
                f"points {' and '.join(names)} have the same position during the adjustment "
                f"(line {obs.line}); check their coordinates and observations",
                names,
            )


def wrap_pi(angle: np.ndarray) -> np.ndarray:
    """Reduce angles to (−π, π] (the array form of ``units.wrap_pi``)."""
    reduced = angle - TWO_PI * np.round(angle / TWO_PI)
    return np.where(reduced <= -math.pi, reduced + TWO_PI, reduced)


def _polar(asm: Assembly, g: _Group, i: np.ndarray, j: np.ndarray, east: np.ndarray,
           north: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    d_east = east[j] - east[i]
    d_north = north[j] - north[i]
    s2 = d_east * d_east + d_north * d_north
    asm.coincident(g, s2)
    return d_east, d_north, s2


def _level(asm, g, east, north, height, orientation):
    value = height[g.to] - height[g.frm]
    coefficients = np.empty(g.cols.shape)
    coefficients[:, 0] = 1.0
    coefficients[:, 1] = -1.0
    return coefficients, value, np.sqrt(g.extra)


def _distance(asm, g, east, north, height, orientation):
    d_east, d_north, s2 = _polar(asm, g, g.frm, g.to, east, north)
    s = np.sqrt(s2)
    de, dn = d_east / s, d_north / s
    coefficients = np.stack([de, dn, -de, -dn], axis=1)
    sigma = np.sqrt(np.hypot(g.constant, g.extra * 1e-6 * g.value) ** 2 + 2.0 * g.centering**2)
    return coefficients, s, sigma


def _azimuth_terms(asm, g, i, j, east, north, sign):
    d_east, d_north, s2 = _polar(asm, g, i, j, east, north)
    value = np.arctan2(d_east, d_north)
    return value, sign * d_north / s2, -sign * d_east / s2, s2


def _azimuth(asm, g, east, north, height, orientation):
    value, de, dn, _ = _azimuth_terms(asm, g, g.frm, g.to, east, north, 1.0)
    return np.stack([de, dn, -de, -dn], axis=1), value, g.constant


def _direction(asm, g, east, north, height, orientation):
    value, de, dn, s2 = _azimuth_terms(asm, g, g.frm, g.to, east, north, 1.0)
    coefficients = np.stack([de, dn, -de, -dn, np.full(de.shape, -1.0)], axis=1)
    c = g.centering
    d = np.sqrt(s2)
    centred = np.sqrt(g.constant**2 + 2.0 * c * c / (d * d))
    sigma = np.where(c != 0.0, centred, g.constant)
    return coefficients, value - orientation[g.rnd], sigma


def _angle(asm, g, east, north, height, orientation):
    fore, de_f, dn_f, s2_f = _azimuth_terms(asm, g, g.at, g.to, east, north, 1.0)
    back, de_b, dn_b, s2_b = _azimuth_terms(asm, g, g.at, g.frm, east, north, -1.0)
    coefficients = np.stack([de_f, dn_f, de_b, dn_b, -de_f - de_b, -dn_f - dn_b], axis=1)
    c = g.centering
    d3e = east[g.to] - east[g.frm]
    d3n = north[g.to] - north[g.frm]
    d1, d2 = np.sqrt(s2_b), np.sqrt(s2_f)
    d3 = np.sqrt(d3e * d3e + d3n * d3n)
    instrument = c * c * d3 * d3 / (d1 * d1 * d2 * d2)
    targets = c * c * (1.0 / (d1 * d1) + 1.0 / (d2 * d2))
    sigma = np.where(c != 0.0, np.sqrt(g.constant**2 + instrument + targets), g.constant)
    return coefficients, fore - back, sigma


def _control(asm, g, east, north, height, orientation):
    value = np.choose(g.rnd, [east[g.frm], north[g.frm], height[g.frm]])
    return np.ones(g.cols.shape), value, g.constant


_EQUATIONS = {
    "level": _level,
    "distance": _distance,
    "azimuth": _azimuth,
    "direction": _direction,
    "angle": _angle,
    "control": _control,
}
