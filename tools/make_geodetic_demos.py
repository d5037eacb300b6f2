#!/usr/bin/env python3
"""Generate the invented demo field books of the geodetic 3D model.

Writes ``demo_projects/dam_control_3d.fieldbook`` and a copy with one blunder in
one baseline component, ``dam_control_3d_blunder.fieldbook``, and the answer key
``tools/GEODETIC_DEMOS.md``.  Everything is simulated and invented (site, firm, people):

- true grid coordinates and orthometric heights are made up on EPSG:32633, with a geoid
  undulation that slopes gently across the site; h = H + N, then latitude and longitude
  by the CRS's own inverse projection and Earth-centred X, Y, Z on its ellipsoid
  (``server.geodesy``, pyproj);
- exact observations come from those positions: GNSS baselines as X, Y, Z differences,
  slope distances and zenith angles between instrument and target (hi, ht along the
  normals, refraction k·S/(2R)), directions in the horizon plane, leveled height
  differences of orthometric heights;
- normal noise with the a priori standard deviations the book states (centering by the
  field-book formulas, the baseline covariance from its sd= and corr=) is added, then the
  values are rounded as booked (0.1 mm, 0.1″).

The seed is fixed: running the script again writes the same files byte for byte::

    .venv/bin/python tools/make_geodetic_demos.py

"""

from __future__ import annotations

import itertools
import math
import sys
from dataclasses import dataclass
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from server.geodesy import frames  # noqa: E402 - after the path is set
from server.geodesy.crs import Crs, crs_from_epsg  # noqa: E402
from server.units import format_dms  # noqa: E402

OUT_DIR = ROOT / "demo_projects"
ANSWER_KEY = ROOT / "tools" / "GEODETIC_DEMOS.md"
SEED = 7031
CRS_TEXT = "EPSG:32633"
RHO = 180.0 * 3600.0 / math.pi  # arc-seconds per radian
MM = 1e-3
K_REFRACTION = 0.13
CENTERING = 1.0 * MM
DIRECTION_SD = 1.0 / RHO
ZENITH_SD = 1.5 / RHO
SLOPE_SD = (1.0 * MM, 1.5)  # a, b ppm
LEVEL_SD = 0.8 * MM  # per √km
BLUNDER = ("GN-WEIR", "P-4", 1, 0.045)  # baseline, component index (dy), metres

#: name: (east, north, orthometric height, role); roles: gnss (fixed by lat/lon), weighted
#: (lat/lon with sd), new (no coordinates), bench (height only, fixed)
TRUTH = {
    "GN-HILL": (398212.417, 5306388.262, 742.318, "gnss"),
    "GN-WEIR": (400147.905, 5305196.774, 688.906, "gnss"),
    "GN-FARM": (398611.338, 5304311.520, 655.482, "weighted"),
    "P-1": (398905.161, 5305612.904, 701.227, "new"),
    "P-2": (399338.720, 5305844.361, 712.540, "new"),
    "P-3": (399702.446, 5305561.083, 699.813, "new"),
    "P-4": (399622.977, 5305130.658, 684.091, "new"),
    "P-5": (399121.530, 5305072.245, 679.664, "new"),
    "BM-MILL": (398760.0, 5305350.0, 690.4127, "bench"),
    "BM-SLUICE": (399880.0, 5305300.0, 682.9534, "bench"),
}
NOTES = {
    "GN-HILL": "forced-centring pillar on Brannoch Hill, permanent GNSS station",
    "GN-WEIR": "brass disc on the spillway wall, static GNSS session",
    "GN-FARM": "rebar in concrete by the Kelvane farm gate, RTK check only",
    "BM-MILL": "bolt in the old mill wall, published height",
    "BM-SLUICE": "bolt on the sluice house step, published height",
}
BASELINES = [
    ("GN-HILL", "GN-WEIR"),
    ("GN-WEIR", "GN-FARM"),
    ("GN-HILL", "P-1"),
    ("GN-HILL", "P-2"),
    ("GN-WEIR", "P-3"),
    ("GN-WEIR", "P-4"),
    ("GN-FARM", "P-5"),
    ("GN-FARM", "P-1"),
    ("GN-HILL", "P-3"),
]
ROUNDS = {
    "P-1": ["P-2", "P-3", "P-5", "GN-HILL"],
    "P-2": ["P-1", "P-3", "P-4"],
    "P-3": ["P-2", "P-4", "P-5", "GN-WEIR"],
    "P-4": ["P-3", "P-5", "P-1"],
    "P-5": ["P-4", "P-1", "GN-FARM"],
}
INSTRUMENT_HEIGHTS = {"P-1": 1.562, "P-2": 1.498, "P-3": 1.611, "P-4": 1.534, "P-5": 1.587}
TARGET_HEIGHTS = {
    "P-1": 1.800,
    "P-2": 1.650,
    "P-3": 1.750,
    "P-4": 2.000,
    "P-5": 1.700,
    "GN-HILL": 1.550,
    "GN-WEIR": 1.800,
    "GN-FARM": 2.000,
}
LEVEL_RUN = ["BM-MILL", "P-1", "P-5", "P-4", "BM-SLUICE", "P-3", "P-2", "P-1"]


