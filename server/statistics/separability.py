"""Which w-tests are (nearly) the same test: observations the data cannot tell apart.

With uncorrelated observations, P = diag(1/σ²), the w-tests of observations
i and j are correlated by

    ρ_ij = (P·Qvv·P)_ij / √((P·Qvv·P)_ii·(P·Qvv·P)_jj) = R_ij / √(r_i·r_j),

where R = I − P^½·A·Qxx·Aᵀ·P^½ is the projector onto the residual space
(R_ii = r_i, the redundancy number).  R_ij is the cosine-like overlap of the
two observations' residual vectors, so |ρ_ij| = 1 exactly when every check
the network offers on i is also a check on j with a fixed ratio: sections in
series in a leveling line, the sides of a single loop, the two halves of a
run with no other redundancy.  A blunder in either then gives both the same
|w|, and leaving out the "largest" one is a coin toss.  An observation's
``inseparable`` list holds the lines whose |ρ| is at least 0.99.

How the pairs are found (``correlated_rows``):

* Small networks (at most ``DENSE_ROWS`` rows): R in full, from
  A·Qxx·Aᵀ applied to P^½ (block solves with the factor, ``BLOCK`` columns
  at a time, so no n×n array is held), every pair exact.
* Larger networks: no n×n matrix.  Two exact parts:

  1. *Simulated residuals* find every |ρ| = 1 group among all observations.
     k = ``SAMPLES`` vectors of unit white noise g are "adjusted" with the
     factor already in hand (one solve with k right-hand sides), giving
     y = R·g.  Cov(y) = R·Rᵀ = R, so y_i/√r_i over the k samples is a
     vector whose cosine with y_j/√r_j estimates ρ_ij; when |ρ_ij| = 1 the
     two vectors are identical up to sign in every sample (they are the same
     linear function of g), whatever k.  Sorting the sign-normalized vectors
     on a few rounded coordinates (twice, the grid shifted by half a cell, so
     rounding cannot split a group) brings identical ones next to each other,
     and neighbours equal to ``SAME_SIGNATURE`` in every sample are joined.
     Measured on the 100k-mark benchmark leveling, members of a group agree to
     1e-13.  A false join needs two different vectors to agree in all k
     random coordinates, which does not happen in floating point.  This is
     O(k·(solve + n log n)).
  2. Every flagged observation (the only ones the review acts on) gets its
     whole row of ρ exactly: A·Qxx·a_iᵀ for the flagged rows, solved in
     blocks of ``BLOCK`` right-hand sides (fewer where the rows are so many that a
     block would exceed ``MAX_BLOCK_ELEMENTS``).  So a flagged observation's list
     is complete at 0.99, not only at 1.  One solve serves a whole |ρ| = 1
     group (its members' columns of R are parallel, so their rows of ρ are
     equal up to sign): a blunder flags its whole series chain, and the
     chain costs one right-hand side.

  The exact rows cost one solve and one product with A each, both in proportion
  to the network, and a bigger network has proportionally more flagged groups: so
  their number is capped at ``EXACT_WORK`` / rows (at least ``MIN_EXACT_ROWS``,
  at most ``MAX_EXACT_ROWS``), which keeps this part linear in the size.  With
  ``priority`` (the |w| of each row) the groups of the largest w-tests come
  first, as a surveyor works through them; without it, the order given.  The
  cap does not bind on the benchmark books (79 groups at a million rows, the
  cap is 128 there) nor on anything under 2,000 rows (every pair exact).
  Flagged observations past the cap get their |ρ| = 1 partners only.

  What the large-network path does not search is a pair of two unflagged
  observations with 0.99 ≤ |ρ| < 1 (nearly, but not exactly, the same
  test, as two series chains joined by a much weaker tie): their lists
  hold their |ρ| = 1 partners only.  Flagged observations, which the
  verdict, the review and the snooping suggestion act on, are exact.

The numbers need only ``hat(B) = A·Qxx·Aᵀ·B`` from the engine
(``adjust.Solution.hat``), which is datum-invariant, so a free network's
minimal-datum factor serves as well as the inner-constraint Qxx.
"""

from __future__ import annotations

import itertools
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np

