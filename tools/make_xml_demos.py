#!/usr/bin/env python3
"""Generate the invented survey XML demos in ``demo_projects/`` (imported, then adjusted).

Three files, each simulated from made-up true grid coordinates and ellipsoidal heights
(no geoid line is imported, so the heights are ellipsoidal: N = 0):

- ``xml_traverse_two_faces.xml``: a closed total-station traverse, every pointing read in
  face I and face II (with a collimation and an index error that the face means cancel);
- ``xml_gnss_network.xml``: static GNSS vectors with their full covariances (version 2.0);
- ``xml_mixed_job.xml``: total station rounds in two sets, GNSS vectors and control on a
  projected CRS, angles in grads.

Grid → latitude/longitude by pyproj (the CRS's own inverse projection), then Earth-centred
X, Y, Z on its ellipsoid; slope distances, zenith angles (refraction k = 0.13, the field
book's default) and horizon-plane directions by ``server.geodesy.frames``, as the geodetic
demo generator does.  Normal noise with the accuracies each file states is added, then the
readings are rounded as a data collector writes them (0.1 mm, about 0.01″).  All sites,
firms and people are fictional.  The seeds are fixed: running the script again writes the
same files byte for byte::

    .venv/bin/python tools/make_xml_demos.py
"""

from __future__ import annotations

import math
import sys
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pyproj

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from server.geodesy import frames  # noqa: E402 - after the path is set
from server.geodesy.crs import crs_from_epsg  # noqa: E402

OUT_DIR = ROOT / "demo_projects"
RHO = 180.0 * 3600.0 / math.pi  # arc-seconds per radian
MM = 1e-3
K_REFRACTION = 0.13  # the field book's default (docs/geodetic.md)


@dataclass
class Job:
    """One demo: its CRS, true positions, control and what was observed."""

    epsg: int
    truth: dict[str, tuple[float, float, float]]  # name: (east, north, ellipsoidal height)
    fixed: tuple[str, ...]
    weighted: dict[str, tuple[float, float]] = field(default_factory=dict)  # sd_en, sd_h
    #: station: (hi, targets, sets)
    rounds: dict[str, tuple[float, list[str], int]] = field(default_factory=dict)
    target_heights: dict[str, float] = field(default_factory=dict)
    vectors: list[tuple[str, str]] = field(default_factory=list)
    angle_unit: str = "decimal degrees"  # or "grads"


class Simulator:
    """True Earth-centred positions of a job and its noisy readings."""

    def __init__(self, job: Job, seed: int) -> None:
        self.job = job
        self.rng = np.random.default_rng(seed)
        crs = crs_from_epsg(f"EPSG:{job.epsg}")
        self.ell = crs.ellipsoid
        to_geographic = pyproj.Transformer.from_crs(
            job.epsg, pyproj.CRS(job.epsg).geodetic_crs, always_xy=True
        )
        self.xyz: dict[str, np.ndarray] = {}
        for name, (east, north, height) in job.truth.items():
            lon, lat = to_geographic.transform(east, north)
            self.xyz[name] = crs.geodetic_to_ecef(
                np.radians([lat]), np.radians([lon]), np.array([height])
            )[0]

    def pointings(self, at: str, hi: float, targets: list[str]) -> dict[str, np.ndarray]:
        """True azimuth, zenith angle and slope distance from ``at`` to each target."""
        frm = np.repeat(self.xyz[at][None], len(targets), axis=0)
        to = np.array([self.xyz[t] for t in targets])
        ht = np.array([self.job.target_heights[t] for t in targets])
        return {
            "azimuth": frames.horizon_azimuth(self.ell, frm, to, hi).value,
            "zenith": frames.zenith_angle(self.ell, frm, to, hi, ht, K_REFRACTION).value,
            "slope": frames.slope_distance(self.ell, frm, to, hi, ht).value,
            "ht": ht,
        }

    def vector(self, frm: str, to: str) -> tuple[np.ndarray, np.ndarray]:
        """A processed vector: the truth plus noise drawn from its formal covariance."""
        length = float(np.linalg.norm(self.xyz[to] - self.xyz[frm]))
        sd = np.hypot(np.array([2.0, 1.5, 3.0]) * MM, 0.5e-6 * length)
        sd = sd * self.rng.uniform(0.9, 1.2, 3)
        corr = np.array([-0.3, 0.5, -0.25]) + self.rng.uniform(-0.08, 0.08, 3)
        cov, ok = frames.baseline_covariance(sd[None], corr[None])
        assert ok[0]
        value = self.xyz[to] - self.xyz[frm] + self.rng.multivariate_normal(np.zeros(3), cov[0])
        return value, cov[0]


