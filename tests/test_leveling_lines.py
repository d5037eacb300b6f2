"""The lines between junctions of the leveling graph, found as arrays, must be the lines a
walk mark by mark finds: the same sections and marks, in the same order and direction."""

from __future__ import annotations

import random
from itertools import pairwise

import pytest

from server.model.misclosures import _DATUM, _chains, _Edges, _Lines


def _walked(edges: _Edges) -> _Lines:
    """The reference: each mark's sections in a list, followed one mark at a time."""
    adjacency: dict[int, list[tuple[int, int]]] = {}
    for k, (start, end) in enumerate(zip(edges.start, edges.end)):
        adjacency.setdefault(start, []).append((k, end))
        adjacency.setdefault(end, []).append((k, start))
    lines = _Lines([], [], [], [])
    done: set[int] = set()

    def follow(origin: int, k: int, node: int, stops) -> None:
        chain, marks = [k], [origin, node]
        done.add(k)
        while node not in stops:
            (k1, n1), (k2, n2) = adjacency[node]
            k, node = (k2, n2) if k1 == k else (k1, n1)
            chain.append(k)
            marks.append(node)
            done.add(k)
        lines.start.append(origin)
        lines.end.append(node)
        lines.members.append(chain)
        lines.marks.append(marks)

    junctions = {node for node, links in adjacency.items() if len(links) != 2}
    junctions.add(_DATUM)
    for node, links in adjacency.items():
        if node in junctions:
            for k, nxt in links:
                if k not in done:
                    follow(node, k, nxt, junctions)
    for node, links in adjacency.items():
        for k, nxt in links:
            if k not in done:
                follow(node, k, nxt, (node,))
    return lines


def _graph(seed: int) -> _Edges:
    rng = random.Random(seed)
    marks = list(range(rng.randint(2, 40)))
    rng.shuffle(marks)
    pairs: list[tuple[int, int]] = []
    at = 0
    while at < len(marks):  # lines and rings of marks, then a few joins, loops and repeats
        size = rng.randint(1, 8)
        run = marks[at : at + size]
        pairs += list(pairwise(run))
        if rng.random() < 0.3 and len(run) > 1:
            pairs.append((run[-1], run[0]))
        at += size
    for _ in range(rng.randint(0, 6)):
        pairs.append((rng.choice(marks), rng.choice(marks)))  # joins, one-section loops
    pairs += rng.sample(pairs, min(2, len(pairs)))  # repeated sections
    pairs = [(b, a) if rng.random() < 0.5 else (a, b) for a, b in pairs]
    rng.shuffle(pairs)
    benchmarks = rng.sample(marks, min(len(marks), rng.choice([0, 0, 2, 3])))
    pairs += [(_DATUM, mark) for mark in benchmarks]
    if not pairs:
        pairs = [(marks[0], marks[-1])]
    start, end = map(list, zip(*pairs))
    return _Edges(start, end, [0.0] * len(start), [None] * len(start), [None] * len(start))


@pytest.mark.parametrize("seed", range(300))
def test_lines_are_those_of_a_walk_mark_by_mark(seed):
    edges = _graph(seed)
    assert _chains(edges) == _walked(edges)
