"""Congruence test of two epochs, and the stepwise search for the marks that moved.

Both epochs' coordinates x₁, x₂ (n marks × k components) with cofactors Q₁, Q₂ (σ₀ = 1)
are brought onto one datum defined by the marks assumed stable, B, by the S-transformation

    S = I − H·(G_Bᵀ·H)⁻¹·G_Bᵀ,     d = S·(x₂ − x₁),     Q_d = S·(Q₁ + Q₂)·Sᵀ,

H the datum directions (translation in each component; in plan also the rotation about the
vertical, lever arms from the centroid) and G_B = H with the rows of marks outside B zeroed.
A datum difference between the two adjustments lies along H, so S removes it.
The global test of "no mark in B moved":

    Ω_B = d_Bᵀ·Q_d,B⁺·d_B,   h = rank Q_d,B,   T = Ω_B / (h·s₀²)  ~  F(h, f),

s₀² = (Ω₁ + Ω₂)/(r₁ + r₂) the pooled variance factor on f = r₁ + r₂ degrees of freedom
(with f = 0 the a priori s₀² = 1 and F(h, ∞) = χ²(h)/h).  When T exceeds the quantile the
mark whose removal from B lowers Ω_B most leaves B, the datum is defined on the rest and
the test repeats, until B is congruent or too small to test.  Every mark's displacement is
then read on the datum of the final B, with its own test d_iᵀ·Q_ii⁺·d_i/(k_i·s₀²) ~ F(k_i, f).

Sources (recalled from memory, not checked against the books): the global congruence test
and its stepwise localisation after Pelzer (1971, 1985); the S-transformation after Baarda
(1973); the presentation follows Caspary, *Concepts of Network and Deformation Analysis*
(1987), chapter on deformation analysis.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.stats

from server.statistics import quality as st

#: Relative eigenvalue below which a direction of Q counts as singular (rank and pseudo-inverse).
RANK_TOLERANCE = 1e-9
#: Floor of a variance factor, so that an exact fit gives a huge statistic, not 0/0.
TINY_VARIANCE = 1e-300


@dataclass(frozen=True, slots=True, kw_only=True)
class Step:
    """One global test on a set of marks assumed stable."""

    stable: tuple[str, ...]
    omega: float
    rank: int
    statistic: float
    critical: float
    passed: bool
    #: the mark taken out of the stable set after this step (None when it passed or stopped)
    removed: str | None


@dataclass(frozen=True, slots=True, kw_only=True)
class Displacement:
    """One mark's displacement d = x₂ − x₁ on the final datum, in the input's length unit."""

    mark: str
    stable: bool
    components: tuple[float, ...]
    #: standard deviations of the components (s₀²·Q_d)
    sd: tuple[float, ...]
    #: |d| of the plan components (2D/3D) or |dH| (1D), and its sd along d
    length: float
    sd_length: float
    #: standard ellipse of the plan components (semi-major, semi-minor, azimuth °), None in 1D
    ellipse: tuple[float, float, float] | None
    statistic: float | None
    critical: float | None
    significant: bool
    #: the movement exceeds the threshold at the chosen confidence (False without a threshold)
    alarm: bool = False


@dataclass(frozen=True, slots=True, kw_only=True)
class Congruence:
    """The whole comparison of two epochs."""

    dimension: int
    marks: tuple[str, ...]
    variance_factor: float
    degrees_of_freedom: int
    alpha: float
    steps: tuple[Step, ...]
    stable: tuple[str, ...]
    moved: tuple[str, ...]
    #: False when no set of at least ``minimum_stable`` marks passes the test
    congruent_set_found: bool
    displacements: tuple[Displacement, ...]


def datum_directions(dimension: int, plan: np.ndarray) -> np.ndarray:
    """H: unit translations per component and, in plan, the rotation about the centroid."""
    n = plan.shape[0]
    columns = []
    for c in range(dimension):
        column = np.zeros((n, dimension))
        column[:, c] = 1.0
        columns.append(column.ravel())
    if dimension >= 2:
        centred = plan - plan.mean(axis=0)
        spread = max(float(np.max(np.hypot(centred[:, 0], centred[:, 1]))), 1.0)
        column = np.zeros((n, dimension))
        column[:, 0] = centred[:, 1] / spread
        column[:, 1] = -centred[:, 0] / spread
        columns.append(column.ravel())
    return np.column_stack(columns)


def minimum_stable(dimension: int) -> int:
    """Fewest marks whose datum leaves something to test: 2 in every dimension."""
    del dimension
    return 2


def s_matrix(h: np.ndarray, stable_rows: np.ndarray) -> np.ndarray:
    """S = I − H·(G_Bᵀ·H)⁻¹·G_Bᵀ with G_B = H on the rows of the stable marks, zero elsewhere."""
    g = np.where(stable_rows[:, None], h, 0.0)
    return np.eye(h.shape[0]) - h @ np.linalg.solve(g.T @ h, g.T)


def pseudo_inverse(q: np.ndarray) -> tuple[np.ndarray, int]:
    """Q⁺ and rank Q of a symmetric positive semidefinite matrix, by its eigenvalues."""
    if q.size == 0:
        return q.copy(), 0
    values, vectors = np.linalg.eigh(0.5 * (q + q.T))
    keep = values > RANK_TOLERANCE * max(float(values.max()), 0.0)
    inverse = (vectors[:, keep] / values[keep]) @ vectors[:, keep].T
    return inverse, int(keep.sum())


def f_quantile(confidence: float, rank: int, dof: int) -> float:
    """F(confidence; rank, dof); with dof = 0 (variance known) χ²(confidence; rank)/rank."""
    if dof <= 0:
        return float(scipy.stats.chi2.ppf(confidence, rank)) / rank
    return float(scipy.stats.f.ppf(confidence, rank, dof))


def one_sided_quantile(confidence: float, dof: int) -> float:
    """Student's t (normal when dof = 0) one-sided quantile: the alarm's lower bound factor."""
    if dof <= 0:
        return float(scipy.stats.norm.ppf(confidence))
    return float(scipy.stats.t.ppf(confidence, dof))


def _rows(marks_mask: np.ndarray, dimension: int) -> np.ndarray:
    return np.repeat(marks_mask, dimension)


def _on_datum(
    dx: np.ndarray, q_sum: np.ndarray, h: np.ndarray, stable: np.ndarray, dimension: int
) -> tuple[np.ndarray, np.ndarray]:
    s = s_matrix(h, _rows(stable, dimension))
    return s @ dx, s @ q_sum @ s.T


def _omega(
    dx: np.ndarray, q_sum: np.ndarray, h: np.ndarray, stable: np.ndarray, dimension: int
) -> tuple[float, int]:
    d, q = _on_datum(dx, q_sum, h, stable, dimension)
    rows = _rows(stable, dimension)
    inverse, rank = pseudo_inverse(q[np.ix_(rows, rows)])
    d_b = d[rows]
    return float(d_b @ inverse @ d_b), rank


@dataclass(frozen=True, slots=True)
class EpochPair:
    """The inputs of one comparison, in one length unit: coordinates and cofactors (σ₀ = 1)."""

    marks: tuple[str, ...]
    dimension: int
    first: np.ndarray
    second: np.ndarray
    q_first: np.ndarray
    q_second: np.ndarray
    plan: np.ndarray
    vtpv: float
    dof: int


def congruence_test(
    pair: EpochPair,
    *,
    alpha: float = 0.05,
    threshold: float | None = None,
    confidence: float = 0.95,
) -> Congruence:
    """The global test, the stepwise localisation, and every mark's displacement."""
    k = pair.dimension
    dx = (pair.second - pair.first).ravel()
    q_sum = pair.q_first + pair.q_second
    h = datum_directions(k, pair.plan)
    s0sq = pair.vtpv / pair.dof if pair.dof > 0 else 1.0
    s0sq = max(s0sq, TINY_VARIANCE)  # residuals all zero: the tests say 'infinite'
    stable = np.ones(len(pair.marks), dtype=bool)
    steps: list[Step] = []
    found = False
    while True:
        omega, rank = _omega(dx, q_sum, h, stable, k)
        names = tuple(m for m, s in zip(pair.marks, stable) if s)
        if rank == 0:
            break
        statistic = omega / (rank * s0sq)
        critical = f_quantile(1.0 - alpha, rank, pair.dof)
        passed = statistic <= critical
        removed = None
        if not passed and int(stable.sum()) > minimum_stable(k):
            removed = _most_reducing(dx, q_sum, h, stable, k, pair.marks)
        steps.append(
            Step(
                stable=names,
                omega=omega,
                rank=rank,
                statistic=statistic,
                critical=critical,
                passed=passed,
                removed=removed,
            )
        )
        if passed:
            found = True
            break
        if removed is None:
            break
        stable[pair.marks.index(removed)] = False
    if not found:
        stable[:] = True  # no congruent set: displacements on the datum of all marks
    d, q = _on_datum(dx, q_sum, h, stable, k)
    displacements = tuple(
        _displacement(
            pair.marks[i],
            bool(stable[i]) and found,
            d[i * k : (i + 1) * k],
            s0sq * q[i * k : (i + 1) * k, i * k : (i + 1) * k],
            alpha,
            pair.dof,
            threshold,
            confidence,
        )
        for i in range(len(pair.marks))
    )
    return Congruence(
        dimension=k,
        marks=pair.marks,
        variance_factor=s0sq,
        degrees_of_freedom=pair.dof,
        alpha=alpha,
        steps=tuple(steps),
        stable=tuple(m for m, s in zip(pair.marks, stable) if s and found),
        moved=tuple(m for m, s in zip(pair.marks, stable) if not s),
        congruent_set_found=found,
        displacements=displacements,
    )


