"""Benchmark of the adjustment engine on synthetic networks (not part of the test suite).

Run from the repository root::

    .venv/bin/python bench/run.py            # every size (about 10 minutes)
    .venv/bin/python bench/run.py --quick    # the smaller sizes only
    .venv/bin/python bench/run.py --only leveling:100000,2D:10000
    .venv/bin/python bench/run.py --only geodetic:2000     # the 3D network (goal: under 3 s)

For each network (``bench/networks.py`` writes it as a field book in a
temporary folder) it prints:

* ``cli s``: wall time of ``python -m server adjust FILE --json > /dev/null``,
  interpreter start to exit (parse, network, start values, adjustment with
  full statistics, result, JSON text);
* ``peak MB``: the command's peak resident memory (``wait4`` rusage);
* ``iter``: Gauss–Newton iterations;
* ``floor s``: the sparse factorizations alone, all iterations (measured in
  this process with the same engine); ``selinv s`` the selected inverse;
* ``cli/floor``: the ratio of the two;
* ``engine s``: the engine's iterations and statistics in this process
  (assembly, factorizations, solves, selected inverse, redundancy numbers);
* ``dense s``: the textbook solver on the same normal equations (dense N,
  dense Cholesky every iteration, dense inverse for the statistics), where N
  has at most ``--dense-max`` unknowns; ``×engine`` and ``×cli`` are its time
  over the engine's and over the whole command's;
* a second table splits the in-process time by stage.

For the geodetic 3D network (``geodetic``) the dense textbook solver is not
run (it is written for the plane state), "network" is split into building the
network and, within it, the 3D start positions (``start 3D``), and the warm
time of ``adjust_fieldbook`` (median of three, in this process) is printed.

Then the "typical project" (200 points, about 1,000 observations) is
adjusted repeatedly in one process and the warm time of adjustment plus the
HTML report is printed.  Last, the same network as a design (every value ``?``,
``--design`` runs this alone): the warm time of one re-evaluation of the design
page, an observation switched off (the parsed book kept, as the page keeps it;
the one linearisation, statistics, external reliability and the formatted
figures of ``design.json``); the target is under 0.5 s for 1,000 planned
observations.  BLAS runs on one thread throughout, as the engine
does.
"""

from __future__ import annotations

import argparse
import json
import math
import os
import subprocess
import sys
import tempfile
import time
from contextlib import contextmanager
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench import networks  # noqa: E402 - importable once the root is on the path

SIZES = [
    ("leveling", 1_000),
    ("leveling", 10_000),
    ("leveling", 100_000),
    ("2D", 1_000),
    ("2D", 5_000),
    ("2D", 10_000),
    ("2D", 20_000),
    ("geodetic", 2_000),
]
QUICK = [
    ("leveling", 1_000),
    ("leveling", 10_000),
    ("2D", 1_000),
    ("2D", 5_000),
    ("geodetic", 2_000),
]
GENERATORS = {
    "leveling": networks.leveling,
    "2D": networks.horizontal,
    "geodetic": networks.geodetic,
}


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--quick", action="store_true", help="the smaller sizes only")
    parser.add_argument(
        "--only",
        default="",
        metavar="FAMILY:SIZE,...",
        help="just these networks, e.g. leveling:100000,2D:10000",
    )
    parser.add_argument(
        "--dense-max",
        type=int,
        default=16_000,
        help="largest number of unknowns for the dense textbook solver",
    )
    parser.add_argument("--keep", type=Path, default=None, help="write the field books here")
    parser.add_argument(
        "--design",
        action="store_true",
        help="only the design page's re-evaluation of 1,000 planned observations",
    )
    args = parser.parse_args()
    if args.design:
        _design()
        return 0
    os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
    _start_runner()  # while this process is still small
    folder = args.keep or Path(tempfile.mkdtemp(prefix="stationfit-bench-"))
    folder.mkdir(parents=True, exist_ok=True)

    from server.engine.backends import choose_backend

    print(
        f"factorization: {choose_backend()}; python {sys.version.split()[0]}; "
        f"{os.cpu_count()} cores"
    )
    # warm the compiled-kernel cache once, so no run below pays for compiling
    warm = folder / "warm.fieldbook"
    warm.write_text(networks.horizontal(100))
    _cli(warm)

    rows, stages = [], []
    chosen = QUICK if args.quick else SIZES
    if args.only:
        chosen = [(f, int(n)) for f, n in (item.split(":") for item in args.only.split(","))]
    for family, size in chosen:
        text = GENERATORS[family](size)
        path = folder / f"{family.lower()}_{size}.fieldbook"
        path.write_text(text)
        wall, peak_mb, status = _cli(path)
        if status != 0:
            print(f"{family} {size}: the command failed with status {status}", file=sys.stderr)
            continue
        inside = _in_process(text, args.dense_max if family != "geodetic" else -1)
        rows.append((family, size, wall, peak_mb, inside))
        stages.append((family, size, inside["stages"]))
        _print_row(rows[-1])
        if family == "geodetic":
            _warm_pipeline(text)
    print()
    _print_stages(stages)
    print()
    _typical()
    _design()
    return 0


