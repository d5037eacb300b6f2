"""Leveling misclosures before adjustment: closed loops and runs between fixed benchmarks.

The observation graph (marks as nodes, level sections as edges) gets one
extra node, the datum, joined to every fixed benchmark by an edge carrying
its height.  A cycle through the datum is a run from one fixed benchmark to
another; any other cycle is a closed loop.  An independent set of cycles (a
cycle basis over GF(2)) is chosen short first: each section proposes the
cycle it closes with the shortest path between its ends, the candidates are
taken shortest first when independent of those already taken, and the basis
is completed from a spanning tree if any are missing.  The closed loops are
chosen first, among paths that avoid the datum, so they are the smallest
loops of the network (its faces, as a crew runs them); the runs between
fixed benchmarks then complete the set, and are listed after the loops.
"""

from __future__ import annotations

import heapq
import math
import operator
from collections.abc import Callable
from dataclasses import dataclass
from functools import partial
from itertools import repeat

from server.fieldbook.model import Fieldbook
from server.units import Quantity

_DATUM = "\x00datum"
#: Above this many lines between junctions, use the spanning-tree cycles directly
#: (the shortest-path candidates cost one bounded search per line).
_CANDIDATE_LIMIT = 3000


@dataclass(frozen=True, slots=True)
class Misclosure:
    """One loop, run or traverse; lengths in metres (``length`` None when a section has no len=).

    A traverse (``traverse.py``) also carries its angular misclosure and allowance in
    radians, its number of angle stations, the east/north parts of the linear
    misclosure and the N of the required precision 1 : N.
    """

    kind: str  # "loop", "run" or "traverse"
    points: tuple[str, ...]
    misclosure: float
    length: float | None
    setups: int | None
    allowed: float | None
    angular: float | None = None
    angular_allowed: float | None = None
    angle_stations: int | None = None
    misclosure_east: float | None = None
    misclosure_north: float | None = None
    ratio_allowed: float | None = None

    @property
    def exceeds(self) -> bool:
        """|misclosure| (or the angular one) above its allowance (False when none applies)."""
        if self.allowed is not None and abs(self.misclosure) > self.allowed:
            return True
        return (
            self.angular is not None
            and self.angular_allowed is not None
            and abs(self.angular) > self.angular_allowed
        )

    @property
    def ratio(self) -> float | None:
        """N of a traverse's precision 1 : N (None for a loop or run, or a zero misclosure)."""
        if self.kind != "traverse" or not self.misclosure or self.length is None:
            return None
        return self.length / abs(self.misclosure)


@dataclass(slots=True)
class _Edges:
    """The sections (and datum links) as parallel lists, indexed by edge number."""

    start: list[str]
    end: list[str]
    rise: list[float]  # height change from start to end
    length_km: list[float | None]
    setups: list[int | None]

    def __len__(self) -> int:
        return len(self.start)


def leveling_misclosures(fieldbook: Fieldbook) -> tuple[Misclosure, ...]:
    """An independent set of loop and run misclosures from the used level sections."""
    sections = [o for o in fieldbook.observations if o.kind == "level" and not o.ignored]
    if not sections:
        return ()
    edges = _Edges(
        [o.from_point for o in sections],
        [o.to for o in sections],
        [o.value for o in sections],
        [o.length_km for o in sections],
        [o.setups for o in sections],
    )
    fixed = [p for p in fieldbook.points if "h" in p.fixed and p.height is not None]
    if len(fixed) >= 2:
        for p in fixed:
            edges.start.append(_DATUM)
            edges.end.append(p.name)
            edges.rise.append(p.height or 0.0)
            edges.length_km.append(0.0)
            edges.setups.append(0)
    adjacency: dict[str, list[tuple[int, str]]] = {}
    for k, (start, end) in enumerate(zip(edges.start, edges.end)):
        adjacency.setdefault(start, []).append((k, end))
        adjacency.setdefault(end, []).append((k, start))
    use_length = all(o.length_km is not None for o in sections)
    if use_length:
        weights = [length or 0.0 for length in edges.length_km]
    else:
        weights = [
            0.0 if _DATUM in (start, end) else 1.0 for start, end in zip(edges.start, edges.end)
        ]
    cycles = _contracted_basis(edges, adjacency, weights)
    order = _first_appearance(fieldbook)
    results = [_describe(cycle, edges, order, fieldbook.misclosure_tolerance) for cycle in cycles]
    # the loops as the crew ran them first, then the runs from benchmark to benchmark
    results.sort(key=lambda m: (m.kind == "run", min(map(order.get, m.points, repeat(0)))))
    return tuple(results)


