"""Correlated observations, whitened before they reach the normal equations.

A block of k rows with covariance C = L·Lᵀ (Cholesky factor L) is replaced by

    Ā = L⁻¹·A,   l̄ = L⁻¹·l,   unit weights,

because ĀᵀĀ = Aᵀ·C⁻¹·A and Āᵀ·l̄ = Aᵀ·C⁻¹·l: the normal equations of the
whitened rows are those of the full weight matrix P = C⁻¹, so the engine can
keep one weight per row.  The whitened rows are uncorrelated with unit
variance, which keeps every statistic built on diagonals of Qvv right for
them: redundancy numbers, w-tests and vᵀPv = v̄ᵀv̄ refer to the decorrelated
observations v̄ = L⁻¹·v.  ``Evaluation.unwhiten`` carries a whitened vector
back to the observations (v = L·v̄).  Rows outside any block are untouched,
so an uncorrelated network is computed exactly as before.

Blocks come from a kind with several components per observation and a
covariance (one k×k block per observation, evaluated each iteration) or are
given as ``CorrelatedBlock`` (any rows, constant covariance).  A whitened row
mixes the columns of all rows of its block, so its slots are the union of
theirs; like A's, this layout is fixed before the first iteration.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from functools import partial

import numpy as np

from server.model.kinds import Positions

#: Covariances (b, k, k) of the blocks of a set, from the current positions.
CovarianceSource = Callable[[Positions], np.ndarray]


@dataclass(frozen=True)
class CorrelatedBlock:
    """Rows of the observations that are correlated, and their covariance (SI units²)."""

    rows: tuple[int, ...]
    covariance: np.ndarray


@dataclass
class BlockSet:
    """Blocks of equal size k: their rows (b, k) and where their covariances come from."""

    rows: np.ndarray
    covariance: CovarianceSource
    # filled by the layout: raw slots → dense (b, k, width) array → whitened slots
    gather: np.ndarray | None = None
    scatter: np.ndarray | None = None
    width: int = 0
    take: np.ndarray | None = None
    put: np.ndarray | None = None


def constant_blocks(blocks: list[CorrelatedBlock], n_rows: int) -> list[BlockSet]:
    """Given blocks checked and grouped by size; ValueError names a bad one."""
    by_size: dict[int, list[CorrelatedBlock]] = {}
    for number, block in enumerate(blocks, start=1):
        k = len(block.rows)
        covariance = np.asarray(block.covariance, dtype=float)
        if k == 0 or covariance.shape != (k, k) or len(set(block.rows)) != k:
            raise ValueError(f"correlated block {number}: needs k distinct rows and a k×k matrix")
        if min(block.rows) < 0 or max(block.rows) >= n_rows:
            raise ValueError(f"correlated block {number}: a row is not an observation's row")
        if not np.allclose(covariance, covariance.T, rtol=1e-12, atol=0.0):
            raise ValueError(f"correlated block {number}: the covariance is not symmetric")
        try:
            np.linalg.cholesky(covariance)
        except np.linalg.LinAlgError:
            raise ValueError(
                f"correlated block {number}: the covariance is not positive definite"
            ) from None
        by_size.setdefault(k, []).append(block)
    sets = []
    for members in by_size.values():
        stacked = np.stack([np.asarray(b.covariance, dtype=float) for b in members])
        rows = np.array([b.rows for b in members], dtype=np.int64)
        sets.append(BlockSet(rows, partial(_constant, stacked)))
    return sets


def _constant(covariance: np.ndarray, positions: Positions) -> np.ndarray:
    return covariance


class Whitening:
    """The whitened layout of A for some block sets, and the transformation of each
    evaluation's numbers into it.

    ``row_ptr``/``slot_col`` are the layout the engine sees; the raw layout is
    the assembly's, one slot per valid partial of each row.
    """

    def __init__(
        self, raw_row_ptr: np.ndarray, raw_slot_col: np.ndarray, sets: list[BlockSet]
    ) -> None:
        n_rows = raw_row_ptr.shape[0] - 1
        raw_counts = np.diff(raw_row_ptr)
        row_of_slot = np.repeat(np.arange(n_rows, dtype=np.int64), raw_counts)
        in_block = np.zeros(n_rows, bool)
        for s in sets:
            if in_block[s.rows.ravel()].any():
                raise ValueError("a row is in more than one correlated block")
            in_block[s.rows.ravel()] = True
        self.sets = sets
        counts = raw_counts.copy()
        n_columns = int(raw_slot_col.max()) + 1 if raw_slot_col.size else 0
        unions = [self._union(s, row_of_slot, raw_slot_col, n_columns, n_rows) for s in sets]
        for s, (count, _, _) in zip(sets, unions):
            counts[s.rows] = count[:, None]
        self.row_ptr = np.zeros(n_rows + 1, np.int64)
        np.cumsum(counts, out=self.row_ptr[1:])
        self.slot_col = np.empty(int(self.row_ptr[-1]), np.int64)
        # rows outside the blocks keep their slots, in the same order
        self.pass_src = np.flatnonzero(~in_block[row_of_slot])
        rows = row_of_slot[self.pass_src]
        self.pass_dst = self.row_ptr[rows] + (self.pass_src - raw_row_ptr[rows])
        self.slot_col[self.pass_dst] = raw_slot_col[self.pass_src]
        for s, (count, column, position) in zip(sets, unions):
            self._place(s, count, column, position)

    @staticmethod
    def _union(
        s: BlockSet, row_of_slot: np.ndarray, raw_slot_col: np.ndarray, n_columns: int, n_rows: int
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """Per block its number of distinct columns; per distinct column its block position.

        Sets ``gather``/``scatter``: each raw slot of a block row and its place in the
        dense (b, k, width) array, row (block, local row), column by rank in the union.
        """
        b, k = s.rows.shape
        block_of_row = np.full(n_rows, -1, np.int64)
        local_of_row = np.zeros(n_rows, np.int64)
        block_of_row[s.rows.ravel()] = np.repeat(np.arange(b), k)
        local_of_row[s.rows.ravel()] = np.tile(np.arange(k), b)
        slots = np.flatnonzero(block_of_row[row_of_slot] >= 0)
        block = block_of_row[row_of_slot[slots]]
        local = local_of_row[row_of_slot[slots]]
        key = block * (n_columns + 1) + raw_slot_col[slots]
        keys = np.unique(key)  # sorted: by block, then column
        key_block = keys // (n_columns + 1)
        count = np.bincount(key_block, minlength=b)
        start = np.concatenate([[0], np.cumsum(count)[:-1]])
        rank = np.arange(keys.size) - start[key_block]
        s.width = int(count.max()) if b else 0
        s.gather = slots
        s.scatter = (block * k + local) * s.width + rank[np.searchsorted(keys, key)]
        return count, keys % (n_columns + 1), rank

    def _place(self, s: BlockSet, count: np.ndarray, column: np.ndarray, rank: np.ndarray) -> None:
        """The whitened slots of every block row: the union's columns in order."""
        k = s.rows.shape[1]
        key_block = np.repeat(np.arange(count.size), count)
        local = np.arange(k)[None, :]
        rows = s.rows[key_block[:, None], local]  # (distinct columns, k)
        s.put = (self.row_ptr[rows] + rank[:, None]).ravel()
        s.take = ((key_block[:, None] * k + local) * s.width + rank[:, None]).ravel()
        self.slot_col[s.put] = np.repeat(column, k)

    def apply(
        self, raw: np.ndarray, misclosure: np.ndarray, sigmas: np.ndarray, positions: Positions
    ) -> tuple[np.ndarray, tuple[tuple[np.ndarray, np.ndarray], ...]]:
        """Whitened slot values; misclosures and σ whitened in place (σ = 1).

        Returns the slot values and, per set, its rows and Cholesky factors L.
        """
        slot_val = np.empty(self.slot_col.shape[0])
        slot_val[self.pass_dst] = raw[self.pass_src]
        factors = []
        for s in self.sets:
            b, k = s.rows.shape
            factor = np.linalg.cholesky(s.covariance(positions))
            inverse = np.linalg.inv(factor)  # k is small: L⁻¹ once, then products
            dense = np.zeros(b * k * s.width)
            dense[s.scatter] = raw[s.gather]
            whitened = inverse @ dense.reshape(b, k, s.width)
            slot_val[s.put] = whitened.reshape(-1)[s.take]
            misclosure[s.rows] = np.einsum("bij,bj->bi", inverse, misclosure[s.rows])
            sigmas[s.rows] = 1.0
            factors.append((s.rows, factor))
        return slot_val, tuple(factors)
