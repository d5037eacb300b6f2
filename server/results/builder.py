"""From the engine's ``Solution`` to the frozen result (``server.results.types``).

``build_result`` runs the statistics once and converts SI values to the
file's length unit, decimal degrees and arc-seconds exactly once.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from itertools import chain, repeat
from operator import is_
from typing import Any

import numpy as np

from server.engine.gauss_newton import Solution
from server.fieldbook.model import ANGULAR_KINDS, Observation
from server.model.kinds import CoincidentPointsError, evaluate_one, sigma_one
from server.model.misclosures import Misclosure
from server.model.network import Network, NetworkPoint
from server.results.baselines import BaselineFigures, baseline_figures
from server.results.columns import (
    ObservationColumns,
    PointColumns,
    RelativeColumns,
    with_entries,
)
from server.results.observation_meta import ObservationMetadata, observation_metadata
from server.results.types import (
    UNCONTROLLED,
    AdjustmentResult,
    GlobalTest,
    MisclosureResult,
    ObservationResult,
    PointResult,
    RelativeHeightResult,
    Summary,
)
from server.statistics import quality as st
from server.statistics import separability
from server.units import ARCSEC_PER_RAD, LENGTH_FACTORS, wrap_2pi, wrap_pi


def _misclosure_result(m: Misclosure, per_m: float) -> MisclosureResult:
    """One misclosure in output units; a traverse also gets its angular part in arcsec."""
    return MisclosureResult(
        kind=m.kind,
        points=m.points,
        misclosure=m.misclosure * per_m,
        length=_scaled(m.length, per_m),
        allowed=_scaled(m.allowed, per_m),
        exceeds=m.exceeds,
        angular_misclosure=_scaled(m.angular, ARCSEC_PER_RAD),
        angular_allowed=_scaled(m.angular_allowed, ARCSEC_PER_RAD),
        angle_stations=m.angle_stations,
        misclosure_east=_scaled(m.misclosure_east, per_m),
        misclosure_north=_scaled(m.misclosure_north, per_m),
        ratio=m.ratio,
        ratio_allowed=m.ratio_allowed,
    )


def _scaled(value: float | None, factor: float) -> float | None:
    return None if value is None else value * factor


def build_result(
    network: Network,
    solution: Solution,
    misclosures: tuple[Misclosure, ...],
    warnings: list[str],
    *,
    design: bool = False,
) -> AdjustmentResult:
    """Run the statistics once and freeze everything in output units.

    ``design``: a planned network's one linearisation (no values): no σ̂₀² and no global
    test, so the precisions are the a priori ones (``tests precision=prior``).
    """
    fb = network.fieldbook
    tests = fb.tests
    per_m = 1.0 / LENGTH_FACTORS[fb.length_unit]
    n_rows = len(solution.sigmas)
    n_unknowns = len(network.parameters)
    redundancy = n_rows - n_unknowns + network.datum_defect

    r_i = st.redundancy_numbers(solution.adjusted_cofactor, solution.sigmas)
    vtpv = st.weighted_square_sum(solution.residuals, solution.sigmas)
    variance = st.variance_factor(vtpv, redundancy)
    global_test = None
    if design:
        variance = None
    elif redundancy > 0:
        lower, upper = st.chi_square_bounds(redundancy, tests.alpha)
        global_test = GlobalTest(
            statistic=vtpv,
            lower=lower,
            upper=upper,
            alpha=tests.alpha,
            passed=bool(lower <= vtpv <= upper),
        )
    critical = st.normal_critical_value(tests.snooping)
    lambda0 = st.non_centrality(tests.snooping, tests.power)
    # σ₀² that scales Qxx, and the ellipse quantile that matches it (F if estimated, else χ²)
    scale_variance, estimated = st.precision_variance(tests.precision, variance)
    factor = st.ellipse_factor(tests.confidence, redundancy, estimated)
    warnings = list(warnings)

    baselines = baseline_figures(network, solution, lambda0, critical, tests.snooping, per_m)
    meta = observation_metadata(network)
    observations = _observation_results(
        network, solution, meta, r_i, critical, lambda0, per_m, warnings, baselines
    )
    points: Sequence[PointResult] = _point_results(
        network, solution, scale_variance, factor, tests.confidence, per_m
    )
    if fb.crs is not None:  # the geodetic figures are added row by row
        from server.results.geodetic_points import with_geodetic_figures  # geodetic books only

        points = with_geodetic_figures(network, solution, points, per_m)
    if not solution.converged:
        warnings.append(solution.message)
    if global_test is not None and not global_test.passed:
        side = "large" if vtpv > global_test.upper else "small"
        warnings.append(
            f"the global test fails: the residuals are too {side} for the a priori standard "
            "deviations"
            + (
                " (look for blunders or optimistic standard deviations)"
                if side == "large"
                else " (the standard deviations may be pessimistic)"
            )
        )
    summary = Summary(
        dimension=network.dimension,
        points=len(points),
        observations=_counted(meta, np.arange(len(meta.kind))),
        used_observations=_counted(meta, meta.used_position),
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
        precision_method=tests.precision,
        precision_factor=scale_variance,
        model="geodetic" if network.geodetic is not None else "plane",
        crs=fb.crs.text if fb.crs is not None else None,
        refraction=network.geodetic.refraction if network.geodetic is not None else None,
    )
    horizontal_pairs, height_pairs = _requested_pairs(network, solution, warnings)
    relative = _relative_results(
        network,
        solution,
        meta,
        scale_variance,
        factor,
        tests.confidence,
        per_m,
        horizontal_pairs,
    )
    relative_heights = _relative_height_results(
        network,
        solution,
        scale_variance,
        tests.confidence,
        redundancy if estimated else 0,  # Student's t only when σ₀² is the estimate
        per_m,
        height_pairs,
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
        misclosures=tuple(_misclosure_result(m, per_m) for m in misclosures),
        relative=relative,
        relative_heights=relative_heights,
        warnings=tuple(warnings),
        baseline_tests=baselines.tests,
    )


def _counted(meta: ObservationMetadata, rows: np.ndarray) -> int:
    """Observations (``rows`` of the book) as the result counts them: a baseline is three."""
    return len(rows) + 2 * int(np.count_nonzero(meta.of_kind("baseline")[rows]))


def _observation_results(
    network: Network,
    solution: Solution,
    meta: ObservationMetadata,
    r_i: np.ndarray,
    critical: float,
    lambda0: float,
    per_m: float,
    warnings: list[str],
    baselines: BaselineFigures,
) -> Sequence[ObservationResult]:
    """Every observation's figures as columns in field book order (``ObservationColumns``),
    a GNSS baseline's three entries in its place."""
    n = len(meta.kind)
    used_at = meta.used_position
    angular_all = meta.angular
    # a baseline takes three rows (one per component); every other observation one
    components = np.where(meta.of_kind("baseline")[used_at], 3, 1).astype(np.int64)
    first = np.cumsum(components) - components
    # every figure of the used rows at once
    angular = angular_all[used_at]
    wrapped = angular & ~meta.of_kind("zenith")[used_at]
    adjusted_si = np.array(solution.adjusted[first], dtype=float)
    adjusted_si[wrapped] = _wrap_2pi(adjusted_si[wrapped])
    residual_si = np.asarray(solution.residuals[first], dtype=float)
    sd_si = np.asarray(solution.sigmas[first], dtype=float)
    redundancy_used = np.asarray(r_i[first], dtype=float)
    controlled = redundancy_used >= UNCONTROLLED
    safe = np.where(controlled, redundancy_used, 1.0)
    w_all = residual_si / (sd_si * np.sqrt(safe))
    mdb_si = sd_si * np.sqrt(lambda0 / safe)
    small = np.where(angular, ARCSEC_PER_RAD, per_m)
    # math.degrees multiplies by 180/π; so does this, for the same last bit
    value_unit = np.where(angular_all, _DEG_PER_RAD, per_m)
    small_unit = np.where(angular_all, ARCSEC_PER_RAD, per_m)
    observed = np.where(angular_all, meta.value * _DEG_PER_RAD, meta.value * per_m)
    booked = np.where(angular_all, meta.booked * _DEG_PER_RAD, meta.booked * per_m)
    adjusted = np.full(n, np.nan)
    adjusted[used_at] = np.where(angular, adjusted_si * _DEG_PER_RAD, adjusted_si * per_m)
    residual = np.full(n, np.nan)
    residual[used_at] = residual_si * small
    sd = np.full(n, np.nan)
    sd[used_at] = sd_si * small
    redundancy = np.full(n, np.nan)
    redundancy[used_at] = redundancy_used
    w = np.full(n, np.nan)
    w[used_at] = w_all
    mdb = np.full(n, np.nan)
    mdb[used_at] = mdb_si * small
    bias = np.full(n, np.nan)
    bias[used_at] = -residual_si / safe * small
    used = np.zeros(n, dtype=bool)
    used[used_at] = True
    tested = np.zeros(n, dtype=bool)
    tested[used_at] = controlled
    flagged = np.zeros(n, dtype=bool)
    flagged[used_at] = controlled & (np.abs(w_all) > critical)
    has_adjusted = used.copy()
    partners = _inseparable_lines(network, solution, meta.line[used_at], r_i, components, first)
    if len(partners) == n and np.array_equal(used_at, np.arange(n)):  # all used, book order
        inseparable = partners
    else:
        inseparable = [()] * n
        for row in np.flatnonzero([bool(p) for p in partners]).tolist():
            inseparable[int(used_at[row])] = partners[row]
    # the observations the adjustment left out: their values from the adjusted coordinates
    entries = _baseline_rows(network, meta, baselines)
    observations = network.fieldbook.observations
    for k in np.flatnonzero(~used).tolist():
        if k in entries:
            continue
        obs = observations[k]
        value_si = _evaluate(obs, solution)
        sd[k] = _sigma_of_ignored(obs, solution) * small_unit[k]
        if value_si is None:
            continue
        residual[k] = _difference(obs, value_si) * small_unit[k]
        if angular_all[k] and obs.kind != "zenith":
            value_si = wrap_2pi(value_si)
        adjusted[k] = value_si * value_unit[k]
        has_adjusted[k] = True
    columns = ObservationColumns(
        line=meta.line,
        kind=meta.kind,
        from_point=meta.from_point,
        at=meta.at,
        to=meta.to,
        note=meta.note,
        observed=observed,
        booked=booked,
        scale_factor=meta.scale,
        has_scale=meta.of_kind("distance"),
        adjusted=adjusted,
        has_adjusted=has_adjusted,
        residual=residual,
        sd=sd,
        redundancy=redundancy,
        used=used,
        w=w,
        mdb=mdb,
        estimated_bias=bias,
        tested=tested,
        flagged=flagged,
        ignored=meta.ignored,
        inseparable=inseparable,
    )
    uncontrolled = np.sort(used_at[~controlled])
    if entries:
        uncontrolled = uncontrolled[[k not in entries for k in uncontrolled.tolist()]]
    _warn_uncontrolled(meta, uncontrolled.tolist(), warnings)
    return with_entries(columns, entries) if entries else columns


