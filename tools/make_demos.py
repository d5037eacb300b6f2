#!/usr/bin/env python3
"""Generate the invented demo field books in ``demo_projects/``.

Every demo is simulated: true coordinates and heights are made up, exact
observations are computed from them, normal noise with the a priori standard
deviations stated in the file (centering included, by the formulas of the
field-book contract) is added, the named blunders are injected, and the values
are written with surveyor's rounding (0.1 mm for heights and distances,
0.1 arc-second for angles).  All places, firms and people are fictional.

The random seeds are fixed, so running the script again rewrites the same
files byte for byte::

    python tools/make_demos.py            # write demo_projects/*.fieldbook and tools/DEMOS.md
    python tools/make_demos.py --check    # also run an independent small adjustment of each
                                          # demo (needs numpy) and print the global test and
                                          # the largest w-statistics

Only the standard library is needed to write the field books; the check values
in tools/DEMOS.md are added when numpy is available.
"""

from __future__ import annotations

import argparse
import itertools
import math
import random
import statistics
import sys
from collections import defaultdict
from dataclasses import dataclass, field
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
OUT_DIR = ROOT / "demo_projects"
ANSWER_KEY = Path(__file__).resolve().parent / "DEMOS.md"

FOOT = 0.3048  # international foot, metres
RHO = 180.0 * 3600.0 / math.pi  # arc-seconds per radian
MM = 1e-3

# One fixed seed per demo.  They were chosen once so that each clean demo is an
# ordinary realisation (variance factor near 1) and the blunder demos show
# their blunder as the largest w-statistic; see tools/DEMOS.md.
SEEDS = {
    "leveling_clean": 1207,
    "leveling_blunder": 2311,
    "control_network": 3447,
    "closed_traverse": 4533,
    "network_direction_blunder": 5602,
}


# --------------------------------------------------------------------------------------
# geometry and formatting


def azimuth(p: tuple[float, float], q: tuple[float, float]) -> float:
    """Grid azimuth p -> q in radians, clockwise from north, in [0, 2pi)."""
    return math.atan2(q[0] - p[0], q[1] - p[1]) % (2.0 * math.pi)


def dist(p: tuple[float, float], q: tuple[float, float]) -> float:
    return math.hypot(q[0] - p[0], q[1] - p[1])


def fmt_dms(angle_rad: float) -> tuple[str, float]:
    """Angle reduced to [0, 360) as D:MM:SS.s, and the rounded value in radians."""
    tenths = round(math.degrees(angle_rad % (2.0 * math.pi)) * 36000.0) % (360 * 36000)
    degrees, rest = divmod(tenths, 36000)
    minutes, rest = divmod(rest, 600)
    seconds, tenth = divmod(rest, 10)
    text = f"{degrees}:{minutes:02d}:{seconds:02d}.{tenth}"
    return text, math.radians(tenths / 36000.0)


def fmt_len(metres: float, unit: str) -> tuple[str, float]:
    """A length in the file unit to 4 decimals (0.1 mm in metres, 0.03 mm in feet)."""
    factor = FOOT if unit == "ft" else 1.0
    value = round(metres / factor, 4)
    return f"{value:.4f}", value * factor


def fmt_dh(metres: float) -> tuple[str, float]:
    value = round(metres, 4)
    if value == 0.0:
        value = 0.0
    return f"{value:+.4f}", value


def quote(text: str) -> str:
    return '"' + text.replace('"', '\\"') + '"'


# --------------------------------------------------------------------------------------
# a field book being written


@dataclass
class Obs:
    """One written observation, kept for the answer key and the check adjustment."""

    kind: str  # level, distance, angle, direction, azimuth
    points: tuple[
        str, ...
    ]  # level/distance/azimuth: (from, to); angle: (back, at, fore); direction: (at, to)
    value: float  # as written, SI (metres / radians)
    sigma: float  # simulated a priori standard deviation, SI
    line: int
    round_id: int | None = None
    ignore: bool = False
    blunder: float = 0.0  # injected gross error, SI
    length_km: float | None = None


@dataclass
class Point:
    name: str
    east: float | None = None  # true values, metres
    north: float | None = None
    height: float | None = None
    fixed: str = ""  # "", "en", "h"
    weighted_sd: float | None = None
    given_height: float | None = None  # written value for weighted control


@dataclass
class Book:
    name: str
    title: str
    story: list[str]
    unit: str = "m"
    lines: list[str] = field(default_factory=list)
    obs: list[Obs] = field(default_factory=list)
    points: dict[str, Point] = field(default_factory=dict)
    centering: float = 0.0
    n_rounds: int = 0
    notes_for_key: list[str] = field(default_factory=list)

    def add(self, text: str = "") -> int:
        self.lines.append(text.rstrip())
        return len(self.lines)

    def comment(self, text: str = "") -> int:
        return self.add("#" + (" " + text if text else ""))

    def header(self, *statements: str) -> None:
        self.add("fieldbook 1")
        self.add(f"title {quote(self.title)}")
        self.comment()
        for text in self.story:
            self.comment(text)
        self.comment()
        self.add()
        for statement in statements:
            self.add(statement)
        self.add()

    def text(self) -> str:
        return "\n".join(self.lines) + "\n"


def with_options(text: str, options: list[str]) -> str:
    return " ".join([text, *[o for o in options if o]])


# --------------------------------------------------------------------------------------
# leveling


@dataclass
class Section:
    a: str
    b: str
    length_km: float
    setups: int | None = None
    note: str = ""
    blunder: float = 0.0


def build_sections(
    rng: random.Random, runs, short_names=("TP-", "CP-")
) -> list[tuple[str, list[Section]]]:
    """Turn runs of mark names into sections with random lengths and some setup counts."""
    groups = []
    for heading, names, opts in runs:
        sections = []
        for a, b in itertools.pairwise(names):
            short = a.startswith(short_names) or b.startswith(short_names)
            length = rng.uniform(0.12, 0.45) if short else rng.uniform(0.25, 1.35)
            length = round(min(max(length, 0.10), 1.50), 3)
            setups = None
            if rng.random() < opts.get("setups_rate", 0.3):
                sight = rng.uniform(28.0, 45.0)
                setups = max(2, 2 * math.ceil(length * 1000.0 / (2.0 * sight) / 2.0))
            sections.append(Section(a, b, length, setups))
        groups.append((heading, sections))
    return groups


def assign_heights(
    rng: random.Random, groups, start: str, start_height: float, grade: float
) -> dict[str, float]:
    """True heights by a random walk along the runs (hilly town: about `grade` m per km)."""
    heights = {start: start_height}
    pending = [s for _, sections in groups for s in sections]
    while pending:
        progress = False
        for s in list(pending):
            if s.a in heights and s.b not in heights:
                heights[s.b] = heights[s.a] + rng.gauss(0.0, grade) * s.length_km
            elif s.b in heights and s.a not in heights:
                heights[s.a] = heights[s.b] - rng.gauss(0.0, grade) * s.length_km
            elif s.a not in heights:
                continue
            pending.remove(s)
            progress = True
        if not progress:
            raise RuntimeError("leveling runs are not connected")
    return {k: round(v, 4) for k, v in heights.items()}


