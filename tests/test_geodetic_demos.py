"""The geodetic demo field books (demo_projects/dam_control_3d*): they parse, the generator rewrites
them identically, and their observations agree with the invented truth when computed by
pyproj alone (projection inverse, +proj=cart, +proj=topocentric), within the noise the book
states.  The blunder copy differs by the one component the answer key names, and the adjustment
finds it: its w is the largest and its baseline's vector test fails.
"""

from __future__ import annotations

import importlib.util
import math
import re
import sys
from pathlib import Path

import numpy as np
import pyproj
import pytest

from server.fieldbook.parser import parse_fieldbook

ROOT = Path(__file__).resolve().parents[1]
FOLDER = ROOT / "demo_projects"
R_REFRACTION = 6_371_000.0  # the model's radius for k·S/(2R) (docs/fieldbook.md, refraction)


def _generator():
    spec = importlib.util.spec_from_file_location(
        "make_geodetic_demos", ROOT / "tools" / "make_geodetic_demos.py"
    )
    assert spec is not None and spec.loader is not None
    module = importlib.util.module_from_spec(spec)
    sys.modules[spec.name] = module  # its dataclasses look their module up there
    spec.loader.exec_module(module)
    return module


GEN = _generator()
TO_LONLAT = pyproj.Transformer.from_crs("EPSG:32633", "EPSG:4326", always_xy=True)
CART = pyproj.Transformer.from_pipeline("+proj=cart +ellps=WGS84")


def _truth_xyz(name: str, above: float = 0.0) -> np.ndarray:
    """Earth-centred position of a mark (plus ``above`` metres along its normal), by pyproj."""
    east, north, height, _ = GEN.TRUTH[name]
    lon, lat = TO_LONLAT.transform(east, north)
    h = height + GEN.geoid(east, north) + above
    return np.array(CART.transform(lon, lat, h))


def _text(name: str) -> str:
    return (FOLDER / f"{name}.fieldbook").read_text(encoding="utf-8")


def test_demos_parse():
    for name in ("dam_control_3d", "dam_control_3d_blunder"):
        book = parse_fieldbook(_text(name), source=f"{name}.fieldbook")
        kinds = {o.kind for o in book.observations}
        assert {"baseline", "slope", "zenith", "direction", "level"} <= kinds
        assert book.crs is not None and book.warnings == ()


def test_the_clean_demo_passes_and_the_blunder_is_found():
    """The answer key (tools/GEODETIC_DEMOS.md): 45 mm in dy of line 48.  Clean, the global
    test passes and nothing is flagged; with the blunder, that component has the largest |w|
    and its baseline's χ²(3) test fails."""
    from server.pipeline import adjust_fieldbook

    clean = adjust_fieldbook(_text("dam_control_3d")).to_json_dict()
    assert clean["summary"]["global_test"]["passed"]
    assert not any(o["flagged"] for o in clean["observations"])
    bad = adjust_fieldbook(_text("dam_control_3d_blunder")).to_json_dict()
    worst = max(bad["observations"], key=lambda o: abs(o["w"] or 0.0))
    assert (worst["line"], worst["component"]) == (48, "dy")
    assert [t["line"] for t in bad["baseline_tests"] if t["flagged"]] == [48]


def test_generator_rewrites_the_files_identically():
    assert GEN.fieldbook(False)[0] == _text("dam_control_3d")
    assert GEN.fieldbook(True)[0] == _text("dam_control_3d_blunder")


def _baselines(text: str) -> dict[tuple[str, str], tuple[np.ndarray, np.ndarray, int]]:
    out = {}
    for n, line in enumerate(text.splitlines(), 1):
        if line.startswith("baseline "):
            parts = line.split()
            sd = [float(v.rstrip("m")) / 1000 for v in parts[6].split("=")[1].split(",")]
            out[(parts[1], parts[2])] = (np.array([float(v) for v in parts[3:6]]), np.array(sd), n)
    return out


def test_baselines_agree_with_the_truth_and_the_blunder_is_where_the_key_says():
    clean, bad = _baselines(_text("dam_control_3d")), _baselines(_text("dam_control_3d_blunder"))
    for (frm, to), (value, sd, _) in clean.items():
        exact = _truth_xyz(to) - _truth_xyz(frm)
        # within 5 σ per component (σ with 1 mm centering at each end, at most 1.5 mm more)
        assert np.all(np.abs(value - exact) < 5 * np.hypot(sd, 1.5e-3)), (frm, to)
    changed = {pair for pair in clean if not np.array_equal(clean[pair][0], bad[pair][0])}
    assert changed == {("GN-WEIR", "P-4")}
    difference = bad[("GN-WEIR", "P-4")][0] - clean[("GN-WEIR", "P-4")][0]
    np.testing.assert_allclose(difference, [0.0, 0.045, 0.0], atol=1e-9)
    key = (ROOT / "tools" / "GEODETIC_DEMOS.md").read_text(encoding="utf-8")
    line = bad[("GN-WEIR", "P-4")][2]
    assert f"line {line}, `baseline GN-WEIR P-4`: +45.0 mm added to Y" in key


def _terrestrial(text: str) -> list[tuple[str, str, str, float, float, float]]:
    pattern = re.compile(r"^(slope|zenith)\s+(\S+)\s+(\S+)\s+(\S+) hi=([0-9.]+)m ht=([0-9.]+)m$")
    rows = []
    for line in text.splitlines():
        match = pattern.match(line)
        if match:
            kind, at, to, value, hi, ht = match.groups()
            if kind == "zenith":
                d, m, s = (float(x) for x in value.split(":"))
                number = math.radians(d + m / 60 + s / 3600)
            else:
                number = float(value)
            rows.append((kind, at, to, number, float(hi), float(ht)))
    return rows


