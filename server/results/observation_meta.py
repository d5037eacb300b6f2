"""What the result reports of each observation as the field book gives it, as columns.

``observation_metadata`` is the one place where the result builder reads the field
book's observations (line, kind, marks, values, note, ignored) and which of them the
network uses; everything else in ``builder.py`` works on these columns.
"""

from __future__ import annotations

from dataclasses import dataclass
from operator import is_

import numpy as np

from server.fieldbook.model import ANGULAR_KINDS
from server.fieldbook.table import ObservationRows
from server.model.network import Network


@dataclass(frozen=True, slots=True, kw_only=True)
class ObservationMetadata:
    """Per-observation columns in field book order (values in SI: metres, radians)."""

    line: np.ndarray  # int64
    kind: list[str]
    from_point: list[str]
    at: list[str | None]
    to: list[str]
    note: list[str]
    #: the value the adjustment uses (scale factor applied, horizontal angles in [0, 2π))
    value: np.ndarray
    #: the value as written, before the scale factor and the reduction into [0, 2π)
    booked: np.ndarray
    #: the scale factor a distance was multiplied by (1.0 when none)
    scale: np.ndarray
    ignored: np.ndarray  # bool
    #: for each row of ``network.used``, the observation's index in field book order
    used_position: np.ndarray  # int64
    #: the marks as indices into ``point_names`` (``at``: −1 where none), for array work
    point_names: tuple[str, ...]
    from_index: np.ndarray  # int64
    at_index: np.ndarray  # int64
    to_index: np.ndarray  # int64
    #: each observation's kind as an index into ``kind_names`` (masks without a string test)
    kind_code: np.ndarray
    kind_names: tuple[str, ...]

    @property
    def angular(self) -> np.ndarray:
        """True for the kinds whose value is an angle."""
        return self.among(ANGULAR_KINDS)

    def of_kind(self, kind: str) -> np.ndarray:
        """True for the observations of ``kind``."""
        return self.among(frozenset({kind}))

    def among(self, kinds: frozenset[str]) -> np.ndarray:
        """True for the observations of any of ``kinds``."""
        codes = [code for code, name in enumerate(self.kind_names) if name in kinds]
        if len(codes) == 1:
            return self.kind_code == codes[0]
        return np.isin(self.kind_code, codes)


def observation_metadata(network: Network) -> ObservationMetadata:
    """The field book's observations as columns, and where the used ones are among them.

    Read from the field book's table (``fieldbook/table.py``): making an ``Observation``
    object per row costs more than the rest of this stage on a large book.
    """
    table = network.fieldbook.table
    used = network.used
    if isinstance(used, ObservationRows) and used.table is table:
        rows = used.rows
        used_position = np.arange(len(used), dtype=np.int64) if rows is None else rows
    else:
        observations = network.fieldbook.observations
        if len(used) == len(observations) and all(map(is_, used, observations)):
            used_position = np.arange(len(used), dtype=np.int64)  # every observation is used
        else:
            book_index = {id(obs): k for k, obs in enumerate(observations)}
            used_position = np.array([book_index[id(obs)] for obs in used], dtype=np.int64)
    names = table.names
    value = np.array(table.value, dtype=float)
    scale = np.array(table.scale, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        unscaled = np.where(scale != 0.0, value / np.where(scale != 0.0, scale, 1.0), value)
    notes = table.notes
    return ObservationMetadata(
        line=np.array(table.line, dtype=np.int64),
        kind=list(table.kind_names),
        from_point=[names[k] for k in table.frm.tolist()],
        at=[None if k < 0 else names[k] for k in table.at.tolist()],
        to=[names[k] for k in table.to.tolist()],
        note=[notes.get(k, "") for k in range(len(table))] if notes else [""] * len(table),
        value=value,
        # the value as written: booked, else before the scale factor
        booked=np.where(table.booked_given, table.booked, unscaled),
        scale=scale,
        ignored=np.array(table.ignored, dtype=bool),
        used_position=np.asarray(used_position, dtype=np.int64).reshape(-1),
        point_names=names,
        from_index=np.asarray(table.frm, dtype=np.int64),
        at_index=np.asarray(table.at, dtype=np.int64),
        to_index=np.asarray(table.to, dtype=np.int64),
        kind_code=np.asarray(table.kind),
        kind_names=tuple(table.kinds),
    )
