"""The web service: a thin FastAPI layer over the pipeline, the report and the project store."""

from __future__ import annotations

from server.web.app import create_app

__all__ = ["create_app"]