def write_level(
    book: Book, rng: random.Random, s: Section, heights, sigma_fn, note: str = ""
) -> Obs:
    sigma = sigma_fn(s.length_km, s.setups)
    true_dh = heights[s.b] - heights[s.a]
    text, value = fmt_dh(true_dh + rng.gauss(0.0, sigma) + s.blunder)
    options = [f"len={s.length_km:.3f}km"]
    if s.setups:
        options.append(f"setups={s.setups}")
    note = note or s.note
    if note:
        options.append(f"note={quote(note)}")
    line = book.add(with_options(f"level {s.a:<12} {s.b:<12} {text:>9}", options))
    ob = Obs("level", (s.a, s.b), value, sigma, line, blunder=s.blunder, length_km=s.length_km)
    book.obs.append(ob)
    return ob


def leveling_clean() -> Book:
    rng = random.Random(SEEDS["leveling_clean"])
    book = Book(
        "leveling_clean",
        "Millbeck Hollow - storm sewer benchmarks, spring leveling",
        [
            "Invented demo. Millbeck Hollow is a fictional hill town; the town engineer",
            "asked Cobblestone & Vane Surveying (also fictional) to put in temporary",
            "benchmarks for a storm-sewer renewal and to tie them to the town datum.",
            "Party chief Ingrid Thorsdottir, level operator Amos Pelletier.",
            "",
            "Instrument: digital level with invar bar-code staffs, balanced sights of",
            "30-45 m, each section a closed set of setups between marks.",
            "Datum: BM-ORCHARD and BM-MILLRACE are held fixed (town datum); BM-CHAPEL",
            "is an older mark whose published height is good to about 2 mm, so it",
            "enters as weighted control.",
            "",
            "What to look for: several closed loops, runs between the benchmarks and a",
            "few double-run sections (forward and return).  The field work is clean:",
            "the adjustment should pass the global test and no section should be",
            "flagged; loop misclosures stay well inside 3 mm/sqrt(km).",
        ],
    )
    runs = [
        (
            "Line A - main run along High Street, Orchard to Millrace",
            [
                "BM-ORCHARD",
                "TBM-01",
                "TBM-02",
                "TP-1",
                "TBM-03",
                "TBM-04",
                "TBM-05",
                "TP-2",
                "TBM-06",
                "BM-MILLRACE",
            ],
            {},
        ),
        (
            "Line B - north loop by Chapel Lane",
            ["TBM-02", "TBM-07", "TBM-08", "TP-3", "TBM-09", "TBM-10", "TBM-04"],
            {},
        ),
        (
            "Line C - Chapel spur, tie to the old benchmark",
            ["TBM-08", "TBM-11", "TBM-12", "BM-CHAPEL", "TBM-13", "TBM-10"],
            {},
        ),
        (
            "Line D - south loop along the mill race",
            ["TBM-05", "TBM-14", "TBM-15", "TP-4", "TBM-16", "TBM-17", "BM-MILLRACE"],
            {},
        ),
        ("Line E - cross-link over the footbridge", ["TBM-15", "TBM-18", "TBM-19", "TBM-06"], {}),
        (
            "Line F - west loop through the Orchard Rise estate",
            ["BM-ORCHARD", "TBM-20", "TBM-21", "TP-5", "TBM-22", "TBM-23", "TBM-07"],
            {},
        ),
        ("Line G - tie across the estate", ["TBM-21", "TBM-24", "TBM-25", "TBM-01"], {}),
        (
            "Line H - east loop behind the mill",
            ["BM-MILLRACE", "TBM-26", "TBM-27", "TBM-28", "TBM-29", "TBM-06"],
            {},
        ),
        ("Line I - school spur, closed on Line B", ["TBM-11", "TBM-30", "TBM-31", "TBM-09"], {}),
    ]
    groups = build_sections(rng, runs)
    heights = assign_heights(rng, groups, "BM-ORCHARD", 47.3125, 5.0)
    k = 1.0 * MM

    def sigma_fn(length_km, setups):
        return k * math.sqrt(length_km)

    given_chapel = round(heights["BM-CHAPEL"] + rng.gauss(0.0, 2.0 * MM), 4)
    for name, h in heights.items():
        book.points[name] = Point(name, height=h)
    book.points["BM-ORCHARD"].fixed = "h"
    book.points["BM-MILLRACE"].fixed = "h"
    chapel = book.points["BM-CHAPEL"]
    chapel.weighted_sd, chapel.given_height = 2.0 * MM, given_chapel

    book.header(
        "units length=m angle=dms",
        "tolerance misclosure=3mm/sqrtkm",
        "defaults level=1.0mm/sqrtkm",
    )
    book.comment("Benchmarks (town datum)")
    book.add(
        f"point BM-ORCHARD  height={heights['BM-ORCHARD']:.4f} fix  "
        'note="bolt in the orchard wall, Mill Road"'
    )
    book.add(
        f"point BM-MILLRACE height={heights['BM-MILLRACE']:.4f} fix  "
        'note="cut mark on the sluice abutment"'
    )
    book.add(
        f"point BM-CHAPEL   height={given_chapel:.4f} sd=2mm "
        'note="old flush bracket, chapel tower; published 1962"'
    )
    book.add()
    book.comment("New marks with descriptions (no heights: the adjustment finds them)")
    book.add('point TBM-07 note="brass disc, north kerb of Chapel Lane opposite no. 14"')
    book.add('point TBM-13 note="nail and washer in the chapel car park"')
    book.add('point TBM-19 note="rivet on the footbridge, upstream parapet"')
    book.add(
        f"point TBM-20 height={round(heights['TBM-20'] + 0.04, 1):.1f} "
        'note="approximate only, scaled from the estate plan"'
    )
    book.add()

    day = 11
    returns = {
        "Line A - main run along High Street, Orchard to Millrace": [
            (2, "return run, same day"),
            (-1, "return run next morning"),
        ],
        "Line C - Chapel spur, tie to the old benchmark": [
            (-3, "return run onto the old benchmark")
        ],
        "Line D - south loop along the mill race": [(1, "return run")],
    }
    for heading, sections in groups:
        book.comment(f"{heading}  (April {day})")
        for s in sections:
            write_level(book, rng, s, heights, sigma_fn)
        for index, note in returns.get(heading, []):
            chosen = sections[:index] if index > 0 else sections[index:]
            book.comment(f"  {note}")
            for s in reversed(chosen):
                back = Section(s.b, s.a, s.length_km, s.setups)
                write_level(book, rng, back, heights, sigma_fn, note="return")
        book.add()
        day += 1 if rng.random() < 0.7 else 2
    book.notes_for_key.append(
        "No blunder.  BM-CHAPEL is weighted control (sd=2mm); "
        f"its true height is {heights['BM-CHAPEL']:.4f} m, written "
        f"{given_chapel:.4f} m."
    )
    return book


