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
from collections.abc import Iterable
from dataclasses import dataclass
from functools import reduce
from itertools import chain

import numpy as np

from server.fieldbook.model import Fieldbook
from server.units import Quantity

#: The datum node: no point has this index (points are the names of the field book's table).
_DATUM = -1
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
    """The sections (and datum links) as parallel lists, indexed by edge number; the marks
    are indices into the field book table's names (``_DATUM`` for the datum)."""

    start: list[int]
    end: list[int]
    rise: list[float]  # height change from start to end
    length_km: list[float | None]
    setups: list[int | None]

    def __len__(self) -> int:
        return len(self.start)


def leveling_misclosures(fieldbook: Fieldbook) -> tuple[Misclosure, ...]:
    """An independent set of loop and run misclosures from the used level sections."""
    table = fieldbook.table
    rows = np.flatnonzero(table.is_kind("level") & ~table.ignored)
    if not rows.size:
        return ()
    names = list(table.names)
    length_km = table.length_km[rows]
    setups = table.setups[rows]
    edges = _Edges(
        table.frm[rows].tolist(),
        table.to[rows].tolist(),
        table.value[rows].tolist(),
        [None if v != v else v for v in length_km.tolist()],  # NaN: no len=
        [None if v < 0 else v for v in setups.tolist()],  # −1: no setups=
    )
    sections = len(edges)
    fixed = [p for p in fieldbook.points if "h" in p.fixed and p.height is not None]
    if len(fixed) >= 2:
        index = dict(zip(names, range(len(names))))
        for p in fixed:
            if p.name not in index:  # a benchmark no observation names
                index[p.name] = len(names)
                names.append(p.name)
            edges.start.append(_DATUM)
            edges.end.append(index[p.name])
            edges.rise.append(p.height or 0.0)
            edges.length_km.append(0.0)
            edges.setups.append(0)
    use_length = not np.isnan(length_km).any()
    if use_length:
        weights = [length or 0.0 for length in edges.length_km]
    else:
        weights = [
            0.0 if _DATUM in (start, end) else 1.0 for start, end in zip(edges.start, edges.end)
        ]
    lines, cycles = _contracted_basis(edges, weights)
    order = _first_appearance(fieldbook, names)
    walker = _Walker(lines, edges, order, sections)
    tolerance = fieldbook.misclosure_tolerance
    described = [walker.describe(cycle, names, tolerance) for cycle in cycles]
    # the loops as the crew ran them first, then the runs from benchmark to benchmark
    described.sort(key=lambda item: item[0])
    return tuple(m for _, m in described)


def _first_appearance(fieldbook: Fieldbook, names: list[str]) -> list[int]:
    """The rank of each mark (by index into ``names``) in order of first appearance: the
    declared points, then the FROM and TO of every observation in turn (0 for neither)."""
    table = fieldbook.table
    rank = np.zeros(len(names), np.int64)
    declared = np.zeros(len(names), bool)
    index = dict(zip(names, range(len(names))))
    for position, p in enumerate(fieldbook.points):
        k = index.get(p.name)
        if k is not None and not declared[k]:
            rank[k] = position
            declared[k] = True
    ends = np.stack([table.frm, table.to], axis=1).ravel()
    seen, first = np.unique(ends, return_index=True)
    observed = seen[np.argsort(first)]
    observed = observed[~declared[observed]]
    rank[observed] = len(fieldbook.points) + np.arange(observed.size)
    return rank.tolist()


