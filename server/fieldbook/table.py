"""The observations of a field book as columns: one numpy array per field, names interned.

A large field book has hundreds of thousands of observations; one Python
object each costs more than everything the network, misclosure and
start-value stages do with them.  The parser therefore collects each
observation as the plain tuple of its ``Observation`` fields (``row_of``)
and hands them over as an ``ObservationTable``:

* point names are interned once, in order of first appearance among the
  observations (FROM, AT, TO of each line in turn); ``frm``/``at``/``to``
  are indices into ``names`` (``at`` −1 where the observation has none);
* ``kind`` is an index into ``kinds`` (``model.OBSERVATION_KINDS``, then any
  other kind a table built in code holds); ``sigma`` an index into
  ``sigmas``, the distinct standard deviations in force (``Quantity``);
* absent values are NaN (``length_km``, ``instrument_height``,
  ``target_height``, ``booked`` where ``booked_given`` is False) or −1
  (``setups``, ``round_line``);
* the rare extras are kept aside by row: ``notes`` (non-empty ones only)
  and ``baselines`` (the three-component vectors).

``ObservationRows`` is the ``Sequence[Observation]`` every other consumer
still reads (``Fieldbook.observations``, ``Network.used``): it makes the
``Observation`` objects lazily, on indexing or iteration, and the table keeps
each one it made, so the same observation is the same object through every
view of the table.
"""

from __future__ import annotations

import math
import operator
from collections.abc import Callable, Iterable, Iterator, Mapping, Sequence
from dataclasses import dataclass, field
from functools import cached_property
from itertools import chain, repeat
from operator import itemgetter
from typing import Any, TypeVar, overload

import numpy as np

from server.fieldbook.model import OBSERVATION_KINDS, BaselineVector, Observation
from server.units import Quantity

#: The ``Observation`` fields in their order: a parsed row is the tuple of these values.
FIELDS = Observation.__slots__
#: Position of each field in a row.
_INDEX = {name: k for k, name in enumerate(FIELDS)}
#: ``kind`` code of each observation kind (its index in ``OBSERVATION_KINDS``).
KIND_CODE: dict[str, int] = {kind: code for code, kind in enumerate(OBSERVATION_KINDS)}
#: Marks an absent integer (``setups``, ``round_line``) or point (``at``).
NONE = -1

Row = tuple[Any, ...]
T = TypeVar("T")
#: A block of rows as its columns: one list (or array) per field of ``FIELDS``, in that order.
Columns = Sequence[list[Any] | np.ndarray]


def row_of(obs: Observation) -> Row:
    """The tuple of an observation's fields, in ``FIELDS`` order (what the parser collects)."""
    return tuple(getattr(obs, name) for name in FIELDS)


def columns_of(rows: Sequence[Row]) -> list[list[Any]]:
    """Rows as columns (one C-level pass per field; ``zip(*rows)`` costs twice as much)."""
    return [list(map(itemgetter(k), rows)) for k in range(len(FIELDS))]


