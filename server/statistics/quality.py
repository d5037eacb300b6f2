"""Statistics of the adjustment: small pure functions, one formula each.

Notation: v residuals, σ a priori standard deviations (σ₀ = 1 a priori),
P = diag(1/σ²), Qxx the cofactor matrix of the unknowns, r redundancy.
References: Baarda (1968), *A Testing Procedure for Use in Geodetic
Networks*, Netherlands Geodetic Commission, New Series 2(5) for the w-test and
minimal detectable bias; Pope (1976), NOAA Technical Report NOS 65 NGS 1 for
the tau distribution.
"""

from __future__ import annotations

import math

import numpy as np
import scipy.special

# The quantiles below call the same special functions as scipy.stats' chi2, norm and f
# distributions (identical numbers) without importing scipy.stats, which costs about
# half a second at every start of the command line.


def redundancy_numbers(adjusted_cofactor: np.ndarray, sigmas: np.ndarray) -> np.ndarray:
    """r_i = (Qvv·P)_ii = 1 − (A·Qxx·Aᵀ)_ii / σ_i², from the engine's (A·Qxx·Aᵀ)_ii."""
    explained = adjusted_cofactor / sigmas**2
    # rounding can push a fully controlled or uncontrolled row past [0, 1]
    return np.clip(1.0 - explained, 0.0, 1.0)


def weighted_square_sum(residuals: np.ndarray, sigmas: np.ndarray) -> float:
    """vᵀPv."""
    return float(np.sum((residuals / sigmas) ** 2))


def variance_factor(vtpv: float, redundancy: int) -> float | None:
    """σ̂₀² = vᵀPv / r; None when r = 0."""
    return vtpv / redundancy if redundancy > 0 else None


def chi_square_bounds(redundancy: int, alpha: float) -> tuple[float, float]:
    """Two-sided χ² acceptance region (χ²_{α/2}(r), χ²_{1−α/2}(r)) for vᵀPv."""
    return (
        _chi2_ppf(alpha / 2.0, redundancy),
        _chi2_ppf(1.0 - alpha / 2.0, redundancy),
    )


def normal_critical_value(alpha: float) -> float:
    """Two-sided critical value z_{1−α/2} of the standard normal distribution."""
    return float(scipy.special.ndtri(1.0 - alpha / 2.0))


def non_centrality(alpha: float, power: float) -> float:
    """λ₀ = (z_{1−α/2} + z_{power})², Baarda's approximation for the MDB."""
    return (normal_critical_value(alpha) + float(scipy.special.ndtri(power))) ** 2


def w_statistics(residuals: np.ndarray, sigmas: np.ndarray, redundancy: np.ndarray) -> np.ndarray:
    """w_i = v_i / (σ_i·√r_i), Baarda's standardized residual (a priori σ₀ = 1)."""
    return residuals / (sigmas * np.sqrt(redundancy))


def minimal_detectable_bias(
    sigmas: np.ndarray, redundancy: np.ndarray, lambda0: float
) -> np.ndarray:
    """∇_i = σ_i·√(λ₀ / r_i)."""
    return sigmas * np.sqrt(lambda0 / redundancy)


def ellipse_factor(confidence: float, redundancy: int, estimated: bool = True) -> float:
    """Scale from the standard ellipse to the confidence ellipse.

    √(2·F(confidence; 2, r)) when the ellipse is scaled by σ̂₀² estimated on r degrees of
    freedom; √χ²(confidence; 2) (2.4477 at 95 %) when the variance is taken as known,
    the a priori σ₀² = 1 (``estimated`` false, or r = 0).
    """
    if redundancy <= 0 or not estimated:
        return math.sqrt(_chi2_ppf(confidence, 2))
    return math.sqrt(2.0 * float(scipy.special.fdtri(2, redundancy, confidence)))


def interval_factor(confidence: float, redundancy: int) -> float:
    """Scale from a standard deviation to a two-sided confidence half-interval of one quantity.

    √F(confidence; 1, r) (Student's t quantile at (1 + confidence)/2) when σ₀²
    is estimated on r degrees of freedom, the normal quantile (1.960 at 95 %)
    when r = 0; the one-dimensional counterpart of ``ellipse_factor``.
    """
    if redundancy <= 0:
        return math.sqrt(_chi2_ppf(confidence, 1))
    return math.sqrt(float(scipy.special.fdtri(1, redundancy, confidence)))


def precision_variance(method: str, variance: float | None) -> tuple[float, bool]:
    """(σ₀² that scales Qxx, whether it is the estimate σ̂₀²) for ``tests precision=``.

    posterior: σ̂₀²; prior: 1; larger: max(σ̂₀², 1), so precisions never look better than
    the a priori model.  Without redundancy σ̂₀² does not exist and the a priori 1 is used.
    """
    if variance is None or method == "prior" or (method == "larger" and variance <= 1.0):
        return 1.0, False
    return variance, True


def standard_ellipse(covariance: np.ndarray) -> tuple[float, float, float]:
    """Semi-axes and azimuth of the major axis (degrees in [0, 180)) of a 2×2 (E, N) covariance.

    λ = (σ_E² + σ_N²)/2 ± √(((σ_N² − σ_E²)/2)² + σ_EN²);  tan 2t = 2σ_EN / (σ_N² − σ_E²),
    t clockwise from grid north.
    """
    see, sen, snn = float(covariance[0, 0]), float(covariance[0, 1]), float(covariance[1, 1])
    mean = 0.5 * (see + snn)
    radius = math.hypot(0.5 * (snn - see), sen)
    major = math.sqrt(max(mean + radius, 0.0))
    minor = math.sqrt(max(mean - radius, 0.0))
    azimuth = math.degrees(0.5 * math.atan2(2.0 * sen, snn - see)) % 180.0
    return major, minor, azimuth


def _chi2_ppf(q: float, degrees: int) -> float:
    """χ² quantile: 2·P⁻¹(k/2, q), P the regularized lower incomplete gamma function."""
    return float(2.0 * scipy.special.gammaincinv(degrees / 2.0, q))


def standard_ellipses(
    var_east: np.ndarray, cov_en: np.ndarray, var_north: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """``standard_ellipse`` for many 2×2 covariances at once (same formulas)."""
    mean = 0.5 * (var_east + var_north)
    radius = np.hypot(0.5 * (var_north - var_east), cov_en)
    major = np.sqrt(np.maximum(mean + radius, 0.0))
    minor = np.sqrt(np.maximum(mean - radius, 0.0))
    azimuth = np.mod(
        0.5 * np.arctan2(2.0 * cov_en, var_north - var_east) * (180.0 / math.pi), 180.0
    )
    return major, minor, azimuth
