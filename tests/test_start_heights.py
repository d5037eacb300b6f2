"""Start heights carried along the leveling: the compiled breadth-first search must carry
every height along exactly the sections a queue seeded with the known marks would."""

from __future__ import annotations

import math
import random
from collections import deque

import numpy as np
import pytest

from server.fieldbook.parser import parse_fieldbook
from server.model.network import build_network
from server.model.start_values import start_coordinates


def _queue_heights(network, given: np.ndarray) -> np.ndarray:
    """The reference: a queue seeded with the known marks in order of first appearance,
    each mark's sections in file order (FROM's before TO's on one line)."""
    table = network.used_table
    rows = np.flatnonzero(table.is_kind("level"))
    point = network.name_point
    frm, to, value = point[table.frm[rows]], point[table.to[rows]], table.value[rows]
    links: dict[int, list[tuple[int, float]]] = {}
    for a, b, v in zip(frm.tolist(), to.tolist(), value.tolist()):
        links.setdefault(a, []).append((b, v))
        links.setdefault(b, []).append((a, -v))
    height = given.tolist()
    known = [h == h for h in height]
    queue = deque(k for k in links if known[k])  # dict order: first appearance
    while queue:
        mark = queue.popleft()
        for other, rise in links[mark]:
            if not known[other]:
                known[other] = True
                height[other] = height[mark] + rise
                queue.append(other)
    return np.array(height)


def _book(seed: int) -> str:
    rng = random.Random(seed)
    count = rng.randint(3, 60)
    lines = ["fieldbook 1", "defaults level=1.0mm/sqrtkm"]
    fixed = rng.sample(range(count), rng.randint(1, 3))
    for k in fixed:
        lines.append(f"point P{k} height={rng.uniform(10, 90):.4f} fix")
    order = list(range(count))
    rng.shuffle(order)
    sections = [(order[k], order[rng.randrange(k)]) for k in range(1, count)]  # a tree
    sections += [tuple(rng.sample(range(count), 2)) for _ in range(rng.randint(0, count))]
    sections += rng.sample(sections, min(3, len(sections)))  # repeated sections
    rng.shuffle(sections)
    for a, b in sections:
        lines.append(f"level P{a} P{b} {rng.uniform(-5, 5):+.4f} len={rng.uniform(0.1, 2):.2f}km")
    return "\n".join(lines) + "\n"


@pytest.mark.parametrize("seed", range(40))
def test_start_heights_match_a_queue_from_the_known_marks(seed):
    network = build_network(parse_fieldbook(_book(seed), source="t.fieldbook"))
    given = np.array([math.nan if p.height is None else p.height for p in network.points])
    heights = start_coordinates(network)[:, 2]
    expected = _queue_heights(network, given)
    assert heights.tolist() == expected.tolist()  # the same sums, bit for bit
