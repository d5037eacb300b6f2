"""Raw rounds reduced as a party chief would, before anything is adjusted.

Per setup and set, the two faces of each pointing are meaned (the textbook relations,
recalled, not looked up):

- direction: mean = FL + ½·((FR − 180°) − FL) (the mean of FL and FR − 180°, taken across
  the 0/360° seam); collimation c = ½·((FR − 180°) − FL); face difference 2c.
- zenith: mean = (FL + 360° − FR) / 2; index error i = (FL + FR − 360°) / 2; face
  difference 2i.

Several sets at one setup: each set's directions are reduced to the reference target (the
first target of the first set), meaned over the sets and put back on the first set's
reference reading; zeniths and slope distances are meaned over every set. The spread
(largest − smallest) of each mean is reported. A face difference or spread above its
tolerance is a warning on its line, never a reason to drop a reading.
"""

from __future__ import annotations

import math
from collections import defaultdict
from collections.abc import Callable
from dataclasses import dataclass

from server.formats.survey_records import RawReading, Source
from server.units import wrap_2pi, wrap_pi


@dataclass(frozen=True, slots=True)
class Tolerances:
    """User-set limits (radians, metres)."""

    face: float
    spread: float
    distance: float


@dataclass(frozen=True, slots=True)
class FacePair:
    """One target's readings in one set: the face mean and what the faces disagree by."""

    target: str
    hz: float | None
    zenith: float | None
    slope: float | None
    collimation: float | None  # radians, ½((FR − 180°) − FL)
    index_error: float | None  # radians, ½(FL + FR − 360°)
    sources: tuple[Source, ...]
    #: variance of hz (zenith) in units of σ², σ the precision of a face mean (ISO 17123-3):
    #: 1 for a face pair, 2/k for k pointings in one face only
    hz_factor: float = 1.0
    zenith_factor: float = 1.0


@dataclass(frozen=True, slots=True)
class ReducedTarget:
    """A target's mean over the sets, its spreads and every source line behind it."""

    target: str
    hz: float | None
    zenith: float | None
    slope: float | None
    hz_spread: float | None
    zenith_spread: float | None
    slope_spread: float | None
    hz_sets: int  # how many set means the direction is the mean of
    zenith_sets: int
    #: variance of the mean in units of σ² (σ: a face mean): Σ factors / n²
    hz_factor: float
    zenith_factor: float
    ht: float | None
    sources: tuple[Source, ...]
    warnings: tuple[str, ...]
    #: the readings behind the direction alone (a set without the reference adds none)
    hz_sources: tuple[Source, ...] = ()


@dataclass(frozen=True, slots=True)
class ReducedSetup:
    """One instrument setup after reduction; ``raw`` keeps every reading for the reviewer."""

    setup: str
    station: str
    hi: float | None
    targets: tuple[ReducedTarget, ...]
    collimation: float | None  # mean over the pairs, radians
    index_error: float | None
    raw: tuple[RawReading, ...]
    warnings: tuple[tuple[int, str], ...]
    #: sets that lack the reference target, written as rounds of their own
    separate: tuple[tuple[ReducedTarget, ...], ...] = ()


def mean_direction(fl: float, fr: float) -> tuple[float, float]:
    """(mean, collimation) of a face I and a face II direction, radians."""
    half = 0.5 * wrap_pi(fr - math.pi - fl)
    return wrap_2pi(fl + half), half


def mean_zenith(fl: float, fr: float) -> tuple[float, float]:
    """(mean, index error) of a face I and a face II zenith angle, radians."""
    return 0.5 * (fl + 2.0 * math.pi - fr), 0.5 * (fl + fr - 2.0 * math.pi)


def _circular_mean(values: list[float], around: float) -> float:
    return wrap_2pi(around + sum(wrap_pi(v - around) for v in values) / len(values))


def _spread(values: list[float], around: float | None = None) -> float | None:
    if len(values) < 2:
        return None
    if around is not None:
        values = [wrap_pi(v - around) for v in values]
    return max(values) - min(values)


