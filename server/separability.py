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
  A·Qxx·Aᵀ applied to P^½ (one block solve with the factor), every pair
  exact.
* Larger networks: no n×n matrix.  Two exact parts:

  1. *Simulated residuals* find every |ρ| = 1 group among all observations.
     k = ``SAMPLES`` vectors of unit white noise g are "adjusted" with the
     factor already in hand (one solve with k right-hand sides), giving
     y = R·g.  Cov(y) = R·Rᵀ = R, so y_i/√r_i over the k samples is a
     vector whose cosine with y_j/√r_j estimates ρ_ij; when |ρ_ij| = 1 the
     two vectors are identical up to sign in every sample (they are the same
     linear function of g), whatever k.  Sorting the sign-normalized vectors
     brings identical ones next to each other, and neighbours equal to
     ``SAME_SIGNATURE`` are joined.  A false join needs two different
     vectors to agree in all k random coordinates, which does not happen in
     floating point.  This is O(k·(solve + n log n)).
  2. Every flagged observation (the only ones the review acts on) gets its
     whole row of ρ exactly: A·Qxx·a_iᵀ for the flagged rows, solved in
     blocks of ``BLOCK`` right-hand sides.  So a flagged observation's list
     is complete at 0.99, not only at 1.

  What the large-network path does not search is a pair of two unflagged
  observations with 0.99 ≤ |ρ| < 1 (nearly, but not exactly, the same
  test); the dense path and the flagged rows cover the cases the review
  and the snooping suggestion use.

The numbers need only ``hat(B) = A·Qxx·Aᵀ·B`` from the engine
(``adjust.Solution.hat``), which is datum-invariant, so a free network's
minimal-datum factor serves as well as the inner-constraint Qxx.
"""

from __future__ import annotations

from collections.abc import Callable, Sequence

import numpy as np

#: |ρ| at or above this makes two w-tests inseparable (contract value).
THRESHOLD = 0.99
#: Networks with at most this many rows (observations and weighted control) get R in full.
DENSE_ROWS = 2000
#: Simulated noise vectors for the |ρ| = 1 groups of large networks.
SAMPLES = 16
#: Two normalized signatures closer than this in every sample are the same test.
SAME_SIGNATURE = 1e-6
#: Right-hand sides per block solve for the exact rows of flagged observations.
BLOCK = 256
#: Above this many flagged observations only the |ρ| = 1 groups are searched for the rest.
MAX_EXACT_ROWS = 4096

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
) -> list[list[int]]:
    """For each row, the other rows in ``candidates`` whose w-test has |ρ| ≥ threshold.

    ``sigmas`` and ``redundancy`` cover every row of A (control rows too);
    ``candidates`` are the rows that have a w-test (controlled field
    observations); ``exact_rows`` (a subset) get their whole row exactly.
    Lists are sorted; rows outside ``candidates`` get empty lists.
    """
    n = sigmas.shape[0]
    out: list[set[int]] = [set() for _ in range(n)]
    candidates = np.asarray(candidates, dtype=np.int64)
    if candidates.size < 2:
        return [[] for _ in range(n)]
    root_p = 1.0 / sigmas
    if n <= dense_rows:
        _dense(hat, root_p, redundancy, candidates, threshold, out)
    else:
        _simulated_groups(hat, root_p, redundancy, candidates, out)
        member = np.zeros(n, bool)
        member[candidates] = True
        exact = np.array([i for i in exact_rows if member[i]], dtype=np.int64)[:MAX_EXACT_ROWS]
        _exact_rows(hat, root_p, redundancy, candidates, exact, threshold, out)
    return [sorted(s) for s in out]


def correlation_rows(hat: Hat, sigmas: np.ndarray, redundancy: np.ndarray, rows: np.ndarray) -> np.ndarray:
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


def _dense(hat: Hat, root_p, redundancy, candidates, threshold, out) -> None:
    rho = correlation_rows(hat, 1.0 / root_p, redundancy, candidates)[:, candidates]
    first, second = np.nonzero(np.abs(rho) >= threshold)
    for a, b in zip(candidates[first].tolist(), candidates[second].tolist()):
        if a != b:
            out[a].add(b)
            out[b].add(a)


def _exact_rows(hat: Hat, root_p, redundancy, candidates, exact, threshold, out) -> None:
    for start in range(0, exact.size, BLOCK):
        block = exact[start:start + BLOCK]
        rho = correlation_rows(hat, 1.0 / root_p, redundancy, block)[:, candidates]
        first, second = np.nonzero(np.abs(rho) >= threshold)
        for a, b in zip(block[first].tolist(), candidates[second].tolist()):
            if a != b:
                out[a].add(b)
                out[b].add(a)


def _simulated_groups(hat: Hat, root_p, redundancy, candidates, out) -> None:
    """Join rows whose simulated standardized residuals agree in every sample (|ρ| = 1)."""
    n = root_p.shape[0]
    noise = np.random.default_rng(20260).standard_normal((n, SAMPLES))
    residual = noise - root_p[:, None] * hat(root_p[:, None] * noise)  # R·g
    signature = residual[candidates] / np.sqrt(redundancy[candidates])[:, None]
    signature *= np.where(signature[:, :1] < 0.0, -1.0, 1.0)
    order = np.lexsort(signature.T[::-1])
    ranked = signature[order]
    same = np.all(np.abs(np.diff(ranked, axis=0)) <= SAME_SIGNATURE * np.sqrt(SAMPLES), axis=1)
    # runs of equal neighbours are the groups
    starts = np.flatnonzero(np.concatenate([[True], ~same]))
    ends = np.concatenate([starts[1:], [ranked.shape[0]]])
    for s, e in zip(starts.tolist(), ends.tolist()):
        if e - s < 2:
            continue
        group = candidates[order[s:e]].tolist()
        for a in group:
            out[a].update(b for b in group if b != a)
