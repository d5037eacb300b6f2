"""The public result types: frozen objects holding plain numbers, in the field book's units.

``AdjustmentResult.to_json_dict`` writes the JSON described by
``docs/result.schema.json``: a key never changes its meaning; new keys may be added.
``server.results.builder`` makes these objects from the engine's ``Solution``.
"""

from __future__ import annotations

import copy
import dataclasses
from collections.abc import Sequence
from dataclasses import dataclass
from typing import Any

from server.fieldbook.model import ANGULAR_KINDS
from server.results.json_writer import FiniteRecords
from server.statistics import quality as st

CAUTION = (
    "These results were computed from the observations as entered. They must be "
    "reviewed and certified by a licensed professional surveyor before use; local "
    "codes, standards and regulations govern."
)

#: Redundancy numbers below this leave an observation uncontrolled (contract value).
UNCONTROLLED = 0.001


@dataclass(frozen=True, slots=True, kw_only=True)
class GlobalTest:
    """Two-sided χ² test of vᵀPv against its redundancy."""

    statistic: float
    lower: float
    upper: float
    alpha: float
    passed: bool


@dataclass(frozen=True, slots=True, kw_only=True)
class Ellipse:
    """A confidence ellipse: semi-axes in length units, azimuth of the major axis in degrees."""

    semi_major: float
    semi_minor: float
    azimuth: float
    confidence: float


@dataclass(frozen=True, slots=True, kw_only=True)
class Summary:
    """Counts and global figures of the adjustment."""

    dimension: int
    points: int
    observations: int
    used_observations: int
    unknowns: int
    redundancy: int
    iterations: int
    converged: bool
    variance_factor: float | None
    global_test: GlobalTest | None
    critical_w: float
    lambda0: float
    ellipse_factor: float
    alpha: float
    snooping: float
    power: float
    confidence: float
    #: ``tests precision=`` as written, and σ₀² actually used to scale every precision figure
    #: (None only in runs stored before the choice existed: then it was σ̂₀², or 1 at r = 0).
    precision_method: str = "posterior"
    precision_factor: float | None = None
    #: "plane" (1D/2D/joint) or "geodetic" (3D, Earth-centred unknowns)
    model: str = "plane"
    #: the ``crs`` line as given ("EPSG:32633", "local ..."), None without one
    crs: str | None = None
    #: refraction coefficient k in force in the geodetic model, else None
    refraction: float | None = None
    #: a design (``plan``): figures from the a priori σ at the approximate coordinates, no values
    design: bool = False

    def __post_init__(self) -> None:
        if self.precision_factor is None:
            factor = 1.0 if self.variance_factor is None else self.variance_factor
            object.__setattr__(self, "precision_factor", factor)

    @property
    def geodetic_keys(self) -> bool:
        """True when the result carries the geodetic keys: a ``crs`` line or the 3D model."""
        return self.model == "geodetic" or self.crs is not None

    @property
    def precision_estimated(self) -> bool:
        """True when precisions are scaled by σ̂₀² (ellipses then take the F quantile, not χ²)."""
        return st.precision_variance(self.precision_method, self.variance_factor)[1]


@dataclass(frozen=True, slots=True, kw_only=True)
class PointResult:
    """An adjusted (or passed-through) point with its a posteriori precision."""

    name: str
    east: float | None
    north: float | None
    height: float | None
    sd_east: float | None
    sd_north: float | None
    sd_height: float | None
    fixed: str
    weighted: str
    ellipse: Ellipse | None
    in_use: bool = True
    note: str = ""
    # With a ``crs`` (None without one): decimal degrees, south and west negative; heights and
    # the geoid undulation N in length units (height = ellipsoidal_height − geoid); the
    # projection's point scale factor and meridian convergence (degrees, grid north minus true
    # north).  In the geodetic model sd_east/north/height and the ellipse are along local east,
    # north and up, the ellipse azimuth from true north.
    latitude: float | None = None
    longitude: float | None = None
    ellipsoidal_height: float | None = None
    geoid: float | None = None
    scale_factor: float | None = None
    convergence: float | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class ObservationResult:
    """One field observation: values in length units or decimal degrees, angular figures in
    arc-seconds."""

    line: int
    kind: str
    from_point: str
    at: str | None
    to: str
    observed: float | None  # None: a planned observation of a design
    adjusted: float | None
    residual: float | None
    sd: float
    redundancy: float | None
    w: float | None
    mdb: float | None
    flagged: bool
    ignored: bool
    note: str = ""
    #: The value as written (length units or decimal degrees) before any reduction; None
    #: only in results stored before it was recorded.
    booked: float | None = None
    #: The scale factor applied to a booked distance (1.0 when none); None for other kinds.
    scale_factor: float | None = None

    #: −residual/redundancy: the blunder that alone would explain the residual (None without w)
    estimated_bias: float | None = None
    #: lines of the used observations whose w-test has |ρ| ≥ 0.99 with this one's
    inseparable: tuple[int, ...] = ()
    #: "dx", "dy" or "dz" for the three entries of a baseline; None for other kinds
    component: str | None = None
    #: a design's external reliability: the largest point shift (length units) an
    #: undetected error of the size of the MDB in this observation alone causes
    external_reliability: float | None = None

    @property
    def angular(self) -> bool:
        """True for kinds whose value is an angle."""
        return self.kind in ANGULAR_KINDS


