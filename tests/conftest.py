"""Shared pytest hooks: the Hypothesis profile (tests/hypothesis_profiles.py) and the
reliability tests' figures, printed after the run."""

from __future__ import annotations

from collections.abc import Callable, Iterator
from pathlib import Path

import pytest

from tests import hypothesis_profiles, postgres

hypothesis_profiles.load()

pytest_plugins = ["tests.browser_support"]

_FIGURES = pytest.StashKey[list[str]]()
_POSTGRESQL = pytest.StashKey[postgres.Provider]()


def pytest_configure(config: pytest.Config) -> None:
    config.stash[_FIGURES] = []
    config.stash[_POSTGRESQL] = postgres.Provider()


def pytest_unconfigure(config: pytest.Config) -> None:
    provider = config.stash.get(_POSTGRESQL, None)
    if provider is not None:
        provider.close()


@pytest.fixture(scope="session")
def postgresql_server(request: pytest.FixtureRequest) -> postgres.Server:
    """The tests' PostgreSQL server (tests/postgres.py): skipped, or failed under CI, with
    the reason when there is none."""
    return request.config.stash[_POSTGRESQL].get()


@pytest.fixture
def postgresql_url(postgresql_server: postgres.Server) -> Iterator[str]:
    """A new empty database for one test, dropped afterwards."""
    url = postgresql_server.create_database()
    yield url
    postgresql_server.drop_database(url)


@pytest.fixture(params=["sqlite", pytest.param("postgresql", marks=pytest.mark.postgresql)])
def store_location(request: pytest.FixtureRequest, tmp_path: Path) -> Path | str:
    """Where a test's ``Store`` lives, once for each back end: a SQLite file in a new data
    folder, and a new PostgreSQL database."""
    if request.param == "sqlite":
        return tmp_path / "data" / "stationfit.sqlite3"
    return str(request.getfixturevalue("postgresql_url"))


@pytest.fixture
def report_figure(request: pytest.FixtureRequest) -> Callable[[str], None]:
    """Record one line of figures (requests, failures, latencies) for the closing summary."""
    return request.config.stash[_FIGURES].append


def pytest_terminal_summary(terminalreporter, exitstatus: int, config: pytest.Config) -> None:
    provider = config.stash.get(_POSTGRESQL, None)
    if provider is not None and provider.started:
        terminalreporter.section("PostgreSQL")
        if provider.server is not None:
            terminalreporter.write_line(f"PostgreSQL tests ran on {provider.server.description}")
        else:
            terminalreporter.write_line(f"PostgreSQL tests skipped: {provider.reason}")
    lines = config.stash.get(_FIGURES, [])
    if lines:
        terminalreporter.section("Stationfit reliability figures")
        for line in lines:
            terminalreporter.write_line(line)