# --------------------------------------------------------------------------------------
# the instrument and its readings

DIRECTION_SD = 1.0 / RHO  # a face mean, as the standard's precision is defined
ZENITH_SD = 1.5 / RHO
EDM = (1.0 * MM, 1.5)  # a, b ppm
COLLIMATION = 4.0 / RHO
INDEX_ERROR = -3.0 / RHO


def _angle_text(radians: float, unit: str) -> str:
    if unit == "grads":
        return f"{math.degrees(radians) / 0.9 % 400.0:.8f}"
    return f"{math.degrees(radians) % 360.0:.8f}"


def _precision_text(radians: float, unit: str) -> str:
    return f"{math.degrees(radians) / (0.9 if unit == 'grads' else 1.0):.12f}"


def _setup_xml(sim: Simulator, at: str, number: int) -> list[str]:
    """One InstrumentSetup and its ObservationGroups: each set read in both faces."""
    job = sim.job
    hi, targets, sets = job.rounds[at]
    true = sim.pointings(at, hi, targets)
    unit = job.angle_unit
    out = [
        f'    <InstrumentSetup id="SU{number}" stationName="{at}" '
        f'instrumentDetailsID="TS1" instrumentHeight="{hi:.3f}">',
        f'      <InstrumentPoint pntRef="{at}"/>',
        "    </InstrumentSetup>",
    ]
    # one face reading has σ·√2, so that a face mean has the stated σ
    read_dir, read_zen = DIRECTION_SD * math.sqrt(2), ZENITH_SD * math.sqrt(2)
    for number_of_set in range(1, sets + 1):
        orientation = sim.rng.uniform(0, 2 * math.pi)
        out.append(
            f'    <ObservationGroup id="SU{number}-{number_of_set}" setupID="SU{number}" '
            f'setID="{number_of_set}">'
        )
        face_two: list[str] = []
        for k, target in enumerate(targets):
            slope_sd = math.hypot(EDM[0], EDM[1] * 1e-6 * true["slope"][k])
            slope = true["slope"][k] + sim.rng.normal(0.0, slope_sd)
            circle = true["azimuth"][k] - orientation
            zenith = true["zenith"][k]
            readings = []
            for face in (1, 2):
                hz = circle + sim.rng.normal(0.0, read_dir)
                z = zenith + sim.rng.normal(0.0, read_zen)
                hz, z = (
                    (hz - COLLIMATION, z + INDEX_ERROR)
                    if face == 1
                    else (hz + math.pi + COLLIMATION, 2 * math.pi - z + INDEX_ERROR)
                )
                jitter = sim.rng.normal(0.0, 0.2 * MM)
                readings.append(
                    f'      <RawObservation directFace="{"true" if face == 1 else "false"}" '
                    f'horizAngle="{_angle_text(hz, unit)}" zenithAngle="{_angle_text(z, unit)}" '
                    f'slopeDistance="{slope + (jitter if face == 1 else -jitter):.4f}" '
                    f'targetHeight="{true["ht"][k]:.3f}"><TargetPoint pntRef="{target}"/>'
                    "</RawObservation>"
                )
            out.append(readings[0])
            face_two.insert(0, readings[1])  # face II in reverse order, as a crew turns back
        out += face_two
        out.append("    </ObservationGroup>")
    return out


