"""Benchmark of the adjustment engine on synthetic networks (not part of the test suite).

Run from the repository root::

    .venv/bin/python bench/run.py            # every size (about 10 minutes)
    .venv/bin/python bench/run.py --quick    # the smaller sizes only
    .venv/bin/python bench/run.py --only leveling:100000,2D:10000
    .venv/bin/python bench/run.py --only geodetic:2000     # the 3D network
    .venv/bin/python bench/run.py --only leveling:1000000  # the million-mark network
    .venv/bin/python bench/run.py --previous none          # without the comparison column

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
* ``prev s``/``prev MB``: the same command in the previous release
  (``--previous REF``, default ``PREVIOUS_RELEASE``: a git commit exported with
  ``git archive`` into a temporary folder and run with the same interpreter),
  ``×`` the speed-up, ``goal s`` the target where the performance work set one;
* a second table splits the time by stage, for this code and the previous
  release alike: the import of the pipeline, then each stage as the pipeline
  reports it through its progress callback, then the JSON text; each measured
  in a fresh process (``STAGE_SCRIPT``), so the figures of both releases come
  from the same instrument.

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

#: The release the comparison column runs: main before the work of making every stage
#: around the engine work on arrays (2026-12-04).
PREVIOUS_RELEASE = "4064200"

#: Goals of the performance work: whole command seconds (and peak MB where one is set).
GOALS = {
    ("leveling", 100_000): (2.5, None),
    ("2D", 10_000): (2.5, None),
    ("geodetic", 2_000): (1.5, None),
    ("leveling", 1_000_000): (15.0, 3000.0),
}

SIZES = [
    ("leveling", 1_000),
    ("leveling", 10_000),
    ("leveling", 100_000),
    ("2D", 1_000),
    ("2D", 5_000),
    ("2D", 10_000),
    ("2D", 20_000),
    ("geodetic", 2_000),
    ("leveling", 1_000_000),
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
        "--previous",
        default=PREVIOUS_RELEASE,
        metavar="REF",
        help="git commit of the release to compare with ('none': no comparison)",
    )
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
    releases = {"this": ROOT}
    _compile(ROOT)
    if args.previous != "none":
        releases["previous"] = _export(args.previous, folder / "previous")

    from server.engine.backends import choose_backend

    print(
        f"factorization: {choose_backend()}; python {sys.version.split()[0]}; "
        f"{os.cpu_count()} cores; previous release: {args.previous}"
    )
    # warm each release's compiled-kernel cache once, so no run below pays for compiling
    warm_books = []
    for family, generator in GENERATORS.items():
        warm_books.append(folder / f"warm_{family.lower()}.fieldbook")
        warm_books[-1].write_text(generator(100))
    for root in releases.values():
        for warm in warm_books:
            _cli(warm, root)

    rows, stages = [], []
    chosen = QUICK if args.quick else SIZES
    if args.only:
        chosen = [(f, int(n)) for f, n in (item.split(":") for item in args.only.split(","))]
    for family, size in chosen:
        text = GENERATORS[family](size)
        path = folder / f"{family.lower()}_{size}.fieldbook"
        path.write_text(text)
        runs = {name: _cli(path, root) for name, root in releases.items()}
        if runs["this"][2] != 0:
            print(f"{family} {size}: the command failed with status {runs['this'][2]}")
            continue
        inside = _in_process(text, args.dense_max if family != "geodetic" else -1)
        rows.append((family, size, runs, inside))
        stages += [
            (family, size, name, _stage_times(path, root)) for name, root in releases.items()
        ]
        _print_row(rows[-1])
        if family == "geodetic":
            _warm_pipeline(text)
        del text
    print()
    _print_stages(stages)
    print()
    for name, root in releases.items():
        _typical(name, root)
    _design()
    return 0


def _export(ref: str, folder: Path) -> Path:
    """The release ``ref`` of this repository as files in ``folder`` (``git archive``)."""
    folder.mkdir(parents=True, exist_ok=True)
    archive = subprocess.run(
        ["git", "-C", str(ROOT), "archive", "--format=tar", ref],
        check=True,
        capture_output=True,
    ).stdout
    subprocess.run(["tar", "-x", "-C", str(folder)], input=archive, check=True)
    _compile(folder)
    return folder


def _compile(root: Path) -> None:
    """Bytecode for a release's package, as an install writes it: without it (and with
    PYTHONDONTWRITEBYTECODE set) every command compiles the source again."""
    subprocess.run(
        [sys.executable, "-m", "compileall", "-q", str(root / "server")],
        check=False,
        capture_output=True,
    )


# The command lines are started by a small helper process started first: a child
# forked from this (by then large) process would report this process's memory as its
# own peak, since Linux carries the high-water mark across exec.
_RUNNER = r"""
import json, os, subprocess, sys, time
for line in sys.stdin:
    command, cwd = json.loads(line)
    env = dict(os.environ, PYTHONPATH=cwd)
    start = time.perf_counter()
    child = subprocess.Popen(
        command, cwd=cwd, env=env, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE
    )
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