def pair_faces(readings: list[RawReading], tol: Tolerances) -> tuple[FacePair, list[str]]:
    """Mean one target's readings of one set (any number of face I and face II pointings)."""
    left = [r for r in readings if r.face == 1]
    right = [r for r in readings if r.face == 2]
    warnings: list[str] = []
    hz, collimation = _pair(
        [r.hz for r in left if r.hz is not None],
        [r.hz for r in right if r.hz is not None],
        mean_direction,
        lambda v: wrap_2pi(v - math.pi),
        circular=True,
    )
    zenith, index = _pair(
        [r.zenith for r in left if r.zenith is not None],
        [r.zenith for r in right if r.zenith is not None],
        mean_zenith,
        lambda v: 2.0 * math.pi - v,
        circular=False,
    )
    if collimation is not None and abs(2.0 * collimation) > tol.face:
        warnings.append(
            f"face difference of the direction {_sec(2.0 * collimation)} exceeds "
            f"the tolerance {_sec_abs(tol.face)}"
        )
    if index is not None and abs(2.0 * index) > tol.face:
        warnings.append(
            f"face difference of the zenith {_sec(2.0 * index)} exceeds "
            f"the tolerance {_sec_abs(tol.face)}"
        )
    slopes = [r.slope for r in readings if r.slope is not None]
    slope = sum(slopes) / len(slopes) if slopes else None
    sources = tuple(r.source for r in readings)
    pair = FacePair(
        readings[0].target,
        hz,
        zenith,
        slope,
        collimation,
        index,
        sources,
        _factor(sum(r.hz is not None for r in left), sum(r.hz is not None for r in right)),
        _factor(sum(r.zenith is not None for r in left), sum(r.zenith is not None for r in right)),
    )
    return pair, warnings


def _factor(left: int, right: int) -> float:
    """σ² multiplier of one set's value: a face mean has σ², k readings in one face 2σ²/k."""
    return 1.0 if left and right else 2.0 / max(left + right, 1)


def _pair(
    left: list[float],
    right: list[float],
    mean: Callable[[float, float], tuple[float, float]],
    single: Callable[[float], float],
    *,
    circular: bool,
) -> tuple[float | None, float | None]:
    """Mean of the face means; a face seen alone is reduced to face I and used as it is."""
    if left and right:
        fl = _circular_mean(left, left[0]) if circular else sum(left) / len(left)
        fr = _circular_mean(right, right[0]) if circular else sum(right) / len(right)
        return mean(fl, fr)
    values = left or [single(v) for v in right]
    if not values:
        return None, None
    return (_circular_mean(values, values[0]) if circular else sum(values) / len(values)), None


def _sec(radians: float) -> str:
    return f"{math.degrees(radians) * 3600.0:+.1f}″"


def _sec_abs(radians: float) -> str:
    return f"{abs(math.degrees(radians)) * 3600.0:.1f}″"


def _mm(metres: float) -> str:
    return f"{metres * 1000.0:.1f} mm"


def reduce_setup(readings: list[RawReading], tol: Tolerances) -> ReducedSetup:
    """All readings of one setup (in file order) → face means, set means and spreads."""
    used = [r for r in readings if not r.unused]
    first = readings[0]
    warnings: list[tuple[int, str]] = [
        (
            r.source.line,
            f"reading marked unused in the file: kept in the raw table, not reduced ({r.target})",
        )
        for r in readings
        if r.unused
    ]
    sets: dict[str, dict[str, list[RawReading]]] = defaultdict(lambda: defaultdict(list))
    for reading in used:
        sets[reading.set_id][reading.target].append(reading)
    pairs: list[dict[str, FacePair]] = []
    for readings_by_target in sets.values():
        by_target: dict[str, FacePair] = {}
        for name, group in readings_by_target.items():
            pair, messages = pair_faces(group, tol)
            by_target[name] = pair
            warnings.extend((group[0].source.line, m) for m in messages)
        pairs.append(by_target)
    reference = next((t for t, p in pairs[0].items() if p.hz is not None), None) if pairs else None
    joined = [
        s
        for s in pairs
        if reference is not None and s.get(reference) and s[reference].hz is not None
    ]
    separate = [s for s in pairs if not any(s is j for j in joined)]
    targets = _mean_sets(pairs, joined, reference, tol, used)
    extra = tuple(
        _mean_sets([s], [s], None, tol, used)
        for s in separate
        if any(p.hz is not None for p in s.values())
    )
    for own_round in extra:
        line = own_round[0].sources[0].line if own_round else first.source.line
        warnings.append(
            (
                line,
                "this set lacks the reference target of the first set: "
                "written as a round of its own",
            )
        )
    for reduced in (*targets, *(t for g in extra for t in g)):
        warnings.extend((reduced.sources[0].line, m) for m in reduced.warnings)
    collimations = [p.collimation for s in pairs for p in s.values() if p.collimation is not None]
    indexes = [p.index_error for s in pairs for p in s.values() if p.index_error is not None]
    return ReducedSetup(
        first.setup,
        first.station,
        first.hi,
        targets,
        sum(collimations) / len(collimations) if collimations else None,
        sum(indexes) / len(indexes) if indexes else None,
        tuple(readings),
        tuple(sorted(warnings)),
        extra,
    )


