"""Accuracy standards as presets: allowances a result is checked against.

Two families, each constant named with its published source:

* Relative positional precision between boundary corners at 95 %
  confidence: 2 cm (0.07 ft) + 50 ppm of the corner-to-corner distance.
  ALTA/NSPS *Minimum Standard Detail Requirements for ALTA/NSPS Land Title
  Surveys* (American Land Title Association and National Society of
  Professional Surveyors), 2026 edition §3.E (the same allowance since
  2005).  The standard prints both "2 cm" and "0.07 feet"; the preset
  uses 0.02 m in metric field books and 0.07 ft in foot field books, as a
  surveyor reading the standard in that unit would.

* Leveling misclosure, c·√K mm with K the length in km: FGCC (1984),
  *Standards and Specifications for Geodetic Control Networks*, Federal
  Geodetic Control Committee, §3.5: section (forward − backward) and loop
  constants per order and class.  **These constants are recalled from
  memory and not yet checked against a copy of the document** (see
  ``docs/references.md``, "FGCC 1984 leveling allowances"); the preset names say so.

A preset becomes the field book's ``tolerance`` for one run; a tolerance
written in the field book itself is always shown as such.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

from server.fieldbook.model import Fieldbook
from server.units import LENGTH_FACTORS, Quantity


@dataclass(frozen=True, slots=True)
class Preset:
    """A named allowance with its source."""

    key: str
    label: str
    source: str
    kind: str  # "relative" or "misclosure"
    verified: bool

    def quantity(self, length_unit: str) -> Quantity:
        """The allowance in SI parts for a field book in ``length_unit``."""
        return _QUANTITIES[self.key](length_unit)


_ALTA_SOURCE = (
    "ALTA/NSPS Minimum Standard Detail Requirements, 2026 edition, §3.E: "
    "2 cm (0.07 ft) + 50 ppm at 95 % confidence"
)
_FGCC_SOURCE = (
    "FGCC (1984) Standards and Specifications for Geodetic Control Networks, §3.5 "
    "(constants recalled from memory, not yet checked against the document)"
)

#: FGCC 1984 leveling constants in mm per √km: (section, loop), recalled from memory.
FGCC_1984_LEVELING: dict[str, tuple[float, float]] = {
    "first-order-class-I": (3.0, 4.0),
    "first-order-class-II": (4.0, 5.0),
    "second-order-class-I": (6.0, 6.0),
    "second-order-class-II": (8.0, 8.0),
    "third-order": (12.0, 12.0),
}


def _alta(length_unit: str) -> Quantity:
    constant = 0.02 if length_unit == "m" else 0.07 * LENGTH_FACTORS[length_unit]
    return Quantity(constant=constant, ppm=50.0)


def _loop_allowance(k_mm: float) -> Callable[[str], Quantity]:
    """k mm·√K (the same in every length unit: the allowance is stored in metres)."""
    return lambda unit: Quantity(per_sqrtkm=k_mm * 1e-3)


_QUANTITIES: dict[str, Callable[[str], Quantity]] = {"alta-nsps-2026": _alta}
PRESETS: dict[str, Preset] = {
    "alta-nsps-2026": Preset(
        "alta-nsps-2026", "ALTA/NSPS relative positional precision", _ALTA_SOURCE, "relative", True
    )
}
for _name, (_section, _loop) in FGCC_1984_LEVELING.items():
    _key = f"fgcc-1984-{_name}"
    # loops and runs are both checked with the loop constant: a run between fixed
    # benchmarks closes like a loop through the datum
    _QUANTITIES[_key] = _loop_allowance(_loop)
    PRESETS[_key] = Preset(
        _key,
        f"FGCC 1984 leveling, {_name.replace('-', ' ')} ({_loop:g} mm·√K)",
        _FGCC_SOURCE,
        "misclosure",
        False,
    )


def with_presets(
    fieldbook: Fieldbook, *, relative: str | None = None, misclosure: str | None = None
) -> Fieldbook:
    """The field book with its tolerances replaced by the named presets (None keeps the file's)."""
    changes: dict[str, Any] = {}
    for key, field in ((relative, "relative_tolerance"), (misclosure, "misclosure_tolerance")):
        if key is None:
            continue
        preset = PRESETS.get(key)
        expected = "relative" if field == "relative_tolerance" else "misclosure"
        if preset is None or preset.kind != expected:
            choices = ", ".join(k for k, p in PRESETS.items() if p.kind == expected)
            raise ValueError(f"unknown {expected} preset {key!r}; choose one of {choices}")
        changes[field] = preset.quantity(fieldbook.length_unit)
    return dataclasses.replace(fieldbook, **changes)
