"""The Hypothesis profiles every property test runs under (docs/security.md, "Property tests").

* ``ci`` (the default): derandomized and without an example database, so every run of
  the suite sees the same examples and a failure reproduces on any machine.
* ``random`` (``HYPOTHESIS_PROFILE=random``): fresh random examples on every run and
  ``RANDOM_FACTOR`` times as many per test, for a longer hunt before a release.

Tests give their example counts through ``examples(n)``, because a count written in a
test's own ``@settings`` would override the profile's.
"""

from __future__ import annotations

import os

from hypothesis import settings

#: How many times more examples the random profile runs than the ci profile.
RANDOM_FACTOR = 5
PROFILES = ("ci", "random")


def chosen() -> str:
    """The profile named by HYPOTHESIS_PROFILE, ``ci`` when unset."""
    name = os.environ.get("HYPOTHESIS_PROFILE", "").strip() or "ci"
    if name not in PROFILES:
        raise ValueError(f"HYPOTHESIS_PROFILE must be one of {', '.join(PROFILES)}, not {name!r}")
    return name


def examples(count: int) -> int:
    """The example count for a test that runs ``count`` examples in the ci profile."""
    return count * RANDOM_FACTOR if chosen() == "random" else count


def load() -> None:
    settings.register_profile("ci", derandomize=True, database=None, deadline=None, print_blob=True)
    settings.register_profile(
        "random", derandomize=False, database=None, deadline=None, print_blob=True
    )
    settings.load_profile(chosen())