#: |ρ| at or above this makes two w-tests inseparable (contract value).
THRESHOLD = 0.99
#: Networks with at most this many rows (observations and weighted control) get R in full.
DENSE_ROWS = 2000
#: Simulated noise vectors for the |ρ| = 1 groups of large networks.
SAMPLES = 8
#: Two normalized signatures closer than this in every sample are the same test.
SAME_SIGNATURE = 1e-6
#: Signatures are sorted on this many samples rounded to this grid (see ``_simulated_groups``).
KEY_COLUMNS = 4
GRID = 1e-5
#: Right-hand sides per block solve for the exact rows of flagged observations.
BLOCK = 256
#: ... but no more than this many elements in one rows × block array (128 MB): at a million
#: rows a block of 256 would take 2 GB, and the solve returns another.
MAX_BLOCK_ELEMENTS = 16_000_000
#: Above this many flagged observations only the |ρ| = 1 groups are searched for the rest.
MAX_EXACT_ROWS = 4096
#: Exact rows × network rows allowed (128 exact rows at a million rows, about 3 s) ...
EXACT_WORK = 1 << 27
#: ... but never fewer exact rows than this.
MIN_EXACT_ROWS = 64
#: Columns of ρ per block when every pair of a small network is worked (``_all_pairs``):
#: measured fastest on the 1,092-row typical book (64: 11 ms, 128: 15, the full square: 17).
PAIR_BLOCK = 64
#: Candidates × exact rows compared at a time (2 MB of products: stays in cache).
CHUNK_ELEMENTS = 1 << 18

Hat = Callable[[np.ndarray], np.ndarray]