def geoid(east: float, north: float) -> float:
    """The invented undulation: 47.58 m, rising 12 mm/km eastwards, falling 18 mm/km north."""
    return round(47.580 + 0.012 * (east - 399000.0) / 1000 - 0.018 * (north - 5305000.0) / 1000, 3)


@dataclass
class Site:
    crs: Crs
    xyz: dict[str, np.ndarray]
    lat_lon: dict[str, tuple[float, float]]  # degrees, rounded as booked for control


def _site() -> Site:
    crs = crs_from_epsg(CRS_TEXT)
    xyz, lat_lon = {}, {}
    for name, (east, north, height, role) in TRUTH.items():
        lat, lon = crs.grid_to_geodetic(np.array([east]), np.array([north]))
        lat_deg, lon_deg = math.degrees(lat[0]), math.degrees(lon[0])
        if role in ("gnss", "weighted"):  # the booked values (0.00001″) are the truth
            lat_deg = _dms_value(format_dms(lat_deg, 5))
            lon_deg = _dms_value(format_dms(lon_deg, 5))
        lat_lon[name] = (lat_deg, lon_deg)
        h = height + geoid(east, north)
        xyz[name] = crs.geodetic_to_ecef(
            np.radians([lat_deg]), np.radians([lon_deg]), np.array([h])
        )[0]
    return Site(crs, xyz, lat_lon)


def _dms_value(text: str) -> float:
    sign = -1.0 if text.startswith("-") else 1.0
    d, m, s = (float(part) for part in text.lstrip("-").split(":"))
    return sign * (d + m / 60 + s / 3600)


def _points(site: Site) -> list[str]:
    lines = []
    for name, (east, north, height, role) in TRUTH.items():
        note = f' note="{NOTES[name]}"' if name in NOTES else ""
        undulation = f"geoid={geoid(east, north):.3f}m"
        lat, lon = site.lat_lon[name]
        if role == "gnss":
            lines.append(
                f"point {name} lat={format_dms(lat, 5)} lon={format_dms(lon, 5)} "
                f"height={height:.3f} {undulation} fix{note}"
            )
        elif role == "weighted":
            lines.append(
                f"point {name} lat={format_dms(lat, 5)} lon={format_dms(lon, 5)} "
                f"height={height:.3f} {undulation} sd_en=10mm sd_h=20mm{note}"
            )
        elif role == "bench":
            lines.append(f"point {name} height={height:.4f} fix{note}")
        else:
            lines.append(f"point {name} {undulation}")
    return lines


