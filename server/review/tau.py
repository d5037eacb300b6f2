"""Pope's tau test: outlier detection when σ₀ is estimated from the adjustment itself.

τ_i = v_i / (σ̂₀·σ_i·√r_i) = w_i / σ̂₀, which follows the tau distribution with
r degrees of freedom: τ = t·√r / √(r − 1 + t²), t ~ Student t(r − 1)
(Pope, 1976, *The Statistics of Residuals and the Detection of Outliers*,
NOAA Technical Report NOS 65 NGS 1, eq. 6).

The per-observation level comes from an overall α over the n tested
observations by Bonferroni's rule, α_i = α/n (the practice described by
Lehmann, 2012, *J. Geodesy* 86:1137–1146).  Stationfit uses Bonferroni, not
Šidák; the two differ in the third decimal.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import scipy.stats

from server.results.result import AdjustmentResult


@dataclass(frozen=True, slots=True)
class TauObservation:
    """τ of one tested observation (by its field book line)."""

    line: int
    tau: float
    flagged: bool


@dataclass(frozen=True, slots=True)
class TauTest:
    """Pope's test of every controlled observation of one adjustment."""

    alpha: float
    tested: int
    redundancy: int
    critical: float
    observations: tuple[TauObservation, ...]

    @property
    def flagged_lines(self) -> tuple[int, ...]:
        """Lines whose |τ| exceeds the critical value, largest first."""
        flagged = sorted((o for o in self.observations if o.flagged), key=lambda o: -abs(o.tau))
        return tuple(o.line for o in flagged)


def tau_critical(alpha: float, tested: int, redundancy: int) -> float:
    """τ_crit = t·√r/√(r − 1 + t²) with t = t_{1 − α/(2n)}(r − 1)."""
    if redundancy < 2:
        raise ValueError("the tau test needs a redundancy of at least 2")
    t = float(scipy.stats.t.ppf(1.0 - alpha / tested / 2.0, redundancy - 1))
    return t * math.sqrt(redundancy) / math.sqrt(redundancy - 1 + t * t)


def tau_test(result: AdjustmentResult, alpha: float | None = None) -> TauTest | None:
    """Pope's test at overall level ``alpha`` (default: the global test's α); None when r < 2."""
    summary = result.summary
    if summary.variance_factor is None or summary.redundancy < 2 or summary.variance_factor <= 0:
        return None
    level = summary.alpha if alpha is None else alpha
    tested = [o for o in result.observations if o.w is not None]
    if not tested:
        return None
    critical = tau_critical(level, len(tested), summary.redundancy)
    sigma0 = math.sqrt(summary.variance_factor)
    observations = tuple(
        TauObservation(line=o.line, tau=o.w / sigma0, flagged=abs(o.w / sigma0) > critical)
        for o in tested
        if o.w is not None
    )
    return TauTest(
        alpha=level,
        tested=len(tested),
        redundancy=summary.redundancy,
        critical=critical,
        observations=observations,
    )