def _vectors_xml(sim: Simulator) -> list[str]:
    names = sorted({p for pair in sim.job.vectors for p in pair})
    out = [f'    <GPSSetup id="G-{n}" stationName="{n}"/>' for n in names]
    for frm, to in sim.job.vectors:
        value, cov = sim.vector(frm, to)
        out.append(
            f'    <GPSVector setupID_A="G-{frm}" setupID_B="G-{to}" dX="{value[0]:.4f}" '
            f'dY="{value[1]:.4f}" dZ="{value[2]:.4f}">'
        )
        parts = zip(
            ("XX", "XY", "XZ", "YY", "YZ", "ZZ"),
            (cov[0, 0], cov[0, 1], cov[0, 2], cov[1, 1], cov[1, 2], cov[2, 2]),
            strict=True,
        )
        out.append(
            "      <GPSQCInfoLevel2 "
            + " ".join(f'covariance{key}="{value:.6e}"' for key, value in parts)
            + "/>"
        )
        out.append("    </GPSVector>")
    return out


def _points_xml(job: Job) -> list[str]:
    out = ["  <CgPoints>"]
    for name in list(job.fixed) + list(job.weighted):
        east, north, height = job.truth[name]
        extra = ""
        if name in job.weighted:
            sd_en, sd_h = job.weighted[name]
            extra = f' horizontalAccuracy="{sd_en}" verticalAccuracy="{sd_h}"'
        out.append(
            f'    <CgPoint name="{name}" pntSurv="control"{extra}>'
            f"{north:.4f} {east:.4f} {height:.4f}</CgPoint>"
        )
    out.append("  </CgPoints>")
    return out


def survey_xml(job: Job, seed: int, title: str, story: str, version: str = "1.2") -> str:
    """The whole file."""
    sim = Simulator(job, seed)
    unit = job.angle_unit
    out = [
        '<?xml version="1.0" encoding="UTF-8"?>',
        "<!--",
        *story.strip().splitlines(),
        "-->",
        f'<LandXML xmlns="http://www.landxml.org/schema/LandXML-{version}" '
        f'version="{version}" date="2026-05-12" time="16:20:00">',
        f'  <Units><Metric linearUnit="meter" angularUnit="{unit}" '
        f'directionUnit="{unit}"/></Units>',
        f'  <CoordinateSystem epsgCode="{job.epsg}" name="project grid"/>',
        f'  <Project name="{title}"/>',
        *_points_xml(job),
        "  <Survey>",
    ]
    if job.rounds:
        out += [
            "    <Equipment>",
            f'      <InstrumentDetails id="TS1" manufacturer="Invented" model="One-second"'
            f' horizAnglePrecision="{_precision_text(DIRECTION_SD, unit)}"'
            f' zenithAnglePrecision="{_precision_text(ZENITH_SD, unit)}"'
            f' edmAccuracyConstant="{EDM[0]:.4f}" edmAccuracyppm="{EDM[1]}"/>',
            "    </Equipment>",
        ]
        for number, at in enumerate(job.rounds, 1):
            out += _setup_xml(sim, at, number)
    out += _vectors_xml(sim)
    out += ["  </Survey>", "</LandXML>"]
    return "\n".join(out) + "\n"


# --------------------------------------------------------------------------------------
# the three invented jobs

TRAVERSE = Job(
    epsg=32633,
    truth={
        "CP-ALDER": (441205.312, 5317408.655, 402.417),
        "CP-BRACKEN": (441612.048, 5317690.210, 408.905),
        "T-1": (441398.771, 5317201.334, 399.812),
        "T-2": (441690.415, 5317126.020, 397.344),
        "T-3": (441858.236, 5317389.583, 401.650),
    },
    fixed=("CP-ALDER", "CP-BRACKEN"),
    rounds={
        "CP-ALDER": (1.552, ["CP-BRACKEN", "T-1", "T-3"], 1),
        "T-1": (1.498, ["CP-ALDER", "T-2"], 1),
        "T-2": (1.611, ["T-1", "T-3"], 1),
        "T-3": (1.534, ["T-2", "CP-BRACKEN", "CP-ALDER"], 1),
    },
    target_heights={
        "CP-ALDER": 1.600,
        "CP-BRACKEN": 1.750,
        "T-1": 1.650,
        "T-2": 1.700,
        "T-3": 1.800,
    },
)