@dataclass(frozen=True, slots=True, kw_only=True)
class BaselineTestResult:
    """The test of a baseline's whole residual vector: vᵀ·Qv⁺·v against χ²(3) at 1 − snooping."""

    line: int
    from_point: str
    to_point: str
    statistic: float
    critical: float
    flagged: bool

    def to_dict(self) -> dict[str, Any]:
        return {
            "line": self.line,
            "from": self.from_point,
            "to": self.to_point,
            "statistic": self.statistic,
            "critical": self.critical,
            "flagged": self.flagged,
        }


@dataclass(frozen=True, slots=True, kw_only=True)
class MisclosureResult:
    """A leveling loop or run, or a traverse, in length units (traverse angles in arcsec)."""

    kind: str
    points: tuple[str, ...]
    misclosure: float
    length: float | None
    allowed: float | None
    exceeds: bool
    # traverse entries only (None for loops and runs)
    angular_misclosure: float | None = None
    angular_allowed: float | None = None
    angle_stations: int | None = None
    misclosure_east: float | None = None
    misclosure_north: float | None = None
    ratio: float | None = None
    ratio_allowed: float | None = None

    def to_dict(self) -> dict[str, Any]:
        out: dict[str, Any] = {
            "kind": self.kind,
            "points": list(self.points),
            "misclosure": self.misclosure,
            "length": self.length,
            "allowed": self.allowed,
            "exceeds": self.exceeds,
        }
        if self.kind == "traverse":
            out.update(
                angular_misclosure=self.angular_misclosure,
                angular_allowed=self.angular_allowed,
                angle_stations=self.angle_stations,
                misclosure_east=self.misclosure_east,
                misclosure_north=self.misclosure_north,
                ratio=self.ratio,
                ratio_allowed=self.ratio_allowed,
            )
        return out


