"""The project store's calls timed on SQLite and on PostgreSQL.

    .venv/bin/python bench/store.py                      # a throwaway PostgreSQL (as the tests)
    .venv/bin/python bench/store.py --database postgresql://…   # an existing empty database

For each back end: storing a project with its finished run (a 200-point network's result,
compressed), reading the latest run with its result, listing 200 projects, queueing a
decision, and the median of each over repeated calls, in one process (the service's
view: a connection per call on SQLite, kept connections on PostgreSQL).
"""

from __future__ import annotations

import argparse
import contextlib
import statistics
import sys
import tempfile
import time
from collections.abc import Callable
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bench.networks import leveling
from server.pipeline import adjust_fieldbook
from server.store.sqlite import NO_EDITS, Store

PROJECTS = 200
REPEATS = 30


def _median_ms(call: Callable[[], object], repeats: int = REPEATS) -> float:
    times = []
    for _ in range(repeats):
        started = time.perf_counter()
        call()
        times.append(time.perf_counter() - started)
    return statistics.median(times) * 1000


def measure(store: Store) -> dict[str, float]:
    text = leveling(200)
    result = adjust_fieldbook(text)
    ids = []

    def store_one() -> None:
        project = store.create_project("bench", "bench.fieldbook", text)
        run_id = store.start_run(project, NO_EDITS)
        store.finish_run(run_id, result=result)
        ids.append(project)

    figures = {"store a project and finish its run": _median_ms(store_one)}
    while len(ids) < PROJECTS:
        store_one()
    figures["latest run with its result"] = _median_ms(
        lambda: store.latest_run(ids[-1]).result()  # type: ignore[union-attr]
    )
    figures[f"list {PROJECTS} projects"] = _median_ms(store.list_projects)
    decision = {"line": 3, "action": "exclude", "reason": "bench", "date": "2026-12-04"}
    counter = iter(range(10**6))
    figures["queue a decision"] = _median_ms(
        lambda: store.add_pending_edit(ids[next(counter)], decision)
    )
    return figures


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--database", help="an empty PostgreSQL database (default: throwaway)")
    args = parser.parse_args()
    rows: dict[str, dict[str, float]] = {}
    with tempfile.TemporaryDirectory() as folder:
        rows["SQLite"] = measure(Store(Path(folder) / "stationfit.sqlite3"))
    with contextlib.ExitStack() as stack:
        url = args.database
        if url is None:
            from tests.postgres import _throwaway_cluster

            # durable, as a real server is (the tests' cluster turns fsync off)
            url = stack.enter_context(_throwaway_cluster(durable=True)).create_database()
        store = Store(url)
        rows["PostgreSQL"] = measure(store)
        store.close()
    names = list(rows["SQLite"])
    print("| call (median ms) | " + " | ".join(rows) + " |")
    print("|---|" + "---:|" * len(rows))
    for name in names:
        print(f"| {name} | " + " | ".join(f"{rows[b][name]:.1f}" for b in rows) + " |")


if __name__ == "__main__":
    main()