def leveling_blunder() -> Book:
    rng = random.Random(SEEDS["leveling_blunder"])
    book = Book(
        "leveling_blunder",
        "Kestrel Ridge - relevelling for the Fallowmere trunk water main",
        [
            "Invented demo. The (fictional) Fallowmere Water Board is laying a new trunk",
            "main through the Kestrel Ridge district and needs the street benchmarks",
            "re-levelled before the trench work starts.  Work by the board's own crew:",
            "Tomasz Brandvold (observer) and Nell Okafor (staff), over four days.",
            "",
            "Instrument: compensator level and a two-sided 3 m staff, both faces read",
            "and meaned, sights kept under 40 m.  The streets form a grid of blocks, so",
            "every street between two junctions closes at least one loop.",
            "Datum: BM-TANNERY and BM-KESTREL are held fixed.",
            "",
            "What to look for: the loops do not all close within the allowance.",
            "Something in the field book is wrong; use the adjustment's tests to find",
            "which section it is and how large the error is.",
        ],
    )
    # junction grid: 3 rows (north to south) by 4 columns (west to east)
    rows, cols = 3, 4
    junction = {}
    number = 101
    for r in range(rows):
        for c in range(cols):
            junction[r, c] = f"KR-{number}"
            number += 1
    junction[0, 0] = "BM-TANNERY"
    junction[2, 3] = "BM-KESTREL"
    blunder_edge = ((1, 1), (1, 2))
    mid_counter = [201]
    cp_counter = [1]
    # junction positions (km) on a slightly irregular street grid; heights from a smooth terrain
    pos = {}
    for r in range(rows):
        for c in range(cols):
            pos[junction[r, c]] = (
                c * 0.85 + rng.uniform(-0.12, 0.12),
                -r * 0.75 + rng.uniform(-0.1, 0.1),
            )

    def terrain(x, y):
        return (
            81.0
            + 5.0 * math.sin(1.3 * x + 0.4)
            + 3.5 * math.cos(1.7 * y + 0.3)
            + 1.5 * math.sin(2.9 * (x - y))
        )

    streets: dict[tuple, list[Section]] = {}

    def street(a, b):
        """Sections along one street between junctions a and b (0-2 intermediate marks)."""
        n = 0 if (a, b) == blunder_edge else rng.choice([0, 1, 1, 1, 2, 2])
        (xa, ya), (xb, yb) = pos[junction[a]], pos[junction[b]]
        names = [junction[a]]
        for i in range(n):
            if rng.random() < 0.3:
                name = f"CP-{cp_counter[0]}"
                cp_counter[0] += 1
            else:
                name = f"KR-{mid_counter[0]}"
                mid_counter[0] += 1
            t = (i + 1) / (n + 1) + rng.uniform(-0.08, 0.08)
            pos[name] = (
                xa + t * (xb - xa) + rng.uniform(-0.03, 0.03),
                ya + t * (yb - ya) + rng.uniform(-0.03, 0.03),
            )
            names.append(name)
        names.append(junction[b])
        sections = [
            Section(p, q, round(dist(pos[p], pos[q]) * rng.uniform(1.03, 1.15), 3))
            for p, q in itertools.pairwise(names)
        ]
        streets[a, b] = sections
        return sections

    east_west = ["Tannery Row", "Glebe Street", "Weir Road"]
    north_south = ["Ridge Lane", "Copper Street", "Pinfold Way", "Kestrel Hill"]
    groups = []
    for r in range(rows):
        sections = [s for c in range(cols - 1) for s in street((r, c), (r, c + 1))]
        groups.append((f"{east_west[r]}, west to east", sections))
    for c in range(cols):
        sections = [s for r in range(rows - 1) for s in street((r, c), (r + 1, c))]
        groups.append((f"{north_south[c]}, north to south", sections))
    # the street with the blunder: a single section between two junctions, two loops share it
    blunder_section = streets[blunder_edge][0]
    blunder_section.blunder = +10.0 * MM  # a staff reading 1 cm wrong somewhere in this section
    heights = {name: round(terrain(*xy), 4) for name, xy in pos.items()}
    for name, h in heights.items():
        book.points[name] = Point(name, height=h)
    book.points["BM-TANNERY"].fixed = "h"
    book.points["BM-KESTREL"].fixed = "h"

    c0, k = 0.3 * MM, 1.2 * MM

    def sigma_fn(length_km, setups):
        return math.sqrt(c0**2 + k**2 * length_km)

    book.header(
        "units length=m",
        "tests alpha=0.05 snooping=0.001 power=0.80",
        "tolerance misclosure=5mm/sqrtkm",
        "defaults level=0.3mm+1.2mm/sqrtkm",
    )
    book.add(
        f"point BM-TANNERY height={heights['BM-TANNERY']:.4f} fix "
        'note="board datum mark, tannery gatepost"'
    )
    book.add(
        f'point BM-KESTREL height={heights["BM-KESTREL"]:.4f} fix note="pillar on Kestrel Hill"'
    )
    book.add()
    days = ["May 6", "May 6", "May 7", "May 7", "May 8", "May 8", "May 9"]
    blunder_obs = None
    written: dict[int, Obs] = {}
    for (heading, sections), day in zip(groups, days):
        book.comment(f"{heading}  ({day})")
        for s in sections:
            ob = written[id(s)] = write_level(book, rng, s, heights, sigma_fn)
            if s.blunder:
                blunder_obs = ob
        if heading.startswith(("Pinfold", "Ridge")):
            book.comment("  check: first two sections run back")
            for s in reversed(sections[:2]):
                write_level(
                    book, rng, Section(s.b, s.a, s.length_km), heights, sigma_fn, note="return"
                )
        book.add()
    assert blunder_obs is not None
    # misclosure of every block (forward runs only), for the answer key
    for r in range(rows - 1):
        for c in range(cols - 1):
            top, right = streets[(r, c), (r, c + 1)], streets[(r, c + 1), (r + 1, c + 1)]
            bottom, left = streets[(r + 1, c), (r + 1, c + 1)], streets[(r, c), (r + 1, c)]
            closure = sum(written[id(s)].value for s in top + right) - sum(
                written[id(s)].value for s in bottom + left
            )
            length = sum(s.length_km for s in top + right + bottom + left)
            allowance = 5.0 * math.sqrt(length)
            corners = " - ".join(
                junction[k] for k in ((r, c), (r, c + 1), (r + 1, c + 1), (r + 1, c))
            )
            has = (
                " (contains the blunder)" if blunder_section in top + right + bottom + left else ""
            )
            book.notes_for_key.append(
                f"Block loop {corners}: misclosure {closure * 1000:+.1f} mm over {length:.3f} km, "
                f"allowance {allowance:.1f} mm{has}."
            )
    book.notes_for_key.insert(
        0,
        f"Blunder: line {blunder_obs.line}, "
        f"`level {blunder_obs.points[0]} {blunder_obs.points[1]}` "
        f"(len={blunder_obs.length_km:.3f}km) has +10.0 mm added to it: a staff read one "
        f"centimetre wrong.  True height difference "
        f"{heights[blunder_obs.points[1]] - heights[blunder_obs.points[0]]:+.4f} m, "
        f"written {blunder_obs.value:+.4f} m (noise included).",
    )
    book.notes_for_key.insert(
        1,
        "The section runs directly between two street junctions and is shared by two loops, "
        "so it is the only section on that path: its w-statistic is not tied to any other. "
        "(Sections in series between the same two junctions always share one |w|.)",
    )
    return book


