"""Naming what a singular normal matrix leaves undetermined.

When N is singular (a datum defect, or too few observations for some
unknowns), its null space holds the directions in which unknowns move
freely; the points with a large component there are named, so the surveyor
knows where a control point or an observation is missing.  Small N: the
eigenvectors of N scaled to a unit diagonal; large N: inverse iteration on
N + ε·diag(N), which brings out the same near-null space without a dense
eigendecomposition.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from server.model.network import Network

#: Above this many unknowns a singular N is diagnosed without a dense eigendecomposition.
DENSE_DIAGNOSIS_LIMIT = 3000


def diagnose(network: Network, matrix: Any, parameters: np.ndarray) -> tuple[str, list[str]]:
    """The message and point names for a singular N (dense array or scipy sparse matrix);
    ``parameters`` gives the unknown of each row of N."""
    if isinstance(matrix, np.ndarray):
        return singular_diagnosis(network, matrix, parameters)
    if matrix.shape[0] <= DENSE_DIAGNOSIS_LIMIT:
        return singular_diagnosis(network, matrix.toarray(), parameters)
    return sparse_singular_diagnosis(network, matrix, parameters)


def singular_diagnosis(
    network: Network, normal: np.ndarray, parameters: np.ndarray | None = None
) -> tuple[str, list[str]]:
    """Name the points that move freely in the null space of the normal matrix.

    ``parameters`` gives the unknown of each row of ``normal`` (all, in order, if None).
    """
    scale = np.sqrt(np.maximum(np.diag(normal), 1e-300))
    scaled = normal / np.outer(scale, scale)
    eigenvalues, vectors = np.linalg.eigh(scaled)
    null = vectors[:, eigenvalues < 1e-10 * max(eigenvalues.max(), 1.0)]
    free = np.abs(null).max(axis=1) > 1e-6 if null.size else np.zeros(len(normal), bool)
    return name_free(network, np.flatnonzero(free), parameters)


def sparse_singular_diagnosis(
    network: Network, matrix: Any, parameters: np.ndarray
) -> tuple[str, list[str]]:
    """The same for large N: inverse iteration on N + ε·diag(N) brings out its null space."""
    import scipy.sparse
    import scipy.sparse.linalg

    diagonal = np.maximum(matrix.diagonal(), 1e-300)
    scale = scipy.sparse.diags(1.0 / np.sqrt(diagonal))
    scaled = (scale @ matrix @ scale).tocsc()
    shifted = (scaled + 1e-9 * scipy.sparse.identity(scaled.shape[0], format="csc")).tocsc()
    lu = scipy.sparse.linalg.splu(
        shifted, permc_spec="MMD_AT_PLUS_A", diag_pivot_thresh=0.0, options={"SymmetricMode": True}
    )
    vectors = np.random.default_rng(0).normal(size=(scaled.shape[0], 8))
    for _ in range(3):
        vectors = lu.solve(vectors)
        vectors, _ = np.linalg.qr(vectors)
    # keep the directions that N (scaled) leaves unstretched: its near-null space
    stretch = np.linalg.norm(scaled @ vectors, axis=0)
    null = vectors[:, stretch < 1e-6]
    free = np.abs(null).max(axis=1) > 1e-3 if null.size else np.zeros(scaled.shape[0], bool)
    return name_free(network, np.flatnonzero(free), parameters)


def name_free(
    network: Network, rows: np.ndarray, parameters: np.ndarray | None
) -> tuple[str, list[str]]:
    """The message naming the points (and rounds) of the free unknowns ``rows``."""
    names: list[str] = []
    for k in rows:
        p = network.parameters[int(k) if parameters is None else int(parameters[k])]
        label = p.point if p.kind != "O" else f"orientation of the round at {p.point}"
        if label and label not in names:
            names.append(label)
    shown = ", ".join(names[:12]) + (f" and {len(names) - 12} more" if len(names) > 12 else "")
    return (
        (
            "the observations do not determine these unknowns (a datum defect or too few "
            f"observations): {shown}"
        ),
        [n for n in names if not n.startswith("orientation")],
    )