def _baseline_rows(
    network: Network, meta: ObservationMetadata, baselines: BaselineFigures
) -> dict[int, tuple[ObservationResult, ...]]:
    """The three entries of each baseline by its index in field book order."""
    if not baselines.entries:
        return {}
    # only the baselines' rows: making every other observation object of the book costs more
    # than the rest of the result (the table's row k is the book's observation k)
    observations = network.fieldbook.observations
    found = {}
    for k in np.flatnonzero(meta.of_kind("baseline")).tolist():
        entry = baselines.entries.get(id(observations[k]))
        if entry is not None:
            found[k] = entry
    return found


def _warn_uncontrolled(meta: ObservationMetadata, rows: list[int], warnings: list[str]) -> None:
    """One warning naming the used observations no test can check (the first ten)."""
    if not rows:
        return
    named = [
        f"line {meta.line[k]} ({meta.kind[k]} {meta.from_point[k]}–{meta.to[k]})" for k in rows[:10]
    ]
    shown = "; ".join(named) + (f" and {len(rows) - 10} more" if len(rows) > 10 else "")
    warnings.append(
        "uncontrolled observations (redundancy number below 0.001), a blunder in them "
        f"cannot be detected: {shown}"
    )


_DEG_PER_RAD = 180.0 / math.pi


