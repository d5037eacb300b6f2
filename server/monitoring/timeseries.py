"""Time series of one mark's component over three or more epochs.

Weighted least squares (weights 1/σ_k², σ_k the epoch's adjusted standard deviation) of

    y(t) = c + r·(t − t̄)/365.25 d + a·sin(2πt/T) + b·cos(2πt/T),

t in days from the first epoch, T the period the user gives (the periodic term is left out
without one).  With redundancy ϱ = n − u > 0 the variance factor s² = vᵀPv/ϱ scales the
cofactors and the tests take Student's t(ϱ) and F(·, ϱ); with ϱ = 0 the epochs' σ are taken as
known (s² = 1, normal and χ² quantiles).

- rate: t = r/σ_r against t(1 − α/2; ϱ);
- periodic term: amplitude A = √(a² + b²), phase φ = atan2(b, a) (y = A·sin(2πt/T + φ)),
  σ by linear propagation; F = ((Ω₀ − Ω)/2)/s² against F(1 − α; 2, ϱ), Ω₀ the vᵀPv of the
  fit without the periodic term;
- prediction at a time: ŷ = x·p̂, σ_ŷ² = s²·x·Q·xᵀ, interval ŷ ± t(1 − α/2; ϱ)·σ_ŷ
  (the model's value; a new epoch's own σ is not added);
- movement since the first epoch m = ŷ(t) − ŷ(t₁); the alarm rings when
  |m| − t(P; ϱ)·σ_m > threshold (one-sided, P the confidence).

Sources (recalled from memory): the harmonic regression and its F-test of added terms are
the general linear hypothesis, e.g. Koch, *Parameter Estimation and Hypothesis Testing in
Linear Models* (1999); Caspary (1987) for kinematic models of deformation.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import scipy.stats

DAYS_PER_YEAR = 365.25


@dataclass(frozen=True, slots=True, kw_only=True)
class PeriodicTerm:
    period_days: float
    a: float
    b: float
    amplitude: float
    sd_amplitude: float
    #: degrees, y = A·sin(2π·t/T + φ) with t in days from the first epoch
    phase: float
    sd_phase: float
    statistic: float | None
    critical: float | None
    significant: bool


@dataclass(frozen=True, slots=True, kw_only=True)
class Prediction:
    days: float
    value: float
    sd: float
    lower: float
    upper: float
    #: ŷ(t) − ŷ(t₁) and its σ; alarm as in the module docstring
    movement: float
    sd_movement: float
    alarm: bool


@dataclass(frozen=True, slots=True, kw_only=True)
class SeriesFit:
    """The fit of one component of one mark."""

    mark: str
    component: str
    epochs: int
    redundancy: int
    variance_factor: float
    offset: float
    #: length unit per year, and its σ and t-test
    rate: float
    sd_rate: float
    rate_statistic: float
    rate_critical: float
    rate_significant: bool
    periodic: PeriodicTerm | None
    #: fitted values and residuals at the epochs
    fitted: tuple[float, ...]
    residuals: tuple[float, ...]
    prediction: Prediction | None
    #: the epochs (days from the first), the adjusted values and their sd, for plotting
    days: tuple[float, ...] = ()
    values: tuple[float, ...] = ()
    sd: tuple[float, ...] = ()
    #: the fitted curve sampled between the first and the last epoch: (day, value) pairs
    curve: tuple[tuple[float, float], ...] = ()


#: Points of the fitted curve drawn between the first and the last epoch.
CURVE_SAMPLES = 121


def design(days: np.ndarray, period_days: float | None, mean_days: float) -> np.ndarray:
    """Columns 1, (t − t̄)/year, and with a period sin(2πt/T), cos(2πt/T)."""
    columns = [np.ones_like(days), (days - mean_days) / DAYS_PER_YEAR]
    if period_days is not None:
        angle = 2.0 * math.pi * days / period_days
        columns += [np.sin(angle), np.cos(angle)]
    return np.column_stack(columns)


def _solve(a: np.ndarray, y: np.ndarray, sd: np.ndarray) -> tuple[np.ndarray, np.ndarray, float]:
    aw, yw = a / sd[:, None], y / sd
    q = np.linalg.inv(aw.T @ aw)
    p = q @ (aw.T @ yw)
    v = yw - aw @ p
    return p, q, float(v @ v)


def fit_series(
    mark: str,
    component: str,
    days: np.ndarray,
    values: np.ndarray,
    sd: np.ndarray,
    *,
    period_days: float | None = None,
    alpha: float = 0.05,
    confidence: float = 0.95,
    predict_days: float | None = None,
    threshold: float | None = None,
) -> SeriesFit:
    """Fit one series (``days`` from the first epoch); the periodic term needs 5 epochs."""
    days, values, sd = (np.asarray(x, dtype=float) for x in (days, values, sd))
    n = days.size
    if period_days is not None and n < 5:
        period_days = None
    mean_days = float(days.mean())
    a = design(days, period_days, mean_days)
    p, q, omega = _solve(a, values, sd)
    dof = n - a.shape[1]
    s2 = max(omega / dof, 1e-300) if dof > 0 else 1.0  # an exact fit: no 0/0
    t_two = _t(1.0 - alpha / 2.0, dof)
    sd_rate = math.sqrt(s2 * q[1, 1])
    rate_stat = abs(p[1]) / sd_rate if sd_rate > 0 else math.inf
    periodic = None
    if period_days is not None:
        _, _, omega0 = _solve(a[:, :2], values, sd)
        periodic = _periodic(p, q, s2, omega0 - omega, dof, alpha, period_days)
    prediction = None
    if predict_days is not None:
        prediction = _predict(
            p,
            q,
            s2,
            dof,
            predict_days,
            float(days[0]),
            period_days,
            mean_days,
            confidence,
            alpha,
            threshold,
        )
    fitted = a @ p
    # enough samples that a yearly term over two years draws as a smooth line
    dense = np.linspace(float(days.min()), float(days.max()), CURVE_SAMPLES)
    curve_values = design(dense, period_days, mean_days) @ p
    return SeriesFit(
        mark=mark,
        component=component,
        epochs=n,
        redundancy=dof,
        variance_factor=s2,
        offset=float(p[0]),
        rate=float(p[1]),
        sd_rate=sd_rate,
        rate_statistic=float(rate_stat),
        rate_critical=t_two,
        rate_significant=bool(rate_stat > t_two),
        periodic=periodic,
        fitted=tuple(float(x) for x in fitted),
        residuals=tuple(float(x) for x in values - fitted),
        prediction=prediction,
        days=tuple(float(x) for x in days),
        values=tuple(float(x) for x in values),
        sd=tuple(float(x) for x in sd),
        curve=tuple(zip(dense.tolist(), curve_values.tolist())),
    )


def _t(probability: float, dof: int) -> float:
    if dof <= 0:
        return float(scipy.stats.norm.ppf(probability))
    return float(scipy.stats.t.ppf(probability, dof))


def _periodic(
    p: np.ndarray,
    q: np.ndarray,
    s2: float,
    reduction: float,
    dof: int,
    alpha: float,
    period_days: float,
) -> PeriodicTerm:
    a, b = float(p[2]), float(p[3])
    amplitude = math.hypot(a, b)
    cov = s2 * q[2:4, 2:4]
    if amplitude > 0.0:
        j_amp = np.array([a, b]) / amplitude
        j_phase = np.array([-b, a]) / amplitude**2
        sd_amp = math.sqrt(float(j_amp @ cov @ j_amp))
        sd_phase = math.degrees(math.sqrt(float(j_phase @ cov @ j_phase)))
    else:
        sd_amp, sd_phase = math.sqrt(float(np.trace(cov)) / 2.0), 180.0
    statistic = reduction / 2.0 / s2
    if dof > 0:
        critical = float(scipy.stats.f.ppf(1.0 - alpha, 2, dof))
    else:
        critical = float(scipy.stats.chi2.ppf(1.0 - alpha, 2)) / 2.0
    return PeriodicTerm(
        period_days=period_days,
        a=a,
        b=b,
        amplitude=amplitude,
        sd_amplitude=sd_amp,
        phase=math.degrees(math.atan2(b, a)),
        sd_phase=sd_phase,
        statistic=statistic,
        critical=critical,
        significant=statistic > critical,
    )


def _predict(
    p: np.ndarray,
    q: np.ndarray,
    s2: float,
    dof: int,
    when: float,
    first: float,
    period_days: float | None,
    mean_days: float,
    confidence: float,
    alpha: float,
    threshold: float | None,
) -> Prediction:
    rows = design(np.array([when, first]), period_days, mean_days)
    x, x0 = rows[0], rows[1]
    value = float(x @ p)
    sd = math.sqrt(s2 * float(x @ q @ x))
    half = _t(1.0 - alpha / 2.0, dof) * sd
    g = x - x0
    movement = float(g @ p)
    sd_move = math.sqrt(s2 * float(g @ q @ g))
    alarm = False
    if threshold is not None:
        alarm = abs(movement) - _t(confidence, dof) * sd_move > threshold
    return Prediction(
        days=when,
        value=value,
        sd=sd,
        lower=value - half,
        upper=value + half,
        movement=movement,
        sd_movement=sd_move,
        alarm=alarm,
    )