# --------------------------------------------------------------------------------------
# horizontal networks


class HorizontalSim:
    """Simulates distances, angles, directions and azimuths with the contract's variances."""

    def __init__(
        self,
        book: Book,
        rng: random.Random,
        coords: dict[str, tuple[float, float]],
        distance_sd=(2.0 * MM, 2.0),
        angle_sd=2.0,
        direction_sd=1.5,
        azimuth_sd=2.0,
        centering=1.0 * MM,
    ):
        self.book, self.rng, self.xy = book, rng, coords
        self.distance_sd, self.angle_sd = distance_sd, angle_sd
        self.direction_sd, self.azimuth_sd = direction_sd, azimuth_sd
        self.c = centering
        book.centering = centering
        self.measured: set[frozenset[str]] = set()

    def sigma_distance(self, d):
        a, ppm = self.distance_sd
        return math.sqrt(a**2 + (ppm * 1e-6 * d) ** 2 + 2 * self.c**2)

    def sigma_direction(self, d, sd_sec=None):
        s = (sd_sec or self.direction_sd) / RHO
        return math.sqrt(s**2 + 2 * self.c**2 / d**2)

    def sigma_angle(self, back, at, fore, sd_sec=None):
        s = (sd_sec or self.angle_sd) / RHO
        d1, d2 = dist(self.xy[at], self.xy[back]), dist(self.xy[at], self.xy[fore])
        d3 = dist(self.xy[back], self.xy[fore])
        c2 = self.c**2
        return math.sqrt(s**2 + c2 * d3**2 / (d1**2 * d2**2) + c2 * (1 / d1**2 + 1 / d2**2))

    def distance(self, a, b, note="", ignore_error=0.0):
        d = dist(self.xy[a], self.xy[b])
        sigma = self.sigma_distance(d)
        text, value = fmt_len(d + self.rng.gauss(0.0, sigma) + ignore_error, self.book.unit)
        options = []
        if note:
            options.append(f"note={quote(note)}")
        if ignore_error:
            options.append("ignore")
        line = self.book.add(with_options(f"distance {a:<12} {b:<12} {text:>10}", options))
        self.book.obs.append(Obs("distance", (a, b), value, sigma, line, ignore=bool(ignore_error)))
        self.measured.add(frozenset((a, b)))

    def angle(self, back, at, fore, note=""):
        true = azimuth(self.xy[at], self.xy[fore]) - azimuth(self.xy[at], self.xy[back])
        sigma = self.sigma_angle(back, at, fore)
        text, value = fmt_dms(true + self.rng.gauss(0.0, sigma))
        options = [f"note={quote(note)}"] if note else []
        line = self.book.add(
            with_options(f"angle {back:<12} {at:<12} {fore:<12} {text:>13}", options)
        )
        self.book.obs.append(Obs("angle", (back, at, fore), value, sigma, line))

    def azimuth(self, a, b, note=""):
        sigma = self.azimuth_sd / RHO
        text, value = fmt_dms(azimuth(self.xy[a], self.xy[b]) + self.rng.gauss(0.0, sigma))
        options = [f"note={quote(note)}"] if note else []
        line = self.book.add(with_options(f"azimuth {a:<12} {b:<12} {text:>13}", options))
        self.book.obs.append(Obs("azimuth", (a, b), value, sigma, line))

    def round(self, at, targets, sd_sec=None, note="", blunders=None):
        """A round at `at`; targets[0] is the backsight the circle is set near zero on."""
        blunders = blunders or {}
        self.book.n_rounds += 1
        rid = self.book.n_rounds
        orientation = azimuth(self.xy[at], self.xy[targets[0]]) - self.rng.uniform(3.0, 95.0) / RHO
        rows = []
        for t in targets:
            reading = (azimuth(self.xy[at], self.xy[t]) - orientation) % (2 * math.pi)
            rows.append((reading, t))
        rows.sort()
        options = []
        if sd_sec:
            options.append(f"sd={sd_sec:g}sec")
        if note:
            options.append(f"note={quote(note)}")
        self.book.add(with_options(f"directions {at}", options))
        for reading, t in rows:
            sigma = self.sigma_direction(dist(self.xy[at], self.xy[t]), sd_sec)
            blunder = blunders.get(t, 0.0)
            text, value = fmt_dms(reading + self.rng.gauss(0.0, sigma) + blunder)
            line = self.book.add(f"  {t:<12} {text:>13}")
            self.book.obs.append(
                Obs("direction", (at, t), value, sigma, line, round_id=rid, blunder=blunder)
            )
        self.book.add("end")


def jittered_grid(rng, cols, rows, spacing, jitter, origin, drop=()):
    pts = {}
    for j in range(rows):
        for i in range(cols):
            if (i, j) in drop:
                continue
            e = (
                origin[0]
                + i * spacing
                + rng.uniform(-jitter, jitter)
                + (spacing * 0.35 if j % 2 else 0.0)
            )
            n = origin[1] + j * spacing * 0.9 + rng.uniform(-jitter, jitter)
            pts[i, j] = (e, n)
    return pts


def plan_network(rng, xy, roots, max_children=4, dmin=150.0, dmax=900.0):
    """Breadth-first traverse-like plan from two intervisible control points."""
    names = list(xy)
    nbrs = {
        p: sorted(
            (q for q in names if q != p and dmin <= dist(xy[p], xy[q]) <= dmax),
            key=lambda q: dist(xy[p], xy[q]),
        )
        for p in names
    }
    parent: dict[str, str] = {}
    children: dict[str, list[str]] = defaultdict(list)
    order = list(roots)
    seen = set(roots)
    queue = list(roots)
    while queue:
        s = queue.pop(0)
        for t in nbrs[s]:
            if t in seen or len(children[s]) >= max_children:
                continue
            parent[t] = s
            children[s].append(t)
            seen.add(t)
            queue.append(t)
            order.append(t)
    missing = set(names) - seen
    if missing:
        raise RuntimeError(f"not reachable: {sorted(missing)}")
    return order, parent, children, nbrs


