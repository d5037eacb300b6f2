"""What the result reports of each observation as the field book gives it, as columns.

``observation_metadata`` is the one place where the result builder reads the field
book's observations (line, kind, marks, values, note, ignored) and which of them the
network uses; everything else in ``builder.py`` works on these columns.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from server.fieldbook.model import ANGULAR_KINDS
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

    @property
    def angular(self) -> np.ndarray:
        """True for the kinds whose value is an angle."""
        return np.array([kind in ANGULAR_KINDS for kind in self.kind], dtype=bool)

    def of_kind(self, kind: str) -> np.ndarray:
        """True for the observations of ``kind``."""
        return np.array([k == kind for k in self.kind], dtype=bool)


def observation_metadata(network: Network) -> ObservationMetadata:
    """The field book's observations as columns, and where the used ones are among them."""
    observations = network.fieldbook.observations
    book_index = {id(obs): k for k, obs in enumerate(observations)}
    used_position = np.array([book_index[id(obs)] for obs in network.used], dtype=np.int64)
    value = np.array([obs.value for obs in observations], dtype=float)
    scale = np.array([obs.scale for obs in observations], dtype=float)
    booked = np.array(
        [
            obs.booked
            if obs.booked is not None
            else (obs.value / obs.scale if obs.scale else obs.value)
            for obs in observations
        ],
        dtype=float,
    )
    return ObservationMetadata(
        line=np.array([obs.line for obs in observations], dtype=np.int64),
        kind=[obs.kind for obs in observations],
        from_point=[obs.from_point for obs in observations],
        at=[obs.at for obs in observations],
        to=[obs.to for obs in observations],
        note=[obs.note for obs in observations],
        value=value,
        booked=booked,
        scale=scale,
        ignored=np.array([obs.ignored for obs in observations], dtype=bool),
        used_position=used_position.reshape(-1),
    )