@dataclass(frozen=True, eq=False)
class ObservationTable:
    """Every observation of a field book (or a selection of them) as parallel arrays.

    Row k is the k-th observation; ``line`` gives its line in the file.  See the
    module text for the encoding of names, kinds, standard deviations and absent
    values.  Arrays are read-only.  ``observation(k)`` gives the ``Observation``.
    """

    names: tuple[str, ...]
    sigmas: tuple[Quantity, ...]
    kinds: tuple[str, ...]
    line: np.ndarray  # int64
    kind: np.ndarray  # int8, index into kinds
    frm: np.ndarray  # int64, index into names
    at: np.ndarray  # int64, index into names, −1: none
    to: np.ndarray  # int64, index into names
    value: np.ndarray  # float64, SI
    sigma: np.ndarray  # int64, index into sigmas
    centering: np.ndarray  # float64, metres
    scale: np.ndarray  # float64
    length_km: np.ndarray  # float64, NaN: none
    setups: np.ndarray  # int64, −1: none
    instrument_height: np.ndarray  # float64, NaN: none
    target_height: np.ndarray  # float64, NaN: none
    round_line: np.ndarray  # int64, −1: none
    ignored: np.ndarray  # bool
    planned: np.ndarray  # bool
    booked: np.ndarray  # float64 (NaN where not given, and for a planned observation)
    booked_given: np.ndarray  # bool: False where the Observation has booked=None
    notes: Mapping[int, str] = field(default_factory=dict)  # row → note (non-empty only)
    baselines: Mapping[int, BaselineVector] = field(default_factory=dict)  # row → vector
    #: the Observation objects made so far, by row (shared by every view of this table)
    _made: list[Observation | None] = field(default_factory=list, repr=False)
    #: True once every row's object is made (``None in _made`` would call each one's __eq__)
    _complete: bool = field(default=False, repr=False)

    def __len__(self) -> int:
        return int(self.line.shape[0])

    # ---- building

    @classmethod
    def from_rows(cls, rows: Sequence[Row]) -> ObservationTable:
        """The table of parsed rows (tuples of the ``Observation`` fields, ``FIELDS`` order)."""
        return cls.from_blocks([columns_of(rows)])

    @classmethod
    def from_blocks(cls, blocks: Sequence[Columns]) -> ObservationTable:
        """The table of blocks of rows in order, each given as its columns (``FIELDS`` order,
        one list per field, None where a value is absent; a number or flag column may
        also be an array, as the parser's fast paths give them)."""
        blocks = [block for block in blocks if len(block[0])]
        if not blocks:
            return _empty()

        def listed(field: str) -> list[Any]:
            k = _INDEX[field]
            if len(blocks) == 1:
                return blocks[0][k]  # type: ignore[return-value]  # names and objects: lists
            return list(chain.from_iterable(block[k] for block in blocks))

        def joined(field: str, convert: Callable[[Any], np.ndarray]) -> np.ndarray:
            # arrays pass through; each list is converted apart, then the pieces joined
            k = _INDEX[field]
            parts = [_array(b[k], convert) for b in blocks]
            return parts[0] if len(parts) == 1 else np.concatenate(parts)

        kind, frm, at, to = listed("kind"), listed("from_point"), listed("at"), listed("to")
        n = len(kind)
        # names in order of first appearance: FROM, AT, TO of each row in turn
        interleaved: list[str | None] = [None] * (3 * n)
        interleaved[0::3], interleaved[1::3], interleaved[2::3] = frm, at, to
        seen = dict.fromkeys(interleaved)
        seen.pop(None, None)  # an absent AT
        names: tuple[str, ...] = tuple(seen)  # type: ignore[arg-type]  # None popped
        codes = dict(KIND_CODE)
        for other in set(kind) - codes.keys():  # a kind of a model built in code (tests)
            codes[other] = len(codes)
        ids: dict[str | None, int] = dict(zip(names, range(len(names))))  # made in C
        ids[None] = NONE
        sigmas, sigma_index = _interned(listed("sigma"))
        booked = joined("booked", _floats)
        table = cls(
            names=names,
            sigmas=sigmas,
            kinds=tuple(codes),
            line=joined("line", _whole),
            kind=np.fromiter(map(codes.__getitem__, kind), np.int8, n),
            frm=np.fromiter(map(ids.__getitem__, frm), np.int64, n),
            at=_absent(n) if at.count(None) == n else _ids(at, ids),
            to=np.fromiter(map(ids.__getitem__, to), np.int64, n),
            value=joined("value", _floats),
            sigma=sigma_index,
            centering=joined("centering", _floats),
            scale=joined("scale", _floats),
            length_km=joined("length_km", _floats),
            setups=joined("setups", _integers),
            instrument_height=joined("instrument_height", _floats),
            target_height=joined("target_height", _floats),
            round_line=joined("round_line", _integers),
            ignored=joined("ignored", _flags),
            planned=joined("planned", _flags),
            booked=booked,
            booked_given=np.concatenate([_given(b[_INDEX["booked"]]) for b in blocks]),
            notes=_sparse(listed("note"), ""),
            baselines=_sparse(listed("baseline"), None),
        )
        table.freeze()
        return table

    @classmethod
    def from_observations(cls, observations: Iterable[Observation]) -> ObservationTable:
        """The table of ``Observation`` objects (a field book built in code, an edited one).

        The objects themselves are kept as the table's made objects, so iterating the
        table gives them back."""
        objects = list(observations)
        table = cls.from_rows([row_of(obs) for obs in objects])
        if objects:
            table._made[:] = objects
            table._mark_complete()
        return table

    def freeze(self) -> None:
        """Make the arrays read-only (a table is shared by the views of one field book)."""
        for name in _ARRAYS:
            getattr(self, name).flags.writeable = False
        if not self._made:
            self._made.extend([None] * len(self))

    def take(self, rows: np.ndarray) -> ObservationTable:
        """The table of the given rows (in that order); names and σ stay as they are."""
        rows = np.asarray(rows, dtype=np.int64)
        picked = {name: getattr(self, name)[rows] for name in _ARRAYS}
        position = np.full(len(self), NONE, np.int64)  # new row of each old one, −1: not taken
        position[rows] = np.arange(rows.size)
        table = ObservationTable(
            names=self.names,
            sigmas=self.sigmas,
            kinds=self.kinds,
            **picked,
            notes=_moved(self.notes, position),
            baselines=_moved(self.baselines, position),
        )
        table.freeze()
        made = self._made
        if any(made):
            table._made[:] = [made[k] for k in rows.tolist()]
            if self._complete:
                table._mark_complete()
        return table

    # ---- columns derived on demand

    @cached_property
    def kind_names(self) -> tuple[str, ...]:
        """The kind of each row as its name (a tuple of interned strings)."""
        kinds = self.kinds
        return tuple(kinds[k] for k in self.kind.tolist())

    def code(self, kind: str) -> int:
        """The ``kind`` code of a kind name (−1 for a kind no row can have)."""
        return self.kinds.index(kind) if kind in self.kinds else NONE

    def is_kind(self, *kinds: str) -> np.ndarray:
        """Boolean mask of the rows of the given kinds."""
        codes = [self.code(kind) for kind in kinds]
        if len(codes) == 1:
            return self.kind == codes[0]
        return np.isin(self.kind, codes)

    def sigma_part(self, part: str) -> np.ndarray:
        """One part of each row's standard deviation (``constant``, ``ppm``, ``per_sqrtkm``,
        ``per_setup``; SI), as float64."""
        parts = np.array([getattr(q, part) for q in self.sigmas], dtype=float)
        return parts[self.sigma] if parts.size else np.zeros(0)

    # ---- objects, one at a time

    def observation(self, row: int) -> Observation:
        """Row ``row`` as an ``Observation`` (made once, then the same object)."""
        made = self._made[row]
        if made is None:
            made = self._make(row)
            self._made[row] = made
        return made

    def observations_at(self, rows: Sequence[int]) -> list[Observation]:
        """The given rows as ``Observation`` objects, those not made yet made together (one
        at a time, each costs as much as a batch of a hundred)."""
        made = self._made
        missing = [k for k in dict.fromkeys(rows) if made[k] is None]
        if missing:
            for k, obs in zip(missing, self._make_many(missing)):
                made[k] = obs
        return [made[k] for k in rows]  # type: ignore[misc]  # every one made above

    def observations(self) -> list[Observation]:
        """Every row as an ``Observation``, made where not made yet."""
        made = self._made
        if not self._complete:
            missing = [k for k, obs in enumerate(made) if obs is None]
            for k, obs in zip(missing, self._make_many(missing)):
                made[k] = obs
            self._mark_complete()
        return made  # type: ignore[return-value]  # no None left

    def _mark_complete(self) -> None:
        object.__setattr__(self, "_complete", True)  # a cache flag, not a field of the value

    def _make(self, row: int) -> Observation:
        return self._make_many([row])[0]

    def _make_many(self, rows: list[int]) -> list[Observation]:
        index = np.asarray(rows, dtype=np.int64)
        names = self.names
        kinds = [self.kinds[k] for k in self.kind[index].tolist()]
        frm = [names[k] for k in self.frm[index].tolist()]
        at = [None if k < 0 else names[k] for k in self.at[index].tolist()]
        to = [names[k] for k in self.to[index].tolist()]
        sigmas = [self.sigmas[k] for k in self.sigma[index].tolist()]
        setups = [None if k < 0 else k for k in self.setups[index].tolist()]
        round_line = [None if k < 0 else k for k in self.round_line[index].tolist()]
        booked = [
            (b if b == b else math.nan) if given else None
            for b, given in zip(self.booked[index].tolist(), self.booked_given[index].tolist())
        ]
        # a planned observation's NaN is math.nan itself, as the parser gives it (NaN is
        # unequal to itself, so equal observations must share the object)
        value = [v if v == v else math.nan for v in self.value[index].tolist()]
        notes, baselines = self.notes, self.baselines
        return [
            Observation(*fields)
            for fields in zip(
                self.line[index].tolist(),
                kinds,
                frm,
                at,
                to,
                value,
                sigmas,
                self.centering[index].tolist(),
                self.scale[index].tolist(),
                _optional(self.length_km[index]),
                setups,
                _optional(self.instrument_height[index]),
                _optional(self.target_height[index]),
                round_line,
                self.ignored[index].tolist(),
                [notes.get(k, "") for k in rows],
                booked,
                self.planned[index].tolist(),
                [baselines.get(k) for k in rows],
                strict=True,
            )
        ]