def _inseparable_lines(
    network: Network,
    solution: Solution,
    lines: np.ndarray,
    r_i: np.ndarray,
    components: np.ndarray,
    first: np.ndarray,
) -> list[tuple[int, ...]]:
    """For each used observation, the lines whose w-test is the same test as its own
    (|ρ| ≥ 0.99).  Rows of a baseline (a whitened block) take no part: their components are
    tested in ``baselines.py``."""
    n_used = len(lines)
    n_rows = int(first[-1] + components[-1]) if n_used else 0
    scalar = np.repeat(components == 1, components)
    r_rows = np.asarray(r_i[:n_rows], dtype=float)
    controlled = (r_rows >= UNCONTROLLED) & scalar
    sigmas = np.asarray(solution.sigmas, dtype=float)
    w_rows = np.asarray(solution.residuals[:n_rows], dtype=float) / (
        sigmas[:n_rows] * np.sqrt(np.where(controlled, r_rows, 1.0))
    )
    flagged = controlled & (
        np.abs(w_rows) > st.normal_critical_value(network.fieldbook.tests.snooping)
    )
    candidates = np.flatnonzero(controlled)
    if solution.hat is None or candidates.size < 2:
        return [()] * n_used
    # when a large network flags more rows than are worked exactly, the largest w-tests
    # (the ones reviewed first) get their partners exactly
    priority = np.zeros(sigmas.shape[0])
    priority[:n_rows] = np.abs(np.where(controlled, w_rows, 0.0))
    rows = separability.correlated_rows(
        solution.hat,
        sigmas,
        np.asarray(r_i, dtype=float),
        candidates,
        np.flatnonzero(flagged).tolist(),
        priority=priority,
    )
    # each scalar row has its own line (a round's directions too)
    line_of = np.repeat(lines, components).tolist().__getitem__
    if n_rows == n_used:  # one row per observation: its rows in turn, no look-up by index
        return [tuple(map(line_of, partners)) if partners else () for partners in rows[:n_used]]
    return [tuple(map(line_of, rows[row])) if rows[row] else () for row in first.tolist()]


