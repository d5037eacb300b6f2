"""Approximate (start) coordinates for the unknown points.

Heights are carried along the leveling from every point whose height is
known.  Horizontal positions are given or computed by ``horizontal_start``
(polar ties, intersections, resections).  A point that cannot be reached is
named in a ``NetworkError``: a surveyor never types approximate values.
"""

from __future__ import annotations

from operator import attrgetter

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import breadth_first_order

from server.errors import NetworkError
from server.model.network import Network


def approximate_coordinates(network: Network) -> dict[str, tuple[float, float, float]]:
    """Start values (east, north, height) in metres for every point, NaN where not needed."""
    table = start_coordinates(network)
    rows = map(tuple, table.tolist())
    return dict(zip((p.name for p in network.points), rows))


def start_coordinates(network: Network) -> np.ndarray:
    """Start values as an array (points × east, north, height; metres, NaN where not needed),
    rows in the order of ``network.points``."""
    points = network.points
    coords = np.empty((len(points), 3))
    for column, field in enumerate(("east", "north", "height")):  # None (not given): NaN
        coords[:, column] = np.array(list(map(attrgetter(field), points)), dtype=float)
    coords[:, 2] = _start_heights(network, coords[:, 2])
    if network.horizontal:
        from server.model.horizontal_start import start_positions

        names = list(map(attrgetter("name"), points))
        given = dict(zip(names, map(tuple, coords[:, :2].tolist())))
        positions = start_positions(network, given)
        if positions:  # one scatter rather than a row assignment per point
            index = dict(zip(names, range(len(names))))
            coords[list(map(index.__getitem__, positions)), :2] = list(positions.values())
    return coords


def _start_heights(network: Network, given: np.ndarray) -> np.ndarray:
    """Carry heights along the used level observations, breadth first from known heights.

    ``given`` holds each point's height (NaN: none).  Each mark's sections are taken in
    file order (FROM's before TO's on one line), and the search starts from the known
    marks in order of first appearance, so every height is carried along the same
    sections on every run.  Returns the heights with the carried ones filled in.
    """
    table = network.used_table
    rows = np.flatnonzero(table.is_kind("level"))
    if not rows.size:
        return given
    point = network.name_point
    frm, to, value = point[table.frm[rows]], point[table.to[rows]], table.value[rows]
    # every section twice: FROM → TO rising by the value, TO → FROM by its negation
    source = np.stack([frm, to], axis=1).ravel()
    target = np.stack([to, frm], axis=1).ravel()
    rise = np.stack([value, -value], axis=1).ravel()
    marks, first = np.unique(source, return_index=True)
    marks = marks[np.argsort(first)]  # the level marks in order of first appearance
    by_mark = np.argsort(source, kind="stable")
    sections = _Sections(source[by_mark], target[by_mark], rise[by_mark], given.shape[0])
    carried, via = sections.search(marks[~np.isnan(given[marks])])
    height = given.tolist()
    # along the search tree, each from the mark it was reached from (always set before)
    for mark, previous, step in zip(carried.tolist(), *via):
        height[mark] = height[previous] + step
    reached = ~np.isnan(given)
    reached[carried] = True
    missing = sorted(network.points[k].name for k in marks[~reached[marks]].tolist())
    if missing:
        raise NetworkError(
            "no height can be carried to these points from any point with a known height: "
            + ", ".join(missing[:12]),
            missing,
        )
    return np.array(height, dtype=float)


class _Sections:
    """The level sections from each mark, grouped by mark in file order (a CSR graph)."""

    def __init__(self, owner: np.ndarray, neighbour: np.ndarray, rise: np.ndarray, count: int):
        self.owner, self.neighbour, self.rise, self.count = owner, neighbour, rise, count
        self.begin = np.zeros(count + 1, np.int64)
        np.cumsum(np.bincount(owner, minlength=count), out=self.begin[1:])

    def search(self, roots: np.ndarray) -> tuple[np.ndarray, tuple[list[int], list[float]]]:
        """The marks reached from ``roots`` breadth first, in the order reached, and for each
        the mark it was reached from and the rise of the section that reached it.

        The search starts at an extra node whose sections lead to the roots in order, so
        it visits the marks exactly as a queue seeded with the roots would, taking each
        mark's sections in their order; the compiled search spares a Python loop per
        section.
        """
        hub = self.count
        indptr = np.append(self.begin, self.begin[-1] + roots.size)
        indices = np.concatenate([self.neighbour, roots])
        graph = csr_matrix(
            (np.ones(indices.size), indices, indptr), shape=(hub + 1, hub + 1), copy=False
        )
        order, previous = breadth_first_order(graph, hub, directed=True)
        carried = order[1 + roots.size :]  # after the hub and the roots
        # the section that reached a mark: the first from its predecessor that leads to it
        leads = np.flatnonzero(previous[self.neighbour] == self.owner)
        reached, first = np.unique(self.neighbour[leads], return_index=True)
        section = np.zeros(hub + 1, np.int64)
        section[reached] = leads[first]
        return carried, (previous[carried].tolist(), self.rise[section[carried]].tolist())
