"""Epochs of plane and geodetic networks compared end to end (server/monitoring/job.py).

A free 2D trilateration with one mark moved by a known (4, −3) mm between epochs: the
congruence test names it and its displacement is recovered within 3σ per component; the
geodetic 3D dam book compared with itself gives zero displacements on every local axis.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np

from server.fieldbook.parser import parse_fieldbook
from server.monitoring.job import MonitoringOptions, monitor

ROOT = Path(__file__).resolve().parent.parent
PILLARS = {
    "P1": (1000.0, 2000.0),
    "P2": (1180.0, 2030.0),
    "P3": (1210.0, 2190.0),
    "P4": (1020.0, 2210.0),
    "P5": (1100.0, 2100.0),
}


def _trilateration(epoch: str, shift: dict[str, tuple[float, float]], seed: int) -> str:
    """Distances between all pairs (σ = 0.5 mm, no control: a free network)."""
    rng = np.random.default_rng(seed)
    true = {
        k: (e + shift.get(k, (0.0, 0.0))[0], n + shift.get(k, (0.0, 0.0))[1])
        for k, (e, n) in PILLARS.items()
    }
    lines = ["fieldbook 1", "units length=m", f"epoch {epoch}", "defaults distance=0.5mm"]
    lines += [f"point {k} east={e:.3f} north={n:.3f}" for k, (e, n) in PILLARS.items()]
    names = list(PILLARS)
    for i, a in enumerate(names):
        for b in names[i + 1 :]:
            (ea, na), (eb, nb) = true[a], true[b]
            d = math.hypot(eb - ea, nb - na) + rng.normal(0.0, 0.0005)
            lines.append(f"distance {a} {b} {d:.5f}")
    return "\n".join(lines) + "\n"


def test_a_moved_pillar_of_a_free_network_is_found_with_its_displacement():
    books = [
        parse_fieldbook(_trilateration("2026-01-10", {}, 1), source="jan.fieldbook"),
        parse_fieldbook(
            _trilateration("2026-06-10", {"P3": (0.004, -0.003)}, 2), source="jun.fieldbook"
        ),
    ]
    job = monitor(books, MonitoringOptions())
    comparison = job.comparisons[0]
    assert comparison.moved == ("P3",)
    assert comparison.steps[0].rank == 7  # 10 coordinates less translation and rotation
    p3 = next(d for d in comparison.displacements if d.mark == "P3")
    # on the datum of the other four, whose own noise moves the reference a little
    for value, truth, sd in zip(p3.components, (0.004, -0.003), p3.sd):
        assert abs(value - truth) < 3.0 * sd
    assert p3.significant


def test_the_geodetic_book_against_itself_has_no_displacement():
    text = (ROOT / "demo_projects" / "dam_control_3d.fieldbook").read_text(encoding="utf-8")
    first = text.replace("crs EPSG:32633", "crs EPSG:32633\nepoch 2026-01-01")
    second = text.replace("crs EPSG:32633", "crs EPSG:32633\nepoch 2026-07-01")
    job = monitor(
        [parse_fieldbook(first, source="a"), parse_fieldbook(second, source="b")],
        MonitoringOptions(),
    )
    assert job.dimension == 3
    comparison = job.comparisons[0]
    assert comparison.steps[0].passed and comparison.moved == ()
    assert all(max(abs(c) for c in d.components) < 1e-6 for d in comparison.displacements)
    assert any("BM-MILL" in note for note in job.notes)  # height-only: not compared


def test_a_mark_moved_along_its_local_axes_is_recovered_in_3d():
    """Geodetic 3D model: the invented hillside site of tests/geodetic_synthetic.py (true
    observations from PROJ, noise added), and a second epoch in which K-8 moved 12 mm east,
    8 mm south and settled 15 mm along its own local axes (the offset by pyproj's geodesic).
    The comparison names K-8 and recovers the three components within 3σ each."""
    import dataclasses

    from tests import geodetic_synthetic as gs

    site = gs.harbor_site()
    k8 = site.marks["K-8"]
    lat, lon = gs._offset(k8.lat, k8.lon, 0.012, -0.008)
    moved = dict(site.marks)
    moved["K-8"] = dataclasses.replace(k8, lat=lat, lon=lon, height=k8.height - 0.015)
    texts = []
    for seed, marks, epoch in ((1, site.marks, "2026-01-10"), (2, moved, "2026-07-10")):
        later = gs.Site(marks, site.undulation)
        observations = gs.with_noise(
            gs.true_observations(later, gs.HARBOR_PLAN), np.random.default_rng(seed)
        )
        text = gs.write_book(later, observations, gs.SITE_GRID).text
        texts.append(text.replace("\ncrs ", f"\nepoch {epoch}\ncrs ", 1))
    books = [parse_fieldbook(t, source=f"e{i}.fieldbook") for i, t in enumerate(texts)]
    job = monitor(books, MonitoringOptions())
    comparison = job.comparisons[0]
    assert "K-8" in comparison.moved
    k8_shift = next(d for d in comparison.displacements if d.mark == "K-8")
    for value, truth, sd in zip(k8_shift.components, (0.012, -0.008, -0.015), k8_shift.sd):
        assert abs(value - truth) < 3.0 * sd, (value, truth, sd)