def test_slope_distances_and_zenith_angles_agree_with_pyproj():
    rows = _terrestrial(_text("dam_control_3d"))
    assert len(rows) == 34
    for kind, at, to, value, hi, ht in rows:
        instrument, target = _truth_xyz(at, hi), _truth_xyz(to, ht)
        slope = float(np.linalg.norm(target - instrument))
        if kind == "slope":
            sd = math.hypot(1e-3, 1.5e-6 * slope, math.sqrt(2) * 1e-3)
            assert value == pytest.approx(slope, abs=5 * sd), (at, to)
            continue
        x0, y0, z0 = (float(v) for v in instrument)
        topo = pyproj.Transformer.from_pipeline(
            f"+proj=topocentric +ellps=WGS84 +X_0={x0!r} +Y_0={y0!r} +Z_0={z0!r}"
        )
        e, n, u = topo.transform(*(float(v) for v in target))
        zenith = math.atan2(math.hypot(e, n), u) - GEN.K_REFRACTION * slope / (2 * R_REFRACTION)
        assert value == pytest.approx(zenith, abs=5 * 1.5 / 206264.8), (at, to)


def test_level_run_closes_on_the_orthometric_truth():
    text = _text("dam_control_3d")
    for line in text.splitlines():
        if line.startswith("level "):
            parts = line.split()
            frm, to, dh = parts[1], parts[2], float(parts[3])
            km = float(parts[4].removeprefix("len=").removesuffix("km"))
            exact = GEN.TRUTH[to][2] - GEN.TRUTH[frm][2]
            assert dh == pytest.approx(exact, abs=5 * 0.8e-3 * math.sqrt(km) + 1e-4)


def test_direction_rounds_agree_with_pyproj_azimuths():
    """Angles between the directions of a round against azimuths in PROJ's topocentric
    frame at the instrument (the round's own orientation cancels)."""
    text = _text("dam_control_3d")
    rounds = re.findall(r"^directions (\S+)\n((?:  .*\n)+)end", text, re.M)
    assert len(rounds) == 5
    for at, body in rounds:
        x0, y0, z0 = (float(v) for v in _truth_xyz(at))
        topo = pyproj.Transformer.from_pipeline(
            f"+proj=topocentric +ellps=WGS84 +X_0={x0!r} +Y_0={y0!r} +Z_0={z0!r}"
        )
        readings = []
        for line in body.splitlines():
            target, value = line.split()
            d, m, s = (float(x) for x in value.split(":"))
            e, n, _ = topo.transform(*(float(v) for v in _truth_xyz(target)))
            readings.append(
                (math.radians(d + m / 60 + s / 3600), math.atan2(e, n), math.hypot(e, n))
            )
        first, first_az, first_d = readings[0]
        for value, azimuth, distance in readings[1:]:
            turned = math.remainder((value - first) - (azimuth - first_az), 2 * math.pi)
            # two directions, each 1″ with 1 mm centering at both ends
            sd = math.sqrt(sum(1 / 206264.8**2 + 2e-6 / dist**2 for dist in (distance, first_d)))
            assert abs(turned) < 5 * sd, (at, value)


def test_a_geodetic_result_survives_the_project_store(tmp_path):
    """Stored and read back, the result is the same object: baseline tests, components and
    geodetic point figures included (nothing a reviewer saw is lost on reopening)."""
    from server.pipeline import adjust_fieldbook
    from server.store.sqlite import Store

    text = _text("dam_control_3d_blunder")
    result = adjust_fieldbook(text)
    store = Store(tmp_path / "projects.sqlite")
    project_id = store.create_project("dam", "dam.fieldbook", text.encode())
    run_id = store.add_run(project_id, result)
    run = store.run(project_id, run_id)
    assert run is not None
    again = run.result()
    assert again == result
    assert again is not None and again.baseline_tests and again.points[0].latitude is not None


def test_the_adjustment_passes_the_clean_demo_and_finds_the_bad_component():
    """End to end through the pipeline: the clean book passes the global test with no
    baseline flagged; in the copy the bad baseline is the only one its test flags and its
    dy component has the largest |w| of the book (the answer key)."""
    from server.pipeline import adjust_fieldbook

    clean = adjust_fieldbook(_text("dam_control_3d").encode())
    assert clean.summary.model == "geodetic" and clean.summary.crs == "EPSG:32633"
    assert clean.summary.global_test is not None and clean.summary.global_test.passed
    assert not any(t.flagged for t in clean.baseline_tests) and len(clean.baseline_tests) == 9
    bad = adjust_fieldbook(_text("dam_control_3d_blunder").encode())
    line = _baselines(_text("dam_control_3d_blunder"))[("GN-WEIR", "P-4")][2]
    assert bad.summary.global_test is not None and not bad.summary.global_test.passed
    assert [t.line for t in bad.baseline_tests if t.flagged] == [line]
    worst = max((o for o in bad.observations if o.w is not None), key=lambda o: abs(o.w or 0))
    assert (worst.line, worst.component) == (line, "dy")
    # the component's estimated bias finds the 45 mm the key names, within two of its MDBs
    assert worst.estimated_bias == pytest.approx(0.045, abs=2 * (worst.mdb or 0))