def _wrap_2pi(angle_rad: np.ndarray) -> np.ndarray:
    """``units.wrap_2pi`` for an array: reduce to [0, 2π)."""
    reduced = np.fmod(angle_rad, 2.0 * math.pi)
    reduced = np.where(reduced < 0.0, reduced + 2.0 * math.pi, reduced)
    return np.where(reduced >= 2.0 * math.pi, 0.0, reduced)


def _difference(obs: Observation, adjusted: float) -> float:
    difference = adjusted - obs.value
    return wrap_pi(difference) if obs.kind in ANGULAR_KINDS else difference


def _evaluate(obs: Observation, solution: Solution) -> float | None:
    """The value of an ignored observation computed from the adjusted coordinates."""
    if obs.round_line is not None and obs.round_line not in solution.orientations:
        return None
    try:
        value = float(evaluate_one(obs, *_model_of(solution)).value[0])
    except (KeyError, CoincidentPointsError):  # a kind without a model, or no position for it
        return None
    return None if math.isnan(value) else value


def _model_of(solution: Solution) -> tuple[Any, Any, Any, Any]:
    """Coordinates, orientations, kinds table and undulations to evaluate one observation:
    Earth-centred positions and the geodetic kinds in the geodetic model."""
    frame = solution.network.geodetic
    if frame is None or solution.positions is None:
        return solution.coordinates, solution.orientations, None, None
    from server.model.geodetic_kinds import geodetic_kinds  # geodetic books only

    kinds = geodetic_kinds(frame.crs, frame.refraction)
    return solution.positions, solution.orientations, kinds, frame.undulation