def _cycle_basis(
    edges: _Edges, adjacency: dict[int, list[tuple[int, int]]], weights: list[float]
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


@dataclass(slots=True)
class _Lines:
    """The lines between junctions: ends, sections in order from ``start``, and the marks
    passed (``marks[l]`` runs from ``start[l]`` to ``end[l]``, one more than its sections)."""

    start: list[int]
    end: list[int]
    members: list[list[int]]
    marks: list[list[int]]


def _contracted_basis(edges: _Edges, weights: list[float]) -> tuple[_Lines, list[list[int]]]:
    """The cycle basis found on the lines between junctions, each cycle as its lines.

    A mark with exactly two sections (not a fixed benchmark, which also has its
    datum link) only carries a line on, so each chain of them becomes one line:
    the cycles are the same and the searches run on a graph of junctions, ten
    or more times smaller in a regional network.  A cycle's sections are its
    lines' members, line after line.
    """
    lines = _chains(edges)
    graph = _Edges(lines.start, lines.end, [], [], [])
    line_adjacency: dict[int, list[tuple[int, int]]] = {}
    for k, (a, b) in enumerate(zip(lines.start, lines.end)):
        line_adjacency.setdefault(a, []).append((k, b))
        if a != b:
            line_adjacency.setdefault(b, []).append((k, a))
    line_weights = [sum(weights[j] for j in chain) for chain in lines.members]
    return lines, _cycle_basis(graph, line_adjacency, line_weights)


def _chains(edges: _Edges) -> _Lines:
    """Lines between junctions (marks of other than two sections, and the datum).

    Each section is two half-edges, ``2k`` from its start and ``2k + 1`` from its end;
    a mark's sections are taken in that order, and the marks in the order their first
    half-edge comes.  A line is followed from a junction through marks of two sections
    (leaving each by its other section) to the next junction; the lines are listed as
    they are met taking the junctions and their sections in that order, each from the
    end met first.  The walks run as arrays (``_Walks``); rings with no junction at all
    are walked one by one after them, each from its first mark.
    """
    walks = _Walks(edges)
    lines = walks.between_junctions()
    walks.rings(lines)
    return lines


class _Walks:
    """The half-edges of the sections and, through each mark of two sections, the next."""

    def __init__(self, edges: _Edges) -> None:
        start = np.array(edges.start, dtype=np.int64) + 1  # the datum (−1) as node 0
        end = np.array(edges.end, dtype=np.int64) + 1
        count = 2 * len(start)
        self.origin = np.stack([start, end], axis=1).ravel()  # half-edge h leaves origin[h]
        self.target = np.stack([end, start], axis=1).ravel()
        nodes = int(self.origin.max()) + 1
        degree = np.bincount(self.origin, minlength=nodes)
        self.junction = degree != 2
        self.junction[0] = True  # the datum
        # each node's first half-edge ranks it; a mark of two has just its first and last
        first = np.full(nodes, count, np.int64)
        seen, at = np.unique(self.origin, return_index=True)
        first[seen] = at
        last = np.full(nodes, -1, np.int64)
        seen, at = np.unique(self.origin[::-1], return_index=True)
        last[seen] = count - 1 - at
        self.rank = first
        half = np.arange(count)
        there = self.target
        # arriving by h at a mark of two, leave by its half-edge of another section (the
        # second when both are h's own section, a ring of one section)
        other = np.where(first[there] >> 1 == half >> 1, last[there], first[there])
        self.terminal = self.junction[there]
        self.next = np.where(self.terminal, half, other)

    def _ends(self) -> tuple[np.ndarray, np.ndarray]:
        """Per half-edge: the last half-edge of its walk (itself at a junction) and the
        number of steps there, by pointer doubling; a ring's half-edges never arrive."""
        jump, steps = self.next.copy(), (~self.terminal).astype(np.int64)
        for _ in range(max(1, int(jump.size).bit_length() + 1)):
            if self.terminal[jump].all():
                break
            steps += steps[jump]
            jump = jump[jump]
        return jump, steps

    def between_junctions(self) -> _Lines:
        """The lines with a junction at each end, in the order they are met."""
        jump, steps = self._ends()
        self.arrives = self.terminal[jump]
        count = self.origin.size
        # the walks from a junction: each line twice, once from each end
        begins = np.flatnonzero(self.junction[self.origin])
        key = self.rank[self.origin] * count + np.arange(count)  # the order they are met
        back = jump[begins] ^ 1  # the same line from its other end
        begins = begins[key[begins] <= key[back]]  # a one-section loop: met from its start
        begins = begins[np.argsort(key[begins], kind="stable")]
        # every half-edge of those walks: its walk's place in the list, then its own
        place = np.full(count, -1, np.int64)
        place[jump[begins]] = np.arange(begins.size)
        line_of = np.where(self.arrives, place[jump], -1)
        members = np.flatnonzero(line_of >= 0)
        members = members[np.lexsort((-steps[members], line_of[members]))]
        sizes = (steps[begins] + 1).tolist()
        sections = (members >> 1).tolist()
        targets = (self.target[members] - 1).tolist()
        lines = _Lines((self.origin[begins] - 1).tolist(), [], [], [])
        at = 0
        for origin, size in zip(lines.start, sizes):
            lines.members.append(sections[at : at + size])
            lines.marks.append([origin, *targets[at : at + size]])
            at += size
            lines.end.append(targets[at - 1])
        return lines

    def rings(self, lines: _Lines) -> None:
        """Append the rings with no junction, each from the first half-edge of its first
        mark, round to that mark again."""
        ring = np.flatnonzero(~self.arrives)
        if not ring.size:
            return
        order = ring[np.lexsort((ring, self.rank[self.origin[ring]]))]
        done: set[int] = set()
        following, target, origin = self.next.tolist(), self.target.tolist(), self.origin.tolist()
        for first in order.tolist():
            if first >> 1 in done:
                continue
            h = first
            home = origin[h]
            chain, marks = [h >> 1], [home - 1, target[h] - 1]
            done.add(h >> 1)
            while target[h] != home:
                h = following[h]
                chain.append(h >> 1)
                marks.append(target[h] - 1)
                done.add(h >> 1)
            lines.start.append(home - 1)
            lines.end.append(home - 1)
            lines.members.append(chain)
            lines.marks.append(marks)


def _candidates(
    edges: _Edges,
    adjacency: dict[int, list[tuple[int, int]]],
    weights: list[float],
    blocked: int | None,
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
    adjacency: dict[int, list[tuple[int, int]]],
    weights: list[float],
    source: int,
    target: int,
    excluded: int,
    blocked: int | None = None,
) -> list[int] | None:
    """Edge indices of a shortest path (Dijkstra) from source to target avoiding one edge
    (and the node ``blocked``)."""
    best = {source: 0.0}
    previous: dict[int, tuple[int, int]] = {}
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


_Forest = tuple[dict[int, "tuple[int, int] | None"], dict[int, int], int]


def _spanning_forest(adjacency: dict[int, list[tuple[int, int]]]) -> _Forest:
    """A breadth-first spanning forest: each mark's (parent, section), its depth, and the
    number of trees (connected parts)."""
    parent: dict[int, tuple[int, int] | None] = {}
    depth: dict[int, int] = {}
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


class _Walker:
    """Each basis cycle walked and described: its marks in order, its summed rise, length,
    setups and allowance.

    The walk starts at the datum (a run) or at the cycle's mark seen first in the
    field book (a loop) and leaves each mark by the first of its two cycle sections
    in the cycle's own order (its lines' members, line after line).  Inside a line
    the way is forced, so the walk goes line by line: from a mark inside a line
    it first heads for the line's start (the earlier of its two sections), and at a
    junction it takes the line whose section there comes first.  The rise is summed
    section by section in walking order, exactly as one section at a time would.
    """

    def __init__(self, lines: _Lines, edges: _Edges, order: list[int], sections: int) -> None:
        self.lines, self.edges, self.order, self.sections = lines, edges, order, sections
        self._rises: dict[tuple[int, bool], list[float]] = {}
        self._first: dict[int, int] = {}

    def rises(self, line: int, forward: bool) -> list[float]:
        """The rise of each section of a line in walking order, forward (from its start)
        or backward."""
        key = (line, forward)
        cached = self._rises.get(key)
        if cached is None:
            starts, rise = self.edges.start, self.edges.rise
            marks, members = self.lines.marks[line], self.lines.members[line]
            ahead = [rise[k] if starts[k] == mark else -rise[k] for k, mark in zip(members, marks)]
            cached = ahead if forward else [-r for r in reversed(ahead)]
            self._rises[key] = cached
        return cached

    def first_mark(self, line: int) -> int:
        """The mark of a line seen first in the field book."""
        cached = self._first.get(line)
        if cached is None:
            cached = min(self.lines.marks[line], key=self.order.__getitem__)
            self._first[line] = cached
        return cached

    def describe(
        self, cycle: list[int], names: list[str], tolerance: Quantity | None
    ) -> tuple[tuple[bool, int], Misclosure]:
        """The misclosure of a cycle of lines, with its place in the listing."""
        lines = self.lines
        # each junction's two cycle sections: (position in the cycle, line, leaving forward)
        at_junction: dict[int, list[tuple[int, int, bool]]] = {}
        first: dict[int, int] = {}
        position = 0
        for line in cycle:
            first[line] = position
            count = len(lines.members[line])
            at_junction.setdefault(lines.start[line], []).append((position, line, True))
            at_junction.setdefault(lines.end[line], []).append((position + count - 1, line, False))
            position += count
        run = _DATUM in at_junction
        start = _DATUM if run else min(map(self.first_mark, cycle), key=self.order.__getitem__)
        marks, rises = self._walk(cycle, first, start, at_junction)
        sections = list(chain.from_iterable(map(lines.members.__getitem__, cycle)))
        if run:
            marks = marks[1:-1]  # a run from one fixed benchmark to another
            sections = [k for k in sections if k < self.sections]  # not the datum links
        lengths = list(map(self.edges.length_km.__getitem__, sections))
        setups = list(map(self.edges.setups.__getitem__, sections))
        # as sum(v or 0.0 ...) adds them: v or 0.0 is v for every length and count here
        length_km = None if None in lengths else sum(lengths)  # type: ignore[arg-type]
        total_setups = None if None in setups else sum(setups)  # type: ignore[arg-type]
        allowed = tolerance.allowance_level(length_km, total_setups) if tolerance else None
        misclosure = Misclosure(
            kind="run" if run else "loop",
            points=tuple(map(names.__getitem__, marks)),
            misclosure=reduce(operator.add, rises, 0.0),
            length=None if length_km is None else length_km * 1000.0,
            setups=total_setups,
            allowed=allowed,
        )
        return (run, min(map(self.order.__getitem__, marks))), misclosure

    def _walk(
        self,
        cycle: list[int],
        first: dict[int, int],
        start: int,
        at_junction: dict[int, list[tuple[int, int, bool]]],
    ) -> tuple[list[int], Iterable[float]]:
        """The marks from ``start`` round the cycle back to it, and the rises in that order.

        ``first`` gives each line's position in the cycle (of its first section).
        """
        lines = self.lines
        marks = [start]
        pieces: list[list[float]] = []
        home, inside = -1, 0  # the line a start inside a line lies on, and its place there
        arrived: tuple[int, int, bool] | None = None
        node = start
        if start not in at_junction:  # a mark inside a line: to the line's start first
            home = next(line for line in cycle if start in lines.marks[line])
            inside = lines.marks[home].index(start)
            marks += lines.marks[home][inside - 1 :: -1]
            pieces.append(self.rises(home, False)[len(lines.members[home]) - inside :])
            node, arrived = lines.start[home], (first[home], home, True)
        while True:
            choices = at_junction.get(node, [])
            if len(choices) != 2 or (arrived is not None and arrived not in choices):
                raise RuntimeError("cycle walk lost its way")  # cannot happen for basis cycles
            if arrived is None:
                leave = min(choices)
            else:
                leave = choices[1] if choices[0] == arrived else choices[0]
            position, line, forward = leave
            path, count = lines.marks[line], len(lines.members[line])
            if line == home:  # the last leg: back along the start's own line
                marks += path[-2 : inside - 1 : -1]
                pieces.append(self.rises(line, False)[: count - inside])
                break
            if forward:
                marks += path[1:]
                pieces.append(self.rises(line, True))
                node, arrived = path[-1], (position + count - 1, line, False)
            else:
                marks += path[-2::-1]
                pieces.append(self.rises(line, False))
                node, arrived = path[0], (position - count + 1, line, True)
            if node == start:
                break
        return marks, chain.from_iterable(pieces)