def reachable_by_polar_ties(book: Book) -> list[str]:
    """Points the contract's polar ties reach from the fixed points (iterated); returns the rest."""
    known = {n for n, p in book.points.items() if p.fixed == "en"}
    all_points = set()
    for ob in book.obs:
        all_points.update(ob.points)
    dists = {frozenset(ob.points) for ob in book.obs if ob.kind == "distance" and not ob.ignore}
    rounds: dict[int, list[Obs]] = defaultdict(list)
    for ob in book.obs:
        if ob.kind == "direction":
            rounds[ob.round_id].append(ob)
    changed = True
    while changed:
        changed = False
        new = set()
        for members in rounds.values():
            at = members[0].points[0]
            if at in known and any(m.points[1] in known for m in members):
                new.update(m.points[1] for m in members if frozenset((at, m.points[1])) in dists)
        for ob in book.obs:
            if ob.kind == "angle":
                back, at, fore = ob.points
                if at in known and back in known and frozenset((at, fore)) in dists:
                    new.add(fore)
                if at in known and fore in known and frozenset((at, back)) in dists:
                    new.add(back)
            if ob.kind == "azimuth":
                a, b = ob.points
                if a in known and frozenset((a, b)) in dists:
                    new.add(b)
        if new - known:
            known |= new
            changed = True
    return sorted(all_points - known)


def write_network(
    book: Book,
    rng: random.Random,
    sim: HorizontalSim,
    order,
    parent,
    children,
    nbrs,
    roots,
    unoccupied=(),
    angle_stations=(),
    extra_distance_rate=0.5,
    round_notes=None,
    blunders=None,
    single_set=None,
    ignored_distance=None,
    azimuth_edge=None,
):
    round_notes = round_notes or {}
    blunders = blunders or {}
    # a point that is only observed to gets a second observer, so that it is checked
    forced: dict[str, list[str]] = defaultdict(list)
    for u in unoccupied:
        second = next(
            q for q in nbrs[u] if q != parent[u] and q not in unoccupied and q not in angle_stations
        )
        forced[second].append(u)
    for s in order:
        if s in unoccupied:
            continue
        targets = []
        back = parent.get(s) or next(r for r in roots if r != s)
        targets.append(back)
        targets += [c for c in children[s] + forced[s] if c not in targets]
        size = max(len(targets), rng.randint(3, 6))
        for q in nbrs[s]:
            if len(targets) >= min(size, 6):
                break
            if q not in targets:
                targets.append(q)
        book.comment(f"station {s}" + (f", backsight {back}" if s in angle_stations else ""))
        if len(targets) < 3:
            print(f"warning: {book.name}: only {len(targets)} targets at {s}", file=sys.stderr)
        if s in angle_stations:
            ref = azimuth(sim.xy[s], sim.xy[back])
            for t in sorted(
                targets[1:], key=lambda t: (azimuth(sim.xy[s], sim.xy[t]) - ref) % (2 * math.pi)
            ):
                sim.angle(back, s, t)
        else:
            sim.round(
                s,
                targets,
                sd_sec=(single_set or {}).get(s),
                note=round_notes.get(s, ""),
                blunders=blunders.get(s),
            )
        for t in targets:
            tree_edge = parent.get(t) == s or parent.get(s) == t
            pair = frozenset((s, t))
            if ignored_distance and (s, t) == ignored_distance[:2]:
                sim.distance(s, t, note=ignored_distance[2], ignore_error=ignored_distance[3])
                sim.distance(s, t, note="remeasured with the right prism constant")
                continue
            if pair in sim.measured:
                if rng.random() < 0.2:
                    sim.distance(s, t, note="measured from the other end too")
                continue
            if tree_edge or rng.random() < extra_distance_rate:
                sim.distance(s, t)
        if azimuth_edge and s == azimuth_edge[0]:
            sim.azimuth(*azimuth_edge)
        book.add()


def control_network() -> Book:
    rng = random.Random(SEEDS["control_network"])
    book = Book(
        "control_network",
        "Lantern Fields subdivision - densification of the Brackenmoor county control",
        [
            "Invented demo. Brackenmoor County (fictional) wants new control for the",
            "Lantern Fields subdivision before the roads are staked.  Hollin & Marsh",
            "Geomatics (fictional) observed the network in one week of October;",
            "party chief Priya Valcourt, instrument operator Josef Amundsen.",
            "",
            "Instrument: 1-second total station with a 2 mm + 2 ppm distance meter,",
            "tribrachs on tripods and optical plummets (about 1 mm centering).",
            "Most stations were observed as direction rounds (circle set near zero on",
            "the backsight, face left and right meaned); three stations were booked as",
            "angles from the backsight instead.  One azimuth comes from a sun",
            "observation already reduced to grid.",
            "Control: county points HARROW, LINDEN and WEIR are held fixed.  No other",
            "point has coordinates: the program computes the approximate ones itself.",
            "",
            "What to look for: a clean network of about 500 m sides; it should pass the",
            "global test.  One distance was booked with the wrong prism constant and is",
            "kept in the book with the flag `ignore`, as a crew would leave it.",
        ],
    )
    grid = jittered_grid(
        rng, 6, 5, 520.0, 90.0, (510650.0, 182700.0), drop={(0, 0), (5, 0), (0, 4), (3, 2)}
    )
    keys = sorted(grid, key=lambda k: (k[1], k[0]))
    names = {}
    label = 101
    for k in keys:
        names[k] = f"LF-{label}"
        label += 1
    names[(2, 0)] = "HARROW"
    names[(3, 0)] = "LINDEN"
    names[(4, 4)] = "WEIR"
    xy = {}
    for k, (e, n) in grid.items():
        xy[names[k]] = (e, n)
    fixed = ["HARROW", "LINDEN", "WEIR"]
    for f in fixed:
        xy[f] = tuple(round(v, 3) for v in xy[f])
    for name, (e, n) in xy.items():
        book.points[name] = Point(name, e, n, fixed="en" if name in fixed else "")
    roots = ["HARROW", "LINDEN"]
    order, parent, children, nbrs = plan_network(rng, xy, roots)
    leaves = [p for p in order if not children[p] and p not in fixed]
    unoccupied = leaves[-2:]
    candidates = [p for p in order[4:] if p not in fixed and p not in unoccupied]
    angle_stations = [candidates[i] for i in (3, 9, 15)]
    azimuth_edge = (parent[order[-6]], order[-6])  # observed from a station late in the plan

    sim = HorizontalSim(
        book,
        rng,
        xy,
        distance_sd=(2.0 * MM, 2.0),
        angle_sd=2.0,
        direction_sd=1.5,
        azimuth_sd=3.0,
        centering=1.0 * MM,
    )
    book.header(
        "units length=m angle=dms",
        "tests alpha=0.05 snooping=0.001 power=0.80 confidence=0.95",
        "tolerance relative=2cm+50ppm",
        "defaults direction=1.5sec angle=2sec distance=2mm+2ppm azimuth=3sec centering=1mm",
    )
    book.comment("County control (grid coordinates, metres)")
    for f, note in zip(
        fixed,
        [
            "brass cap in concrete, Harrow Lane",
            "pillar at the Linden water tower",
            "disc on the Weir Road culvert headwall",
        ],
    ):
        e, n = xy[f]
        book.add(f"point {f:<7} east={e:.3f} north={n:.3f} fix note={quote(note)}")
    book.add()
    round_stations = [p for p in order if p not in angle_stations and p not in unoccupied]
    windy, single = round_stations[5], round_stations[8]
    ignored = None
    for s in order[3:]:
        if (
            parent.get(s)
            and parent[s] not in unoccupied
            and s not in unoccupied
            and parent[s] not in angle_stations
        ):
            ignored = (parent[s], s, "prism constant -30 mm not set", 0.0300)
            break
    write_network(
        book,
        rng,
        sim,
        order,
        parent,
        children,
        nbrs,
        roots,
        unoccupied=unoccupied,
        angle_stations=angle_stations,
        round_notes={windy: "strong wind, two sets", single: "single set, failing light"},
        single_set={single: 2.5},
        ignored_distance=ignored,
        azimuth_edge=azimuth_edge,
    )
    book.notes_for_key.append("No blunder.")
    book.notes_for_key.append(
        f"The distance {ignored[0]}-{ignored[1]} appears twice: once with +30.0 mm (prism constant "
        f"not set) and the flag `ignore`, once remeasured correctly.  "
        f"The ignored one must stay out "
        f"of the adjustment."
    )
    book.notes_for_key.append(
        f"Stations booked as angles instead of rounds: {', '.join(angle_stations)}.  "
        f"Not occupied (only observed to): {', '.join(unoccupied)}.  "
        f"Round at {single} carries sd=2.5sec (single set, on the `directions` line).  "
        f"Azimuth {azimuth_edge[0]} -> {azimuth_edge[1]} with sd from defaults (3sec)."
    )
    return book