def _sigma_of_ignored(obs: Observation, solution: Solution) -> float:
    try:
        coordinates, _, kinds, _ = _model_of(solution)
        sigma = sigma_one(obs, coordinates, kinds)
    except KeyError:
        sigma = math.nan
    return sigma if math.isfinite(sigma) else obs.sigma.constant


def _point_results(
    network: Network,
    solution: Solution,
    variance: float,
    factor: float,
    confidence: float,
    per_m: float,
) -> PointColumns:
    """Every point's coordinates, standard deviations and ellipse, as columns.

    An adjusted component comes from the solution with its σ; one that is not adjusted
    keeps its given value, with σ 0 when it is held fixed in a dimension the network
    adjusts, else no σ.
    """
    points = network.points
    names = [p.name for p in points]
    fixed = [p.fixed for p in points]
    n_points = len(names)
    n_unknowns = len(network.parameters)
    # the unknown of each component of each point (−1: none)
    row_of: dict[str | None, int] = dict(zip(names, range(n_points)))
    parameters = network.parameters
    component = np.fromiter(
        map(_COMPONENT.get, [p.kind for p in parameters], repeat(-1)), np.int64, n_unknowns
    )
    owner = np.fromiter(
        map(row_of.get, [p.point for p in parameters], repeat(-1)), np.int64, n_unknowns
    )
    found = (component >= 0) & (owner >= 0)
    unknown = np.full((n_points, 3), -1, dtype=np.int64)
    unknown[owner[found], component[found]] = np.flatnonzero(found)
    # the elements of Qxx the points need, fetched at once: the diagonal and each E–N pair
    q_diagonal = solution.covariance_entries(np.arange(n_unknowns), np.arange(n_unknowns))
    sd_all = np.sqrt(np.maximum(variance * q_diagonal, 0.0)) * per_m
    estimated = unknown >= 0
    adjusted = _coordinates_of(solution.coordinates, names)
    given = _given_coordinates(points)
    has_given = ~np.isnan(given)
    coordinates = np.where(estimated, adjusted, given) * per_m
    has_coordinate = estimated | has_given
    held_en = np.array(["en" in f for f in fixed], dtype=bool) & network.horizontal
    held_h = np.array(["h" in f for f in fixed], dtype=bool) & network.vertical
    held = np.column_stack([held_en, held_en, held_h]) & has_given & ~estimated
    sds = np.where(estimated, sd_all[np.maximum(unknown, 0)] if n_unknowns else 0.0, 0.0)
    has_sd = estimated | held
    with_ellipse = estimated[:, 0] & estimated[:, 1]
    ke_all, kn_all = unknown[with_ellipse, 0], unknown[with_ellipse, 1]
    q_en = solution.covariance_entries(ke_all, kn_all)
    major, minor, azimuth = st.standard_ellipses(
        variance * q_diagonal[ke_all], variance * q_en, variance * q_diagonal[kn_all]
    )
    semi_major, semi_minor, azimuths = (
        np.zeros(len(points)),
        np.zeros(len(points)),
        np.zeros(len(points)),
    )
    semi_major[with_ellipse] = major * factor * per_m
    semi_minor[with_ellipse] = minor * factor * per_m
    azimuths[with_ellipse] = azimuth
    return PointColumns(
        name=names,
        coordinates=coordinates,
        has_coordinate=has_coordinate,
        sds=sds,
        has_sd=has_sd,
        fixed=fixed,
        weighted=[p.weighted for p in points],
        note=[p.note for p in points],
        in_use=np.array([p.in_use for p in points], dtype=bool),
        semi_major=semi_major,
        semi_minor=semi_minor,
        azimuth=azimuths,
        has_ellipse=with_ellipse,
        confidence=confidence,
    )


def _given_coordinates(points: Sequence[NetworkPoint]) -> np.ndarray:
    """(n, 3) given east, north and height of the points, NaN where not given (None)."""
    nan = math.nan
    columns = ([p.east for p in points], [p.north for p in points], [p.height for p in points])
    # None made NaN here: NumPy's own conversion of a list holding None is slower
    return np.column_stack(
        [np.fromiter([nan if v is None else v for v in c], float, len(c)) for c in columns]
    ).reshape(-1, 3)