def _mean_sets(
    sets: list[dict[str, FacePair]],
    direction_sets: list[dict[str, FacePair]],
    reference: str | None,
    tol: Tolerances,
    readings: list[RawReading],
) -> tuple[ReducedTarget, ...]:
    """Mean each target over the sets; directions (of ``direction_sets`` only) are reduced
    to the reference first, so a set without the reference adds no direction here."""
    order = list(dict.fromkeys(t for pairs in sets for t in pairs))
    by_target: dict[str, list[RawReading]] = defaultdict(list)
    for reading in readings:
        by_target[reading.target].append(reading)
    base = direction_sets[0][reference].hz if reference is not None and direction_sets else None
    out: list[ReducedTarget] = []
    for target in order:
        seen = [s[target] for s in sets if target in s]
        hz_values = [
            wrap_2pi(p.hz - s[reference].hz + base)  # type: ignore[operator]
            if reference is not None and base is not None
            else p.hz
            for s in direction_sets
            if target in s and (p := s[target]).hz is not None
        ]
        zeniths = [p.zenith for p in seen if p.zenith is not None]
        hz_factors = [
            s[target].hz_factor for s in direction_sets if target in s and s[target].hz is not None
        ]
        zen_factors = [p.zenith_factor for p in seen if p.zenith is not None]
        slopes = [p.slope for p in seen if p.slope is not None]
        hz = _circular_mean(hz_values, hz_values[0]) if hz_values else None
        hz_spread = _spread(hz_values, hz) if hz_values and hz is not None else None
        zen_spread, slope_spread = _spread(zeniths), _spread(slopes)
        messages: list[str] = []
        for what, spread, n in (
            ("direction", hz_spread, len(hz_values)),
            ("zenith", zen_spread, len(zeniths)),
        ):
            if spread is not None and spread > tol.spread:
                messages.append(
                    f"spread of the {what} over {n} sets {_sec_abs(spread)} "
                    f"exceeds the tolerance {_sec_abs(tol.spread)}"
                )
        if slope_spread is not None and slope_spread > tol.distance:
            messages.append(
                f"spread of the slope distance over {len(seen)} sets "
                f"{_mm(slope_spread)} exceeds the tolerance {_mm(tol.distance)}"
            )
        hts = [r.ht for r in by_target[target] if r.ht is not None]
        with_hz = {r.source for r in by_target[target] if r.hz is not None}
        if len(set(hts)) > 1:
            messages.append(
                f"the target height changes between readings ({len(set(hts))} "
                "values); the first is written"
            )
        out.append(
            ReducedTarget(
                target,
                hz,
                sum(zeniths) / len(zeniths) if zeniths else None,
                sum(slopes) / len(slopes) if slopes else None,
                hz_spread,
                zen_spread,
                slope_spread,
                len(hz_values),
                len(zeniths),
                sum(hz_factors) / len(hz_factors) ** 2 if hz_factors else 1.0,
                sum(zen_factors) / len(zen_factors) ** 2 if zen_factors else 1.0,
                hts[0] if hts else None,
                tuple(src for p in seen for src in p.sources),
                tuple(messages),
                tuple(
                    src
                    for s in direction_sets
                    if target in s and s[target].hz is not None
                    for src in s[target].sources
                    if src in with_hz
                ),
            )
        )
    return tuple(out)


def reduce_readings(readings: tuple[RawReading, ...], tol: Tolerances) -> list[ReducedSetup]:
    """Group the readings by setup (in file order) and reduce each."""
    by_setup: dict[str, list[RawReading]] = {}
    for reading in readings:
        by_setup.setdefault(reading.setup, []).append(reading)
    return [reduce_setup(group, tol) for group in by_setup.values()]
