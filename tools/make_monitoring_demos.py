"""Write the monitoring demo: eight levelings of a weir's marks over two years.

Invented job: the (fictional) Lenwick Water Board levels the crest marks of the Corran Mill
weir each quarter against five rock benchmarks on the banks.  Every mark breathes with the
seasons (the crest rises in the warm months, the bank marks barely), and crest mark W-4,
over a scoured pier footing, settles about 4 mm a year.  Fixed seeds: running this again
writes the same files.  Run: .venv/bin/python tools/make_monitoring_demos.py
"""

from __future__ import annotations

import math
from datetime import date
from pathlib import Path

import numpy as np

OUT = Path(__file__).resolve().parent.parent / "demo_projects" / "monitoring"

EPOCHS = (
    date(2025, 3, 10),
    date(2025, 6, 12),
    date(2025, 9, 15),
    date(2025, 12, 8),
    date(2026, 3, 16),
    date(2026, 6, 10),
    date(2026, 9, 14),
    date(2026, 12, 2),
)
#: name: (height m, seasonal amplitude mm, rate mm/year)
MARKS = {
    "RB-1": (41.2874, 0.2, 0.0),
    "RB-2": (43.0518, 0.2, 0.0),
    "RB-3": (44.8802, 0.2, 0.0),
    "RB-4": (42.6137, 0.2, 0.0),
    "RB-5": (40.9311, 0.2, 0.0),
    "W-1": (38.4120, 0.8, 0.0),
    "W-2": (38.4097, 1.1, 0.0),
    "W-3": (38.4155, 1.2, -4.0),
    "W-4": (38.4081, 0.9, 0.0),
}
#: sections: from, to, length km
SECTIONS = (
    ("RB-1", "W-1", 0.12),
    ("W-1", "W-2", 0.06),
    ("W-2", "W-3", 0.06),
    ("W-3", "W-4", 0.06),
    ("W-4", "RB-2", 0.14),
    ("RB-2", "RB-3", 0.22),
    ("RB-3", "W-3", 0.18),
    ("RB-3", "RB-4", 0.31),
    ("RB-4", "W-2", 0.16),
    ("RB-4", "RB-5", 0.12),
    ("RB-5", "RB-1", 0.20),
    ("RB-1", "W-2", 0.14),
    ("RB-2", "W-4", 0.09),
    ("RB-5", "W-1", 0.15),
)
SD_MM_PER_SQRT_KM = 0.8
#: warmest day of the seasonal cycle (the crest is highest then), days after 1 January
PEAK_DAY = 200.0


def true_height(name: str, when: date) -> float:
    height, amplitude, rate = MARKS[name]
    years = (when - EPOCHS[0]).days / 365.25
    season = math.cos(2.0 * math.pi * (when.timetuple().tm_yday - PEAK_DAY) / 365.25)
    return height + (amplitude * season + rate * years) / 1000.0


def book(index: int, when: date, rng: np.random.Generator) -> str:
    lines = [
        "fieldbook 1",
        f'title "Corran Mill weir - crest levelling, epoch {index + 1} of {len(EPOCHS)}"',
        "#",
        "# Invented demo. The (fictional) Lenwick Water Board levels the crest marks W-1 to W-4",
        "# of the Corran Mill weir each quarter against the rock benchmarks RB-1 to RB-5.",
        "# Digital level, invar staves, every section run forward and back and meaned.",
        "# RB-1 is held at its adopted height; the monitoring comparison moves every epoch",
        "# onto the marks that stay stable (python -m server monitor ...).",
        "#",
        f"epoch {when.isoformat()}",
        "units length=m",
        "tests alpha=0.05 snooping=0.001 power=0.80",
        f"defaults level=0.1mm+{SD_MM_PER_SQRT_KM}mm/sqrtkm",
        "",
        f'point RB-1 height={MARKS["RB-1"][0]:.4f} fix note="rock bolt, west bank"',
        "",
    ]
    for start, end, km in SECTIONS:
        sd = math.hypot(0.1, SD_MM_PER_SQRT_KM * math.sqrt(km)) / 1000.0
        dh = true_height(end, when) - true_height(start, when) + rng.normal(0.0, sd)
        lines.append(f"level {start:<6} {end:<6} {dh:+.5f} len={km:.2f}km")
    return "\n".join(lines) + "\n"


def main() -> None:
    OUT.mkdir(parents=True, exist_ok=True)
    for i, when in enumerate(EPOCHS):
        rng = np.random.default_rng(20250310 + i)
        path = OUT / f"corran_weir_{when.isoformat()}.fieldbook"
        path.write_text(book(i, when, rng), encoding="utf-8")
        print(path.relative_to(OUT.parent.parent))


if __name__ == "__main__":
    main()
