"""The package as a surveyor's IT department installs it: a built wheel (not the checkout)
serves the UI, carries the demos, and installs the ``stationfit`` command."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
import tomllib
import zipfile
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PYPROJECT = tomllib.loads((ROOT / "pyproject.toml").read_text())


def test_every_subpackage_is_listed_for_the_wheel():
    listed = set(PYPROJECT["tool"]["setuptools"]["packages"])
    found = {
        ".".join(p.parent.relative_to(ROOT).parts) for p in (ROOT / "server").rglob("__init__.py")
    }
    assert found - listed == set(), "add these to [tool.setuptools] packages in pyproject.toml"


def test_one_version_string():
    from server import __version__

    assert "version" not in PYPROJECT["project"]
    assert PYPROJECT["project"]["dynamic"] == ["version"]
    assert PYPROJECT["tool"]["setuptools"]["dynamic"]["version"] == {"attr": "server.__version__"}
    assert __version__ in (ROOT / "CHANGELOG.md").read_text()


@pytest.fixture(scope="module")
def installed(tmp_path_factory) -> Path:
    """The wheel built from this checkout, unpacked into a folder of its own."""
    out = tmp_path_factory.mktemp("wheel")
    source = out / "source"  # a copy, so the build leaves nothing in the checkout
    names = ("pyproject.toml", "setup.py", "README.md", "server", "templates", "static")
    for name in (*names, "demo_projects"):
        copy = shutil.copytree if (ROOT / name).is_dir() else shutil.copy2
        (source / name).parent.mkdir(parents=True, exist_ok=True)
        copy(
            ROOT / name,
            source / name,
            **(
                {"ignore": shutil.ignore_patterns("__pycache__", "*.so")}
                if (ROOT / name).is_dir()
                else {}
            ),
        )
    subprocess.run(
        [
            sys.executable,
            "-m",
            "pip",
            "wheel",
            "--quiet",
            "--no-deps",
            "--no-build-isolation",
            "--disable-pip-version-check",
            "-w",
            str(out),
            str(source),
        ],
        check=True,
        capture_output=True,
        cwd=out,
    )
    wheel = next(out.glob("stationfit-*.whl"))
    target = out / "site"
    with zipfile.ZipFile(wheel) as archive:
        archive.extractall(target)
    return target


def test_installed_wheel_serves_the_ui(installed, tmp_path):
    script = """
import sys
from fastapi.testclient import TestClient
import server
from server.web.app import create_app
assert server.__file__.startswith(sys.argv[1]), server.__file__
client = TestClient(create_app(sys.argv[2]))
for path in ("/", "/static/app.css", "/static/plot.js"):
    response = client.get(path)
    assert response.status_code == 200, (path, response.status_code)
assert "Stationfit" in client.get("/").text
demo = client.post("/demos/leveling_clean", follow_redirects=False)
assert demo.status_code in (303, 302), demo.status_code
imported = client.post("/demos/xml_mixed_job", follow_redirects=False)  # survey XML, carried too
assert imported.headers["location"].endswith("/import"), imported.headers
assert "xml_mixed_job" in client.get(imported.headers["location"]).text
print("served")
"""
    env = dict(os.environ, PYTHONPATH=str(installed))
    proc = subprocess.run(
        [sys.executable, "-c", script, str(installed), str(tmp_path / "data")],
        cwd=tmp_path,
        env=env,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 0, proc.stderr
    assert "served" in proc.stdout


def test_wheel_installs_the_stationfit_command(installed):
    entry_points = next(installed.glob("stationfit-*.dist-info")) / "entry_points.txt"
    assert "stationfit = server.cli:run" in entry_points.read_text()


def test_installed_wheel_carries_the_compiled_kernels(installed):
    """The engine's kernels are compiled into the wheel (setup.py), not left to numba."""
    assert list((installed / "server" / "engine").glob("_kernels_c*.so"))
    script = (
        "import sys\nimport server\nfrom server.engine import kernels\n"
        "assert server.__file__.startswith(sys.argv[1]), server.__file__\n"
        "kernels.warm_up()\nprint(kernels.IMPLEMENTATION)\n"
    )
    proc = subprocess.run(
        [sys.executable, "-c", script, str(installed)],
        env=dict(os.environ, PYTHONPATH=str(installed)),
        cwd=installed,
        capture_output=True,
        text=True,
        timeout=120,
    )
    assert proc.returncode == 0, proc.stderr
    assert proc.stdout.strip() == "C"