#: The array columns of a table (everything but names, σ and the sparse extras).
_ARRAYS = (
    "line",
    "kind",
    "frm",
    "at",
    "to",
    "value",
    "sigma",
    "centering",
    "scale",
    "length_km",
    "setups",
    "instrument_height",
    "target_height",
    "round_line",
    "ignored",
    "planned",
    "booked",
    "booked_given",
)


def _moved(extras: Mapping[int, T], position: np.ndarray) -> dict[int, T]:
    """Sparse extras by row, renumbered by ``position`` (old row → new row, −1: dropped)."""
    moved = {int(position[k]): value for k, value in extras.items()}
    moved.pop(NONE, None)
    return moved


def _empty() -> ObservationTable:
    integers = np.zeros(0, np.int64)
    floats = np.zeros(0)
    flags = np.zeros(0, bool)
    table = ObservationTable(
        names=(),
        sigmas=(),
        kinds=OBSERVATION_KINDS,
        line=integers,
        kind=np.zeros(0, np.int8),
        frm=integers,
        at=integers,
        to=integers,
        value=floats,
        sigma=integers,
        centering=floats,
        scale=floats,
        length_km=floats,
        setups=integers,
        instrument_height=floats,
        target_height=floats,
        round_line=integers,
        ignored=flags,
        planned=flags,
        booked=floats,
        booked_given=flags,
    )
    table.freeze()
    return table