@dataclass(frozen=True, slots=True, kw_only=True)
class RelativeResult:
    """Relative confidence ellipse between two joined points."""

    from_point: str
    to_point: str
    distance: float
    semi_major: float
    semi_minor: float
    azimuth: float
    confidence: float
    allowed: float | None
    passed: bool | None
    sd_distance: float
    #: asked for by a ``relative A B`` line (joined or not)
    requested: bool = False
    #: both points held fixed: their relative position comes from the control (zero ellipse)
    held: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class RelativeHeightResult:
    """A ``relative A B`` pair in a height network: the precision of H(B) − H(A)."""

    from_point: str
    to_point: str
    height_difference: float
    sd: float
    half_width: float
    confidence: float
    held: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class AdjustmentResult:
    """The whole result of one adjustment, identical for every output."""

    title: str
    source: str
    length_unit: str
    angle_unit: str
    text_sha256: str
    summary: Summary
    #: rows made on demand from columns (``columns.py``) when built here; any sequence of
    #: rows otherwise (results read back from the store, edited copies)
    points: Sequence[PointResult]
    observations: Sequence[ObservationResult]
    misclosures: tuple[MisclosureResult, ...]
    relative: Sequence[RelativeResult]
    warnings: tuple[str, ...]
    caution: str = CAUTION
    relative_heights: tuple[RelativeHeightResult, ...] = ()
    baseline_tests: tuple[BaselineTestResult, ...] = ()

    @property
    def geodetic(self) -> bool:
        """True for a result of the geodetic 3D model."""
        return self.summary.model == "geodetic"

    def to_json_dict(self, *, records: bool = True) -> dict[str, object]:
        """The JSON object of the result contract.

        The geodetic keys are written only when the book has a ``crs`` line or the geodetic
        model is in use, so that every other result keeps its text byte for byte.
        ``records=False``: "points" and "observations" hold None, for a writer that makes
        those records itself a chunk at a time (``json_result.py``; plane results only).
        """
        out = self._plane_json_dict(records)
        if self.summary.geodetic_keys:
            _add_geodetic_keys(self, out)
        if self.summary.design:
            _add_design_keys(self, out)
        return out

    def detail_dict(self) -> dict[str, Any]:
        """``dataclasses.asdict`` of the result with its rows made (what the store keeps)."""
        rows = dataclasses.replace(
            self,
            points=tuple(self.points),
            observations=tuple(self.observations),
            relative=tuple(self.relative),
        )
        return plain_dict(rows)

    def _plane_json_dict(self, records: bool = True) -> dict[str, object]:
        s = self.summary
        return {
            "format": 1,
            "title": self.title,
            "units": {"length": self.length_unit, "angle_residual": "arcsec"},
            "settings": {
                "alpha": s.alpha,
                "snooping": s.snooping,
                "power": s.power,
                "confidence": s.confidence,
                "critical_w": s.critical_w,
                "lambda0": s.lambda0,
                "ellipse_factor": s.ellipse_factor,
            },
            "summary": {
                "dimension": s.dimension,
                "points": s.points,
                "observations": s.observations,
                "used_observations": s.used_observations,
                "unknowns": s.unknowns,
                "redundancy": s.redundancy,
                "iterations": s.iterations,
                "converged": s.converged,
                "variance_factor": s.variance_factor,
                "global_test": None
                if s.global_test is None
                else {
                    "statistic": s.global_test.statistic,
                    "lower": s.global_test.lower,
                    "upper": s.global_test.upper,
                    "alpha": s.global_test.alpha,
                    "passed": s.global_test.passed,
                },
                "precision_scaling": {"method": s.precision_method, "factor": s.precision_factor},
            },
            "points": _point_records(self.points) if records else None,
            "observations": _observation_records(self.observations) if records else None,
            "misclosures": [m.to_dict() for m in self.misclosures],
            "relative": _relative_records(self.relative),
            "relative_heights": [
                {
                    "from": h.from_point,
                    "to": h.to_point,
                    "height_difference": h.height_difference,
                    "sd": h.sd,
                    "half_width": h.half_width,
                    "confidence": h.confidence,
                    "held": h.held,
                }
                for h in self.relative_heights
            ],
            "warnings": list(self.warnings),
            "caution": self.caution,
        }


def _column_records(rows: Sequence[Any]) -> list[dict[str, Any]] | None:
    """The records straight from a column store built here (checked finite once), else None."""
    from server.results.columns import ObservationColumns, PointColumns, RelativeColumns

    if not isinstance(rows, (PointColumns, ObservationColumns, RelativeColumns)):
        return None
    records = rows.json_records()
    return FiniteRecords(records) if rows.all_finite() else records


def _point_records(points: Sequence[PointResult]) -> list[dict[str, Any]]:
    """The points of the plane contract: straight from the columns when built here."""
    columns = _column_records(points)
    if columns is not None:
        return columns
    return [
        {
            "name": p.name,
            "east": p.east,
            "north": p.north,
            "height": p.height,
            "sd_east": p.sd_east,
            "sd_north": p.sd_north,
            "sd_height": p.sd_height,
            "fixed": p.fixed,
            "weighted": p.weighted,
            "note": p.note,
            "ellipse": None
            if p.ellipse is None
            else {
                "semi_major": p.ellipse.semi_major,
                "semi_minor": p.ellipse.semi_minor,
                "azimuth": p.ellipse.azimuth,
                "confidence": p.ellipse.confidence,
            },
        }
        for p in points
    ]


def _observation_records(observations: Sequence[ObservationResult]) -> list[dict[str, Any]]:
    """The observations of the contract: straight from the columns when built here."""
    columns = _column_records(observations)
    if columns is not None:
        return columns
    return [
        {
            "line": o.line,
            "kind": o.kind,
            "from": o.from_point,
            "at": o.at,
            "to": o.to,
            "observed": o.observed,
            "booked": o.booked,
            "scale_factor": o.scale_factor,
            "adjusted": o.adjusted,
            "residual": o.residual,
            "sd": o.sd,
            "redundancy": o.redundancy,
            "w": o.w,
            "mdb": o.mdb,
            "estimated_bias": o.estimated_bias,
            "inseparable": list(o.inseparable),
            "flagged": o.flagged,
            "ignored": o.ignored,
        }
        for o in observations
    ]


