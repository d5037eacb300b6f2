"""The public result: frozen objects holding plain numbers, in the field book's units.

``build_result`` runs the statistics once and converts SI values to the
file's length unit, decimal degrees and arc-seconds exactly once.  The same
object feeds the command line, the JSON API, the web pages and the reports;
``to_json_dict`` follows ``shared/spec/result.md`` key for key.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from . import statistics as st
from .adjust import Solution
from .fieldbook_model import ANGULAR_KINDS, Observation
from .misclosures import Misclosure
from .network import Network
from .observations import EQUATIONS
from .units import ARCSEC_PER_RAD, LENGTH_FACTORS, wrap_2pi, wrap_pi

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


@dataclass(frozen=True, slots=True, kw_only=True)
class ObservationResult:
    """One field observation: values in length units or decimal degrees, angular figures in arc-seconds."""

    line: int
    kind: str
    from_point: str
    at: str | None
    to: str
    observed: float
    adjusted: float | None
    residual: float | None
    sd: float
    redundancy: float | None
    w: float | None
    mdb: float | None
    flagged: bool
    ignored: bool
    note: str = ""

    @property
    def angular(self) -> bool:
        """True for kinds whose value is an angle."""
        return self.kind in ANGULAR_KINDS


@dataclass(frozen=True, slots=True, kw_only=True)
class MisclosureResult:
    """A leveling loop or run, in length units."""

    kind: str
    points: tuple[str, ...]
    misclosure: float
    length: float | None
    allowed: float | None
    exceeds: bool


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


@dataclass(frozen=True, slots=True, kw_only=True)
class AdjustmentResult:
    """The whole result of one adjustment, identical for every output."""

    title: str
    source: str
    length_unit: str
    angle_unit: str
    text_sha256: str
    summary: Summary
    points: tuple[PointResult, ...]
    observations: tuple[ObservationResult, ...]
    misclosures: tuple[MisclosureResult, ...]
    relative: tuple[RelativeResult, ...]
    warnings: tuple[str, ...]
    caution: str = CAUTION

    def to_json_dict(self) -> dict[str, object]:
        """The JSON object of the result contract."""
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
            },
            "points": [
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
                    "ellipse": None
                    if p.ellipse is None
                    else {
                        "semi_major": p.ellipse.semi_major,
                        "semi_minor": p.ellipse.semi_minor,
                        "azimuth": p.ellipse.azimuth,
                        "confidence": p.ellipse.confidence,
                    },
                }
                for p in self.points
            ],
            "observations": [
                {
                    "line": o.line,
                    "kind": o.kind,
                    "from": o.from_point,
                    "at": o.at,
                    "to": o.to,
                    "observed": o.observed,
                    "adjusted": o.adjusted,
                    "residual": o.residual,
                    "sd": o.sd,
                    "redundancy": o.redundancy,
                    "w": o.w,
                    "mdb": o.mdb,
                    "flagged": o.flagged,
                    "ignored": o.ignored,
                }
                for o in self.observations
            ],
            "misclosures": [
                {
                    "kind": m.kind,
                    "points": list(m.points),
                    "misclosure": m.misclosure,
                    "length": m.length,
                    "allowed": m.allowed,
                    "exceeds": m.exceeds,
                }
                for m in self.misclosures
            ],
            "relative": [
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
                }
                for r in self.relative
            ],
            "warnings": list(self.warnings),
            "caution": self.caution,
        }


def build_result(
    network: Network,
    solution: Solution,
    misclosures: tuple[Misclosure, ...],
    warnings: list[str],
) -> AdjustmentResult:
    """Run the statistics once and freeze everything in output units."""
    fb = network.fieldbook
    tests = fb.tests
    per_m = 1.0 / LENGTH_FACTORS[fb.length_unit]
    n_rows = solution.design.shape[0]
    n_unknowns = len(network.parameters)
    redundancy = n_rows - n_unknowns + network.datum_defect

    r_i = st.redundancy_numbers(solution.design, solution.sigmas, solution.qxx)
    vtpv = st.weighted_square_sum(solution.residuals, solution.sigmas)
    variance = st.variance_factor(vtpv, redundancy)
    global_test = None
    if redundancy > 0:
        lower, upper = st.chi_square_bounds(redundancy, tests.alpha)
        global_test = GlobalTest(
            statistic=vtpv, lower=lower, upper=upper, alpha=tests.alpha,
            passed=bool(lower <= vtpv <= upper),
        )
    critical = st.normal_critical_value(tests.snooping)
    lambda0 = st.non_centrality(tests.snooping, tests.power)
    factor = st.ellipse_factor(tests.confidence, redundancy)
    scale_variance = variance if variance is not None else 1.0
    warnings = list(warnings)

    observations = _observation_results(
        network, solution, r_i, critical, lambda0, per_m, warnings
    )
    points = _point_results(network, solution, scale_variance, factor, tests.confidence, per_m)
    if not solution.converged:
        warnings.append(solution.message)
    if global_test is not None and not global_test.passed:
        side = "large" if vtpv > global_test.upper else "small"
        warnings.append(
            f"the global test fails: the residuals are too {side} for the a priori standard "
            "deviations" + (" (look for blunders or optimistic standard deviations)" if side == "large"
                            else " (the standard deviations may be pessimistic)")
        )
    summary = Summary(
        dimension=network.dimension,
        points=len(points),
        observations=len(fb.observations),
        used_observations=len(network.used),
        unknowns=n_unknowns,
        redundancy=redundancy,
        iterations=solution.iterations,
        converged=solution.converged,
        variance_factor=variance,
        global_test=global_test,
        critical_w=critical,
        lambda0=lambda0,
        ellipse_factor=factor,
        alpha=tests.alpha,
        snooping=tests.snooping,
        power=tests.power,
        confidence=tests.confidence,
    )
    return AdjustmentResult(
        title=fb.title,
        source=fb.source,
        length_unit=fb.length_unit,
        angle_unit=fb.angle_unit,
        text_sha256=fb.text_sha256,
        summary=summary,
        points=points,
        observations=observations,
        misclosures=tuple(
            MisclosureResult(
                kind=m.kind,
                points=m.points,
                misclosure=m.misclosure * per_m,
                length=None if m.length is None else m.length * per_m,
                allowed=None if m.allowed is None else m.allowed * per_m,
                exceeds=m.exceeds,
            )
            for m in misclosures
        ),
        relative=_relative_results(network, solution, scale_variance, factor, tests.confidence, per_m),
        warnings=tuple(warnings),
    )


def _observation_results(
    network: Network,
    solution: Solution,
    r_i: np.ndarray,
    critical: float,
    lambda0: float,
    per_m: float,
    warnings: list[str],
) -> tuple[ObservationResult, ...]:
    row_of = {id(obs): row for row, obs in enumerate(network.used)}
    results = []
    uncontrolled: list[str] = []
    for obs in network.fieldbook.observations:
        angular = obs.kind in ANGULAR_KINDS
        to_value = math.degrees if angular else (lambda x: x * per_m)
        to_small = (lambda x: x * ARCSEC_PER_RAD) if angular else (lambda x: x * per_m)
        row = row_of.get(id(obs))
        if row is None:
            adjusted_si = _evaluate(obs, solution)
            residual_si = None if adjusted_si is None else _difference(obs, adjusted_si)
            sd_si = _sigma_of_ignored(obs, solution)
            redundancy = w = mdb = None
            flagged = False
        else:
            adjusted_si = float(solution.adjusted[row])
            residual_si = float(solution.residuals[row])
            sd_si = float(solution.sigmas[row])
            redundancy = float(r_i[row])
            if redundancy < UNCONTROLLED:
                w = mdb = None
                flagged = False
                uncontrolled.append(f"line {obs.line} ({obs.kind} {obs.from_point}–{obs.to})")
            else:
                w = residual_si / (sd_si * math.sqrt(redundancy))
                mdb = sd_si * math.sqrt(lambda0 / redundancy)
                flagged = abs(w) > critical
        if adjusted_si is not None and angular and obs.kind != "zenith":
            adjusted_si = wrap_2pi(adjusted_si)
        results.append(
            ObservationResult(
                line=obs.line,
                kind=obs.kind,
                from_point=obs.from_point,
                at=obs.at,
                to=obs.to,
                observed=to_value(obs.value),
                adjusted=None if adjusted_si is None else to_value(adjusted_si),
                residual=None if residual_si is None else to_small(residual_si),
                sd=to_small(sd_si),
                redundancy=redundancy,
                w=None if w is None else float(w),
                mdb=None if mdb is None else to_small(mdb),
                flagged=flagged,
                ignored=obs.ignored,
                note=obs.note,
            )
        )
    if uncontrolled:
        shown = "; ".join(uncontrolled[:10]) + (f" and {len(uncontrolled) - 10} more" if len(uncontrolled) > 10 else "")
        warnings.append(
            "uncontrolled observations (redundancy number below 0.001), a blunder in them "
            f"cannot be detected: {shown}"
        )
    return tuple(results)


def _difference(obs: Observation, adjusted: float) -> float:
    difference = adjusted - obs.value
    return wrap_pi(difference) if obs.kind in ANGULAR_KINDS else difference


def _evaluate(obs: Observation, solution: Solution) -> float | None:
    """The value of an ignored observation computed from the adjusted coordinates."""
    equation = EQUATIONS.get(obs.kind)
    if equation is None:
        return None
    if obs.round_line is not None and obs.round_line not in solution.orientations:
        return None
    try:
        value, _ = equation(obs, solution.coordinates, solution.orientations)
    except (KeyError, ZeroDivisionError):
        return None
    return None if math.isnan(value) else value


def _sigma_of_ignored(obs: Observation, solution: Solution) -> float:
    from .observations import a_priori_sigma

    try:
        sigma = a_priori_sigma(obs, solution.coordinates)
    except (KeyError, ZeroDivisionError):
        sigma = math.nan
    return sigma if math.isfinite(sigma) else obs.sigma.constant


def _point_results(
    network: Network,
    solution: Solution,
    variance: float,
    factor: float,
    confidence: float,
    per_m: float,
) -> tuple[PointResult, ...]:
    column = {(p.point, p.kind): k for k, p in enumerate(network.parameters)}
    qxx = solution.qxx
    results = []
    for p in network.points:
        east, north, height = solution.coordinates.get(p.name, (math.nan,) * 3)
        values = {"E": east, "N": north, "H": height}
        given = {"E": p.east, "N": p.north, "H": p.height}
        out: dict[str, float | None] = {}
        sds: dict[str, float | None] = {}
        for comp in ("E", "N", "H"):
            k = column.get((p.name, comp))
            in_dimension = (comp == "H" and network.vertical) or (comp != "H" and network.horizontal)
            value = values[comp]
            if k is not None:
                out[comp] = float(value) * per_m
                sds[comp] = math.sqrt(max(variance * qxx[k, k], 0.0)) * per_m
            else:
                original = given[comp]
                out[comp] = None if original is None else original * per_m
                fixed_here = in_dimension and original is not None and (
                    ("h" in p.fixed) if comp == "H" else ("en" in p.fixed)
                )
                sds[comp] = 0.0 if fixed_here else None
        ellipse = None
        ke, kn = column.get((p.name, "E")), column.get((p.name, "N"))
        if ke is not None and kn is not None:
            cov = variance * qxx[np.ix_([ke, kn], [ke, kn])]
            major, minor, azimuth = st.standard_ellipse(cov)
            ellipse = Ellipse(
                semi_major=major * factor * per_m,
                semi_minor=minor * factor * per_m,
                azimuth=azimuth,
                confidence=confidence,
            )
        results.append(
            PointResult(
                name=p.name,
                east=out["E"],
                north=out["N"],
                height=out["H"],
                sd_east=sds["E"],
                sd_north=sds["N"],
                sd_height=sds["H"],
                fixed=p.fixed,
                weighted=p.weighted,
                ellipse=ellipse,
                in_use=p.in_use,
            )
        )
    return tuple(results)


def _joined_pairs(network: Network) -> list[tuple[str, str]]:
    """Point pairs joined by a used horizontal observation, first-seen order, no repeats."""
    pairs: dict[frozenset[str], tuple[str, str]] = {}
    for obs in network.used:
        if obs.kind == "angle":
            assert obs.at is not None
            candidates = [(obs.at, obs.from_point), (obs.at, obs.to)]
        elif obs.kind in ("distance", "azimuth", "direction"):
            candidates = [(obs.from_point, obs.to)]
        else:
            continue
        for pair in candidates:
            pairs.setdefault(frozenset(pair), pair)
    return list(pairs.values())


def _relative_results(
    network: Network,
    solution: Solution,
    variance: float,
    factor: float,
    confidence: float,
    per_m: float,
) -> tuple[RelativeResult, ...]:
    """Relative confidence ellipses: Σ_Δ = Σ_ii + Σ_jj − Σ_ij − Σ_ji over (E, N)."""
    column = {(p.point, p.kind): k for k, p in enumerate(network.parameters)}
    tolerance = network.fieldbook.relative_tolerance
    qxx = solution.qxx
    results = []
    for a, b in _joined_pairs(network):
        # the difference b − a as a combination of the unknowns (fixed parts contribute nothing)
        weights: list[tuple[int, int, float]] = []
        for axis, comp in enumerate(("E", "N")):
            for name, sign in ((b, 1.0), (a, -1.0)):
                k = column.get((name, comp))
                if k is not None:
                    weights.append((axis, k, sign))
        if not weights:
            continue  # both ends held fixed
        jacobian = np.zeros((2, len(network.parameters)))
        for axis, k, sign in weights:
            jacobian[axis, k] += sign
        used_columns = sorted({k for _, k, _ in weights})
        block = jacobian[:, used_columns]
        cov = variance * block @ qxx[np.ix_(used_columns, used_columns)] @ block.T
        major, minor, azimuth = st.standard_ellipse(cov)
        (ea, na, _), (eb, nb, _) = solution.coordinates[a], solution.coordinates[b]
        distance_m = math.hypot(eb - ea, nb - na)
        unit = np.array([eb - ea, nb - na]) / distance_m if distance_m else np.zeros(2)
        sd_distance = math.sqrt(max(float(unit @ cov @ unit), 0.0))
        semi_major = major * factor * per_m
        allowed = None if tolerance is None else tolerance.allowance_distance(distance_m) * per_m
        results.append(
            RelativeResult(
                from_point=a,
                to_point=b,
                distance=distance_m * per_m,
                semi_major=semi_major,
                semi_minor=minor * factor * per_m,
                azimuth=azimuth,
                confidence=confidence,
                allowed=allowed,
                passed=None if allowed is None else bool(semi_major <= allowed),
                sd_distance=sd_distance * per_m,
            )
        )
    return tuple(results)