def _first_appearance(fieldbook: Fieldbook) -> dict[str, int]:
    order: dict[str, int] = {}
    for p in fieldbook.points:
        order.setdefault(p.name, len(order))
    for o in fieldbook.observations:
        for name in (o.from_point, o.to):
            order.setdefault(name, len(order))
    return order


def _cycle_basis(
    edges: _Edges, adjacency: dict[str, list[tuple[int, str]]], weights: list[float]
) -> list[list[int]]:
    """Independent simple cycles, each as the list of its edge indices."""
    forest = _spanning_forest(adjacency)
    dimension = len(edges) - len(adjacency) + forest[2]
    if dimension <= 0:
        return []
    kept = _Independent()
    if len(edges) <= _CANDIDATE_LIMIT:
        # the loops first, each section's shortest loop without the datum (the smallest
        # closed loops, as the crew ran them), then the runs through the datum
        for blocked in (_DATUM, None):
            for cycle in _candidates(edges, adjacency, weights, blocked):
                if len(kept.chosen) == dimension:
                    break
                kept.take(cycle)
    if not kept.chosen:
        # each spanning-tree cycle holds its own non-tree section, so together they are
        # independent and complete: no elimination needed
        return _fundamental_cycles(edges, forest)[:dimension]
    if len(kept.chosen) < dimension:
        for cycle in _fundamental_cycles(edges, forest):
            if len(kept.chosen) == dimension:
                break
            kept.take(cycle)
    return kept.chosen


class _Independent:
    """Cycles kept while each is independent of those before (GF(2) elimination: a cycle
    is the bit mask of its sections, the sum of cycles their exclusive or)."""

    def __init__(self) -> None:
        self.basis: dict[int, int] = {}  # pivot bit → reduced mask
        self.chosen: list[list[int]] = []
        self.covered: set[int] = set()
        self.pending: list[list[int]] = []  # chosen but not yet in the elimination

    def _reduce(self, cycle: list[int]) -> int:
        mask = 0
        for k in cycle:
            mask ^= 1 << k
        while mask:
            pivot = mask.bit_length() - 1
            if pivot not in self.basis:
                return mask
            mask ^= self.basis[pivot]
        return 0

    def take(self, cycle: list[int]) -> None:
        """Keep ``cycle`` if it is independent of the cycles kept so far."""
        # a cycle with a section no chosen cycle has is independent of them all: the
        # usual case, which spares the elimination until a cycle has only old sections
        if not self.covered.issuperset(cycle):
            self.covered.update(cycle)
            self.chosen.append(cycle)
            self.pending.append(cycle)
            return
        while self.pending:
            mask = self._reduce(self.pending.pop())
            self.basis[mask.bit_length() - 1] = mask
        mask = self._reduce(cycle)
        if mask:
            self.basis[mask.bit_length() - 1] = mask
            self.chosen.append(cycle)


def _contracted_basis(
    edges: _Edges, adjacency: dict[str, list[tuple[int, str]]], weights: list[float]
) -> list[list[int]]:
    """The cycle basis found on the lines between junctions, then spelled in sections.

    A mark with exactly two sections (not a fixed benchmark, which also has its
    datum link) only carries a line on, so each chain of them becomes one line:
    the cycles are the same and the searches run on a graph of junctions, ten
    or more times smaller in a regional network.
    """
    start, end, members = _chains(adjacency)
    lines = _Edges(start, end, [], [], [])
    line_adjacency: dict[str, list[tuple[int, str]]] = {}
    for k, (a, b) in enumerate(zip(start, end)):
        line_adjacency.setdefault(a, []).append((k, b))
        if a != b:
            line_adjacency.setdefault(b, []).append((k, a))
    line_weights = [sum(weights[j] for j in chain) for chain in members]
    return [
        [j for k in cycle for j in members[k]]
        for cycle in _cycle_basis(lines, line_adjacency, line_weights)
    ]


