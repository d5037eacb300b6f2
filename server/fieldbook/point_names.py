"""Point names that look like a misspelt declared name: a warning with "did you mean".

A name that one observation uses and no ``point`` line declares is legitimate
(a mark levelled once off the line), but it is also what a typing slip looks
like: ``BM-12`` booked for the declared ``BM-21`` makes a new point that no
other observation checks, and the declared one loses an observation without a
word.  Only names used exactly once are looked at (a turning point is read
forward and back, so it is used twice), and only against declared names, so
the cost stays linear in the file.

"Close" means one of the slips a keyboard or a field sheet makes, never a
different number in a series (``101`` beside a declared ``100`` is another
mark, not a typo):

* the same name apart from case and separators (``bm12``, ``BM_12``, ``BM-12``);
* two neighbouring characters swapped (``BM-12`` for ``BM-21``);
* a look-alike letter for a digit (``BM-I2`` or ``BM-l2`` for ``BM-12``, ``O`` for ``0``);
* a letter typed twice or once too few (``BMM-12`` for ``BM-12``).

Each used-once name is turned into at most a few dozen such variants (names
are at most 64 characters) and each variant is looked up in an index of the
declared names, so the search is bounded whatever the size of the network.
"""

from __future__ import annotations

from collections.abc import Iterator, Sequence

import numpy as np

from server.errors import Issue
from server.fieldbook.model import PointStatement
from server.fieldbook.table import ObservationTable

#: Characters that only separate the parts of a name.
_SEPARATORS = str.maketrans("", "", "-_.:/")
#: Look-alike characters a hand or an eye confuses with a digit (and back).
_LOOK_ALIKE = {"o": "0", "0": "o", "i": "1", "l": "1", "1": "il"}
_SAME_LOOK = str.maketrans("oil", "011")
#: Names listed in one hint at most.
_MAX_CHOICES = 3


def near_miss_warnings(points: Sequence[PointStatement], table: ObservationTable) -> list[Issue]:
    """One warning per undeclared name used once that is a likely slip for a declared name.

    Each warning is on the line of the observation that uses the name, with the
    name as its token, in line order.
    """
    if not points or not len(table):
        return []
    declared = {p.name for p in points}
    names = table.names
    uses = _uses(table)
    once = [names[k] for k in np.flatnonzero(uses == 1).tolist() if names[k] not in declared]
    if not once:
        return []
    index = _index(points)
    # Every slip keeps the set of characters (look-alikes counted as one): a cheap
    # necessary test that spares the variants of nearly every name of a large file.
    signatures = {_signature(key) for key in index}
    matches: dict[str, list[PointStatement]] = {}
    for name in once:
        key = _key(name)
        if _signature(key) in signatures and (found := _lookup(name, key, index)):
            matches[name] = found
    if not matches:
        return []
    matched = np.zeros(len(names) + 1, bool)  # the last entry stands for an absent AT (−1)
    matched[[names.index(name) for name in matches]] = True
    rows = np.flatnonzero(matched[table.frm] | matched[table.at] | matched[table.to])
    warnings = []
    for row in rows.tolist():
        for name in _names(table, row):
            if name in matches:
                warnings.append(Issue(int(table.line[row]), name, _message(name, matches[name])))
    return warnings


def _names(table: ObservationTable, row: int) -> Iterator[str]:
    """The distinct points an observation names (a direction's AT is also its FROM)."""
    frm, at, to = int(table.frm[row]), int(table.at[row]), int(table.to[row])
    yield table.names[frm]
    if at >= 0 and at != frm:
        yield table.names[at]
    if to != frm:
        yield table.names[to]


def _uses(table: ObservationTable) -> np.ndarray:
    """How many observations name each point (by name index): FROM, TO, and a separate AT."""
    count = len(table.names)
    uses = np.bincount(table.frm, minlength=count) + np.bincount(table.to, minlength=count)
    station = table.at[(table.at >= 0) & (table.at != table.frm)]
    return uses + np.bincount(station, minlength=count)


def _key(name: str) -> str:
    return name.casefold().translate(_SEPARATORS)


def _signature(key: str) -> frozenset[str]:
    return frozenset(key.translate(_SAME_LOOK))


def _index(points: Sequence[PointStatement]) -> dict[str, list[PointStatement]]:
    """Declared points by their key, and by their key with one doubled letter made single."""
    index: dict[str, list[PointStatement]] = {}
    for point in points:
        key = _key(point.name)
        for variant in {key, *_single_letters(key)}:
            index.setdefault(variant, []).append(point)
    return index


def _single_letters(key: str) -> Iterator[str]:
    """``key`` with one doubled letter typed once (digits are never doubled by a slip)."""
    for i in range(len(key) - 1):
        if key[i] == key[i + 1] and not key[i].isdigit():
            yield key[:i] + key[i + 1 :]


def _variants(key: str) -> Iterator[str]:
    """The keys one slip away from ``key`` (see the module's docstring)."""
    yield key
    yield from _single_letters(key)
    for i in range(len(key) - 1):
        if key[i] != key[i + 1]:
            yield key[:i] + key[i + 1] + key[i] + key[i + 2 :]
    for i, char in enumerate(key):
        for other in _LOOK_ALIKE.get(char, ""):
            yield key[:i] + other + key[i + 1 :]


def _lookup(name: str, key: str, index: dict[str, list[PointStatement]]) -> list[PointStatement]:
    found: dict[str, PointStatement] = {}
    for variant in _variants(key):
        for point in index.get(variant, ()):
            if point.name != name:
                found.setdefault(point.name, point)
    return sorted(found.values(), key=lambda p: p.line)[:_MAX_CHOICES]


def _message(name: str, choices: list[PointStatement]) -> str:
    listed = " or ".join(f"'{p.name}' (declared on line {p.line})" for p in choices)
    return (
        f"point {name} is named in this observation only and no 'point' line declares "
        f"it; did you mean {listed}? A misspelt name makes a new point that no other "
        "observation checks"
    )