def network_direction_blunder(blunder_direction=None, blunder_seconds=None) -> Book:
    blunder_direction = blunder_direction or BLUNDER_DIRECTION
    blunder_seconds = BLUNDER_SECONDS if blunder_seconds is None else blunder_seconds
    rng = random.Random(SEEDS["network_direction_blunder"])
    book = Book(
        "network_direction_blunder",
        "Port Elowen - harbour wall control, resurvey",
        [
            "Invented demo. The (fictional) Port Elowen harbour authority resurveys the",
            "control network around its breakwater and quays every five years.",
            "This campaign: Saltings Survey Co-operative (fictional), observers Dara",
            "Quill and Benedikt Ferreira, three days in March.",
            "",
            "Instrument: 1-second total station, 2 mm + 2 ppm distances, 1 mm",
            "centering.  Every occupied station was observed as one direction round",
            "(face left and right), distances to most targets.",
            "Control: PE-LIGHT, PE-SLIP and PE-CRANE are held fixed; the other points",
            "have no coordinates in the book.",
            "",
            "What to look for: the variance factor comes out too large.  One booked",
            "value is wrong; find it with the adjustment's tests.",
        ],
    )
    grid = jittered_grid(rng, 5, 4, 470.0, 80.0, (498200.0, 171400.0), drop={(4, 3)})
    keys = sorted(grid, key=lambda k: (k[0], k[1]))
    names = {}
    label = 1
    for k in keys:
        names[k] = f"Q{label:02d}"
        label += 1
    names[(1, 0)] = "PE-LIGHT"
    names[(2, 0)] = "PE-SLIP"
    names[(3, 3)] = "PE-CRANE"
    xy = {names[k]: v for k, v in grid.items()}
    fixed = ["PE-LIGHT", "PE-SLIP", "PE-CRANE"]
    for f in fixed:
        xy[f] = tuple(round(v, 3) for v in xy[f])
    for name, (e, n) in xy.items():
        book.points[name] = Point(name, e, n, fixed="en" if name in fixed else "")
    roots = ["PE-LIGHT", "PE-SLIP"]
    order, parent, children, nbrs = plan_network(rng, xy, roots, max_children=3)
    sim = HorizontalSim(
        book, rng, xy, distance_sd=(2.0 * MM, 2.0), direction_sd=1.0, centering=1.0 * MM
    )
    book.header(
        "units length=m angle=dms",
        "defaults direction=1sec distance=2mm+2ppm centering=1mm",
    )
    for f in fixed:
        e, n = xy[f]
        book.add(f"point {f:<8} east={e:.3f} north={n:.3f} fix")
    book.add()
    blunder_at, blunder_to = blunder_direction
    blunder = {blunder_at: {blunder_to: blunder_seconds / RHO}}
    write_network(
        book,
        rng,
        sim,
        order,
        parent,
        children,
        nbrs,
        roots,
        extra_distance_rate=0.65,
        blunders=blunder,
    )
    if not blunder_seconds:
        return book
    ob = next(o for o in book.obs if o.blunder)
    book.notes_for_key.append(
        f"Blunder: line {ob.line}, direction {ob.points[0]} -> {ob.points[1]} in the round at "
        f"{ob.points[0]} has {blunder_seconds:+.1f} arc-seconds added (a pointing or booking slip)."
        f"  Written {fmt_dms(ob.value)[0]}; the error-free reading "
        f"would have been about {fmt_dms(ob.value - ob.blunder)[0]} (noise included)."
    )
    return book


# the direction with the blunder in demo 5: (station, target) and size in arc-seconds
BLUNDER_DIRECTION = ("Q13", "Q15")
BLUNDER_SECONDS = +30.0


# ties across the site in the traverse demo: station -> station it also sights
CROSS_TIES = {"STA-3": "STA-8", "STA-6": "STA-10"}