def _coordinates_of(
    coordinates: dict[str, tuple[float, float, float]], names: list[str]
) -> np.ndarray:
    """(n, 3) adjusted coordinates of the named points, NaN for a point with none."""
    n = len(names)
    if len(coordinates) == n and all(map(is_, coordinates, names)):
        # the engine keeps the points in the network's order: no look-up by name
        values = chain.from_iterable(coordinates.values())
    else:
        values = chain.from_iterable(map(coordinates.get, names, repeat((math.nan,) * 3)))
    return np.fromiter(values, float, 3 * n).reshape(-1, 3)


#: The column of ``unknown`` of each coordinate unknown's kind.
_COMPONENT = {"E": 0, "N": 1, "H": 2}


def _joined_pairs(meta: ObservationMetadata) -> tuple[np.ndarray, np.ndarray]:
    """Point pairs joined by a used observation of any kind but level and zenith, first-seen
    order and orientation, no repeats: their two ends as indices into ``meta.point_names``."""
    used = meta.used_position
    angle = meta.of_kind("angle")[used]
    # (the geodetic model's slope distances and baselines join marks too; a zenith angle or
    # a level line does not fix a horizontal position between them)
    joining = meta.among(_JOINING_KINDS)[used]
    at, from_point, to = meta.at_index[used], meta.from_index[used], meta.to_index[used]
    # each observation's candidates in turn: an angle joins its station to both targets
    first = np.column_stack([np.where(angle, at, from_point), np.where(angle, at, to)])
    second = np.column_stack([np.where(angle, from_point, to), to])
    present = np.column_stack([angle | joining, angle])
    a, b = first[present], second[present]
    # the unordered pair as its key; the first occurrence of each, in order
    key = np.minimum(a, b) * max(len(meta.point_names), 1) + np.maximum(a, b)
    seen = np.sort(np.unique(key, return_index=True)[1])
    return a[seen], b[seen]


_JOINING_KINDS = frozenset({"distance", "azimuth", "direction", "slope", "baseline"})


def _requested_pairs(
    network: Network, solution: Solution, warnings: list[str]
) -> tuple[list[tuple[str, str]], list[tuple[str, str]]]:
    """The ``relative A B`` pairs split into horizontal and height pairs.

    A pair is horizontal when the network adjusts positions and both points
    have one (estimated or held); otherwise a height pair when the network
    adjusts heights and both have one.  A pair with a point that no used
    observation ties to the survey is left out with a warning: the survey
    says nothing about where that point lies relative to the other.
    """
    requests = network.fieldbook.relative_pairs
    if not requests:
        return [], []
    column = {(p.point, p.kind) for p in network.parameters}
    by_name = {p.name: p for p in network.points}

    def has(name: str, kind: str, held: str) -> bool:
        point = by_name.get(name)
        return (name, kind) in column or (point is not None and held in point.fixed)

    horizontal, heights = [], []
    for pair in requests:
        a, b = pair.first, pair.second
        loose = [n for n in (a, b) if n not in by_name or not by_name[n].in_use]
        if loose:
            warnings.append(
                f"line {pair.line}: relative {a} {b} is not reported: {loose[0]} is not tied to "
                "the survey by any used observation, so their relative precision is undetermined"
            )
        elif network.horizontal and has(a, "E", "en") and has(b, "E", "en"):
            horizontal.append((a, b))
        elif network.vertical and has(a, "H", "h") and has(b, "H", "h"):
            heights.append((a, b))
        else:
            what = "horizontal position" if network.horizontal else "height"
            lacking = a if not (has(a, "E", "en") or has(a, "H", "h")) else b
            warnings.append(
                f"line {pair.line}: relative {a} {b} is not reported: {lacking} has no adjusted "
                f"{what} in this adjustment"
            )
    held = [
        f"{a}–{b}"
        for pairs, kinds in ((horizontal, "EN"), (heights, "H"))
        for a, b in pairs
        if not any((n, k) in column for n in (a, b) for k in kinds)
    ]
    if held:
        warnings.append(
            "relative pairs of two held points (their relative position comes from the control, "
            "not from this survey; reported with zero precision figures and not checked against "
            f"the allowance): {', '.join(held)}"
        )
    return horizontal, heights