def _interned(sigmas: list[Quantity]) -> tuple[tuple[Quantity, ...], np.ndarray]:
    """The distinct standard deviations (in order of first use) and each row's index.

    Rows share the ``Quantity`` of the defaults in force, so the objects are told
    apart by identity first (no per-row hashing), then the few distinct ones by value.
    """
    addresses = np.fromiter(map(id, sigmas), np.uint64, len(sigmas))
    _, first, inverse = np.unique(addresses, return_index=True, return_inverse=True)
    by_use = np.argsort(first, kind="stable")
    distinct: dict[Quantity, int] = {}
    code = np.empty(first.size, np.int64)
    for k in by_use.tolist():
        code[k] = distinct.setdefault(sigmas[int(first[k])], len(distinct))
    return tuple(distinct), code[inverse.reshape(-1)]


def _given(values: list[object] | np.ndarray) -> np.ndarray:
    """True where a value is not None (everywhere in an array of numbers)."""
    if isinstance(values, np.ndarray) or values.count(None) == 0:
        return np.ones(len(values), bool)
    return np.fromiter(map(operator.is_not, values, repeat(None)), bool, len(values))


def _sparse(values: list[T], absent: object) -> dict[int, T]:
    """The values other than ``absent`` (None or ""), by row (found in one C-level pass:
    they are rare)."""
    given = map(operator.is_not, values, repeat(absent)) if absent is None else map(bool, values)
    rows = np.flatnonzero(np.fromiter(given, bool, len(values)))
    return {k: values[k] for k in rows.tolist()}