# The command lines are started by a small helper process started first: a child
# forked from this (by then large) process would report this process's memory as its
# own peak, since Linux carries the high-water mark across exec.
_RUNNER = r"""
import json, os, subprocess, sys, time
for line in sys.stdin:
    command, cwd = json.loads(line)
    start = time.perf_counter()
    child = subprocess.Popen(command, cwd=cwd, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
    _, status, usage = os.wait4(child.pid, 0)
    wall = time.perf_counter() - start
    message = child.stderr.read().decode(errors="replace")
    child.stderr.close()
    print(json.dumps([wall, usage.ru_maxrss / 1024.0, os.waitstatus_to_exitcode(status), message]),
          flush=True)
"""
_runner: list[subprocess.Popen] = []


def _start_runner() -> None:
    if not _runner:
        _runner.append(
            subprocess.Popen(
                [sys.executable, "-c", _RUNNER],
                stdin=subprocess.PIPE,
                stdout=subprocess.PIPE,
                text=True,
            )
        )


def _cli(path: Path) -> tuple[float, float, int]:
    """Wall seconds, peak resident MB and exit status of the command line on ``path``."""
    _start_runner()
    runner = _runner[0]
    command = [sys.executable, "-m", "server", "adjust", str(path), "--json"]
    assert runner.stdin is not None and runner.stdout is not None
    runner.stdin.write(json.dumps([command, str(ROOT)]) + "\n")
    runner.stdin.flush()
    wall, peak_mb, status, message = json.loads(runner.stdout.readline())
    if message.strip():
        print(message.strip(), file=sys.stderr)
    return wall, peak_mb, status


@contextmanager
def _timed_factorizations(log: list[float]):
    """Record the time of every sparse factorization made while inside."""
    from server.engine import backends as sparse

    originals = {cls: cls.factorize for cls in (sparse._Cholmod, sparse._SuperLU)}

    def wrap(function):
        def timed(self, matrix, check):
            start = time.perf_counter()
            try:
                return function(self, matrix, check)
            finally:
                log.append(time.perf_counter() - start)

        return timed

    for cls, function in originals.items():
        cls.factorize = wrap(function)
    try:
        yield
    finally:
        for cls, function in originals.items():
            cls.factorize = function


def _in_process(text: str, dense_max: int) -> dict[str, object]:
    """Stage times, iterations, the factorization floor and the dense solver, in this process."""
    from server.pipeline import paused_gc

    with paused_gc():  # as adjust_fieldbook runs them
        return _stages(text, dense_max)