GNSS = Job(
    epsg=32633,
    truth={
        "GN-CAIRN": (452108.774, 5311994.106, 512.338),
        "GN-WELLS": (455890.215, 5310402.871, 488.017),
        "GN-ORCHARD": (453402.660, 5308775.493, 471.902),
        "N-10": (453015.432, 5311120.587, 497.255),
        "N-11": (454611.090, 5310913.344, 493.781),
        "N-12": (454220.518, 5309502.776, 480.116),
    },
    fixed=("GN-CAIRN", "GN-WELLS"),
    weighted={"GN-ORCHARD": (0.010, 0.020)},
    vectors=[
        ("GN-CAIRN", "N-10"),
        ("GN-CAIRN", "N-11"),
        ("GN-WELLS", "N-11"),
        ("GN-WELLS", "N-12"),
        ("GN-ORCHARD", "N-12"),
        ("GN-ORCHARD", "N-10"),
        ("N-10", "N-11"),
        ("N-11", "N-12"),
        ("GN-CAIRN", "GN-WELLS"),
    ],
)

MIXED = Job(
    epsg=25832,
    truth={
        "KP-MOOR": (512604.118, 5402213.907, 261.442),
        "KP-SPRING": (513388.560, 5401842.311, 255.019),
        "S-1": (512911.245, 5401955.672, 258.130),
        "S-2": (513155.903, 5402120.488, 259.874),
        "S-3": (513020.377, 5401702.050, 254.603),
    },
    fixed=("KP-MOOR",),
    weighted={"KP-SPRING": (0.008, 0.015)},
    rounds={
        "S-1": (1.561, ["KP-MOOR", "S-2", "S-3"], 2),
        "S-2": (1.507, ["S-1", "KP-SPRING", "S-3"], 2),
        "S-3": (1.589, ["S-1", "S-2", "KP-SPRING"], 2),
    },
    target_heights={"KP-MOOR": 1.800, "KP-SPRING": 2.000, "S-1": 1.650, "S-2": 1.650, "S-3": 1.700},
    vectors=[
        ("KP-MOOR", "S-1"),
        ("KP-MOOR", "S-2"),
        ("KP-SPRING", "S-2"),
        ("KP-SPRING", "S-3"),
        ("KP-MOOR", "KP-SPRING"),
    ],
    angle_unit="grads",
)

DEMOS = {
    "xml_traverse_two_faces": (
        TRAVERSE,
        8101,
        "Alder Brook lane - closed traverse, two faces",
        """
Invented demo: Fenmoor Surveys (fictional) closed a four-station traverse along the
Alder Brook lane (fictional) from two control marks; operator Rhona Tellwick. Every
pointing is read in face I and face II: the import means the faces (collimation and
index error cancel) and warns of any face difference above its tolerance.
""",
        "1.2",
    ),
    "xml_gnss_network": (
        GNSS,
        8203,
        "Cairnfold - static GNSS densification",
        """
Invented demo: static GNSS sessions by Ostervale Geomatics (fictional) densifying control
around the Cairnfold quarry (fictional); party chief Edwin Marlowe. Vectors with their
full 3x3 covariances; two stations held, one weighted.
""",
        "2.0",
    ),
    "xml_mixed_job": (
        MIXED,
        8307,
        "Kelmere spring - GNSS, rounds and control",
        """
Invented demo: a mixed job by Brightwater Survey Co-op (fictional) at the Kelmere spring
(fictional); observers Ada Penhallow and Jonas Reeve. Control on the project's projected
CRS (one mark held, one weighted), GNSS vectors, and total-station rounds in two sets
and two faces; angles in grads.
""",
        "1.2",
    ),
}


def main() -> None:
    OUT_DIR.mkdir(parents=True, exist_ok=True)
    for name, (job, seed, title, story, version) in DEMOS.items():
        (OUT_DIR / f"{name}.xml").write_text(
            survey_xml(job, seed, title, story, version), encoding="utf-8"
        )
        print(f"wrote demo_projects/{name}.xml")


if __name__ == "__main__":
    main()
