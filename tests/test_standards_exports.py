"""Accuracy-standard presets against their published constants, and the exports' validity."""

from __future__ import annotations

import csv
import io
import json
import math
from pathlib import Path

import numpy as np
import pytest
import scipy.stats

from server.fieldbook.parser import parse_fieldbook
from server.formats.geojson import GeoJsonUnavailable, geojson_text
from server.pipeline import adjust_fieldbook, adjust_parsed
from server.report.csv_export import points_csv
from server.review.standards import FGCC_1984_LEVELING, PRESETS, with_presets

DEMOS = Path(__file__).resolve().parent.parent / "demo_projects"


def test_alta_nsps_allowance_values():
    """ALTA/NSPS (2026, §3.E): 2 cm + 50 ppm at 95 %.  100 m → 0.0250 m; 1000 m → 0.0700 m;
    in feet 0.07 ft + 50 ppm: 200 ft → 0.080 ft, 1000 ft → 0.120 ft (arithmetic of the
    published allowance, docs/references.md "ALTA/NSPS relative positional precision")."""
    metric = PRESETS["alta-nsps-2026"].quantity("m")
    assert metric.allowance_distance(100.0) == pytest.approx(0.0250, abs=1e-12)
    assert metric.allowance_distance(1000.0) == pytest.approx(0.0700, abs=1e-12)
    feet = PRESETS["alta-nsps-2026"].quantity("ft")
    for distance_ft, allowed_ft in ((200.0, 0.080), (1000.0, 0.120)):
        allowed_m = feet.allowance_distance(distance_ft * 0.3048)
        assert allowed_m / 0.3048 == pytest.approx(allowed_ft, abs=1e-12)


def test_fgcc_leveling_constants_as_recalled():
    """FGCC 1984 §3.5 loop constants 4/5/6/8/12 mm·√E — from memory
    (docs/references.md "FGCC 1984 leveling allowances");
    a 1st-I 20 km loop allows 17.89 mm (computed)."""
    loops = [
        FGCC_1984_LEVELING[k][1]
        for k in (
            "first-order-class-I",
            "first-order-class-II",
            "second-order-class-I",
            "second-order-class-II",
            "third-order",
        )
    ]
    assert loops == [4.0, 5.0, 6.0, 8.0, 12.0]
    q = PRESETS["fgcc-1984-first-order-class-I"].quantity("m")
    assert q.allowance_level(20.0, None) * 1000 == pytest.approx(17.89, abs=0.005)
    assert not PRESETS["fgcc-1984-first-order-class-I"].verified


def test_published_95_percent_factors_match_scipy():
    """1D 1.9600 and 2D 2.4477 at 95 % (FGDC-STD-007.3-1998 App. 3-A, quoted in
    docs/references.md "95 % factors") equal the normal and chi-square quantiles."""
    assert scipy.stats.norm.ppf(0.975) == pytest.approx(1.9600, abs=5e-5)
    assert math.sqrt(scipy.stats.chi2.ppf(0.95, 2)) == pytest.approx(2.4477, abs=5e-5)
    assert math.sqrt(-2 * math.log(0.05)) == pytest.approx(2.4477, abs=5e-5)


def test_relative_precision_hand_computed_two_point_case():
    """One new point P from fixed A by a distance (σ_d) and an azimuth (σ_t):
    the relative ellipse A–P has semi-axes σ_d and D·σ_t along and across the line,
    times the 95 % factor (√χ²₂ = 2.4477 with no redundancy)."""
    text = """
    defaults distance=5mm azimuth=10sec
    point A east=1000 north=1000 fix
    distance A P 400.000
    azimuth A P 90:00:00
    """
    result = adjust_fieldbook(text)
    (rel,) = result.relative
    factor = math.sqrt(scipy.stats.chi2.ppf(0.95, 2))
    across = 400.0 * math.radians(10 / 3600)  # 19.4 mm
    assert rel.semi_major == pytest.approx(factor * across, rel=1e-6)
    assert rel.semi_minor == pytest.approx(factor * 0.005, rel=1e-6)
    assert rel.azimuth == pytest.approx(0.0, abs=1e-6) or rel.azimuth == pytest.approx(
        180.0, abs=1e-6
    )
    assert rel.sd_distance == pytest.approx(0.005, rel=1e-6)