def _relative_records(relative: Sequence[RelativeResult]) -> list[dict[str, Any]]:
    """The relative ellipses of the contract: straight from the columns when built here."""
    columns = _column_records(relative)
    if columns is not None:
        return columns
    return [
        {
            "from": r.from_point,
            "to": r.to_point,
            "distance": r.distance,
            "semi_major": r.semi_major,
            "semi_minor": r.semi_minor,
            "azimuth": r.azimuth,
            "confidence": r.confidence,
            "allowed": r.allowed,
            "passed": r.passed,
            "sd_distance": r.sd_distance,
            "requested": r.requested,
            "held": r.held,
        }
        for r in relative
    ]


def _add_geodetic_keys(result: AdjustmentResult, out: dict[str, Any]) -> None:
    """summary.model/crs/refraction, the point keys after ``height``, ``component`` after
    ``kind`` (baselines only) and ``baseline_tests`` after ``observations``."""
    s = result.summary
    out["summary"].update(model=s.model, crs=s.crs, refraction=s.refraction)
    out["points"] = [
        _inserted(
            entry,
            "height",
            [
                ("latitude", p.latitude),
                ("longitude", p.longitude),
                ("ellipsoidal_height", p.ellipsoidal_height),
                ("geoid", p.geoid),
                ("scale_factor", p.scale_factor),
                ("convergence", p.convergence),
            ],
        )
        for entry, p in zip(out["points"], result.points, strict=True)
    ]
    records = out["observations"]
    inserted = [
        entry if component is None else _inserted(entry, "kind", [("component", component)])
        for entry, component in zip(records, _components(result.observations), strict=True)
    ]
    # records checked finite stay so: a component is a name
    out["observations"] = FiniteRecords(inserted) if type(records) is FiniteRecords else inserted
    tests = [t.to_dict() for t in result.baseline_tests]
    replaced = _inserted(out, "observations", [("baseline_tests", tests)])
    out.clear()
    out.update(replaced)


def _components(observations: Sequence[ObservationResult]) -> Sequence[str | None]:
    """Each observation's ``component``: straight from the columns when built here."""
    from server.results.columns import ObservationColumns

    if isinstance(observations, ObservationColumns):
        if observations.component is None:
            return [None] * len(observations)
        return observations.component
    return [o.component for o in observations]


def _add_design_keys(result: AdjustmentResult, out: dict[str, Any]) -> None:
    """summary.design and each observation's ``external_reliability`` after ``mdb``: only a
    design's result carries them, so every adjustment keeps its text byte for byte."""
    out["summary"]["design"] = True
    out["observations"] = [
        _inserted(entry, "mdb", [("external_reliability", o.external_reliability)])
        for entry, o in zip(out["observations"], result.observations, strict=True)
    ]


def _inserted(entry: dict[str, Any], after: str, pairs: list[tuple[str, Any]]) -> dict[str, Any]:
    """A copy of ``entry`` with ``pairs`` placed right after the key ``after``."""
    items = list(entry.items())
    at = [key for key, _ in items].index(after) + 1
    return dict(items[:at] + pairs + items[at:])


#: Values ``dataclasses.asdict`` would deep-copy, which are their own copies.
_IMMUTABLE = frozenset({int, float, str, bool, type(None)})
#: Each dataclass's field names, looked up once per class.
_FIELD_NAMES: dict[type, tuple[str, ...]] = {}


def plain_dict(obj: Any) -> Any:
    """``dataclasses.asdict(obj)``, the same dicts, lists and tuples, in a third of the time.

    ``asdict`` asks for the fields of every record and deep-copies every number and
    string (each its own copy): 38 ms for the typical project's 1,300 records, more than
    the adjustment; 12 ms here. Here the field names are taken once per class and immutable scalars
    are kept as they are; anything else is converted as ``asdict`` converts it
    (``tests/test_result_columns.py`` compares the two).
    """
    kind = type(obj)
    if kind in _IMMUTABLE:
        return obj
    names = _FIELD_NAMES.get(kind)
    if names is None and dataclasses.is_dataclass(obj) and not isinstance(obj, type):
        names = _FIELD_NAMES[kind] = tuple(f.name for f in dataclasses.fields(obj))
    if names is not None:  # a scalar field is kept without a call: most of them are
        return {
            name: value if type(value := getattr(obj, name)) in _IMMUTABLE else plain_dict(value)
            for name in names
        }
    if isinstance(obj, tuple) and hasattr(obj, "_fields"):  # a named tuple
        return kind(*[plain_dict(v) for v in obj])
    if isinstance(obj, (list, tuple)):
        return kind(plain_dict(v) for v in obj)
    if isinstance(obj, dict):
        return kind((plain_dict(k), plain_dict(v)) for k, v in obj.items())
    return copy.deepcopy(obj)
