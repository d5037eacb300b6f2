"""Where the service keeps its data, and the limits it enforces."""

from __future__ import annotations

import os
from dataclasses import dataclass
from pathlib import Path

#: Largest field book upload accepted by the web service (bytes).
DEFAULT_MAX_UPLOAD_BYTES = 20 * 1024 * 1024


def default_data_dir() -> Path:
    """The per-user data folder: $STATIONFIT_DATA, else $XDG_DATA_HOME/stationfit, else ~/.local/share."""
    explicit = os.environ.get("STATIONFIT_DATA")
    if explicit:
        return Path(explicit)
    base = os.environ.get("XDG_DATA_HOME") or str(Path.home() / ".local" / "share")
    return Path(base) / "stationfit"


def repository_root() -> Path:
    """The checkout's top folder (templates/, static/, demo_projects/ live there)."""
    return Path(__file__).resolve().parent.parent


#: Observations one field book may hold in the web service before it is refused
#: (a 200,000-observation network adjusts in roughly 25 s and under 1 GB; docs/security.md).
DEFAULT_MAX_OBSERVATIONS = 200_000
#: Unknowns (coordinates, heights, orientations) one network may have in the web service.
DEFAULT_MAX_UNKNOWNS = 150_000
#: Adjustments the web service runs at the same time; the others wait their turn.
DEFAULT_MAX_CONCURRENT_ADJUSTMENTS = 1


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


def service_limits(max_observations: int | None = None,
                   max_unknowns: int | None = None) -> WorkLimits:
    """The web service's limits: the arguments, else STATIONFIT_MAX_OBSERVATIONS and
    STATIONFIT_MAX_UNKNOWNS, else the defaults; 0 turns a limit off."""
    if max_observations is None:
        max_observations = env_int("STATIONFIT_MAX_OBSERVATIONS", DEFAULT_MAX_OBSERVATIONS)
    if max_unknowns is None:
        max_unknowns = env_int("STATIONFIT_MAX_UNKNOWNS", DEFAULT_MAX_UNKNOWNS)
    return WorkLimits(max_observations or None, max_unknowns or None)