def test_preset_applies_to_the_relative_check():
    """2 cm + 50 ppm of the corner-to-corner distance (docs/references.md,
    "ALTA/NSPS relative positional precision")."""
    fb = with_presets(
        parse_fieldbook((DEMOS / "control_network.fieldbook").read_text()),
        relative="alta-nsps-2026",
    )
    result = adjust_parsed(fb)
    assert len(result.relative) >= 10, "the demo's joined pairs are all checked"
    for r in result.relative:
        assert r.allowed == pytest.approx(0.02 + 50e-6 * r.distance, rel=1e-9)
        assert r.passed == (r.semi_major <= r.allowed)
    assert all(r.passed for r in result.relative)  # a sound control network meets it


def test_preset_fails_a_pair_whose_ellipse_is_over_the_allowance():
    """A 400 m line fixed only by a 10" azimuth: the semi-major 2.4477 × 19.4 mm = 47.5 mm
    is over 2 cm + 50 ppm × 400 m = 40.0 mm, so the pair fails."""
    text = """
    defaults distance=5mm azimuth=10sec
    point A east=1000 north=1000 fix
    distance A P 400.000
    azimuth A P 90:00:00
    """
    (rel,) = adjust_parsed(with_presets(parse_fieldbook(text), relative="alta-nsps-2026")).relative
    assert rel.allowed == pytest.approx(0.0400, abs=1e-9)
    assert rel.semi_major == pytest.approx(0.0475, abs=5e-5)
    assert rel.passed is False


def test_unknown_preset_is_refused_with_choices():
    fb = parse_fieldbook("defaults level=1mm\npoint A height=0 fix\nlevel A B 1\n")
    with pytest.raises(ValueError, match="alta-nsps-2026"):
        with_presets(fb, relative="alta")


def test_geojson_is_refused_without_a_crs():
    """Grid eastings in a GeoJSON file would be read as longitudes (RFC 7946 §4 allows only
    WGS 84-style longitude/latitude): without a crs line there is no GeoJSON."""
    result = adjust_fieldbook((DEMOS / "control_network.fieldbook").read_bytes())
    with pytest.raises(GeoJsonUnavailable, match="crs"):
        geojson_text(result)


def test_geojson_is_valid_feature_collection():
    result = adjust_fieldbook((DEMOS / "dam_control_3d.fieldbook").read_bytes())
    data = json.loads(geojson_text(result))
    assert data["type"] == "FeatureCollection"
    assert "EPSG:32633" in data["coordinate_system"]
    points = [f for f in data["features"] if f["id"].startswith("point:")]
    lines = [f for f in data["features"] if f["id"].startswith("line:")]
    assert len(points) == len(result.points) and len(lines) == len(result.observations)
    for f in data["features"]:
        assert f["type"] == "Feature" and isinstance(f["properties"], dict)
        g = f["geometry"]
        if g is not None:
            assert g["type"] in ("Point", "LineString")
            coords = [g["coordinates"]] if g["type"] == "Point" else g["coordinates"]
            assert all(len(c) >= 2 and all(isinstance(x, float) for x in c) for c in coords)
            if g["type"] == "LineString":
                assert len(g["coordinates"]) >= 2
    flagged = [f for f in lines if f["properties"]["flagged"]]
    assert flagged == [f for f in lines if f["properties"]["flagged"] is True]


def test_points_csv_reads_back_with_the_standard_reader():
    result = adjust_fieldbook((DEMOS / "leveling_clean.fieldbook").read_bytes())
    rows = list(csv.DictReader(io.StringIO(points_csv(result))))
    assert [r["name"] for r in rows] == [p.name for p in result.points]
    heights = np.array([float(r["height"]) for r in rows if r["height"]])
    assert np.allclose(
        heights, [p.height for p in result.points if p.height is not None], atol=5e-5
    )