def _stages(text: str, dense_max: int) -> dict[str, object]:
    from server.engine import backends as sparse
    from server.engine import gauss_newton as engine
    from server.engine import kernels
    from server.fieldbook.parser import parse_fieldbook
    from server.model import geodetic_network
    from server.model.misclosures import leveling_misclosures
    from server.model.network import build_network
    from server.model.traverse import traverse_misclosures
    from server.results.json_text import dumps_indented
    from server.results.result import build_result

    stages: dict[str, float] = {}
    clock = time.perf_counter
    t = clock()
    fieldbook = parse_fieldbook(text)
    stages["parse"] = clock() - t
    frame_times: list[float] = []
    original_frame = geodetic_network.geodetic_frame

    def timed_frame(*a):
        start = clock()
        try:
            return original_frame(*a)
        finally:
            frame_times.append(clock() - start)

    geodetic_network.geodetic_frame = timed_frame
    try:
        t = clock()
        network = build_network(fieldbook)
        stages["network"] = clock() - t
    finally:
        geodetic_network.geodetic_frame = original_frame
    stages["start 3D"] = sum(frame_times)  # part of "network" (geodetic model only)
    t = clock()
    misclosures = leveling_misclosures(fieldbook) if network.vertical else ()
    if network.horizontal:  # as the pipeline does
        misclosures += traverse_misclosures(fieldbook)
    stages["misclosures"] = clock() - t
    marks: dict[str, float] = {}

    def progress(stage: str, step: int) -> None:
        marks.setdefault(stage, clock())

    selinv: list[float] = []
    original_selinv = kernels.selected_inverse

    def timed_selinv(*a):
        start = clock()
        try:
            return original_selinv(*a)
        finally:
            selinv.append(clock() - start)

    log: list[float] = []
    sparse.kernels.selected_inverse = timed_selinv
    try:
        with _timed_factorizations(log):
            t = clock()
            solution = engine.adjust(network, method="sparse", progress=progress)
            end = clock()
    finally:
        sparse.kernels.selected_inverse = original_selinv
    stages["start values"] = marks["iteration"] - marks["start values"]
    stages["iterations"] = marks["statistics"] - marks["iteration"]
    stages["statistics"] = end - marks["statistics"]
    t = clock()
    result = build_result(network, solution, misclosures, [])
    stages["result"] = clock() - t
    t = clock()
    dumps_indented(result.to_json_dict())
    stages["json"] = clock() - t
    n = len(network.parameters)
    dense = _dense_textbook(network, solution, len(log)) if n <= dense_max else None
    return {
        "iterations": solution.iterations,
        "unknowns": n,
        "observations": len(network.used),
        "floor": sum(log),
        "selinv": sum(selinv),
        "dense": dense,
        "stages": stages,
    }


def _dense_textbook(network, solution, iterations: int) -> float:
    """Seconds for the textbook algebra: dense N, dense Cholesky per iteration, dense inverse.

    Measured on N at the solution (its pattern and size do not change between
    iterations), with BLAS and LAPACK on one thread like the engine; the
    statistics then take diag(A·Qxx·Aᵀ) from the full Qxx.
    """
    import numpy as np
    import scipy.linalg
    from threadpoolctl import threadpool_limits

    from server.engine.state import State

    state = State(network, solution.coordinates)
    assembly = state.assembly(state.column)
    evaluation = assembly.evaluate(*state.arrays())
    design = assembly.design_matrix(evaluation.slot_val, len(network.parameters))
    weights = 1.0 / evaluation.sigmas**2
    weighted = design.multiply(weights[:, None]).tocsr()
    with threadpool_limits(1):
        start = time.perf_counter()
        for _ in range(iterations):
            normal = (design.T @ weighted).toarray()
            rhs = design.T @ (weights * evaluation.misclosure)
            factor = scipy.linalg.cho_factor(
                normal, lower=True, check_finite=False, overwrite_a=True
            )
            scipy.linalg.cho_solve(factor, rhs, check_finite=False)
        inverse, _ = scipy.linalg.lapack.dpotri(factor[0], lower=True, overwrite_c=True)
        qxx = np.tril(inverse)
        qxx += np.tril(inverse, -1).T
        del inverse
        # diag(A·Qxx·Aᵀ), row by row over the few unknowns of each row
        counts = np.diff(design.indptr)
        for k in np.unique(counts):
            rows = np.flatnonzero(counts == k)
            if k == 0:
                continue
            take = design.indptr[rows][:, None] + np.arange(k)
            cols, vals = design.indices[take], design.data[take]
            np.einsum("ra,rab,rb->r", vals, qxx[cols[:, :, None], cols[:, None, :]], vals)
        return time.perf_counter() - start


def _print_row(row) -> None:
    family, size, wall, peak_mb, inside = row
    if not hasattr(_print_row, "header"):
        print(
            f"{'network':>16} {'unknowns':>9} {'obs':>8} {'cli s':>7} {'peak MB':>8} {'iter':>4} "
            f"{'floor s':>8} {'selinv s':>8} {'cli/floor':>9} {'engine s':>8} {'dense s':>8} "
            f"{'×engine':>8} {'×cli':>6}"
        )
        _print_row.header = True  # type: ignore[attr-defined]
    dense = inside["dense"]
    floor = inside["floor"]
    stages = inside["stages"]
    engine = stages["iterations"] + stages["statistics"]
    dense_text = f"{dense:8.2f}" if dense is not None else f"{'—':>8}"
    by_engine = f"{dense / engine:8.0f}" if dense is not None else f"{'—':>8}"
    by_cli = f"{dense / wall:6.0f}" if dense is not None else f"{'—':>6}"
    print(
        f"{family + ' ' + format(size, ','):>16} {inside['unknowns']:>9,} "
        f"{inside['observations']:>8,} "
        f"{wall:7.2f} {peak_mb:8.0f} {inside['iterations']:>4} {floor:8.3f} "
        f"{inside['selinv']:8.3f} {wall / floor if floor else math.inf:9.1f} {engine:8.3f} "
        f"{dense_text} {by_engine} {by_cli}",
        flush=True,
    )


