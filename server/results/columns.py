"""A result's points and observations kept as columns, read as rows only when asked.

``build_result`` computes every per-point and per-observation figure as an array
(``builder.py``); these classes hold them.  For the pages, reports, review and the
store they are ``Sequence[PointResult]`` and ``Sequence[ObservationResult]``: a row is
made when it is read (slices and iteration make them a chunk at a time).  The JSON
writer goes straight from the columns (``json_records``) and never makes the rows.

A float column with no mask is never null; a mask marks where a value exists (the
row's field is None elsewhere).  ``json_records`` also says whether every float it
wrote is finite, so that the writer need not look at each one again.
"""

from __future__ import annotations

import math
from collections.abc import Iterator, Mapping, Sequence
from dataclasses import dataclass
from typing import Any, overload

import numpy as np

from server.results.types import Ellipse, ObservationResult, PointResult, RelativeResult

#: Rows made per step when a whole column store is iterated or written.
CHUNK = 20_000


def _nullable(values: np.ndarray, mask: np.ndarray | None) -> list[Any]:
    """The values as Python numbers, None where ``mask`` is False."""
    if mask is None or mask.all():
        return values.tolist()
    out = values.astype(object)
    out[~mask] = None
    return out.tolist()


def _finite(values: np.ndarray, mask: np.ndarray | None) -> bool:
    return bool(np.isfinite(values if mask is None else values[mask]).all())


class _Columns(Sequence[Any]):
    """Rows by index and slice, equality and hashing as the tuple of the rows."""

    __slots__ = ()

    def __len__(self) -> int:
        raise NotImplementedError

    def _rows(self, start: int, stop: int) -> list[Any]:
        raise NotImplementedError

    @overload
    def __getitem__(self, index: int) -> Any: ...

    @overload
    def __getitem__(self, index: slice) -> tuple[Any, ...]: ...

    def __getitem__(self, index: int | slice) -> Any:
        n = len(self)
        if isinstance(index, slice):
            start, stop, step = index.indices(n)
            if step != 1:
                return tuple(self)[index]
            return tuple(self._rows(start, max(start, stop)))
        k = index.__index__()
        if k < 0:
            k += n
        if not 0 <= k < n:
            raise IndexError("row index out of range")
        return self._rows(k, k + 1)[0]

    def __iter__(self) -> Iterator[Any]:
        for start in range(0, len(self), CHUNK):
            yield from self._rows(start, min(start + CHUNK, len(self)))

    def __eq__(self, other: object) -> bool:
        if isinstance(other, (str, bytes)) or not isinstance(other, Sequence):
            return NotImplemented
        return len(self) == len(other) and tuple(self) == tuple(other)

    def __hash__(self) -> int:
        return hash(tuple(self))

    def __repr__(self) -> str:
        return f"{type(self).__name__}({len(self)} rows)"