def _most_reducing(
    dx: np.ndarray,
    q_sum: np.ndarray,
    h: np.ndarray,
    stable: np.ndarray,
    k: int,
    marks: tuple[str, ...],
) -> str:
    best, best_omega = -1, math.inf
    for j in np.flatnonzero(stable):
        trial = stable.copy()
        trial[j] = False
        omega, _ = _omega(dx, q_sum, h, trial, k)
        if omega < best_omega:
            best, best_omega = int(j), omega
    return marks[best]


def _displacement(
    mark: str,
    stable: bool,
    d: np.ndarray,
    cov: np.ndarray,
    alpha: float,
    dof: int,
    threshold: float | None,
    confidence: float,
) -> Displacement:
    k = d.size
    plan = d[:2] if k >= 2 else d
    plan_cov = cov[:2, :2] if k >= 2 else cov
    length = float(np.linalg.norm(plan))
    if length > 0.0:
        unit = plan / length
        sd_length = math.sqrt(max(float(unit @ plan_cov @ unit), 0.0))
    else:
        sd_length = math.sqrt(max(float(np.max(np.diag(plan_cov))), 0.0))
    inverse, rank = pseudo_inverse(cov)
    statistic = critical = None
    significant = False
    if rank > 0:
        # cov already carries s₀², so the quadratic form divides by the rank only
        statistic = float(d @ inverse @ d) / rank
        critical = f_quantile(1.0 - alpha, rank, dof)
        significant = statistic > critical
    alarm = False
    if threshold is not None:
        q = one_sided_quantile(confidence, dof)
        alarm = length - q * sd_length > threshold
        if k == 3:  # plan and height are judged apart: a settlement is not a plan movement
            alarm = (
                alarm or abs(float(d[2])) - q * math.sqrt(max(float(cov[2, 2]), 0.0)) > threshold
            )
    return Displacement(
        mark=mark,
        stable=stable,
        components=tuple(float(x) for x in d),
        sd=tuple(math.sqrt(max(float(v), 0.0)) for v in np.diag(cov)),
        length=length,
        sd_length=sd_length,
        ellipse=st.standard_ellipse(cov[:2, :2]) if k >= 2 else None,
        statistic=statistic,
        critical=critical,
        significant=significant,
        alarm=alarm,
    )
