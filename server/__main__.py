"""``python -m server``: the same command line as ``stationfit`` (see server/cli.py)."""

from server.cli import run

run()
