"""Where the page templates, static files and demo field books are.

In a checkout (and an editable install) they sit beside the package at the top
level, as the design keeps them; a built wheel ships them inside the package as
``server/templates``, ``server/static`` and ``server/demo_projects`` (see
pyproject.toml), so an installed service serves its UI.  Never from a request.
"""

from __future__ import annotations

from pathlib import Path

_PACKAGE = Path(__file__).resolve().parent


def _located(name: str) -> Path:
    shipped = _PACKAGE / name
    return shipped if shipped.is_dir() else _PACKAGE.parent / name


TEMPLATE_DIR = _located("templates")
STATIC_DIR = _located("static")
DEMO_DIR = _located("demo_projects")