def _baselines(site: Site, rng: np.random.Generator, blunder: bool) -> tuple[list[str], list[str]]:
    """Baseline lines and the answer key's notes on them."""
    lines, key = [], []
    ell = site.crs.ellipsoid
    for frm, to in BASELINES:
        a, b = site.xyz[frm], site.xyz[to]
        length = float(np.linalg.norm(b - a))
        # a processor's formal figures: a few mm and 0.5 ppm in quadrature, Y best, Z worst
        sd = np.hypot(np.array([2.2, 1.6, 3.1]) * MM, 0.5e-6 * length)
        sd = np.round(sd * rng.uniform(0.9, 1.2, 3), 4)
        corr = np.round(np.array([-0.35, 0.52, -0.28]) + rng.uniform(-0.08, 0.08, 3), 2)
        cov, ok = frames.baseline_covariance(sd[None], corr[None])
        assert ok[0]
        lat_a, lon_a, _ = ell.from_ecef(a)
        lat_b, lon_b, _ = ell.from_ecef(b)
        cov = (
            cov[0]
            + frames.baseline_centering_covariance(
                np.atleast_1d(lat_a),
                np.atleast_1d(lon_a),
                np.atleast_1d(lat_b),
                np.atleast_1d(lon_b),
                CENTERING,
            )[0]
        )
        value = (b - a) + rng.multivariate_normal(np.zeros(3), cov)
        if blunder and (frm, to) == BLUNDER[:2]:
            value[BLUNDER[2]] += BLUNDER[3]
            key.append(
                f"`baseline {frm} {to}`: {BLUNDER[3] * 1000:+.1f} mm added to "
                f"{'XYZ'[BLUNDER[2]]} (component d{'xyz'[BLUNDER[2]]})"
            )
        sds = ",".join(f"{s / MM:.1f}mm" for s in sd)
        corrs = ",".join(f"{c:.2f}" for c in corr)
        lines.append(
            f"baseline {frm} {to} {value[0]:.4f} {value[1]:.4f} {value[2]:.4f} "
            f"sd={sds} corr={corrs}"
        )
    return lines, key


def _station(site: Site, at: str, rng: np.random.Generator) -> list[str]:
    """A direction round at ``at`` and a slope distance and zenith angle to each target."""
    ell = site.crs.ellipsoid
    targets = ROUNDS[at]
    frm = np.repeat(site.xyz[at][None], len(targets), axis=0)
    to = np.array([site.xyz[t] for t in targets])
    hi = INSTRUMENT_HEIGHTS[at]
    ht = np.array([TARGET_HEIGHTS[t] for t in targets])
    azimuth = frames.horizon_azimuth(ell, frm, to, hi).value
    distance = frames.horizon_distance(ell, frm, to)
    slope = frames.slope_distance(ell, frm, to, hi, ht).value
    zenith = frames.zenith_angle(ell, frm, to, hi, ht, K_REFRACTION).value
    orientation = rng.uniform(0, 2 * math.pi)
    direction_sd = np.sqrt(DIRECTION_SD**2 + 2 * CENTERING**2 / distance**2)
    directions = azimuth - orientation + rng.normal(0.0, direction_sd)
    slope_sd = np.sqrt(SLOPE_SD[0] ** 2 + (SLOPE_SD[1] * 1e-6 * slope) ** 2 + 2 * CENTERING**2)
    slopes = slope + rng.normal(0.0, slope_sd)
    zeniths = zenith + rng.normal(0.0, ZENITH_SD, len(targets))
    lines = [f"directions {at}"]
    lines += [
        f"  {t:<8} {format_dms(math.degrees(d % (2 * math.pi)), 1, wrap=True)}"
        for t, d in zip(targets, directions, strict=True)
    ]
    lines.append("end")
    for t, s, z, h in zip(targets, slopes, zeniths, ht, strict=True):
        lines.append(f"slope  {at} {t:<8} {s:.4f} hi={hi:.3f}m ht={h:.3f}m")
        lines.append(
            f"zenith {at} {t:<8} {format_dms(math.degrees(z), 1)} hi={hi:.3f}m ht={h:.3f}m"
        )
    return lines