def _cli(path: Path, root: Path = ROOT) -> tuple[float, float, int]:
    """Wall seconds, peak resident MB and exit status of the command line of the release in
    ``root`` on ``path``."""
    _start_runner()
    runner = _runner[0]
    command = [sys.executable, "-m", "server", "adjust", str(path), "--json"]
    assert runner.stdin is not None and runner.stdout is not None
    runner.stdin.write(json.dumps([command, str(root)]) + "\n")
    runner.stdin.flush()
    wall, peak_mb, status, message = json.loads(runner.stdout.readline())
    if message.strip():
        print(message.strip(), file=sys.stderr)
    return wall, peak_mb, status


#: Run in a fresh process with the release's folder first on the path: seconds to import
#: the pipeline, each stage the pipeline reports through its progress callback, and the
#: JSON text as the release's command line writes it.  Works on releases before and after
#: the JSON writer changed, so both columns come from the same instrument.
STAGE_SCRIPT = r"""
import json, sys, time
clock = time.perf_counter
start = clock()
from server.pipeline import adjust_fieldbook
imported = clock() - start
try:  # what the command line does (collection paused, written in pieces), to /dev/null
    import os
    from server.results.json_result import write_result_json
    def encode(result):
        with open(os.devnull, "w") as sink:
            write_result_json(result, sink)
except ImportError:
    from server.results.json_text import dumps_indented
    def encode(result):
        return dumps_indented(result.to_json_dict()).encode()
with open(sys.argv[1], "rb") as file:
    text = file.read()
marks = {}
def progress(stage, step):
    marks.setdefault(stage, clock())
result = adjust_fieldbook(text, progress=progress)
marks["json"] = clock()
encode(result)
marks["end"] = clock()
order = ["parse", "network", "misclosures", "start values", "iteration", "statistics",
         "result", "json", "end"]
seen = [name for name in order if name in marks]
times = {"import": imported}
times.update({a: marks[b] - marks[a] for a, b in zip(seen, seen[1:])})
print(json.dumps(times))
"""


def _stage_times(path: Path, root: Path) -> dict[str, float]:
    """Seconds by stage of the release in ``root`` on ``path`` (``STAGE_SCRIPT``)."""
    done = subprocess.run(
        [sys.executable, "-c", STAGE_SCRIPT, str(path)],
        check=False,
        cwd=root,
        env=dict(os.environ, PYTHONPATH=str(root)),
        capture_output=True,
        text=True,
    )
    if done.returncode != 0:
        print(done.stderr.strip().splitlines()[-1:], file=sys.stderr)
        return {}
    return json.loads(done.stdout)


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
    """Iterations, the factorization floor, the selected inverse, the engine and the dense
    textbook solver, measured in this process."""
    from server.pipeline import paused_gc

    with paused_gc():  # as adjust_fieldbook runs them
        return _engine_figures(text, dense_max)


