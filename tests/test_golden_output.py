"""Golden output: the JSON result of every demo, and of two sparse networks on each
factorization back end, must not change while the code is restructured.

The files in tests/golden/ were written by ``python -m server adjust FILE --json``
before the package was reorganised.  Keys, strings and whole numbers must match
exactly; floats to a relative 1e-9 (different BLAS builds round the last bits
differently).  ``STATIONFIT_GOLDEN_EXACT=1`` demands byte-identical text, which is
what a refactor on one machine must achieve.  Since the results are written with orjson,
floats below 1e-4 are spelled without an exponent (the files were regenerated once for
that, every parsed value unchanged to the last bit) and text is UTF-8.

Regenerate only for an intended change of output, and say so in the commit.
"""

from __future__ import annotations

import json
import math
import os
from pathlib import Path

import pytest

from server.cli import main
from server.engine.backends import cholmod_available

ROOT = Path(__file__).resolve().parents[1]
GOLDEN = ROOT / "tests" / "golden"

CASES = [
    (f"demo_projects/{p.stem}.fieldbook", p.stem + ".json", None)
    for p in sorted((ROOT / "demo_projects").glob("*.fieldbook"))
]
CASES += [
    (f"tests/golden/{name}.fieldbook", f"{name}.{backend}.json", backend)
    for name in ("grid_network", "leveling_network")
    for backend in ("superlu", "cholmod")
]


def _close(expected, actual, where: str) -> None:
    if isinstance(expected, dict):
        assert isinstance(actual, dict), where
        assert list(expected) == list(actual), f"{where}: keys differ"
        for key in expected:
            _close(expected[key], actual[key], f"{where}.{key}")
    elif isinstance(expected, list):
        assert isinstance(actual, list) and len(expected) == len(actual), f"{where}: length"
        for i, (e, a) in enumerate(zip(expected, actual)):
            _close(e, a, f"{where}[{i}]")
    elif isinstance(expected, float) and not isinstance(expected, bool):
        assert isinstance(actual, (int, float)), where
        assert math.isclose(expected, actual, rel_tol=1e-9, abs_tol=1e-12), (
            f"{where}: {expected!r} became {actual!r}"
        )
    else:
        assert expected == actual, f"{where}: {expected!r} became {actual!r}"


@pytest.mark.parametrize(("fieldbook", "golden", "backend"), CASES, ids=[c[1] for c in CASES])
def test_json_output_unchanged(fieldbook, golden, backend, monkeypatch, capsys):
    if backend == "cholmod" and not cholmod_available():
        pytest.skip("scikit-sparse's CHOLMOD is not installed")
    monkeypatch.chdir(ROOT)
    if backend:
        monkeypatch.setenv("STATIONFIT_FACTORIZATION", backend)
    assert main(["adjust", fieldbook, "--json"]) == 0
    text = capsys.readouterr().out
    expected = (GOLDEN / golden).read_text(encoding="utf-8")
    if os.environ.get("STATIONFIT_GOLDEN_EXACT") == "1":
        assert text == expected
    _close(json.loads(expected), json.loads(text), golden)


def test_every_demo_has_a_golden_file():
    demos = {p.stem for p in (ROOT / "demo_projects").glob("*.fieldbook")}
    assert demos and all((GOLDEN / f"{d}.json").is_file() for d in demos)
