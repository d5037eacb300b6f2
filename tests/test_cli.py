"""The command line: exit statuses, stdout/stderr split and the JSON contract's keys."""

from __future__ import annotations

import json
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parent.parent
DEMOS = sorted((ROOT / "demo_projects").glob("*.fieldbook"))


def run(*args: str, cwd: Path = ROOT) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "server", *args],
        cwd=cwd,
        capture_output=True,
        text=True,
        timeout=120,
        check=False,
    )


@pytest.mark.parametrize("demo", DEMOS, ids=lambda p: p.stem)
def test_every_demo_adjusts_with_json_on_stdout_alone(demo):
    proc = run("adjust", str(demo), "--json")
    assert proc.returncode == 0, proc.stderr
    data = json.loads(proc.stdout)  # nothing but the JSON object on stdout
    assert set(data) >= {
        "format",
        "units",
        "summary",
        "points",
        "observations",
        "misclosures",
        "relative",
        "warnings",
        "caution",
    }
    assert set(data["summary"]) >= {
        "dimension",
        "points",
        "observations",
        "used_observations",
        "unknowns",
        "redundancy",
        "iterations",
        "converged",
        "variance_factor",
        "global_test",
    }
    for obs in data["observations"]:
        assert set(obs) >= {
            "line",
            "kind",
            "from",
            "at",
            "to",
            "observed",
            "adjusted",
            "residual",
            "sd",
            "redundancy",
            "w",
            "mdb",
            "flagged",
            "ignored",
        }
    for point in data["points"]:
        assert set(point) >= {
            "name",
            "east",
            "north",
            "height",
            "sd_east",
            "sd_north",
            "sd_height",
            "fixed",
            "weighted",
            "ellipse",
        }
    assert "licensed" in data["caution"]


def test_field_book_errors_exit_2_with_file_and_line(tmp_path):
    book = tmp_path / "bad.fieldbook"
    book.write_text("defaults level=1mm\npoint A height=1 fix\nlevl A B 0.5\nlevel A B nan\n")
    proc = run("adjust", str(book), "--json")
    assert proc.returncode == 2
    assert proc.stdout == ""
    lines = proc.stderr.strip().splitlines()
    assert any(line.startswith(f"{book}:3:") and "level" in line for line in lines)
    assert any(line.startswith(f"{book}:4:") for line in lines)
    assert "Traceback" not in proc.stderr


def test_network_that_cannot_be_adjusted_exits_3_naming_points(tmp_path):
    book = tmp_path / "nodatum.fieldbook"
    book.write_text("defaults level=1mm\nlevel P Q +1.0\nlevel Q P -1.0\n")
    proc = run("adjust", str(book))
    assert proc.returncode == 3
    assert "P" in proc.stderr and "Q" in proc.stderr and "datum" in proc.stderr
    assert "Traceback" not in proc.stderr


def test_unreadable_file_is_reported_without_traceback(tmp_path):
    proc = run("adjust", str(tmp_path / "missing.fieldbook"))
    assert proc.returncode not in (0, 2, 3)
    assert "cannot read" in proc.stderr and "Traceback" not in proc.stderr


