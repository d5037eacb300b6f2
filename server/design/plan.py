"""``plan``: the precision and reliability a planned network will have, before the field.

A design book lists the observations to be made with their standard deviations and ``?``
for the value (a booked value is allowed and read, but a design never uses it: every
observation of a plan book counts as planned).  Every figure here depends on A and P alone,
so the network is linearised once at the approximate coordinates the book gives
(``engine/linearisation.py``), with σ₀ = 1: point standard deviations and ellipses,
relative ellipses against ``tolerance relative=``, redundancy numbers, MDB, the inseparable
w-tests and the external reliability (``reliability.py``).  The result is the adjustment's
own ``AdjustmentResult`` with ``summary.design`` set and every value-borne figure (observed,
adjusted, residual, w, estimated bias, σ̂₀², global test) left empty.
"""

from __future__ import annotations

import dataclasses
import math
from collections.abc import Collection, Sequence

import numpy as np

from server.design.given_positions import check_given_positions
from server.design.reliability import largest_point_shifts
from server.engine.linearisation import Linearisation, linearise_once
from server.engine.state import State
from server.fieldbook.model import Fieldbook, Observation
from server.fieldbook.parser import parse_fieldbook
from server.model.geodetic_kinds import geodetic_kinds
from server.model.kinds import CoincidentPointsError, evaluate_one
from server.model.network import Network, build_network
from server.pipeline import (
    UNLIMITED,
    check_observation_limit,
    check_unknown_limit,
    paused_gc,
)
from server.results.result import AdjustmentResult, build_result
from server.results.types import UNCONTROLLED, ObservationResult
from server.settings import WorkLimits
from server.statistics import quality as st
from server.units import LENGTH_FACTORS

#: Redundancy numbers below this mark an observation as weakly controlled.  A common rule of
#: thumb in network design, not a standard: docs/design.md says where it stands.
WEAK_REDUNDANCY = 0.3


def plan_fieldbook(
    text: str | bytes,
    *,
    source: str = "",
    switched_off: Collection[int] = (),
    limits: WorkLimits = UNLIMITED,
) -> AdjustmentResult:
    """Parse a design book and compute its figures; ``switched_off`` are observation lines left
    out (as if marked ignore).  Raises ``FieldbookError`` or ``NetworkError`` like ``adjust``."""
    with paused_gc():
        return plan_parsed(
            parse_fieldbook(text, source=source), switched_off=switched_off, limits=limits
        )


def plan_parsed(
    fieldbook: Fieldbook, *, switched_off: Collection[int] = (), limits: WorkLimits = UNLIMITED
) -> AdjustmentResult:
    """The design figures of an already parsed book (the design page re-evaluates here)."""
    check_observation_limit(fieldbook, limits)
    book = design_book(fieldbook, switched_off)
    check_given_positions(book)
    network = build_network(book)
    check_unknown_limit(network, limits)
    network = with_design_lengths(network, design_state(network))
    linear = linearise_once(network, design_state(network))
    warnings = [issue.format(book.source) for issue in book.warnings] + list(network.warnings)
    result = build_result(network, linear.solution, (), warnings, design=True)
    return design_result(result, network, linear)


def design_book(fieldbook: Fieldbook, switched_off: Collection[int] = ()) -> Fieldbook:
    """The book as a design reads it: a priori precisions (σ₀ = 1), the switched-off lines
    left out like ignored ones."""
    off = set(switched_off)
    observations = tuple(
        dataclasses.replace(o, ignored=True) if o.line in off and not o.ignored else o
        for o in fieldbook.observations
    )
    tests = dataclasses.replace(fieldbook.tests, precision="prior")
    return dataclasses.replace(fieldbook, observations=observations, tests=tests)


def design_state(network: Network) -> State:
    """The given coordinates as the engine's state; orientations 0 (A does not depend on
    them, and there are no values to start them from)."""
    state: State
    if network.geodetic is not None:
        from server.engine.geodetic_state import GeodeticState

        state = GeodeticState(network)
    else:
        nan = math.nan
        given = {
            p.name: (
                nan if p.east is None else p.east,
                nan if p.north is None else p.north,
                nan if p.height is None else p.height,
            )
            for p in network.points
        }
        state = State(network, given)
    state.orientation[:] = 0.0
    return state


#: Kinds whose σ has a part proportional to the measured length (``ppm``).
LENGTH_KINDS = frozenset({"distance", "slope"})


