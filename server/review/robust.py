"""A second opinion by robust estimation: iteratively reweighted least squares.

Weight function: Huber's, ω(u) = 1 for |u| ≤ k and k/|u| beyond, with
k = 1.5 (Huber, P. J., 1964, "Robust Estimation of a Location Parameter",
*Annals of Mathematical Statistics* 35(1):73–101; k = 1.5 is common
practice).  u is the standardized residual v/(σ·√r) with the original a
priori σ and the redundancy number of the current fit; each iteration
adjusts again with σ/√ω, until no weight changes by more than 0.001.

Several blunders at once can hide one another from the w-test (the
largest spreads into its neighbours); down-weighting all large residuals
together often separates them.  Observations whose final |u| exceeds the
w-test's critical value are reported as suspects.  Nothing is removed.

When the observation it down-weights most has w-tests inseparable from
others' (``inseparable``, |ρ| ≥ 0.99 in the ordinary adjustment), the
choice among them is arbitrary: ``inseparable_warning`` then names the
group and says the data cannot tell which is wrong.
"""

from __future__ import annotations

import dataclasses
import math
from dataclasses import dataclass

from server.fieldbook.model import Fieldbook, Observation
from server.pipeline import adjust_parsed
from server.results.result import AdjustmentResult
from server.review.snooping import describe
from server.units import Quantity

HUBER_K = 1.5
MAX_ITERATIONS = 30
WEIGHT_TOLERANCE = 1e-3


@dataclass(frozen=True, slots=True)
class RobustObservation:
    """Final weight and standardized residual of one observation."""

    line: int
    weight: float
    u: float
    suspect: bool


@dataclass(frozen=True, slots=True)
class RobustResult:
    """The outcome of the reweighting: weights per observation and the final adjustment."""

    k: float
    iterations: int
    converged: bool
    critical: float
    observations: tuple[RobustObservation, ...]
    result: AdjustmentResult
    #: set when the most down-weighted observation cannot be told apart from others
    inseparable_warning: str = ""
    inseparable: tuple[int, ...] = ()

    @property
    def suspects(self) -> tuple[int, ...]:
        """Lines whose final |u| exceeds the critical value, largest first."""
        worst = sorted((o for o in self.observations if o.suspect), key=lambda o: -abs(o.u))
        return tuple(o.line for o in worst)

    @property
    def down_weighted(self) -> tuple[RobustObservation, ...]:
        """Observations given less than full weight, lowest weight first."""
        return tuple(
            sorted((o for o in self.observations if o.weight < 1.0), key=lambda o: o.weight)
        )


def huber_weight(u: float, k: float = HUBER_K) -> float:
    """ω(u) = 1 if |u| ≤ k else k/|u|."""
    return 1.0 if abs(u) <= k else k / abs(u)


def _scaled(obs: Observation, factor: float) -> Observation:
    """The observation with its whole a priori σ multiplied by ``factor`` (all parts,
    centering too)."""
    q = obs.sigma
    sigma = Quantity(
        constant=q.constant * factor,
        ppm=q.ppm * factor,
        per_sqrtkm=q.per_sqrtkm * factor,
        per_setup=q.per_setup * factor,
        angular=q.angular,
    )
    return dataclasses.replace(obs, sigma=sigma, centering=obs.centering * factor)


def robust_adjustment(
    fieldbook: Fieldbook, *, k: float = HUBER_K, first: AdjustmentResult | None = None
) -> RobustResult:
    """Reweight by Huber's function until the weights settle; report weights and suspects."""
    base = first if first is not None else adjust_parsed(fieldbook)
    sd_original = {o.line: o.sd for o in base.observations if not o.ignored}
    weights = {line: 1.0 for line in sd_original}
    result = base
    converged = False
    iterations = 0
    for iterations in range(1, MAX_ITERATIONS + 1):  # noqa: B007 - the count is reported
        new = {}
        for o in result.observations:
            if o.ignored or o.redundancy is None or o.redundancy < 1e-3 or o.residual is None:
                new[o.line] = weights.get(o.line, 1.0)
                continue
            u = o.residual / (sd_original[o.line] * math.sqrt(o.redundancy))
            new[o.line] = huber_weight(u, k)
        change = max((abs(new[line] - weights[line]) for line in weights), default=0.0)
        weights = new
        observations = tuple(
            _scaled(o, 1.0 / math.sqrt(weights[o.line])) if weights.get(o.line, 1.0) < 1.0 else o
            for o in fieldbook.observations
        )
        result = adjust_parsed(dataclasses.replace(fieldbook, observations=observations))
        if change < WEIGHT_TOLERANCE:
            converged = True
            break
    critical = base.summary.critical_w
    final = []
    for o in result.observations:
        if o.ignored or o.redundancy is None or o.redundancy < 1e-3 or o.residual is None:
            continue
        u = o.residual / (sd_original[o.line] * math.sqrt(o.redundancy))
        final.append(RobustObservation(o.line, weights[o.line], u, abs(u) > critical))
    warning, group = _inseparable_warning(base, final)
    return RobustResult(
        k=k,
        iterations=iterations,
        converged=converged,
        critical=critical,
        observations=tuple(final),
        result=result,
        inseparable_warning=warning,
        inseparable=group,
    )


def _inseparable_warning(
    base: AdjustmentResult, final: list[RobustObservation]
) -> tuple[str, tuple[int, ...]]:
    """The warning for a most down-weighted observation whose w-test others share."""
    lowest = min((o for o in final if o.weight < 1.0), key=lambda o: o.weight, default=None)
    if lowest is None:
        return "", ()
    by_line = {o.line: o for o in base.observations}
    first = by_line.get(lowest.line)
    if first is None or not first.inseparable:
        return "", ()
    group = tuple(sorted({lowest.line, *first.inseparable}))
    return (
        f"the most down-weighted observation, line {lowest.line}, cannot be told apart from the "
        f"others of its group: {describe(base, group)} are tested by the same check, so the data "
        "cannot tell which of them is wrong. Re-observe them, or check the field notes",
        group,
    )