def _array(values: list[Any] | np.ndarray, convert: Callable[[Any], np.ndarray]) -> np.ndarray:
    return values if isinstance(values, np.ndarray) else convert(values)


def _whole(values: list[int]) -> np.ndarray:
    return np.array(values, dtype=np.int64)


def _flags(values: list[bool]) -> np.ndarray:
    return np.array(values, dtype=bool)


def _absent(n: int) -> np.ndarray:
    return np.full(n, NONE, np.int64)


def _ids(names: list[str | None], ids: dict[str | None, int]) -> np.ndarray:
    return np.fromiter(map(ids.__getitem__, names), np.int64, len(names))


def _floats(values: list[float | None]) -> np.ndarray:
    """Floats with None as NaN (numpy converts None to NaN for a float array)."""
    return np.array(values, dtype=float)


def _integers(values: list[int | None]) -> np.ndarray:
    """Whole numbers with None as −1."""
    if values.count(None) == len(values):
        return np.full(len(values), NONE, np.int64)
    return np.fromiter((NONE if v is None else v for v in values), np.int64, len(values))


def _optional(values: np.ndarray) -> list[float | None]:
    """Floats with NaN as None."""
    return [None if v != v else v for v in values.tolist()]


class ObservationRows(Sequence[Observation]):
    """A read-only ``Sequence[Observation]`` over the rows of a table (all, or ``rows``).

    Objects are made on demand and kept by the table, so two views of one
    table give the same object for the same row.  Equal to any sequence of
    equal observations (a tuple included), as the tuple it replaces was.
    """

    __slots__ = ("rows", "table")

    def __init__(self, table: ObservationTable, rows: np.ndarray | None = None) -> None:
        self.table = table
        #: rows of ``table`` in this view's order; None: every row in order
        self.rows = rows

    def __len__(self) -> int:
        return len(self.table) if self.rows is None else int(self.rows.shape[0])

    @overload
    def __getitem__(self, index: int) -> Observation: ...

    @overload
    def __getitem__(self, index: slice) -> tuple[Observation, ...]: ...

    def __getitem__(self, index: int | slice) -> Observation | tuple[Observation, ...]:
        if isinstance(index, slice):
            return tuple(self)[index]
        count = len(self)
        if not -count <= index < count:
            raise IndexError("observation index out of range")
        row = index % count if self.rows is None else int(self.rows[index])
        return self.table.observation(row)

    def __iter__(self) -> Iterator[Observation]:
        made = self.table.observations()
        if self.rows is None:
            return iter(made)
        return iter([made[k] for k in self.rows.tolist()])

    def __eq__(self, other: object) -> bool:
        if isinstance(other, (ObservationRows, tuple, list)):
            return len(self) == len(other) and tuple(self) == tuple(other)
        return NotImplemented

    def __hash__(self) -> int:
        return hash(tuple(self))

    def __repr__(self) -> str:
        return f"ObservationRows({len(self)} observations)"

    def __reduce__(self) -> tuple[Any, ...]:
        return tuple, (tuple(self),)


def table_of(observations: Sequence[Observation]) -> tuple[ObservationTable, np.ndarray | None]:
    """The table behind a sequence of observations, and its rows (None: all, in order).

    An ``ObservationRows`` gives its own; any other sequence is tabled afresh.
    """
    if isinstance(observations, ObservationRows):
        return observations.table, observations.rows
    return ObservationTable.from_observations(observations), None
