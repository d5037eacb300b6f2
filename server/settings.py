"""Where the service keeps its data, and the limits it enforces."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

#: Largest field book upload accepted by the web service (bytes).
DEFAULT_MAX_UPLOAD_BYTES = 20 * 1024 * 1024


def default_data_dir() -> Path:
    """The per-user data folder: $STATIONFIT_DATA, else $XDG_DATA_HOME/stationfit, else
    ~/.local/share."""
    explicit = os.environ.get("STATIONFIT_DATA")
    if explicit:
        return Path(explicit)
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "stationfit"


#: Observations one field book may hold in the web service before it is refused.
DEFAULT_MAX_OBSERVATIONS = 200_000
#: Unknowns (coordinates, heights, orientations) one network may have in the web service.
#: Measured on a 2-core machine (docs/security.md): a levelling grid of 50,625 unknowns
#: took 26 s and 0.8 GB, one of 100,489 unknowns 104 s and 2.4 GB; time and memory grow
#: faster than the size, so the limit sits just under the larger one.
DEFAULT_MAX_UNKNOWNS = 100_000
#: Adjustments the web service runs at the same time; the others wait their turn.  One
#: keeps the memory to that of one adjustment and leaves the second core to the pages.
DEFAULT_ADJUSTMENTS_AT_ONCE = 1
#: Adjustments that may wait for a slot; a new upload beyond them gets 503 and Retry-After.
DEFAULT_MAX_WAITING = 20
#: Seconds a client refused with 503 is asked to wait before trying again.
RETRY_AFTER_SECONDS = 30


@dataclass(frozen=True, slots=True)
class WorkLimits:
    """How much work one field book may ask for (None: no limit, the command line's default)."""

    max_observations: int | None = None
    max_unknowns: int | None = None


def env_int(name: str, default: int) -> int:
    """A whole number from the environment, or ``default`` when unset or empty."""
    value = os.environ.get(name, "").strip()
    if not value:
        return default
    if not value.isdigit():
        raise ValueError(f"{name} must be a whole number, not {value!r}")
    return int(value)


def service_limits(
    max_observations: int | None = None, max_unknowns: int | None = None
) -> WorkLimits:
    """The web service's limits: the arguments, else STATIONFIT_MAX_OBSERVATIONS and
    STATIONFIT_MAX_UNKNOWNS, else the defaults; 0 turns a limit off."""
    if max_observations is None:
        max_observations = env_int("STATIONFIT_MAX_OBSERVATIONS", DEFAULT_MAX_OBSERVATIONS)
    if max_unknowns is None:
        max_unknowns = env_int("STATIONFIT_MAX_UNKNOWNS", DEFAULT_MAX_UNKNOWNS)
    return WorkLimits(max_observations or None, max_unknowns or None)


def service_queue(
    adjustments_at_once: int | None = None, max_waiting: int | None = None
) -> tuple[int, int]:
    """(adjustments at once, adjustments allowed to wait): the arguments, else
    STATIONFIT_ADJUSTMENTS_AT_ONCE and STATIONFIT_MAX_WAITING, else the defaults."""
    if adjustments_at_once is None:
        adjustments_at_once = env_int("STATIONFIT_ADJUSTMENTS_AT_ONCE", DEFAULT_ADJUSTMENTS_AT_ONCE)
    if max_waiting is None:
        max_waiting = env_int("STATIONFIT_MAX_WAITING", DEFAULT_MAX_WAITING)
    if adjustments_at_once < 1:
        raise ValueError("STATIONFIT_ADJUSTMENTS_AT_ONCE must be at least 1")
    return adjustments_at_once, max_waiting