def _chains(
    adjacency: dict[str, list[tuple[int, str]]],
) -> tuple[list[str], list[str], list[list[int]]]:
    """Lines between junctions (marks of other than two sections): ends and sections."""
    start: list[str] = []
    end: list[str] = []
    members: list[list[int]] = []
    done: set[int] = set()

    def follow(origin: str, k: int, node: str, junction: Callable[[str], bool]) -> None:
        chain = [k]
        done.add(k)
        while not junction(node):
            (k1, n1), (k2, n2) = adjacency[node]
            k, node = (k2, n2) if k1 == k else (k1, n1)
            chain.append(k)
            done.add(k)
        start.append(origin)
        end.append(node)
        members.append(chain)

    def is_junction(node: str) -> bool:
        return len(adjacency[node]) != 2 or node == _DATUM

    for node, links in adjacency.items():
        if is_junction(node):
            for k, nxt in links:
                if k not in done:
                    follow(node, k, nxt, is_junction)
    for node, links in adjacency.items():  # rings with no junction at all
        for k, nxt in links:
            if k not in done:
                follow(node, k, nxt, partial(operator.eq, node))  # back at the ring's start
    return start, end, members


def _candidates(
    edges: _Edges,
    adjacency: dict[str, list[tuple[int, str]]],
    weights: list[float],
    blocked: str | None,
) -> list[list[int]]:
    """Each section's cycle with the shortest path between its ends, shortest first.

    With ``blocked`` the paths avoid that node (the datum: loops only); without
    it the datum links propose the runs.
    """
    candidates = []
    for k, (start, end) in enumerate(zip(edges.start, edges.end)):
        # loops: the lines between marks; runs: each benchmark's link to the datum, whose
        # shortest way back is the run to the nearest other benchmark
        if (blocked is not None) == (_DATUM in (start, end)):
            continue
        path = _shortest_path(adjacency, weights, end, start, excluded=k, blocked=blocked)
        if path is None:
            continue
        cycle = [k, *path]
        candidates.append((sum(weights[j] for j in cycle), len(cycle), k, cycle))
    candidates.sort(key=lambda c: c[:3])
    return [c[3] for c in candidates]


def _shortest_path(
    adjacency: dict[str, list[tuple[int, str]]],
    weights: list[float],
    source: str,
    target: str,
    excluded: int,
    blocked: str | None = None,
) -> list[int] | None:
    """Edge indices of a shortest path (Dijkstra) from source to target avoiding one edge
    (and the node ``blocked``)."""
    best = {source: 0.0}
    previous: dict[str, tuple[str, int]] = {}
    heap = [(0.0, 0, source)]
    counter = 1
    while heap:
        dist, _, node = heapq.heappop(heap)
        if node == target:
            break
        if dist > best.get(node, math.inf):
            continue
        for k, nxt in adjacency[node]:
            candidate = dist + weights[k]
            if k != excluded and nxt != blocked and candidate < best.get(nxt, math.inf):
                best[nxt] = candidate
                previous[nxt] = (node, k)
                heapq.heappush(heap, (candidate, counter, nxt))
                counter += 1
    if target not in best:
        return None
    path: list[int] = []
    node = target
    while node != source:
        node, k = previous[node]
        path.append(k)
    return path


_Forest = tuple[dict[str, "tuple[str, int] | None"], dict[str, int], int]


def _spanning_forest(adjacency: dict[str, list[tuple[int, str]]]) -> _Forest:
    """A breadth-first spanning forest: each mark's (parent, section), its depth, and the
    number of trees (connected parts)."""
    parent: dict[str, tuple[str, int] | None] = {}
    depth: dict[str, int] = {}
    parts = 0
    for root in adjacency:
        if root in parent:
            continue
        parts += 1
        parent[root], depth[root] = None, 0
        queue = [root]
        for node in queue:
            below = depth[node] + 1
            for k, nxt in adjacency[node]:
                if nxt not in parent:
                    parent[nxt], depth[nxt] = (node, k), below
                    queue.append(nxt)
    return parent, depth, parts