def _print_stages(stages) -> None:
    names = [
        "parse",
        "network",
        "start 3D",
        "misclosures",
        "start values",
        "iterations",
        "statistics",
        "result",
        "json",
    ]
    print("in-process seconds by stage")
    print(f"{'network':>16} " + " ".join(f"{n:>12}" for n in names))
    for family, size, times in stages:
        print(
            f"{family + ' ' + format(size, ','):>16} "
            + " ".join(f"{times.get(n, 0.0):12.3f}" for n in names)
        )


def _warm_pipeline(text: str) -> None:
    """Warm wall time of ``adjust_fieldbook`` (parse to result, full statistics), median of
    three in this process, against the goal of 3 s for the 2,000-point 3D network."""
    from server.pipeline import adjust_fieldbook

    times = []
    for _ in range(3):
        start = time.perf_counter()
        result = adjust_fieldbook(text)
        times.append(time.perf_counter() - start)
    times.sort()
    print(
        f"  adjust_fieldbook warm: {times[1]:.2f} s median of 3 (min {times[0]:.2f}, max "
        f"{times[2]:.2f}); {result.summary.points} points, {result.summary.unknowns} unknowns, "
        f"redundancy {result.summary.redundancy}, variance factor "
        f"{result.summary.variance_factor:.3f}",
        flush=True,
    )


def _typical() -> None:
    """Warm time of a typical project: adjustment with full statistics plus its HTML report."""
    from server.pipeline import adjust_fieldbook
    from server.report import html as html_report

    text = networks.horizontal(200, sparse=True, fixed_every=50)
    count = sum(1 for line in text.splitlines() if line.startswith(("  ", "distance")))
    for _ in range(3):
        html_report.report_html(adjust_fieldbook(text))
    adjust_times, page_times = [], []
    for _ in range(20):
        start = time.perf_counter()
        result = adjust_fieldbook(text)
        middle = time.perf_counter()
        html_report.report_html(result)
        adjust_times.append(middle - start)
        page_times.append(time.perf_counter() - middle)
    adjust_times.sort()
    page_times.sort()
    print(
        f"typical project: {result.summary.points} points, {count} observations, "
        f"{result.summary.unknowns} unknowns: warm adjustment {adjust_times[10] * 1000:.0f} ms "
        f"(median of 20), HTML report {page_times[10] * 1000:.0f} ms"
    )
    print(
        json.dumps(
            {
                "typical_adjust_ms": round(adjust_times[10] * 1000, 1),
                "typical_report_ms": round(page_times[10] * 1000, 1),
            }
        )
    )


def _design() -> None:
    """Warm time of one design-page re-evaluation with about 1,000 planned observations."""
    from server.design.plan import plan_parsed
    from server.fieldbook.parser import parse_fieldbook
    from server.report.design_tables import design_figures

    text = networks.horizontal(200, sparse=True, fixed_every=50, planned=True)
    book = parse_fieldbook(text)
    lines = [o.line for o in book.observations]
    for k in range(3):
        design_figures(plan_parsed(book, switched_off={lines[k]}))
    times = []
    for k in range(20):
        start = time.perf_counter()
        result = plan_parsed(book, switched_off={lines[(7 * k) % len(lines)]})
        json.dumps(design_figures(result))
        times.append(time.perf_counter() - start)
    times.sort()
    print(
        f"design page: {len(lines)} planned observations, {result.summary.unknowns} unknowns: "
        f"one re-evaluation {times[10] * 1000:.0f} ms (median of 20, slowest "
        f"{times[-1] * 1000:.0f} ms)"
    )
    print(
        json.dumps(
            {"design_reevaluate_ms": round(times[10] * 1000, 1), "design_observations": len(lines)}
        )
    )


if __name__ == "__main__":
    sys.exit(main())
