"""The rows of the design matrix A for a whole network, kind by kind, from ``kinds.py``.

``kinds.KINDS`` defines each observation kind (equation, partial derivatives,
a priori σ) for a whole batch at once; this module groups the used field
observations by kind, calls the table once per kind and lays the partials out
as the rows of A in a fixed sparse layout (``row_ptr``, ``slot_col``): the
columns of every row are known before the first iteration, only the numbers
change.  Rows are the used field observations in ``network.used`` order
(``components`` rows each), then the weighted control rows.

Columns are indices into ``columns`` (normally the network's parameters);
a component whose column is −1 (held fixed, or removed for a minimal datum)
contributes nothing and takes no slot.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass
from functools import cached_property, partial
from typing import Any

import numpy as np

from server.errors import NetworkError
from server.fieldbook.model import Observation
from server.fieldbook.table import ObservationTable, table_of
from server.model.kinds import (
    KINDS,
    Batch,
    CoincidentPointsError,
    Covariance,
    Kind,
    Positions,
    table_batch,
)
from server.model.whitening import BlockSet, CorrelatedBlock, Whitening, constant_blocks

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
    """The rows of one kind (``kind`` None: control rows) and where their partials go."""

    kind: Kind | None
    rows: np.ndarray  # row numbers, observation-major (components rows per observation)
    observations: np.ndarray  # index into ``used`` of each observation of the group
    batch: Batch | None
    cols: np.ndarray  # (rows, k) columns of the kind's partials, −1 where not estimated
    valid: np.ndarray  # cols ≥ 0
    dest: np.ndarray  # slot positions of the valid entries, row-major


@dataclass
class _Control:
    """Control rows: point, component (0 E, 1 N, 2 H), given value and σ."""

    point: np.ndarray
    component: np.ndarray
    given: np.ndarray
    sigma: np.ndarray


@dataclass(frozen=True)
class GeodeticRows:
    """What the geodetic model changes in the assembly: its kinds table, each point's geoid
    undulation (by name), and its control equation ``control(xyz, point, component)`` giving
    grid east, north or orthometric height (metres) of the control rows and their partials
    (c, 3) with respect to the local E, N, H corrections of the point."""

    kinds: Mapping[str, Kind]
    undulation: Mapping[str, float]
    control: Callable[[np.ndarray, np.ndarray, np.ndarray], tuple[np.ndarray, np.ndarray]]


@dataclass
class Evaluation:
    """One linearisation: slot values of A, misclosures l = observed − computed, σ.

    Rows of correlated blocks are whitened (``whitening.py``): their slot
    values and misclosures are L⁻¹ times the observations' and their σ is 1;
    ``computed`` is always the observations' own.  ``factors`` hold, per set of
    blocks, the rows (b, k) and the Cholesky factors L (b, k, k).
    """

    slot_val: np.ndarray
    misclosure: np.ndarray
    computed: np.ndarray
    sigmas: np.ndarray
    factors: tuple[tuple[np.ndarray, np.ndarray], ...] = ()

    @cached_property
    def weights(self) -> np.ndarray:
        """P's diagonal, 1/σ², in the rows the engine sees (whitened rows: 1); computed once."""
        return 1.0 / self.sigmas**2

    def unwhiten(self, values: np.ndarray) -> np.ndarray:
        """A vector over the rows (such as residuals) carried back from the whitened rows to
        the observations: L·v̄ in each block, other rows unchanged."""
        out = np.array(values, dtype=float)
        for rows, factor in self.factors:
            out[rows] = np.einsum("bij,bj->bi", factor, out[rows])
        return out


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
    kinds : mapping
        The observation kinds by name (``kinds.KINDS``; tests add their own).
    correlated : sequence of CorrelatedBlock
        Groups of observation rows with a full covariance, whitened on evaluation.
    model : GeodeticRows, optional
        The geodetic model's kinds, undulations and control equation; without it the
        plane kinds of ``kinds.KINDS`` and control rows that observe a coordinate directly.
    table : ObservationTable, optional
        ``used`` as columns (``Network.used_table``); tabled from ``used`` when not given.
        The layout is read from it, never from the objects.
    name_point : ndarray, optional
        ``point_index`` of each name of ``table.names`` (−1: none), as ``Network.name_point``
        holds it; looked up name by name when not given.
    """

    row_ptr: np.ndarray  # slots of row r: row_ptr[r] … row_ptr[r+1]−1
    slot_col: np.ndarray  # the column of each slot

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
        kinds: Mapping[str, Kind] = KINDS,
        correlated: Sequence[CorrelatedBlock] = (),
        model: GeodeticRows | None = None,
        table: ObservationTable | None = None,
        name_point: np.ndarray | None = None,
    ) -> None:
        self.model = model
        if model is not None:
            kinds = model.kinds
        self.kinds = kinds
        if table is None:
            whole, rows = table_of(used)
            table = whole if rows is None else whole.take(rows)
        present = [table.kinds[code] for code in np.unique(table.kind).tolist()]
        unknown_kinds = sorted(set(present) - set(kinds))
        if unknown_kinds:
            raise ValueError(f"no observation equation for {unknown_kinds}")
        per_code = np.ones(len(table.kinds), np.int64)
        for name in present:
            per_code[table.code(name)] = kinds[name].components
        #: first row of each used observation (one row per component)
        self.first_row = np.zeros(len(table) + 1, np.int64)
        np.cumsum(per_code[table.kind], out=self.first_row[1:])
        self.n_used = int(self.first_row[-1])
        self.n_rows = self.n_used + len(control)
        self.used = used
        self.control = tuple(control)
        columns = {"E": column_e, "N": column_n, "H": column_h, "O": column_o}
        point = name_point
        if point is None:
            names = table.names
            point = np.fromiter((point_index.get(name, -1) for name in names), np.int64, len(names))
        self.groups = [
            self._group(kind, members, table, point, round_index, columns)
            for name, kind in kinds.items()
            if name in present and (members := np.flatnonzero(table.is_kind(name))).size
        ]
        self._controls = self._control_group(columns)
        self._layout()
        sets = self._kind_blocks() + constant_blocks(list(correlated), self.n_used)
        self._whitening = Whitening(self.row_ptr, self.slot_col, sets) if sets else None
        if self._whitening is not None:  # the engine sees the whitened layout
            self.row_ptr, self.slot_col = self._whitening.row_ptr, self._whitening.slot_col

    def _kind_blocks(self) -> list[BlockSet]:
        """One k×k block per observation of each kind with correlated components."""
        sets = []
        for g in self.groups:
            kind, batch = g.kind, g.batch
            if kind is None or kind.covariance is None or batch is None:
                continue
            source = partial(_batch_covariance, kind.covariance, batch)
            sets.append(BlockSet(g.rows.reshape(-1, kind.components), source))
        return sets

    def _group(
        self,
        kind: Kind,
        members: np.ndarray,
        table: ObservationTable,
        point: np.ndarray,
        round_index: dict[int, int],
        columns: dict[str, np.ndarray],
    ) -> _Group:
        """The rows of one kind, their batch and the columns of their partials."""
        undulation = None if self.model is None else self.model.undulation
        batch = table_batch(kind, table, members, point, round_index, undulation)
        cols = np.stack(
            [columns[unknown][batch.role(role)] for role, unknown in kind.columns], axis=1
        )
        k = kind.components
        # every component row of an observation has the same columns
        rows = (self.first_row[members][:, None] + np.arange(k)).ravel()
        cols = np.repeat(cols, k, axis=0) if k > 1 else cols
        return _Group(kind, rows, members, batch, cols, cols >= 0, np.zeros(0, np.int64))

    def _control_group(self, columns: dict[str, np.ndarray]) -> _Control | None:
        control = self.control
        if not control:
            return None
        rows = np.arange(self.n_used, self.n_rows, dtype=np.int64)
        point = np.array([c.point for c in control], dtype=np.int64)
        component = np.array([c.component for c in control], dtype=np.int64)
        ce, cn, ch = columns["E"], columns["N"], columns["H"]
        if self.model is None:
            cols = np.choose(component, [ce[point], cn[point], ch[point]])[:, None]
        else:  # grid east, north and height each depend on all three local corrections
            cols = np.stack([ce[point], cn[point], ch[point]], axis=1)
        self.groups.append(
            _Group(None, rows, np.zeros(0, np.int64), None, cols, cols >= 0, np.zeros(0, np.int64))
        )
        given = np.array([c.given for c in control])
        return _Control(point, component, given, np.array([c.sigma for c in control]))

    def _layout(self) -> None:
        """The fixed layout: slots of each row, in row order (before any whitening)."""
        counts = np.zeros(self.n_rows, np.int64)
        for g in self.groups:
            counts[g.rows] = g.valid.sum(axis=1)
        self.row_ptr = np.zeros(self.n_rows + 1, np.int64)
        np.cumsum(counts, out=self.row_ptr[1:])
        self.slot_col = np.empty(int(self.row_ptr[-1]), np.int64)
        self._raw_slots = self.slot_col.shape[0]
        for g in self.groups:
            rank = np.cumsum(g.valid, axis=1) - 1
            g.dest = (self.row_ptr[g.rows][:, None] + rank)[g.valid]
            self.slot_col[g.dest] = g.cols[g.valid]

    def evaluate(
        self, east: np.ndarray, north: np.ndarray, height: np.ndarray, orientation: np.ndarray
    ) -> Evaluation:
        """Linearise every row about the given coordinates (metres) and orientations (radians)."""
        positions = Positions(east, north, height, orientation)
        slot_val = np.empty(self._raw_slots)
        misclosure = np.empty(self.n_rows)
        computed = np.empty(self.n_rows)
        sigmas = np.empty(self.n_rows)
        for g in self.groups:
            if g.kind is None:
                coefficients, value, observed, sigma = self._control_rows(positions)
            else:
                assert g.batch is not None
                try:
                    linearised = g.kind.equation(g.batch, positions)
                except CoincidentPointsError as caught:
                    raise self._coincident(g, caught.rows) from None
                coefficients, value = linearised.partials, linearised.value
                observed, sigma = g.batch.value, g.kind.sigma(g.batch, positions)
            difference = observed - value
            if g.kind is not None and g.kind.angular:
                difference = wrap_pi(difference)
            slot_val[g.dest] = coefficients[g.valid]
            misclosure[g.rows] = difference
            # an angle's computed value is the observed one less its wrapped misclosure
            computed[g.rows] = value if g.kind is None else observed - difference
            sigmas[g.rows] = sigma
        if self._whitening is None:
            return Evaluation(slot_val, misclosure, computed, sigmas)
        slot_val, factors = self._whitening.apply(slot_val, misclosure, sigmas, positions)
        return Evaluation(slot_val, misclosure, computed, sigmas, factors)

    def _control_rows(self, at: Positions) -> tuple[np.ndarray, ...]:
        """Partials (all 1), computed and given values and σ of the control rows."""
        c = self._controls
        assert c is not None
        if self.model is not None:
            xyz = np.stack([at.east[c.point], at.north[c.point], at.height[c.point]], axis=1)
            value, partials = self.model.control(xyz, c.point, c.component)
            return partials, value, c.given, c.sigma
        value = np.choose(c.component, [at.east[c.point], at.north[c.point], at.height[c.point]])
        return np.ones((c.point.size, 1)), value, c.given, c.sigma

    def design_matrix(self, slot_val: np.ndarray, n_columns: int) -> Any:
        """A as a scipy CSR matrix (for checks and small dense solves)."""
        import scipy.sparse

        return scipy.sparse.csr_matrix(
            (slot_val, self.slot_col, self.row_ptr), shape=(self.n_rows, n_columns)
        )

    def _coincident(self, g: _Group, rows: np.ndarray) -> NetworkError:
        """The error naming the points of the first row whose two points coincide."""
        obs = self.used[int(g.observations[rows[0]])]
        names = list(dict.fromkeys(n for n in (obs.from_point, obs.at, obs.to) if n))
        return NetworkError(
            f"points {' and '.join(names)} have the same position during the adjustment "
            f"(line {obs.line}); check their coordinates and observations",
            names,
        )


def _batch_covariance(covariance: Covariance, batch: Batch, positions: Positions) -> np.ndarray:
    return covariance(batch, positions)


def wrap_pi(angle: np.ndarray) -> np.ndarray:
    """Reduce angles to (−π, π] (the array form of ``units.wrap_pi``)."""
    reduced = angle - TWO_PI * np.round(angle / TWO_PI)
    return np.where(reduced <= -math.pi, reduced + TWO_PI, reduced)