@dataclass(frozen=True, eq=False, repr=False, slots=True, kw_only=True)
class ObservationColumns(_Columns):
    """Every observation of a result, in field book order, as columns (output units)."""

    line: np.ndarray
    kind: list[str]
    from_point: list[str]
    at: list[str | None]
    to: list[str]
    note: list[str]
    observed: np.ndarray
    booked: np.ndarray
    scale_factor: np.ndarray
    has_scale: np.ndarray  # a distance: the scale factor is reported
    adjusted: np.ndarray
    has_adjusted: np.ndarray
    residual: np.ndarray
    sd: np.ndarray
    redundancy: np.ndarray
    used: np.ndarray  # adjusted with the others: redundancy reported
    w: np.ndarray
    mdb: np.ndarray
    estimated_bias: np.ndarray
    tested: np.ndarray  # controlled (r ≥ 0.001): w, MDB and estimated bias reported
    flagged: np.ndarray
    ignored: np.ndarray
    inseparable: list[tuple[int, ...]]
    #: "dx", "dy" or "dz" for a baseline's three entries, None elsewhere; None: no baselines
    component: list[str | None] | None = None

    def __len__(self) -> int:
        return len(self.kind)

    def _fields(self, start: int, stop: int) -> dict[str, list[Any]]:
        """Each field of the rows start..stop as a list of Python values (None where null)."""
        s = slice(start, stop)
        has_adjusted = self.has_adjusted[s]
        tested = self.tested[s]
        return {
            "line": self.line[s].tolist(),
            "kind": self.kind[s],
            "from_point": self.from_point[s],
            "at": self.at[s],
            "to": self.to[s],
            "observed": self.observed[s].tolist(),
            "booked": self.booked[s].tolist(),
            "scale_factor": _nullable(self.scale_factor[s], self.has_scale[s]),
            "adjusted": _nullable(self.adjusted[s], has_adjusted),
            "residual": _nullable(self.residual[s], has_adjusted),
            "sd": self.sd[s].tolist(),
            "redundancy": _nullable(self.redundancy[s], self.used[s]),
            "w": _nullable(self.w[s], tested),
            "mdb": _nullable(self.mdb[s], tested),
            "estimated_bias": _nullable(self.estimated_bias[s], tested),
            "inseparable": self.inseparable[s],
            "flagged": self.flagged[s].tolist(),
            "ignored": self.ignored[s].tolist(),
            "note": self.note[s],
        } | ({} if self.component is None else {"component": self.component[s]})

    def _rows(self, start: int, stop: int) -> list[ObservationResult]:
        fields = self._fields(start, stop)
        names = tuple(fields)
        return [
            ObservationResult(**dict(zip(names, values)))
            for values in zip(*fields.values(), strict=True)
        ]

    def all_finite(self) -> bool:
        """True when every reported float is finite (as JSON can write it)."""
        return all(
            _finite(values, mask)
            for values, mask in (
                (self.observed, None),
                (self.booked, None),
                (self.scale_factor, self.has_scale),
                (self.adjusted, self.has_adjusted),
                (self.residual, self.has_adjusted),
                (self.sd, None),
                (self.redundancy, self.used),
                (self.w, self.tested),
                (self.mdb, self.tested),
                (self.estimated_bias, self.tested),
            )
        )

    def json_records(self, start: int = 0, stop: int | None = None) -> list[dict[str, Any]]:
        """The contract's observation records (``to_json_dict``), keys in their order."""
        stop = len(self) if stop is None else stop
        f = self._fields(start, stop)
        # a dict display per record: presized with its keys, faster than dict(zip(...))
        return [
            {
                "line": line,
                "kind": kind,
                "from": from_point,
                "at": at,
                "to": to,
                "observed": observed,
                "booked": booked,
                "scale_factor": scale_factor,
                "adjusted": adjusted,
                "residual": residual,
                "sd": sd,
                "redundancy": redundancy,
                "w": w,
                "mdb": mdb,
                "estimated_bias": bias,
                "inseparable": list(inseparable),
                "flagged": flagged,
                "ignored": ignored,
            }
            for (
                line,
                kind,
                from_point,
                at,
                to,
                observed,
                booked,
                scale_factor,
                adjusted,
                residual,
                sd,
                redundancy,
                w,
                mdb,
                bias,
                inseparable,
                flagged,
                ignored,
            ) in zip(
                f["line"],
                f["kind"],
                f["from_point"],
                f["at"],
                f["to"],
                f["observed"],
                f["booked"],
                f["scale_factor"],
                f["adjusted"],
                f["residual"],
                f["sd"],
                f["redundancy"],
                f["w"],
                f["mdb"],
                f["estimated_bias"],
                f["inseparable"],
                f["flagged"],
                f["ignored"],
                strict=True,
            )
        ]


#: The keys of an observation record of the result contract, in their order.
OBSERVATION_KEYS = (
    "line",
    "kind",
    "from",
    "at",
    "to",
    "observed",
    "booked",
    "scale_factor",
    "adjusted",
    "residual",
    "sd",
    "redundancy",
    "w",
    "mdb",
    "estimated_bias",
    "inseparable",
    "flagged",
    "ignored",
)

#: The keys of a point record of the plane result contract, in their order.
POINT_KEYS = (
    "name",
    "east",
    "north",
    "height",
    "sd_east",
    "sd_north",
    "sd_height",
    "fixed",
    "weighted",
    "note",
    "ellipse",
)