def closed_traverse() -> Book:
    rng = random.Random(SEEDS["closed_traverse"])
    book = Book(
        "closed_traverse",
        "Gannet Street logistics park - site control traverse (feet)",
        [
            "Invented demo. Quarrington & Daughters Construction (fictional) is building a",
            "warehouse park on Gannet Street; their layout crew ran a closed traverse",
            "around the site to set control for staking.  Crew chief Lupe Marchetti.",
            "",
            "Coordinates and distances in international feet.  Instrument: 3-second",
            "total station, 2 mm + 2 ppm distances, about 0.005 ft centering.",
            "The traverse leaves monument MON-3 with a backsight on the water tower",
            "pin MON-TOWER, goes around the site through stations STA-1 ... STA-10,",
            "and closes on monument MON-4, which also sees MON-3 and the tower.",
            "Two ties across the site (STA-3 to STA-8, STA-6 to STA-10) stiffen it.",
            "The three monuments are held fixed.  Angles at every station, each",
            "turned clockwise from the back station to the forward station.",
            "",
            "What to look for: an ordinary closed traverse with no blunder; the",
            "adjustment should pass the global test and meet the relative allowance.",
        ],
    )
    unit = "ft"
    book.unit = unit
    centre = (1684200.0 * FOOT, 612850.0 * FOOT)
    a_axis, b_axis = 1150.0 * FOOT, 760.0 * FOOT
    n_pos = 12
    start = rng.uniform(0, 2 * math.pi)
    positions = []
    for i in range(n_pos):
        t = start - 2 * math.pi * i / n_pos + rng.uniform(-0.12, 0.12)  # clockwise around the site
        r = 1.0 + rng.uniform(-0.08, 0.08)
        positions.append(
            (centre[0] + a_axis * r * math.cos(t), centre[1] + b_axis * r * math.sin(t))
        )
    names = ["MON-3"] + [f"STA-{i}" for i in range(1, n_pos - 1)] + ["MON-4"]
    xy = dict(zip(names, positions))
    # the tower pin lies well outside the site, about 3000 ft from MON-3
    direction_out = azimuth(centre, xy["MON-3"]) + 0.5
    xy["MON-TOWER"] = (
        xy["MON-3"][0] + 3050 * FOOT * math.sin(direction_out),
        xy["MON-3"][1] + 3050 * FOOT * math.cos(direction_out),
    )
    fixed = ["MON-3", "MON-4", "MON-TOWER"]
    for f in fixed:  # published to 0.001 ft; the published values are the truth here
        xy[f] = tuple(round(v / FOOT, 3) * FOOT for v in xy[f])
    for name, (e, n) in xy.items():
        book.points[name] = Point(name, e, n, fixed="en" if name in fixed else "")

    sim = HorizontalSim(
        book, rng, xy, distance_sd=(2.0 * MM, 2.0), angle_sd=3.0, centering=0.005 * FOOT
    )
    book.header(
        "units length=ft angle=dms",
        "tolerance relative=0.07ft+50ppm",
        "defaults angle=3sec distance=2mm+2ppm centering=0.005ft",
    )
    book.comment("Site monuments (state-plane-like grid, international feet)")
    for f, note in zip(
        fixed,
        [
            "iron pipe in concrete, NW gate",
            "iron pipe in concrete, W fence",
            "pin on the water tower catwalk",
        ],
    ):
        e, n = xy[f]
        book.add(f"point {f:<9} east={e / FOOT:.3f} north={n / FOOT:.3f} fix note={quote(note)}")
    book.add()
    loop = names
    for i, s in enumerate(loop):
        back = "MON-TOWER" if i == 0 else loop[i - 1]
        fore = loop[i + 1] if i + 1 < len(loop) else "MON-3"
        book.comment(f"station {s}")
        sim.angle(back, s, fore)
        if s == "MON-3":
            sim.angle("MON-4", s, fore, note="closing the loop on MON-4")
        if s == "MON-4":
            sim.angle(back, s, "MON-TOWER", note="check on the tower")
        if s in CROSS_TIES:
            tie = CROSS_TIES[s]
            sim.angle(back, s, tie, note="tie across the site")
            sim.distance(s, tie, note="tie across the site")
        if i + 1 < len(loop):
            sim.distance(s, fore)
        else:
            sim.distance(s, fore, note="check between monuments")
        book.add()
    book.notes_for_key.append("No blunder.")
    return book


# --------------------------------------------------------------------------------------
# independent check adjustment (numpy; only with --check)


def check(book: Book) -> dict:
    import numpy as np

    level = any(o.kind == "level" for o in book.obs)
    obs = [o for o in book.obs if not o.ignore]
    if level:
        unknown = [n for n, p in book.points.items() if p.fixed != "h"]
        index = {n: i for i, n in enumerate(unknown)}
        rows, values, sig = [], [], []
        for o in obs:
            row = np.zeros(len(unknown))
            a, b = o.points
            h = {n: p.height for n, p in book.points.items()}
            fixed_part = 0.0
            for name, sign in ((b, 1.0), (a, -1.0)):
                if name in index:
                    row[index[name]] += sign
                else:
                    fixed_part += sign * h[name]
            rows.append(row)
            values.append(o.value - fixed_part)
            sig.append(o.sigma)
        for n, p in book.points.items():
            if p.weighted_sd:
                row = np.zeros(len(unknown))
                row[index[n]] = 1.0
                rows.append(row)
                values.append(p.given_height)
                sig.append(p.weighted_sd)
        A, l, s = np.array(rows), np.array(values), np.array(sig)
        P = np.diag(1 / s**2)
        N = A.T @ P @ A
        x = np.linalg.solve(N, A.T @ P @ l)
        v = A @ x - l
        labels = [f"line {o.line}: level {o.points[0]} {o.points[1]}" for o in obs]
        labels += [f"point {n} (weighted)" for n, p in book.points.items() if p.weighted_sd]
    else:
        xy = {n: (p.east, p.north) for n, p in book.points.items()}
        unknown_pts = [n for n, p in book.points.items() if p.fixed != "en"]
        rounds = sorted({o.round_id for o in obs if o.kind == "direction"})
        col = {}
        for n in unknown_pts:
            col[n] = len(col)
            col[n + "#n"] = len(col)
        for r in rounds:
            col[f"round{r}"] = len(col)
        orient = {}
        for r in rounds:  # orientation = azimuth - reading, averaged over the round
            members = [o for o in obs if o.round_id == r]
            ref = azimuth(xy[members[0].points[0]], xy[members[0].points[1]]) - members[0].value
            orient[r] = ref + statistics.fmean(
                [
                    ((azimuth(xy[m.points[0]], xy[m.points[1]]) - m.value) - ref + math.pi)
                    % (2 * math.pi)
                    - math.pi
                    for m in members
                ]
            )
        for _ in range(6):
            A = np.zeros((len(obs), len(col)))
            w = np.zeros(len(obs))

            def d_az(row, p, q, sign=1.0):
                de, dn = xy[q][0] - xy[p][0], xy[q][1] - xy[p][1]
                d2 = de * de + dn * dn
                for name, s in ((q, 1.0), (p, -1.0)):
                    if name in col:
                        row[col[name]] += sign * s * dn / d2
                        row[col[name + "#n"]] += sign * s * -de / d2

            for i, o in enumerate(obs):
                row = A[i]
                if o.kind == "distance":
                    p, q = o.points
                    de, dn = xy[q][0] - xy[p][0], xy[q][1] - xy[p][1]
                    d = math.hypot(de, dn)
                    for name, s in ((q, 1.0), (p, -1.0)):
                        if name in col:
                            row[col[name]] += s * de / d
                            row[col[name + "#n"]] += s * dn / d
                    w[i] = o.value - d
                elif o.kind == "azimuth":
                    p, q = o.points
                    d_az(row, p, q)
                    w[i] = (o.value - azimuth(xy[p], xy[q]) + math.pi) % (2 * math.pi) - math.pi
                elif o.kind == "direction":
                    p, q = o.points
                    d_az(row, p, q)
                    row[col[f"round{o.round_id}"]] = -1.0
                    comp = azimuth(xy[p], xy[q]) - orient[o.round_id]
                    w[i] = (o.value - comp + math.pi) % (2 * math.pi) - math.pi
                elif o.kind == "angle":
                    b, at, f = o.points
                    d_az(row, at, f)
                    d_az(row, at, b, -1.0)
                    comp = azimuth(xy[at], xy[f]) - azimuth(xy[at], xy[b])
                    w[i] = (o.value - comp + math.pi) % (2 * math.pi) - math.pi
            s = np.array([o.sigma for o in obs])
            P = np.diag(1 / s**2)
            N = A.T @ P @ A
            dx = np.linalg.solve(N, A.T @ P @ w)
            for n in unknown_pts:
                xy[n] = (xy[n][0] + dx[col[n]], xy[n][1] + dx[col[n + "#n"]])
            for r in rounds:
                orient[r] += dx[col[f"round{r}"]]
            if np.max(np.abs(dx)) < 1e-7:
                break
        v = A @ dx - w
        labels = [f"line {o.line}: {o.kind} {' '.join(o.points)}" for o in obs]
    Qx = np.linalg.inv(N)
    Qv = np.diag(s**2) - A @ Qx @ A.T
    r = np.clip(np.diag(Qv) / s**2, 0.0, 1.0)
    f = A.shape[0] - A.shape[1]
    vPv = float(v @ P @ v)
    with np.errstate(divide="ignore", invalid="ignore"):
        wstat = np.where(r > 1e-9, v / (s * np.sqrt(r)), 0.0)
    z = statistics.NormalDist()
    lo = f * (1 - 2 / (9 * f) + z.inv_cdf(0.025) * math.sqrt(2 / (9 * f))) ** 3
    hi = f * (1 - 2 / (9 * f) + z.inv_cdf(0.975) * math.sqrt(2 / (9 * f))) ** 3
    top = np.argsort(-np.abs(wstat))[:4]
    return {
        "n": A.shape[0],
        "u": A.shape[1],
        "f": f,
        "vPv": vPv,
        "s0sq": vPv / f,
        "chi2_bounds": (lo, hi),
        "passes": lo <= vPv <= hi,
        "top_w": [(labels[i], float(wstat[i]), float(r[i])) for i in top],
        "min_r": float(np.min(r)),
        "all": [(labels[i], float(wstat[i]), float(r[i])) for i in range(len(labels))],
    }