def _relative_results(
    network: Network,
    solution: Solution,
    meta: ObservationMetadata,
    variance: float,
    factor: float,
    confidence: float,
    per_m: float,
    requested: Sequence[tuple[str, str]] = (),
) -> RelativeColumns:
    """Relative confidence ellipses: Σ_Δ = Σ_ii + Σ_jj − Σ_ij − Σ_ji over (E, N).

    Pairs joined by a used observation (two held points left out), then the
    ``relative`` pairs not joined; a requested pair that is also joined keeps
    its place and is marked requested.  Covariances of unjoined pairs come
    from ``Solution.covariance_entries`` like the others (off the factor's
    pattern they are solved for).
    """
    tolerance = network.fieldbook.relative_tolerance
    names = meta.point_names
    joined_a, joined_b = _joined_pairs(meta)
    # each pair's unknowns (E_a, N_a, E_b, N_b), −1 where held; signs of the difference b − a
    # (looked up only when there are pairs: a large leveling network has none)
    east: dict[str | None, int] = {}
    north: dict[str | None, int] = {}
    if joined_a.size or requested:
        for k, p in enumerate(network.parameters):
            if p.kind == "E":
                east[p.point] = k
            elif p.kind == "N":
                north[p.point] = k
    unknowns = np.zeros((0, 4), dtype=np.int64)
    if joined_a.size:
        east_of = np.fromiter(map(east.get, names, repeat(-1)), np.int64, len(names))
        north_of = np.fromiter(map(north.get, names, repeat(-1)), np.int64, len(names))
        unknowns = np.column_stack(
            [east_of[joined_a], north_of[joined_a], east_of[joined_b], north_of[joined_b]]
        )
    from_points = [names[k] for k in joined_a.tolist()]
    to_points = [names[k] for k in joined_b.tolist()]
    asked = {(a, b) if a <= b else (b, a) for a, b in requested}
    is_asked = [((a, b) if a <= b else (b, a)) in asked for a, b in zip(from_points, to_points)]
    # a joined pair is left out when both ends are held fixed, unless it is requested
    kept = np.flatnonzero((unknowns.max(axis=1, initial=-1) >= 0) | np.array(is_asked, bool))
    if kept.size < len(from_points):
        unknowns = unknowns[kept]
        from_points = [from_points[k] for k in kept.tolist()]
        to_points = [to_points[k] for k in kept.tolist()]
        is_asked = [is_asked[k] for k in kept.tolist()]
    if requested:  # then the requested pairs not joined
        seen = {(a, b) if a <= b else (b, a) for a, b in zip(from_points, to_points)}
        extra = [(a, b) for a, b in requested if ((a, b) if a <= b else (b, a)) not in seen]
        ends = [
            [east.get(a, -1), north.get(a, -1), east.get(b, -1), north.get(b, -1)] for a, b in extra
        ]
        unknowns = np.concatenate([unknowns, np.array(ends, dtype=np.int64).reshape(-1, 4)])
        from_points += [a for a, _ in extra]
        to_points += [b for _, b in extra]
        is_asked += [True] * len(extra)
    held = [bool(x) for x in np.all(unknowns < 0, axis=1).tolist()]
    sign = np.array([-1.0, -1.0, 1.0, 1.0])
    # Σ_Δ over (E, N) from the 4×4 block of the pair's unknowns, held ones contributing nothing
    first, second = np.meshgrid(np.arange(4), np.arange(4), indexing="ij")
    rows = unknowns[:, first.ravel()]
    cols = unknowns[:, second.ravel()]
    valid = (rows >= 0) & (cols >= 0)
    block = np.zeros(rows.shape)
    block[valid] = solution.covariance_entries(rows[valid], cols[valid])
    block = block.reshape(-1, 4, 4) * (sign[:, None] * sign[None, :])
    axis_of = np.array([0, 1, 0, 1])  # E, N, E, N
    covariances = np.zeros((len(from_points), 2, 2))
    for s_ in range(4):
        for t_ in range(4):
            covariances[:, axis_of[s_], axis_of[t_]] += block[:, s_, t_]
    cov = variance * covariances
    major, minor, azimuth = st.standard_ellipses(cov[:, 0, 0], cov[:, 0, 1], cov[:, 1, 1])
    coordinates = solution.coordinates
    ends_a, ends_b = (
        np.fromiter(
            chain.from_iterable(map(coordinates.__getitem__, ends)), float, 3 * len(ends)
        ).reshape(-1, 3)[:, :2]
        for ends in (from_points, to_points)
    )
    d_east, d_north = ends_b[:, 0] - ends_a[:, 0], ends_b[:, 1] - ends_a[:, 1]
    distance_m = np.hypot(d_east, d_north)
    length = np.where(distance_m > 0.0, distance_m, 1.0)
    u_east = np.where(distance_m > 0.0, d_east / length, 0.0)
    u_north = np.where(distance_m > 0.0, d_north / length, 0.0)
    along = u_east * (cov[:, 0, 0] * u_east + cov[:, 0, 1] * u_north) + u_north * (
        cov[:, 1, 0] * u_east + cov[:, 1, 1] * u_north
    )
    has_allowed = ~np.array(held, dtype=bool).reshape(-1)
    if tolerance is None:
        allowed = np.zeros(len(from_points))
        has_allowed[:] = False
    else:
        allowed = (tolerance.constant + tolerance.ppm * 1e-6 * distance_m) * per_m
    semi_major = major * factor * per_m
    return RelativeColumns(
        from_point=from_points,
        to_point=to_points,
        distance=distance_m * per_m,
        semi_major=semi_major,
        semi_minor=minor * factor * per_m,
        azimuth=azimuth,
        confidence=confidence,
        allowed=allowed,
        has_allowed=has_allowed,
        passed=semi_major <= allowed,
        sd_distance=np.sqrt(np.maximum(along, 0.0)) * per_m,
        requested=np.array(is_asked, dtype=bool),
        held=np.array(held, dtype=bool).reshape(-1),
    )