def with_entries(
    columns: ObservationColumns, entries: Mapping[int, tuple[ObservationResult, ...]]
) -> ObservationColumns:
    """``columns`` with each row k of ``entries`` replaced by its rows (a baseline's three
    component entries), still as columns: making every other row an object would cost
    more than the rest of the result."""
    n = len(columns)
    counts = np.ones(n, np.int64)
    rows = sorted(entries)
    counts[rows] = [len(entries[k]) for k in rows]
    source = np.repeat(np.arange(n), counts)  # the row each new row comes from
    first = np.cumsum(counts) - counts
    at = np.concatenate([first[k] + np.arange(len(entries[k])) for k in rows]).astype(np.int64)
    made = [row for k in rows for row in entries[k]]
    taken = source.tolist()

    def listed(values: list[Any], field: str) -> list[Any]:
        out = [values[k] for k in taken]
        for position, row in zip(at.tolist(), made):
            out[position] = getattr(row, field)
        return out

    def numbers(values: np.ndarray, field: str) -> np.ndarray:
        out = values[source]
        out[at] = [getattr(row, field) for row in made]
        return out

    def given(values: np.ndarray, mask: np.ndarray, field: str, first: bool = True) -> np.ndarray:
        # a value where the row has one; the mask says where (as _nullable reads it), and a
        # mask shared by several fields must fit each of them
        out = values[source]
        present = [getattr(row, field) is not None for row in made]
        out[at] = [getattr(row, field) if ok else math.nan for row, ok in zip(made, present)]
        if first:
            mask[at] = present
        elif mask[at].tolist() != present:
            raise ValueError(f"an entry's {field} is null where the fields beside it are not")
        return out

    has_scale, has_adjusted = columns.has_scale[source], columns.has_adjusted[source]
    used, tested = columns.used[source], columns.tested[source]
    component = [None] * n if columns.component is None else columns.component
    return ObservationColumns(
        line=numbers(columns.line, "line"),
        kind=listed(columns.kind, "kind"),
        from_point=listed(columns.from_point, "from_point"),
        at=listed(columns.at, "at"),
        to=listed(columns.to, "to"),
        note=listed(columns.note, "note"),
        observed=numbers(columns.observed, "observed"),
        booked=numbers(columns.booked, "booked"),
        scale_factor=given(columns.scale_factor, has_scale, "scale_factor"),
        has_scale=has_scale,
        adjusted=given(columns.adjusted, has_adjusted, "adjusted"),
        has_adjusted=has_adjusted,
        residual=given(columns.residual, has_adjusted, "residual", first=False),
        sd=numbers(columns.sd, "sd"),
        redundancy=given(columns.redundancy, used, "redundancy"),
        used=used,
        w=given(columns.w, tested, "w"),
        mdb=given(columns.mdb, tested, "mdb", first=False),
        estimated_bias=given(columns.estimated_bias, tested, "estimated_bias", first=False),
        tested=tested,
        flagged=numbers(columns.flagged, "flagged"),
        ignored=numbers(columns.ignored, "ignored"),
        inseparable=listed(columns.inseparable, "inseparable"),
        component=listed(component, "component"),
    )


@dataclass(frozen=True, eq=False, repr=False, slots=True, kw_only=True)
class PointColumns(_Columns):
    """Every point of a plane result (no ``crs``), in the network's order, as columns.

    ``coordinates`` and ``sds`` are (n, 3) east, north, height with their masks; the
    ellipse's semi-axes and azimuth are (n,) with ``has_ellipse``.
    """

    name: list[str]
    coordinates: np.ndarray
    has_coordinate: np.ndarray
    sds: np.ndarray
    has_sd: np.ndarray
    fixed: list[str]
    weighted: list[str]
    note: list[str]
    in_use: np.ndarray
    semi_major: np.ndarray
    semi_minor: np.ndarray
    azimuth: np.ndarray
    has_ellipse: np.ndarray
    confidence: float

    def __len__(self) -> int:
        return len(self.name)

    def _fields(self, start: int, stop: int) -> dict[str, list[Any]]:
        s = slice(start, stop)
        coordinates, has_coordinate = self.coordinates[s], self.has_coordinate[s]
        sds, has_sd = self.sds[s], self.has_sd[s]
        return {
            "name": self.name[s],
            "east": _nullable(coordinates[:, 0], has_coordinate[:, 0]),
            "north": _nullable(coordinates[:, 1], has_coordinate[:, 1]),
            "height": _nullable(coordinates[:, 2], has_coordinate[:, 2]),
            "sd_east": _nullable(sds[:, 0], has_sd[:, 0]),
            "sd_north": _nullable(sds[:, 1], has_sd[:, 1]),
            "sd_height": _nullable(sds[:, 2], has_sd[:, 2]),
            "fixed": self.fixed[s],
            "weighted": self.weighted[s],
            "note": self.note[s],
            "in_use": self.in_use[s].tolist(),
        }

    def _ellipses(self, start: int, stop: int) -> list[tuple[float, float, float] | None]:
        s = slice(start, stop)
        has = self.has_ellipse[s]
        if not has.any():
            return [None] * (stop - start)
        axes = zip(
            self.semi_major[s][has].tolist(),
            self.semi_minor[s][has].tolist(),
            self.azimuth[s][has].tolist(),
            strict=True,
        )
        return [next(axes) if h else None for h in has.tolist()]

    def _rows(self, start: int, stop: int) -> list[PointResult]:
        fields = self._fields(start, stop)
        names = (*fields, "ellipse")
        ellipses = [
            None
            if e is None
            else Ellipse(semi_major=e[0], semi_minor=e[1], azimuth=e[2], confidence=self.confidence)
            for e in self._ellipses(start, stop)
        ]
        return [
            PointResult(**dict(zip(names, values)))
            for values in zip(*fields.values(), ellipses, strict=True)
        ]

    def all_finite(self) -> bool:
        """True when every reported float is finite (as JSON can write it)."""
        return (
            _finite(self.coordinates, self.has_coordinate)
            and _finite(self.sds, self.has_sd)
            and _finite(self.semi_major, self.has_ellipse)
            and _finite(self.semi_minor, self.has_ellipse)
            and _finite(self.azimuth, self.has_ellipse)
            and bool(np.isfinite(self.confidence) or not self.has_ellipse.any())
        )

    def json_records(self, start: int = 0, stop: int | None = None) -> list[dict[str, Any]]:
        """The contract's point records of a plane result, keys in their order."""
        stop = len(self) if stop is None else stop
        f = self._fields(start, stop)
        confidence = self.confidence
        ellipses = [
            None
            if e is None
            else {"semi_major": e[0], "semi_minor": e[1], "azimuth": e[2], "confidence": confidence}
            for e in self._ellipses(start, stop)
        ]
        return [
            {
                "name": name,
                "east": east,
                "north": north,
                "height": height,
                "sd_east": sd_east,
                "sd_north": sd_north,
                "sd_height": sd_height,
                "fixed": fixed,
                "weighted": weighted,
                "note": note,
                "ellipse": ellipse,
            }
            for (
                name,
                east,
                north,
                height,
                sd_east,
                sd_north,
                sd_height,
                fixed,
                weighted,
                note,
                ellipse,
            ) in zip(
                f["name"],
                f["east"],
                f["north"],
                f["height"],
                f["sd_east"],
                f["sd_north"],
                f["sd_height"],
                f["fixed"],
                f["weighted"],
                f["note"],
                ellipses,
                strict=True,
            )
        ]


