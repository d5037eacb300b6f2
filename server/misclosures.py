"""Leveling misclosures before adjustment: closed loops and runs between fixed benchmarks.

The observation graph (marks as nodes, level sections as edges) gets one
extra node, the datum, joined to every fixed benchmark by an edge carrying
its height.  A cycle through the datum is a run from one fixed benchmark to
another; any other cycle is a closed loop.  An independent set of cycles (a
cycle basis over GF(2)) is chosen short first: each section proposes the
cycle it closes with the shortest path between its ends, the candidates are
taken shortest first when independent of those already taken, and the basis
is completed from a spanning tree if any are missing.
"""

from __future__ import annotations

import heapq
import math
from dataclasses import dataclass

from .fieldbook_model import Fieldbook
from .units import Quantity

_DATUM = "\x00datum"
#: Above this many sections, use the spanning-tree cycles directly (shortest-path candidates are O(E²)).
_CANDIDATE_LIMIT = 3000


@dataclass(frozen=True, slots=True)
class Misclosure:
    """One loop or run; lengths in metres (``length`` None when a section has no len=)."""

    kind: str  # "loop" or "run"
    points: tuple[str, ...]
    misclosure: float
    length: float | None
    setups: int | None
    allowed: float | None

    @property
    def exceeds(self) -> bool:
        """|misclosure| above the allowance (False when no allowance applies)."""
        return self.allowed is not None and abs(self.misclosure) > self.allowed


@dataclass(frozen=True, slots=True)
class _Edge:
    start: str
    end: str
    rise: float  # height change from start to end
    length_km: float | None
    setups: int | None


def leveling_misclosures(fieldbook: Fieldbook) -> tuple[Misclosure, ...]:
    """An independent set of loop and run misclosures from the used level sections."""
    sections = [o for o in fieldbook.observations if o.kind == "level" and not o.ignored]
    if not sections:
        return ()
    edges = [_Edge(o.from_point, o.to, o.value, o.length_km, o.setups) for o in sections]
    fixed = [
        p for p in fieldbook.points if "h" in p.fixed and p.height is not None
    ]
    if len(fixed) >= 2:
        edges += [_Edge(_DATUM, p.name, p.height or 0.0, 0.0, 0) for p in fixed]
    adjacency: dict[str, list[tuple[int, str]]] = {}
    for k, e in enumerate(edges):
        adjacency.setdefault(e.start, []).append((k, e.end))
        adjacency.setdefault(e.end, []).append((k, e.start))
    use_length = all(o.length_km is not None for o in sections)
    weights = [
        (e.length_km if use_length else (0.0 if _DATUM in (e.start, e.end) else 1.0)) or 0.0
        for e in edges
    ]
    cycles = _cycle_basis(edges, adjacency, weights)
    order = _first_appearance(fieldbook)
    results = [_describe(cycle, edges, order, fieldbook.misclosure_tolerance) for cycle in cycles]
    results.sort(key=lambda m: (m.kind != "run", min(order.get(p, 0) for p in m.points)))
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
    edges: list[_Edge], adjacency: dict[str, list[tuple[int, str]]], weights: list[float]
) -> list[list[int]]:
    """Independent simple cycles, each as the list of its edge indices."""
    dimension = len(edges) - len(adjacency) + _count_parts(adjacency)
    if dimension <= 0:
        return []
    basis: dict[int, int] = {}  # pivot bit → reduced mask (GF(2) elimination)
    chosen: list[list[int]] = []

    def take(cycle: list[int]) -> None:
        mask = 0
        for k in cycle:
            mask ^= 1 << k
        while mask:
            pivot = mask.bit_length() - 1
            if pivot not in basis:
                basis[pivot] = mask
                chosen.append(cycle)
                return
            mask ^= basis[pivot]

    if len(edges) <= _CANDIDATE_LIMIT:
        candidates = []
        for k, e in enumerate(edges):
            path = _shortest_path(adjacency, weights, e.end, e.start, excluded=k)
            if path is not None:
                cycle = [k, *path]
                candidates.append((sum(weights[j] for j in cycle), len(cycle), k, cycle))
        candidates.sort(key=lambda c: c[:3])
        for *_, cycle in candidates:
            if len(chosen) == dimension:
                break
            take(cycle)
    if not chosen:
        # each spanning-tree cycle holds its own non-tree section, so together they are
        # independent and complete: no elimination needed
        return _fundamental_cycles(edges, adjacency)[:dimension]
    if len(chosen) < dimension:
        for cycle in _fundamental_cycles(edges, adjacency):
            if len(chosen) == dimension:
                break
            take(cycle)
    return chosen