def _relative_height_results(
    network: Network,
    solution: Solution,
    variance: float,
    confidence: float,
    redundancy: int,
    per_m: float,
    pairs: list[tuple[str, str]],
) -> tuple[RelativeHeightResult, ...]:
    """σ of H(B) − H(A) from Q_aa + Q_bb − 2·Q_ab (held heights contribute nothing).

    ``half_width`` is the confidence half-interval: σ times √F(confidence; 1, r)
    (Student's t) when σ₀² is estimated, else the normal quantile.
    """
    if not pairs:
        return ()
    column = {p.point: k for k, p in enumerate(network.parameters) if p.kind == "H"}
    scale = st.interval_factor(confidence, redundancy)
    coordinates = solution.coordinates
    # (H_a, H_b) unknowns per pair, −1 where held; one fetch of every needed element of Qxx
    ends = np.array([[column.get(a, -1), column.get(b, -1)] for a, b in pairs], dtype=np.int64)
    sign = np.array([-1.0, 1.0])
    rows = np.repeat(ends, 2, axis=1)  # a a b b
    cols = np.tile(ends, (1, 2))  # a b a b
    valid = (rows >= 0) & (cols >= 0)
    q = np.zeros(rows.shape)
    q[valid] = solution.covariance_entries(rows[valid], cols[valid])
    weights = np.repeat(sign, 2) * np.tile(sign, 2)  # + − − +
    variances = variance * (q * weights).sum(axis=1)
    sds = (np.sqrt(np.maximum(variances, 0.0)) * per_m).tolist()
    held = [bool(x) for x in np.all(ends < 0, axis=1).tolist()]
    results = []
    for k, (a, b) in enumerate(pairs):
        results.append(
            RelativeHeightResult(
                from_point=a,
                to_point=b,
                height_difference=(coordinates[b][2] - coordinates[a][2]) * per_m,
                sd=sds[k],
                half_width=sds[k] * scale,
                confidence=confidence,
                held=held[k],
            )
        )
    return tuple(results)
