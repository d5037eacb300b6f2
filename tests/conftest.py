"""Shared pytest hooks: the Hypothesis profile (tests/hypothesis_profiles.py) and the
reliability tests' figures, printed after the run."""

from __future__ import annotations

from collections.abc import Callable

import pytest

from tests import hypothesis_profiles

hypothesis_profiles.load()

pytest_plugins = ["tests.browser_support"]

_FIGURES = pytest.StashKey[list[str]]()


def pytest_configure(config: pytest.Config) -> None:
    config.stash[_FIGURES] = []


@pytest.fixture
def report_figure(request: pytest.FixtureRequest) -> Callable[[str], None]:
    """Record one line of figures (requests, failures, latencies) for the closing summary."""
    return request.config.stash[_FIGURES].append


def pytest_terminal_summary(terminalreporter, exitstatus: int, config: pytest.Config) -> None:
    lines = config.stash.get(_FIGURES, [])
    if lines:
        terminalreporter.section("Stationfit reliability figures")
        for line in lines:
            terminalreporter.write_line(line)
