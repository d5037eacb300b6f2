"""Where the service keeps its data, and the limits it enforces."""

from __future__ import annotations

import os
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
