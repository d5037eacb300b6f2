"""Weight and server time of the result pages (not part of the test suite).

Run from the repository root::

    .venv/bin/python bench/pages.py            # both projects
    .venv/bin/python bench/pages.py --repeat 11 --profile results

Two invented projects are stored through the web application (in this process,
with a temporary data folder): the typical project (196 points, 1,092
observations: ``networks.horizontal(200, sparse=True, fixed_every=50)``) and a
project of 2,052 observations (361 points, the same kind of survey).  For each
of the results page, the review page and the HTML report it prints the bytes as
sent without and with gzip (the service compresses pages; the compressed size is
the bytes the client actually downloaded) and the median server time of
``--repeat`` requests after one warm-up (the time of the whole request through
the application, which for a stored result includes reading it from the store),
with the fastest one and the median CPU time of the process (steadier on a shared
machine: the request runs on this process's threads, the client's part is small),
and the median time of a first view (the page as it is first opened after
adjusting: the cache of the run's parts emptied, then filled as the adjusting thread
fills it once the run is stored, ``run_parts.prepare``) and of a cold view (the cache
emptied: the first view after the service restarted, or of a run another process
adjusted).
The goals (issue 16): results and review pages of the 2,000-observation project
under 300 KB compressed and under 150 ms.  ``--profile PAGE`` prints a cProfile
of one request of that page for the larger project.  The last line is JSON for
``bench/run.py``.
"""

from __future__ import annotations

import argparse
import cProfile
import json
import pstats
import statistics
import sys
import tempfile
import time
import warnings
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "bench"))

import networks  # noqa: E402

from server.web import create_app  # noqa: E402

with warnings.catch_warnings():
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

#: The projects measured: name -> points asked of ``networks.horizontal``.
PROJECTS = {"typical": 200, "2000": 361}
PAGES = {"results": "", "review": "/review", "report": "/report.html"}
BUDGET_KB = 300
BUDGET_MS = 150


def project_text(points: int) -> str:
    """The invented field book: a grid survey, rounds to four neighbours and distances."""
    return networks.horizontal(points, sparse=True, fixed_every=50)


def observation_count(text: str) -> int:
    return sum(1 for line in text.splitlines() if line.startswith(("  ", "distance")))


def store_project(client: TestClient, text: str) -> str:
    """Upload the text and wait until its adjustment is stored; the project's address."""
    response = client.post("/projects", data={"text": text}, follow_redirects=False)
    assert response.status_code == 303, response.text[:500]
    url = str(response.headers["location"])
    for _ in range(1200):
        if 'id="observations-table"' in client.get(url).text:
            return url
        time.sleep(0.1)
    raise RuntimeError(f"{url} was not adjusted in two minutes")


def measure(client: TestClient, url: str, repeat: int) -> dict[str, Any]:
    """Bytes raw and gzip of one response, the median time of ``repeat`` requests, and the
    median of three first requests (nothing of the run kept yet, as right after adjusting)."""
    headers = {"Accept-Encoding": "gzip"}
    first, cold = [], []
    for _ in range(3):
        forget_runs(client)
        prepare_as_after_adjusting(client, url)
        start = time.perf_counter()
        client.get(url, headers=headers)
        first.append(time.perf_counter() - start)
        forget_runs(client)
        start = time.perf_counter()
        response = client.get(url, headers=headers)
        cold.append(time.perf_counter() - start)
    assert response.status_code == 200, (url, response.status_code)
    wire = response.num_bytes_downloaded
    times, cpu = [], []
    for _ in range(repeat):
        start, start_cpu = time.perf_counter(), time.process_time()
        client.get(url, headers=headers)
        times.append(time.perf_counter() - start)
        cpu.append(time.process_time() - start_cpu)
    return {
        "raw_bytes": len(response.content),
        "gzip_bytes": wire,
        "median_ms": round(statistics.median(times) * 1000, 1),
        "min_ms": round(min(times) * 1000, 1),
        "cpu_ms": round(statistics.median(cpu) * 1000, 1),
        "first_ms": round(statistics.median(first) * 1000, 1),
        "cold_ms": round(statistics.median(cold) * 1000, 1),
    }


def forget_runs(client: TestClient) -> None:
    """Empty the application's cache of run parts (results, rows, plots), if it has one."""
    state = client.app.state  # type: ignore[attr-defined]
    if hasattr(state, "run_parts"):
        from server.web.run_parts import parts_cache

        state.run_parts = parts_cache()


def prepare_as_after_adjusting(client: TestClient, url: str) -> None:
    """What the adjusting thread does once a run is stored (``run_parts.prepare``)."""
    from server.web.run_parts import prepare

    app = client.app
    project_id = url.rstrip("/").split("/projects/")[1].split("/")[0]
    run = app.state.store.latest_run(project_id)  # type: ignore[attr-defined]
    prepare(app, project_id, run.id)


def profile(client: TestClient, url: str) -> None:
    """cProfile of one request's work in the worker threads (route, dependencies, template)."""
    import fastapi.dependencies.utils
    import fastapi.routing
    from starlette.concurrency import run_in_threadpool

    profiler = cProfile.Profile()

    async def profiled(func: Any, *args: Any, **kwargs: Any) -> Any:
        return await run_in_threadpool(profiler.runcall, func, *args, **kwargs)

    client.get(url)
    modules = (fastapi.routing, fastapi.dependencies.utils)
    for module in modules:
        module.run_in_threadpool = profiled  # type: ignore[attr-defined]
    try:
        client.get(url)
    finally:
        for module in modules:
            module.run_in_threadpool = run_in_threadpool  # type: ignore[attr-defined]
    pstats.Stats(profiler).sort_stats("cumulative").print_stats(50)


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--repeat", type=int, default=7, help="requests timed per page")
    parser.add_argument("--profile", choices=sorted(PAGES), help="profile this page (2000 obs)")
    parser.add_argument("--only", choices=sorted(PROJECTS), help="measure this project only")
    args = parser.parse_args()
    figures: dict[str, dict[str, Any]] = {}
    with tempfile.TemporaryDirectory() as folder:
        app = create_app(Path(folder) / "data")
        with TestClient(app) as client:
            for label, points in PROJECTS.items():
                if args.only and label != args.only:
                    continue
                text = project_text(points)
                url = store_project(client, text)
                count = observation_count(text)
                print(f"{label}: {count:,} observations", flush=True)
                if args.profile and label != "typical":
                    profile(client, url + PAGES[args.profile])
                for page, suffix in PAGES.items():
                    row = measure(client, url + suffix, args.repeat)
                    figures[f"{label} {page}"] = row
                    print(
                        f"  {page:8} {row['raw_bytes'] / 1000:9.1f} KB raw "
                        f"{row['gzip_bytes'] / 1000:8.1f} KB gzip "
                        f"{row['median_ms']:8.1f} ms median (min {row['min_ms']:.1f}, "
                        f"CPU {row['cpu_ms']:.1f}); first view {row['first_ms']:.1f} ms "
                        f"(cold {row['cold_ms']:.1f} ms)",
                        flush=True,
                    )
    print(f"goals: results and review of 2000 obs < {BUDGET_KB} KB gzip, < {BUDGET_MS} ms")
    print(json.dumps({"pages": figures}))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