def _fundamental_cycles(edges: _Edges, forest: _Forest) -> list[list[int]]:
    """Cycles closed by each non-tree edge of a breadth-first spanning forest."""
    parent, depth, _ = forest
    tree = {link[1] for link in parent.values() if link is not None}
    cycles = []
    for k, (start, end) in enumerate(zip(edges.start, edges.end)):
        if k in tree:
            continue
        cycle = [k]
        append = cycle.append
        a, b = start, end
        depth_a, depth_b = depth[a], depth[b]
        while a != b:  # climb from the deeper end until both meet
            if depth_a < depth_b:
                a, b, depth_a, depth_b = b, a, depth_b, depth_a
            link = parent[a]
            assert link is not None
            a, k_up = link
            depth_a -= 1  # a parent is one level up
            append(k_up)
        cycles.append(cycle)
    return cycles


def _walk(
    cycle: list[int], edges: _Edges, start_mark: str, at_mark: dict[str, list[tuple[int, int]]]
) -> tuple[list[str], float]:
    """Walk a simple cycle from ``start``: the marks in order and the summed rise.

    At each mark the walk leaves by the first cycle section (in the cycle's
    own order) that touches it and is not yet used.  ``at_mark`` lists, for
    every mark of the cycle, its (position in the cycle, section) in that order.
    """
    starts, ends, rises = edges.start, edges.end, edges.rise
    used = [False] * len(cycle)
    node, marks, rise = start_mark, [start_mark], 0.0
    append = marks.append
    for _ in range(len(cycle)):
        for entry in at_mark.get(node, ()):  # (position in the cycle, section)
            if not used[entry[0]]:
                break
        else:  # not a simple cycle through start; cannot happen for basis cycles
            raise RuntimeError("cycle walk lost its way")
        position, k = entry
        used[position] = True
        if starts[k] == node:
            rise += rises[k]
            node = ends[k]
        else:
            rise += -rises[k]
            node = starts[k]
        append(node)
    return marks, rise


def _marks_of(cycle: list[int], edges: _Edges) -> dict[str, list[tuple[int, int]]]:
    """Every mark of a cycle with its (position in the cycle, section), in cycle order."""
    starts, ends = edges.start, edges.end
    at_mark: dict[str, list[tuple[int, int]]] = {}
    for position, k in enumerate(cycle):
        start, end = starts[k], ends[k]
        here = at_mark.get(start)
        if here is None:
            at_mark[start] = [(position, k)]
        else:
            here.append((position, k))
        if end != start:
            here = at_mark.get(end)
            if here is None:
                at_mark[end] = [(position, k)]
            else:
                here.append((position, k))
    return at_mark


def _describe(
    cycle: list[int], edges: _Edges, order: dict[str, int], tolerance: Quantity | None
) -> Misclosure:
    at_mark = _marks_of(cycle, edges)  # its keys are the marks of the cycle
    if _DATUM in at_mark:
        marks, rise = _walk(cycle, edges, _DATUM, at_mark)
        marks = marks[1:-1]  # a run from one fixed benchmark to another
        kind = "run"
        starts, ends = edges.start, edges.end
        sections = [k for k in cycle if starts[k] != _DATUM and ends[k] != _DATUM]
    else:
        first = min(at_mark, key=lambda n: order.get(n, 0))
        marks, rise = _walk(cycle, edges, first, at_mark)
        kind = "loop"
        sections = cycle
    lengths = [edges.length_km[k] for k in sections]
    setups = [edges.setups[k] for k in sections]
    length_km = None if None in lengths else sum(v or 0.0 for v in lengths)
    total_setups = None if None in setups else sum(v or 0 for v in setups)
    allowed = tolerance.allowance_level(length_km, total_setups) if tolerance else None
    return Misclosure(
        kind=kind,
        points=tuple(marks),
        misclosure=rise,
        length=None if length_km is None else length_km * 1000.0,
        setups=total_setups,
        allowed=allowed,
    )