def _level_run(rng: np.random.Generator) -> list[str]:
    lines = []
    for frm, to in itertools.pairwise(LEVEL_RUN):
        e1, n1, h1, _ = TRUTH[frm]
        e2, n2, h2, _ = TRUTH[to]
        km = 1.15 * math.hypot(e2 - e1, n2 - n1) / 1000  # the route winds a little
        dh = h2 - h1 + rng.normal(0.0, LEVEL_SD * math.sqrt(km))
        lines.append(f"level {frm:<9} {to:<9} {dh:+.4f} len={km:.3f}km")
    return lines


HEADER = """fieldbook 1
title "{title}"
#
# Invented demo. The water board of the (fictional) Kelvane valley wants 3D
# control around the Brannoch Water dam before its deformation survey.  Ostrand
# Survey Partners (fictional) observed it in two days of May; party chief Ines
# Marwood, instrument operator Tobias Quayle.
#
# GNSS: static sessions, baselines as the processor printed them (X, Y, Z
# differences in metres, formal standard deviations and correlations).
# Two GNSS stations are held fixed by latitude, longitude and height; a third
# is weighted control.  Total station: 1-second instrument with a 1 mm + 1.5 ppm
# distance meter on the five dam pillars, direction rounds with slope
# distances and zenith angles (instrument and prism heights booked).  Leveling:
# a digital level run from the mill benchmark over the pillars to the sluice
# benchmark and back.  The geoid undulation of each mark comes from the
# water board's site model (it slopes by about 2 cm across the site).
#
# What to look for: {look}
#

units length=m angle=dms
crs {crs}
geoid undulation=47.580m
refraction k={k}
tests alpha=0.05 snooping=0.001 power=0.80 confidence=0.95
defaults direction=1sec slope=1mm+1.5ppm zenith=1.5sec level=0.8mm/sqrtkm centering=1mm
"""


def fieldbook(blunder: bool) -> tuple[str, list[str]]:
    """The text of one demo and the answer key's lines about it."""
    rng = np.random.default_rng(SEED)
    site = _site()
    baselines, key = _baselines(site, rng, blunder)
    title = "Brannoch Water dam - 3D control from GNSS, total station and leveling" + (
        " (one bad baseline)" if blunder else ""
    )
    look = (
        "one GNSS baseline has a component 45 mm off; its baseline test and the\n# "
        "w-test of that component should point at it."
        if blunder
        else "a clean network: no blunder, every value carries only the noise\n# "
        "its standard deviation states."
    )
    out = [HEADER.format(title=title, look=look, crs=CRS_TEXT, k=K_REFRACTION).rstrip("\n")]
    out += ["", "# Control and marks (grid from the CRS; heights orthometric)"] + _points(site)
    out += ["", "# GNSS baselines (Earth-centred differences, metres)"] + baselines
    for at in ROUNDS:
        out += ["", f"# station {at}"] + _station(site, at, rng)
    out += ["", "# Leveling run"] + _level_run(rng)
    return "\n".join(out) + "\n", key


def main() -> None:
    OUT_DIR.mkdir(parents=True, exist_ok=True)
    clean, _ = fieldbook(False)
    bad, key = fieldbook(True)
    (OUT_DIR / "dam_control_3d.fieldbook").write_text(clean, encoding="utf-8")
    (OUT_DIR / "dam_control_3d_blunder.fieldbook").write_text(bad, encoding="utf-8")
    line = next(
        n
        for n, text in enumerate(bad.splitlines(), 1)
        if text.startswith(f"baseline {BLUNDER[0]} {BLUNDER[1]} ")
    )
    ANSWER_KEY.write_text(
        "# Geodetic demo field books: answer key\n\n"
        "For test writers. Written by `tools/make_geodetic_demos.py` (fixed seed).\n"
        "Both books share every value but the one below: same truth, same noise.\n\n"
        "## dam_control_3d.fieldbook\n\n- No blunder.\n\n"
        "## dam_control_3d_blunder.fieldbook\n\n"
        f"- Blunder: line {line}, " + key[0] + ".\n",
        encoding="utf-8",
    )


if __name__ == "__main__":
    main()