def test_numerical_core_imports_without_the_web_stack():
    """The core (parser to result) must not need FastAPI or Jinja2."""
    code = (
        "import sys\n"
        "class Block:\n"
        "    def find_spec(self, name, path=None, target=None):\n"
        "        if name.split('.')[0] in ('fastapi', 'jinja2', 'starlette', 'uvicorn'):\n"
        "            raise ImportError('blocked ' + name)\n"
        "sys.meta_path.insert(0, Block())\n"
        "from server.pipeline import adjust_fieldbook\n"
        "r = adjust_fieldbook('defaults level=1mm\\npoint A height=0 fix\\n"
        "level A B 1\\nlevel A B 1.001\\n')\n"
        "print(r.summary.redundancy)\n"
    )
    proc = subprocess.run(
        [sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=False
    )
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "1"


def test_results_are_identical_whatever_the_hash_seed():
    """Regression (2026-12-02): start values followed the order of a set of point pairs, so the
    last digits of a 2D result changed with PYTHONHASHSEED; the same file must give the same
    bytes."""
    import os

    outputs = set()
    for seed in ("0", "1"):  # two seeds that gave different bytes before the fix
        env = {**os.environ, "PYTHONHASHSEED": seed}
        proc = subprocess.run(
            [
                sys.executable,
                "-m",
                "server",
                "adjust",
                str(ROOT / "demo_projects" / "control_network.fieldbook"),
                "--json",
            ],
            cwd=ROOT,
            capture_output=True,
            text=True,
            timeout=120,
            env=env,
            check=False,
        )
        assert proc.returncode == 0, proc.stderr
        outputs.add(proc.stdout)
    assert len(outputs) == 1


def test_help_lists_every_exit_status():
    proc = run("--help")
    assert proc.returncode == 0
    for status, meaning in (
        ("0", "adjusted"),
        ("2", "field book has errors"),
        ("3", "cannot be adjusted"),
        ("64", "command line"),
        ("73", "data folder"),
    ):
        assert any(
            line.split()[:1] == [status] and meaning in line for line in proc.stdout.splitlines()
        ), status


def test_wrong_command_line_is_not_taken_for_field_book_errors():
    """Exit 2 means 'the field book has errors' to scripts; a typo in an option must not say
    that."""
    proc = run("adjust", "--no-such-option", "x.fieldbook")
    assert proc.returncode == 64
    assert "Traceback" not in proc.stderr


def test_version_is_the_package_version():
    from server import __version__

    proc = run("--version")
    assert proc.returncode == 0 and proc.stdout.strip() == f"stationfit {__version__}"


def test_adjust_command_loads_neither_the_office_service_nor_the_web_layer():
    # start-up is part of every command's time: the accounts (argon2), the store and the
    # web framework belong to serve, worker and users only; numpy's Fortran wrapper
    # generator and test helpers, which scipy's star import would load, to nobody
    book = str(ROOT / "demo_projects" / "control_network.fieldbook")
    code = (
        "import contextlib, io, sys\n"
        "from server.cli import main\n"
        "with contextlib.redirect_stdout(io.StringIO()):\n"
        f"    status = main(['adjust', {book!r}, '--json'])\n"
        "heavy = ('argon2', 'server.store.sqlite', 'server.store.accounts', 'fastapi',\n"
        "         'numpy.f2py.crackfortran', 'numpy.testing._private.utils')\n"
        "print(status, [m for m in heavy if m in sys.modules])\n"
    )
    done = _python(code)
    assert done.stdout.strip() == "0 []", done.stderr[-800:]


def test_deferred_numpy_modules_still_work_when_used():
    # they are loaded on first use, not taken away
    code = (
        "import server.pipeline, numpy, sys\n"
        "assert 'numpy.testing._private.utils' not in sys.modules\n"
        "numpy.testing.assert_allclose(1.0, 1.0)\n"
        "print(numpy.polynomial.polynomial.polyval(2.0, [1.0, 3.0]))\n"
    )
    done = _python(code)
    assert done.stdout.strip() == "7.0", done.stderr[-800:]


def _python(code: str) -> subprocess.CompletedProcess[str]:
    """``code`` run by a fresh interpreter in the repository (a process's start-up as is)."""
    return subprocess.run(
        [sys.executable, "-c", code], cwd=ROOT, capture_output=True, text=True, check=False
    )


def test_one_shot_command_leaves_its_whole_output_in_a_file(tmp_path):
    # the command exits without tearing the interpreter down: what it printed must be
    # flushed first, to a file as to a pipe, and the exit status must survive
    book = ROOT / "demo_projects" / "control_network.fieldbook"
    out = tmp_path / "result.json"
    with out.open("wb") as sink:
        done = subprocess.run(
            [sys.executable, "-m", "server", "adjust", str(book), "--json"],
            cwd=ROOT,
            stdout=sink,
            stderr=subprocess.PIPE,
            timeout=120,
            check=False,
        )
    assert done.returncode == 0, done.stderr[-800:]
    result = json.loads(out.read_text())
    assert result["points"] and result["observations"]
    bad = tmp_path / "bad.fieldbook"
    bad.write_text("this is not a field book line\n")
    assert run("adjust", str(bad)).returncode == 2