@dataclass(frozen=True, eq=False, repr=False, slots=True, kw_only=True)
class RelativeColumns(_Columns):
    """Every relative confidence ellipse of a result, as columns (output units).

    ``allowed`` exists where ``has_allowed`` (a tolerance, and not two held points);
    ``passed`` is reported exactly there.
    """

    from_point: list[str]
    to_point: list[str]
    distance: np.ndarray
    semi_major: np.ndarray
    semi_minor: np.ndarray
    azimuth: np.ndarray
    confidence: float
    allowed: np.ndarray
    has_allowed: np.ndarray
    passed: np.ndarray
    sd_distance: np.ndarray
    requested: np.ndarray
    held: np.ndarray

    def __len__(self) -> int:
        return len(self.from_point)

    def _fields(self, start: int, stop: int) -> dict[str, list[Any]]:
        s = slice(start, stop)
        has_allowed = self.has_allowed[s]
        return {
            "from_point": self.from_point[s],
            "to_point": self.to_point[s],
            "distance": self.distance[s].tolist(),
            "semi_major": self.semi_major[s].tolist(),
            "semi_minor": self.semi_minor[s].tolist(),
            "azimuth": self.azimuth[s].tolist(),
            "confidence": [self.confidence] * (stop - start),
            "allowed": _nullable(self.allowed[s], has_allowed),
            "passed": _nullable(self.passed[s], has_allowed),
            "sd_distance": self.sd_distance[s].tolist(),
            "requested": self.requested[s].tolist(),
            "held": self.held[s].tolist(),
        }

    def _rows(self, start: int, stop: int) -> list[RelativeResult]:
        fields = self._fields(start, stop)
        names = tuple(fields)
        return [
            RelativeResult(**dict(zip(names, values)))
            for values in zip(*fields.values(), strict=True)
        ]

    def all_finite(self) -> bool:
        """True when every reported float is finite (as JSON can write it)."""
        return bool(np.isfinite(self.confidence) or not len(self)) and all(
            _finite(values, mask)
            for values, mask in (
                (self.distance, None),
                (self.semi_major, None),
                (self.semi_minor, None),
                (self.azimuth, None),
                (self.allowed, self.has_allowed),
                (self.sd_distance, None),
            )
        )

    def json_records(self, start: int = 0, stop: int | None = None) -> list[dict[str, Any]]:
        """The contract's relative records, keys in their order."""
        stop = len(self) if stop is None else stop
        f = self._fields(start, stop)
        return [
            {
                "from": a,
                "to": b,
                "distance": distance,
                "semi_major": major,
                "semi_minor": minor,
                "azimuth": azimuth,
                "confidence": confidence,
                "allowed": allowed,
                "passed": passed,
                "sd_distance": sd_distance,
                "requested": requested,
                "held": held,
            }
            for (
                a,
                b,
                distance,
                major,
                minor,
                azimuth,
                confidence,
                allowed,
                passed,
                sd_distance,
                requested,
                held,
            ) in zip(*f.values(), strict=True)
        ]