def with_design_lengths(network: Network, state: State) -> Network:
    """The network as the statistics read a design: each distance's value is the length
    computed at the approximate coordinates (its σ = √(a² + (b·ppm·length)²) needs a length,
    and a design has none), and no observation is marked planned any more (the network is
    built; the result builder then treats a planned baseline like a booked one, values empty)."""
    geodetic = network.geodetic
    if geodetic is None:
        coordinates, kinds, undulation = state.coordinates(), None, None
    else:
        positions = state.positions()
        assert positions is not None
        coordinates = positions
        kinds, undulation = geodetic_kinds(geodetic.crs, geodetic.refraction), geodetic.undulation
    replaced: dict[int, Observation] = {}
    for obs in network.fieldbook.observations:  # switched-off ones too: their σ is listed
        if obs.kind in LENGTH_KINDS:
            try:
                length = float(evaluate_one(obs, coordinates, {}, kinds, undulation).value[0])
            except (KeyError, CoincidentPointsError):  # a point no used observation names
                continue
            replaced[id(obs)] = dataclasses.replace(obs, value=length, planned=False)
    for obs in network.fieldbook.observations:
        if obs.planned and id(obs) not in replaced:
            replaced[id(obs)] = dataclasses.replace(obs, planned=False)
    if not replaced:
        return network
    used = tuple(replaced.get(id(o), o) for o in network.used)
    observations = tuple(replaced.get(id(o), o) for o in network.fieldbook.observations)
    book = dataclasses.replace(network.fieldbook, observations=observations)
    return dataclasses.replace(network, used=used, fieldbook=book)


def design_result(
    result: AdjustmentResult, network: Network, linear: Linearisation
) -> AdjustmentResult:
    """The adjustment-shaped result of a design: values emptied, external reliability and the
    weakly controlled observations added."""
    reliability = external_reliability(network, linear)
    observations = tuple(_planned(o, reliability.get(o.line)) for o in result.observations)
    weak = [
        o
        for o in observations
        if o.redundancy is not None
        and o.redundancy < WEAK_REDUNDANCY
        and o.component is None
        and o.redundancy >= UNCONTROLLED
    ]
    warnings = list(result.warnings)
    if weak:
        shown = "; ".join(
            f"line {o.line} ({o.kind} {o.from_point}–{o.to}, r = {o.redundancy:.2f})"
            for o in weak[:10]
        )
        more = f" and {len(weak) - 10} more" if len(weak) > 10 else ""
        warnings.append(
            f"weakly controlled observations (redundancy number below "
            f"{WEAK_REDUNDANCY}): {shown}{more}"
        )
    summary = dataclasses.replace(
        result.summary, design=True, variance_factor=None, global_test=None, iterations=0
    )
    return dataclasses.replace(
        result,
        summary=summary,
        observations=observations,
        warnings=tuple(warnings),
        baseline_tests=(),
    )


def weak_lines(result: AdjustmentResult) -> list[int]:
    """Lines of the used observations with 0.001 ≤ r < 0.3 (weakly controlled)."""
    return [
        o.line
        for o in result.observations
        if o.redundancy is not None
        and UNCONTROLLED <= o.redundancy < WEAK_REDUNDANCY
        and o.component is None
    ]


def external_reliability(network: Network, linear: Linearisation) -> dict[int, float]:
    """Line → largest point shift (length units) from an MDB-sized error in that observation;
    single-row observations that the w-test controls (a baseline is tested as a block)."""
    solution = linear.solution
    first, single = _first_rows(network.used)
    sigma = np.asarray(solution.sigmas, dtype=float)
    r = st.redundancy_numbers(solution.adjusted_cofactor, solution.sigmas)
    rows = first[single & (r[first] >= UNCONTROLLED)]
    if rows.size == 0:
        return {}
    tests = network.fieldbook.tests
    lambda0 = st.non_centrality(tests.snooping, tests.power)
    mdb = sigma[rows] * np.sqrt(lambda0 / r[rows])
    shift = largest_point_shifts(network, linear.shifts, rows, mdb)
    per_m = 1.0 / LENGTH_FACTORS[network.fieldbook.length_unit]
    line_of_row = {int(row): obs.line for row, obs in zip(first.tolist(), network.used)}
    return {line_of_row[int(row)]: float(s) * per_m for row, s in zip(rows, shift)}


def _first_rows(used: Sequence[Observation]) -> tuple[np.ndarray, np.ndarray]:
    """First row of each used observation, and whether it is a single-row one."""
    components = np.array([3 if o.kind == "baseline" else 1 for o in used], dtype=np.int64)
    first = np.concatenate([[0], np.cumsum(components)[:-1]]).astype(np.int64)
    return first, components == 1


def _planned(o: ObservationResult, reliability: float | None) -> ObservationResult:
    return dataclasses.replace(
        o,
        observed=None,
        adjusted=None,
        residual=None,
        w=None,
        estimated_bias=None,
        booked=None,
        flagged=False,
        external_reliability=reliability,
    )