def correlated_rows(
    hat: Hat,
    sigmas: np.ndarray,
    redundancy: np.ndarray,
    candidates: np.ndarray,
    exact_rows: Sequence[int],
    *,
    dense_rows: int = DENSE_ROWS,
    threshold: float = THRESHOLD,
    priority: np.ndarray | None = None,
) -> list[tuple[int, ...]]:
    """For each row, the other rows in ``candidates`` whose w-test has |ρ| ≥ threshold.

    ``sigmas`` and ``redundancy`` cover every row of A (control rows too);
    ``candidates`` are the rows that have a w-test (controlled field
    observations); ``exact_rows`` (a subset) get their whole row exactly, within the
    cap of large networks, taken by descending ``priority`` (per row) when it is given.
    Each tuple is in ascending order; rows outside ``candidates`` get ().
    """
    n = sigmas.shape[0]
    out: list[tuple[int, ...]] = [()] * n
    candidates = np.asarray(candidates, dtype=np.int64)
    if candidates.size < 2:
        return out
    root_p = 1.0 / sigmas
    scale = np.sqrt(np.maximum(redundancy, 0.0))
    columns = _ExactColumns(hat, root_p, candidates)
    pairs: list[tuple[np.ndarray, np.ndarray]] = []
    if n <= dense_rows and columns.direct and hasattr(hat, "inverse"):
        pairs.append(_all_pairs(hat, root_p, scale, candidates, threshold))
    elif n <= dense_rows:
        # every row exact, in blocks so that no n×n array is held
        for start in range(0, candidates.size, BLOCK):
            rows = candidates[start : start + BLOCK]
            pairs.append(_pairs(columns, root_p, scale, rows, candidates, threshold))
    else:
        _simulated_groups(hat, root_p, redundancy, candidates, out)
        if priority is not None:
            ranked = np.asarray(exact_rows, dtype=np.int64)
            exact_rows = ranked[np.argsort(-priority[ranked], kind="stable")].tolist()
        limit = min(MAX_EXACT_ROWS, max(MIN_EXACT_ROWS, EXACT_WORK // n))
        exact = _representatives(exact_rows, candidates, out, n, limit)
        block = max(1, min(BLOCK, MAX_BLOCK_ELEMENTS // n))
        for start in range(0, exact.size, block):
            rows = exact[start : start + block]
            pairs.append(_pairs(columns, root_p, scale, rows, candidates, threshold))
    groups = list(out)
    extra: dict[int, set[int]] = {}
    for first, second in pairs:
        for a, b in zip(first.tolist(), second.tolist()):
            # the members of a's |ρ| = 1 group have a's row of ρ up to sign
            for c in (a, *groups[a]):
                if c != b:
                    extra.setdefault(c, set()).add(b)
                    extra.setdefault(b, set()).add(c)
    for a, others in extra.items():
        out[a] = tuple(sorted(others.union(out[a])))
    return out


def _representatives(
    exact_rows: Sequence[int],
    candidates: np.ndarray,
    groups: Sequence[Sequence[int]],
    n: int,
    limit: int = MAX_EXACT_ROWS,
) -> np.ndarray:
    """The rows to solve for exactly: one per |ρ| = 1 group, since its members share
    their column of R up to scale; the first ``limit`` in the order given."""
    member = np.zeros(n, bool)
    member[candidates] = True
    covered: set[int] = set()
    chosen: list[int] = []
    for i in exact_rows:
        if len(chosen) >= limit:
            break
        if member[i] and i not in covered:
            chosen.append(i)
            covered.add(i)
            covered.update(groups[i])
    return np.array(chosen, dtype=np.int64)


def correlation_rows(
    hat: Hat, sigmas: np.ndarray, redundancy: np.ndarray, rows: np.ndarray
) -> np.ndarray:
    """ρ[rows[k], j] for every row j: the exact correlations of a few w-tests with all others.

    Column i of R is e_i − P^½·A·Qxx·Aᵀ·P^½·e_i; rows with r = 0 give 0.
    """
    rows = np.asarray(rows, dtype=np.int64)
    n = sigmas.shape[0]
    root_p = 1.0 / sigmas
    unit = np.zeros((n, rows.size))
    unit[rows, np.arange(rows.size)] = root_p[rows]
    r_columns = -root_p[:, None] * hat(unit)
    r_columns[rows, np.arange(rows.size)] += 1.0
    scale = np.sqrt(np.maximum(redundancy, 0.0))
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = r_columns / scale[:, None] / scale[rows][None, :]
    return np.nan_to_num(rho, nan=0.0, posinf=0.0, neginf=0.0).T


def _pairs(
    columns: _ExactColumns,
    root_p: np.ndarray,
    scale: np.ndarray,
    rows: np.ndarray,
    candidates: np.ndarray,
    threshold: float,
) -> tuple[np.ndarray, np.ndarray]:
    """(row, candidate) pairs with |ρ| ≥ threshold, ρ computed exactly for ``rows``.

    The test |R_ij| ≥ threshold·√(r_i·r_j) (``scale`` = √r) is ρ's without dividing by a
    vanishing r.  The candidates are taken ``CHUNK_ELEMENTS`` products at a time, so that
    no rows × candidates array is held: at a million rows such temporaries cost more in
    page faults than the arithmetic.
    """
    products = columns.block(rows)
    chunk = max(1, CHUNK_ELEMENTS // max(1, rows.size))
    firsts, seconds = [], []
    for start in range(0, candidates.size, chunk):
        part = candidates[start : start + chunk]
        # −R off the diagonal on these candidates' rows, worked in place (the same products)
        r_columns = products(start, start + part.size)
        r_columns *= root_p[part][:, None]
        np.abs(r_columns, out=r_columns)
        bound = threshold * scale[part][:, None] * scale[rows][None, :]
        # flatnonzero and divmod: np.nonzero's order, in a tenth of its time
        second, first = np.divmod(np.flatnonzero(r_columns >= bound), rows.size)
        firsts.append(rows[first])
        seconds.append(part[second])
    return np.concatenate(firsts), np.concatenate(seconds)


def _all_pairs(
    hat: Any, root_p: np.ndarray, scale: np.ndarray, candidates: np.ndarray, threshold: float
) -> tuple[np.ndarray, np.ndarray]:
    """Every (i, j), i < j, of the candidates with |ρ_ij| ≥ threshold, from R in full.

    Off the diagonal R = −P^½·A·Qxx·Aᵀ·P^½, and with Qxx = N⁻¹ in full (one solve of the
    identity: u right-hand sides, where a solve per observation takes n) the candidates'
    block is two products with their sparse rows of P^½·A.  At most ``DENSE_ROWS`` rows: the
    u × u inverse and blocks of ``PAIR_BLOCK`` columns (1 MB each at 2,000 rows).
    """
    import scipy.sparse

    # the rows of P^½·A divided by √r: the products below are then ρ itself
    design = scipy.sparse.csr_matrix(hat.design[candidates])
    row_scale = root_p[candidates] / scale[candidates]
    design.data = design.data * np.repeat(row_scale, np.diff(design.indptr))
    # C order (the engine's already is): a sparse product copies any other for every block
    inverse = np.ascontiguousarray(hat.inverse())
    m = candidates.size
    firsts, seconds = [], []
    # the upper triangle a block of columns at a time: half the products of the full
    # square, and blocks that stay in cache; each element is the same sum as in the square
    for start in range(0, m, PAIR_BLOCK):
        end = min(m, start + PAIR_BLOCK)
        right = np.ascontiguousarray(np.asarray(_row_range(design, start, end) @ inverse).T)
        rho = np.asarray(_row_range(design, 0, end) @ right)  # −ρ off the diagonal, rows :end
        np.abs(rho, out=rho)
        first, second = np.divmod(np.flatnonzero(rho >= threshold), end - start)
        second += start
        upper = first < second
        firsts.append(first[upper])
        seconds.append(second[upper])
    return candidates[np.concatenate(firsts)], candidates[np.concatenate(seconds)]


def _row_range(matrix: Any, start: int, end: int) -> Any:
    """Rows start:end of a CSR matrix on views of its arrays: the same rows as
    ``matrix[start:end]``, without the indexing machinery (half the time at this size)."""
    import scipy.sparse

    indptr = matrix.indptr
    first, last = int(indptr[start]), int(indptr[end])
    return scipy.sparse.csr_matrix(
        (matrix.data[first:last], matrix.indices[first:last], indptr[start : end + 1] - first),
        shape=(end - start, matrix.shape[1]),
    )


class _ExactColumns:
    """Columns of A·Qxx·Aᵀ·P^½ for unit vectors, on the candidates' rows.

    With the engine's ``HatProduct`` each block of columns is one solve from the rows of A
    (``solve_rows``), and each slice of candidates its own sparse product with A's rows:
    the same sums, in the same order, as ``hat`` of the unit block.  Any other callable
    (the tests' dense hat) is applied to the unit block.
    """

    def __init__(self, hat: Hat, root_p: np.ndarray, candidates: np.ndarray) -> None:
        self.hat = hat
        self.root_p = root_p
        self.candidates = candidates
        self._design: Any = None  # A's candidate rows, taken on first use
        self.direct = hasattr(hat, "solve_rows") and hasattr(hat, "design")

    def block(self, rows: np.ndarray) -> Callable[[int, int], np.ndarray]:
        """(start, end) ↦ the columns of ``rows`` on candidates[start:end], to overwrite."""
        root_p = self.root_p
        if not self.direct:
            unit = np.zeros((root_p.shape[0], rows.size))
            unit[rows, np.arange(rows.size)] = root_p[rows]
            full = self.hat(unit)[self.candidates]
            return lambda start, end: full[start:end]
        if self._design is None:
            self._design = self.hat.design[self.candidates]  # type: ignore[attr-defined]
        design = self._design
        # C order once: a sparse product copies a Fortran-ordered operand at every call
        solved = np.ascontiguousarray(self.hat.solve_rows(rows, root_p[rows]))  # type: ignore[attr-defined]
        return lambda start, end: np.asarray(design[start:end] @ solved)


def _simulated_groups(
    hat: Hat,
    root_p: np.ndarray,
    redundancy: np.ndarray,
    candidates: np.ndarray,
    out: list[tuple[int, ...]],
) -> None:
    """Join rows whose simulated standardized residuals agree in every sample (|ρ| = 1).

    The signatures are sorted on a few coordinates rounded to ``GRID``; members of a
    group round alike unless they straddle a grid line, so a second pass on a grid
    shifted by half a cell catches those.  Neighbours in either order that agree to
    ``SAME_SIGNATURE`` in all samples are linked, and the linked sets are the groups.
    """
    import scipy.sparse
    from scipy.sparse.csgraph import connected_components

    n = root_p.shape[0]
    noise = np.random.default_rng(20260).standard_normal((n, SAMPLES))
    # R·g = g − P^½·hat(P^½·g), worked in place: at a million rows every fresh n × k array
    # costs more in page faults than its arithmetic (the same operations as a plain formula)
    residual = hat(root_p[:, None] * noise)
    residual *= root_p[:, None]
    np.subtract(noise, residual, out=residual)
    del noise
    signature = residual[candidates]
    del residual
    signature /= np.sqrt(redundancy[candidates])[:, None]
    np.negative(signature, out=signature, where=signature[:, :1] < 0.0)
    first, second = [], []
    for shift in (0.0, 0.5):
        keys = np.floor(signature[:, :KEY_COLUMNS] / GRID + shift).astype(np.int64)
        order = np.lexsort(keys.T[::-1])
        del keys
        # neighbours in this order that agree in every sample, a cache-sized slice at a time
        step = max(2, CHUNK_ELEMENTS // SAMPLES)
        same = np.concatenate(
            [
                start
                + np.flatnonzero(
                    np.all(
                        np.abs(np.diff(signature[order[start : start + step + 1]], axis=0))
                        <= SAME_SIGNATURE,
                        axis=1,
                    )
                )
                for start in range(0, max(1, order.size - 1), step)
            ]
        )
        first.append(order[same])
        second.append(order[same + 1])
    a, b = np.concatenate(first), np.concatenate(second)
    if a.size == 0:
        return
    m = candidates.size
    links = scipy.sparse.coo_matrix((np.ones(a.size), (a, b)), shape=(m, m))
    _, label = connected_components(links, directed=False)
    grouped = np.flatnonzero(np.bincount(label)[label] >= 2)
    grouped = grouped[np.argsort(label[grouped], kind="stable")]
    bounds = [0, *(np.flatnonzero(np.diff(label[grouped])) + 1).tolist(), grouped.size]
    members = candidates[grouped].tolist()
    for start, end in itertools.pairwise(bounds):
        group = tuple(sorted(members[start:end]))
        for k, row in enumerate(group):
            out[row] = group[:k] + group[k + 1 :]