def _count_parts(adjacency: dict[str, list[tuple[int, str]]]) -> int:
    seen: set[str] = set()
    parts = 0
    for start in adjacency:
        if start in seen:
            continue
        parts += 1
        stack = [start]
        seen.add(start)
        while stack:
            for _, nxt in adjacency[stack.pop()]:
                if nxt not in seen:
                    seen.add(nxt)
                    stack.append(nxt)
    return parts


def _shortest_path(
    adjacency: dict[str, list[tuple[int, str]]],
    weights: list[float],
    source: str,
    target: str,
    excluded: int,
) -> list[int] | None:
    """Edge indices of a shortest path (Dijkstra) from source to target avoiding one edge."""
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
            if k != excluded and candidate < best.get(nxt, math.inf):
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


def _fundamental_cycles(
    edges: list[_Edge], adjacency: dict[str, list[tuple[int, str]]]
) -> list[list[int]]:
    """Cycles closed by each non-tree edge of a breadth-first spanning forest."""
    parent: dict[str, tuple[str, int] | None] = {}
    depth: dict[str, int] = {}
    for root in adjacency:
        if root in parent:
            continue
        parent[root], depth[root] = None, 0
        queue = [root]
        for node in queue:
            for k, nxt in adjacency[node]:
                if nxt not in parent:
                    parent[nxt], depth[nxt] = (node, k), depth[node] + 1
                    queue.append(nxt)
    tree = {link[1] for link in parent.values() if link is not None}
    cycles = []
    for k, e in enumerate(edges):
        if k in tree:
            continue
        cycle = [k]
        a, b = e.start, e.end
        while a != b:  # climb from the deeper end until both meet
            if depth[a] < depth[b]:
                a, b = b, a
            link = parent[a]
            assert link is not None
            cycle.append(link[1])
            a = link[0]
        cycles.append(cycle)
    return cycles


def _walk(cycle: list[int], edges: list[_Edge], start: str) -> tuple[list[str], float]:
    """Walk a simple cycle from ``start``: the marks in order and the summed rise.

    At each mark the walk leaves by the first cycle section (in the cycle's
    own order) that touches it and is not yet used.
    """
    at_mark: dict[str, list[tuple[int, int]]] = {}  # mark → (position in cycle, section)
    for position, k in enumerate(cycle):
        e = edges[k]
        at_mark.setdefault(e.start, []).append((position, k))
        if e.end != e.start:
            at_mark.setdefault(e.end, []).append((position, k))
    used = [False] * len(cycle)
    node, marks, rise = start, [start], 0.0
    for _ in range(len(cycle)):
        for position, k in at_mark.get(node, ()):
            if not used[position]:
                break
        else:  # not a simple cycle through start; cannot happen for basis cycles
            raise RuntimeError("cycle walk lost its way")
        used[position] = True
        e = edges[k]
        forward = e.start == node
        rise += e.rise if forward else -e.rise
        node = e.end if forward else e.start
        marks.append(node)
    return marks, rise


def _describe(
    cycle: list[int], edges: list[_Edge], order: dict[str, int], tolerance: Quantity | None
) -> Misclosure:
    nodes = {edges[k].start for k in cycle} | {edges[k].end for k in cycle}
    if _DATUM in nodes:
        marks, rise = _walk(cycle, edges, _DATUM)
        marks = marks[1:-1]  # a run from one fixed benchmark to another
        kind = "run"
    else:
        first = min(nodes, key=lambda n: order.get(n, 0))
        marks, rise = _walk(cycle, edges, first)
        kind = "loop"
    sections = [edges[k] for k in cycle if _DATUM not in (edges[k].start, edges[k].end)]
    lengths = [s.length_km for s in sections]
    setups = [s.setups for s in sections]
    length_km = None if any(v is None for v in lengths) else sum(v or 0.0 for v in lengths)
    total_setups = None if any(v is None for v in setups) else sum(v or 0 for v in setups)
    allowed = tolerance.allowance_level(length_km, total_setups) if tolerance else None
    return Misclosure(
        kind=kind,
        points=tuple(marks),
        misclosure=rise,
        length=None if length_km is None else length_km * 1000.0,
        setups=total_setups,
        allowed=allowed,
    )