def _engine_figures(text: str, dense_max: int) -> dict[str, object]:
    from server.engine import backends as sparse
    from server.engine import gauss_newton as engine
    from server.engine import kernels
    from server.fieldbook.parser import parse_fieldbook
    from server.model.network import build_network

    network = build_network(parse_fieldbook(text))
    clock = time.perf_counter
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
            solution = engine.adjust(network, method="sparse", progress=progress)
            end = clock()
    finally:
        sparse.kernels.selected_inverse = original_selinv
    n = len(network.parameters)
    dense = _dense_textbook(network, solution, len(log)) if n <= dense_max else None
    return {
        "iterations": solution.iterations,
        "unknowns": n,
        "observations": len(network.used),
        "floor": sum(log),
        "selinv": sum(selinv),
        "engine": end - marks["iteration"],
        "dense": dense,
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
    family, size, runs, inside = row
    if not hasattr(_print_row, "header"):
        print(
            f"{'network':>17} {'unknowns':>9} {'obs':>9} {'cli s':>6} {'prev s':>6} {'×':>5} "
            f"{'goal s':>6} {'peak MB':>7} {'prev MB':>7} {'iter':>4} {'floor s':>7} "
            f"{'selinv s':>8} {'engine s':>8} {'dense s':>8} {'×engine':>7}"
        )
        _print_row.header = True  # type: ignore[attr-defined]
    wall, peak_mb, _ = runs["this"]
    previous = runs.get("previous")
    if previous is not None and previous[2] == 0:
        prev_text = f"{previous[0]:6.2f} {previous[0] / wall:5.1f}"
        prev_mb = f"{previous[1]:7.0f}"
    else:
        prev_text, prev_mb = f"{'—':>6} {'—':>5}", f"{'—':>7}"
    goal, _ = GOALS.get((family, size), (None, None))
    goal_text = f"{goal:6.1f}" if goal is not None else f"{'—':>6}"
    dense, engine = inside["dense"], inside["engine"]
    dense_text = f"{dense:8.2f}" if dense is not None else f"{'—':>8}"
    by_engine = f"{dense / engine:7.0f}" if dense is not None else f"{'—':>7}"
    print(
        f"{family + ' ' + format(size, ','):>17} {inside['unknowns']:>9,} "
        f"{inside['observations']:>9,} {wall:6.2f} {prev_text} {goal_text} {peak_mb:7.0f} "
        f"{prev_mb} {inside['iterations']:>4} {inside['floor']:7.3f} {inside['selinv']:8.3f} "
        f"{engine:8.3f} {dense_text} {by_engine}",
        flush=True,
    )


_STAGES = [
    "import",
    "parse",
    "network",
    "misclosures",
    "start values",
    "iteration",
    "statistics",
    "result",
    "json",
]


def _print_stages(stages) -> None:
    print("seconds by stage, each release in a fresh process ('iteration': all iterations)")
    print(f"{'network':>17} {'release':>8} " + " ".join(f"{n:>12}" for n in _STAGES))
    for family, size, release, times in stages:
        print(
            f"{family + ' ' + format(size, ','):>17} {release:>8} "
            + " ".join(f"{times.get(n, math.nan):12.3f}" for n in _STAGES)
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


#: The typical project in a fresh process of a release: warm adjustment (parse to result
#: object, full statistics, as the service runs it) and the HTML report, medians of 20.
TYPICAL_SCRIPT = r"""
import json, sys, time
sys.path.insert(0, ".")
from bench import networks
from server.pipeline import adjust_fieldbook
from server.report import html as html_report
text = networks.horizontal(200, sparse=True, fixed_every=50)
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
print(json.dumps({"points": result.summary.points, "unknowns": result.summary.unknowns,
                  "observations": result.summary.observations,
                  "typical_adjust_ms": round(adjust_times[10] * 1000, 1),
                  "typical_report_ms": round(page_times[10] * 1000, 1)}))
"""


def _typical(release: str, root: Path) -> None:
    """Warm time of a typical project: adjustment with full statistics plus its HTML report
    (goal: the adjustment under 25 ms warm in the service)."""
    done = subprocess.run(
        [sys.executable, "-c", TYPICAL_SCRIPT],
        check=False,
        cwd=root,
        env=dict(os.environ, PYTHONPATH=f"{root}{os.pathsep}{ROOT}"),
        capture_output=True,
        text=True,
    )
    if done.returncode != 0:
        print(f"typical project ({release}): failed: {done.stderr.strip()[-300:]}")
        return
    figures = json.loads(done.stdout)
    print(
        f"typical project ({release} release): {figures['points']} points, "
        f"{figures['observations']} observations, {figures['unknowns']} unknowns: warm "
        f"adjustment {figures['typical_adjust_ms']:.0f} ms (median of 20; goal 25 ms), "
        f"HTML report {figures['typical_report_ms']:.0f} ms"
    )
    print(json.dumps({"release": release} | figures))


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