# --------------------------------------------------------------------------------------


BUILDERS = [
    ("leveling_clean", leveling_clean),
    ("leveling_blunder", leveling_blunder),
    ("control_network", control_network),
    ("closed_traverse", closed_traverse),
    ("network_direction_blunder", network_direction_blunder),
]


def summary(book: Book) -> str:
    kinds = defaultdict(int)
    for o in book.obs:
        kinds[o.kind + (" (ignored)" if o.ignore else "")] += 1
    used = set()
    for o in book.obs:
        used.update(o.points)
    parts = ", ".join(f"{v} {k}" for k, v in kinds.items())
    rounds = f" in {book.n_rounds} rounds" if book.n_rounds else ""
    n_fixed = sum(1 for p in book.points.values() if p.fixed)
    return f"{len(used)} points ({n_fixed} fixed); {parts}{rounds}"


def answer_key(books: list[Book], checks: dict[str, dict]) -> str:
    out = [
        "# Demo field books: answer key",
        "",
        "For test writers.  Generated by `tools/make_demos.py` (fixed seeds; run it",
        "again to rewrite `demo_projects/*.fieldbook` and this file identically).",
        "Everything is simulated and invented: true coordinates/heights, exact",
        "observations, normal noise with the a priori standard deviations stated in",
        "each file (centering by the contract's formulas), blunders injected where",
        "listed below, then rounded (0.1 mm, 0.1 arc-second).",
        "",
        "Line numbers are 1-based lines of the `.fieldbook` file.",
        "",
    ]
    for book in books:
        out.append(f"## {book.name}.fieldbook")
        out.append("")
        out.append(f"*{book.title}* — {summary(book)}.")
        out.append("")
        for note in book.notes_for_key:
            out.append(f"- {note}")
        c = checks.get(book.name)
        if c:
            lo, hi = c["chi2_bounds"]
            out.append(
                f"- Generator's own check adjustment: n={c['n']}, u={c['u']}, redundancy {c['f']}, "
                f"vPv={c['vPv']:.2f} (variance factor {c['s0sq']:.3f}); two-sided 95% chi-square "
                f"band {lo:.1f}..{hi:.1f}: {'passes' if c['passes'] else 'FAILS'}.  "
                f"Smallest redundancy number {c['min_r']:.2f}."
            )
            out.append("- Largest |w| (w = v / (sigma·sqrt(r)), critical 3.29 at snooping 0.001):")
            for label, wv, r in c["top_w"][:3]:
                out.append(f"  - {label}: w = {wv:+.2f} (r = {r:.2f})")
        out.append("")
    out.append("These check values come from the generator's small independent adjustment that")
    out.append("uses the true coordinates as a start and the simulated standard deviations; the")
    out.append("program's numbers should agree closely (it evaluates centering with adjusted")
    out.append("coordinates, so the last digit can differ).")
    return "\n".join(out) + "\n"


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--check", action="store_true", help="run the check adjustment (numpy)")
    parser.add_argument("--no-write", action="store_true", help="do not write any file")
    args = parser.parse_args(argv)
    books = [builder() for _, builder in BUILDERS]
    checks = {}
    for book in books:
        unreachable = (
            reachable_by_polar_ties(book) if not any(o.kind == "level" for o in book.obs) else []
        )
        if unreachable:
            raise SystemExit(f"{book.name}: not reachable by polar ties: {unreachable}")
        if args.check:
            checks[book.name] = c = check(book)
            print(f"{book.name}: {summary(book)}")
            print(
                f"  f={c['f']} vPv={c['vPv']:.2f} s0^2={c['s0sq']:.3f} "
                f"band={c['chi2_bounds'][0]:.1f}..{c['chi2_bounds'][1]:.1f} "
                f"{'pass' if c['passes'] else 'FAIL'} min r={c['min_r']:.2f}"
            )
            for label, wv, r in c["top_w"]:
                print(f"    w={wv:+6.2f} r={r:.2f}  {label}")
    if not args.no_write:
        OUT_DIR.mkdir(exist_ok=True)
        for book in books:
            (OUT_DIR / f"{book.name}.fieldbook").write_text(book.text(), encoding="utf-8")
        if not checks:
            try:
                checks = {b.name: check(b) for b in books}
            except ImportError:  # numpy missing: the key is written without the check values
                checks = {}
        ANSWER_KEY.write_text(answer_key(books, checks), encoding="utf-8")
    return 0


if __name__ == "__main__":
    sys.exit(main())
