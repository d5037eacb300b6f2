"""External reliability of a design: what an undetected blunder of MDB size does to the points.

An error ∇ in observation i alone moves the estimate by dx = Qxx·Aᵀ·P·e_i·∇ (e_i the unit
vector of row i).  With ∇ the row's minimal detectable bias this is the largest effect a
blunder the w-test will probably miss can have.  Per observation the figure reported is the
largest shift of any one point, √(dE² + dN² + dH²) over the point's estimated components
(orientations are not positions and take no part).  In a free network dx is the
inner-constraint (S-transformed) shift, the same datum the point precisions are given in.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from server.model.network import Network

#: Rows solved for at once: bounds the dense block of shifts to CHUNK × unknowns.
CHUNK = 512


def point_shift_rows(network: Network) -> tuple[np.ndarray, np.ndarray]:
    """(unknown index, point index) of every coordinate unknown, orientations left out."""
    points = {p.name: k for k, p in enumerate(network.points)}
    pairs = [
        (k, points[p.point])
        for k, p in enumerate(network.parameters)
        if p.kind != "O" and p.point is not None
    ]
    table = np.array(pairs, dtype=np.int64).reshape(-1, 2)
    return table[:, 0], table[:, 1]


def largest_point_shifts(
    network: Network,
    shifts: Callable[[np.ndarray], np.ndarray],
    rows: np.ndarray,
    mdb: np.ndarray,
) -> np.ndarray:
    """Per row in ``rows`` (with its MDB in SI): the largest point shift in metres."""
    unknowns, point_of = point_shift_rows(network)
    n_points = len(network.points)
    out = np.zeros(rows.size)
    if unknowns.size == 0:
        return out
    for start in range(0, rows.size, CHUNK):
        part = slice(start, start + CHUNK)
        dx = shifts(rows[part])[unknowns, :] * mdb[part][None, :]
        squares = np.zeros((n_points, dx.shape[1]))
        np.add.at(squares, point_of, dx**2)
        out[part] = np.sqrt(squares.max(axis=0))
    return out
