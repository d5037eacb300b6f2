"""Import round trips and the survey XML demos.

A field book's observations written as survey XML by the test-only writer
(``tests/survey_xml_writer.py``) and imported again adjust to the same coordinates
(1e-6 m) as the book itself; each demo XML in ``demo_projects/`` imports, adjusts with a
passing global test and lands near the invented truth it was simulated from.
"""

from __future__ import annotations

import importlib.util
import math
import sys
from pathlib import Path

import pytest

from server.fieldbook.parser import parse_fieldbook
from server.formats.importing import import_with_summary
from server.pipeline import adjust_fieldbook
from server.results.result import AdjustmentResult
from tests.survey_xml_writer import write_survey_xml

ROOT = Path(__file__).resolve().parents[1]
DEMO_XML = sorted((ROOT / "demo_projects").glob("*.xml"))


def _generator():
    """tools/make_xml_demos.py as a module: the invented truth of each demo."""
    spec = importlib.util.spec_from_file_location(
        "make_xml_demos", ROOT / "tools" / "make_xml_demos.py"
    )
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules.setdefault("make_xml_demos", module)
    spec.loader.exec_module(module)
    return module


def _imported_text(path: Path) -> str:
    imported, _ = import_with_summary(path.read_bytes(), path.name)
    return imported.text


def _coordinates(result: AdjustmentResult) -> dict[str, tuple[float, float, float]]:
    return {p.name: (p.east, p.north, p.height) for p in result.points}


def test_three_demo_kinds_are_offered():
    assert [p.name for p in DEMO_XML] == [
        "xml_gnss_network.xml",
        "xml_mixed_job.xml",
        "xml_traverse_two_faces.xml",
    ]


@pytest.mark.parametrize("path", DEMO_XML, ids=lambda p: p.stem)
def test_a_book_written_as_xml_and_imported_again_adjusts_the_same(path: Path):
    original_text = _imported_text(path)
    original = parse_fieldbook(original_text, source="original.fieldbook")
    xml = write_survey_xml(original)
    again, summary = import_with_summary(xml, "written.xml")
    assert summary.warnings == ()
    first = adjust_fieldbook(original_text, source="original.fieldbook")
    second = adjust_fieldbook(again.text, source="again.fieldbook")
    a, b = _coordinates(first), _coordinates(second)
    assert a.keys() == b.keys() and len(a) >= 5
    for name in a:
        for x, y in zip(a[name], b[name], strict=True):
            assert abs(x - y) < 1e-6, (name, a[name], b[name])
    assert first.summary.redundancy == second.summary.redundancy
    assert math.isclose(first.summary.variance_factor, second.summary.variance_factor, rel_tol=1e-6)


def test_the_writer_reads_faces_that_the_import_means_back():
    """Face II is face I + 180° and 360° − z: the import finds no collimation at all."""
    text = _imported_text(ROOT / "demo_projects" / "xml_traverse_two_faces.xml")
    xml = write_survey_xml(parse_fieldbook(text, source="t.fieldbook"))
    again, summary = import_with_summary(xml, "t.xml")
    assert summary.setups == 4 and summary.observations == 20
    assert "collimation +0.0″, index error +0.0″" in again.text


@pytest.mark.parametrize("path", DEMO_XML, ids=lambda p: p.stem)
def test_each_demo_imports_and_passes_the_global_test(path: Path):
    imported, summary = import_with_summary(path.read_bytes(), path.name)
    assert summary.warnings == ()
    result = adjust_fieldbook(imported.text, source=path.stem + ".fieldbook")
    assert result.summary.global_test.passed
    assert result.summary.model == "geodetic" and result.summary.converged


@pytest.mark.parametrize("path", DEMO_XML, ids=lambda p: p.stem)
def test_each_demo_lands_near_its_invented_truth(path: Path):
    """Reference: the true coordinates the generator simulated from (its TRUTH tables).
    With 1″ angles, 1 mm + 1.5 ppm distances and millimetre vectors, 3 cm is far beyond
    any a posteriori ellipse here; a wrong face reduction or unit would miss by decimetres."""
    job = _generator().DEMOS[path.stem][0]
    imported, _ = import_with_summary(path.read_bytes(), path.name)
    adjusted = _coordinates(adjust_fieldbook(imported.text, source="demo.fieldbook"))
    for name, (east, north, height) in job.truth.items():
        e, n, h = adjusted[name]
        assert math.hypot(e - east, n - north) < 0.03, (name, e - east, n - north)
        assert abs(h - height) < 0.05, (name, h - height)


def test_the_generator_rewrites_the_demos_byte_for_byte():
    generator = _generator()
    for path in DEMO_XML:
        job, seed, title, story, version = generator.DEMOS[path.stem]
        assert generator.survey_xml(job, seed, title, story, version) == path.read_text("utf-8")
