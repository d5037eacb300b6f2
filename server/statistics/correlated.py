"""Tests for blocks of correlated observations, such as the three components of a baseline.

For one block of k observations with residuals v, weight block P = Σ⁻¹ (a priori σ₀ = 1)
and cofactor block Qvv of the residuals:

- redundancy of component i: (Qvv·P)_ii;
- Baarda's w for component i, the test of a bias in that component alone while the
  others keep their correlation:  w_i = (P·v)_i / √((P·Qvv·P)_ii).  It is standard normal
  when the model holds, and the usual v_i / (σ_i·√r_i) when P is diagonal;
- its minimal detectable bias ∇_i = √(λ₀ / (P·Qvv·P)_ii), in the units of v;
- the estimated bias of that component, −(P·v)_i / (P·Qvv·P)_ii: the least-squares size of a
  blunder in it alone (residual = adjusted − observed), −v_i/r_i when P is diagonal;
- the block test T = vᵀ·Qvv⁺·v (σ₀² = 1), whose critical value is the χ²(k) quantile at
  1 − α.  T is χ²(rank Qvv) when the model holds.

Components whose redundancy is below ``UNCONTROLLED`` are left out of T: their residual
says nothing about a blunder in them.  The pseudo-inverse is taken of the whitened block
M = W·Qvv·W (W = P^½), whose eigenvalues lie in [0, 1] because P·Qvv is a part of an
idempotent matrix; so the cut-off for "zero" does not depend on units.  For v in the
range of Qvv (always so for least-squares residuals), (W·v)ᵀ·M⁺·(W·v) equals vᵀ·Qvv⁺·v.

Everything works on stacks: v (n, k), P and Qvv (n, k, k).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import scipy.special

#: Redundancy below which a component is uncontrolled (the contract's value).
UNCONTROLLED = 0.001
#: Eigenvalues of the whitened Qvv block below this count as zero (they lie in [0, 1]).
_RANK_CUTOFF = 1e-9


@dataclass(frozen=True, slots=True)
class ComponentTests:
    """Per-component figures of n blocks of k components: arrays of shape (n, k)."""

    redundancy: np.ndarray
    w: np.ndarray  # NaN where uncontrolled
    mdb: np.ndarray  # units of v; NaN where uncontrolled
    estimated_bias: np.ndarray  # units of v; NaN where uncontrolled
    controlled: np.ndarray  # bool
    flagged: np.ndarray  # bool: |w| above the critical value, controlled components only


@dataclass(frozen=True, slots=True)
class BlockTests:
    """The test of each whole block: arrays of shape (n,)."""

    statistic: np.ndarray
    rank: np.ndarray  # components the statistic is made of (after leaving some out)
    critical: float  # χ²(k) quantile at 1 − α
    flagged: np.ndarray  # bool


def component_tests(
    v: np.ndarray, weight: np.ndarray, qvv: np.ndarray, lambda0: float, critical_w: float
) -> ComponentTests:
    """Redundancy, w, MDB and flags of every component of every block."""
    v, weight, qvv = _stacks(v, weight, qvv)
    redundancy = np.einsum("nij,nji->ni", qvv, weight)
    pqp = np.einsum("nii->ni", weight @ qvv @ weight)
    controlled = redundancy >= UNCONTROLLED
    # an uncontrolled component can have (P·Qvv·P)_ii of 0: divide by 1 and mask instead
    safe = np.where(controlled & (pqp > 0.0), pqp, 1.0)
    controlled &= pqp > 0.0
    pv = np.einsum("nij,nj->ni", weight, v)
    w = np.where(controlled, pv / np.sqrt(safe), np.nan)
    mdb = np.where(controlled, np.sqrt(lambda0 / safe), np.nan)
    bias = np.where(controlled, -pv / safe, np.nan)
    flagged = controlled & (np.abs(np.where(controlled, w, 0.0)) > critical_w)
    return ComponentTests(
        redundancy=redundancy,
        w=w,
        mdb=mdb,
        estimated_bias=bias,
        controlled=controlled,
        flagged=flagged,
    )


def block_tests(v: np.ndarray, weight: np.ndarray, qvv: np.ndarray, alpha: float) -> BlockTests:
    """T = vᵀ·Qvv⁺·v per block, uncontrolled components left out, against χ²(k) at 1 − α."""
    v, weight, qvv = _stacks(v, weight, qvv)
    k = v.shape[1]
    redundancy = np.einsum("nij,nji->ni", qvv, weight)
    keep = (redundancy >= UNCONTROLLED).astype(float)
    root = _symmetric_root(weight)
    # leaving a component out = zeroing its row and column of the whitened block
    whitened = root @ qvv @ root * keep[:, :, None] * keep[:, None, :]
    u = np.einsum("nij,nj->ni", root, v) * keep
    values, vectors = np.linalg.eigh(0.5 * (whitened + np.swapaxes(whitened, 1, 2)))
    nonzero = values > _RANK_CUTOFF
    inverse = np.where(nonzero, 1.0 / np.where(nonzero, values, 1.0), 0.0)
    projected = np.einsum("nji,nj->ni", vectors, u)
    statistic = np.sum(projected * projected * inverse, axis=1)
    critical = chi_square_quantile(1.0 - alpha, k)
    return BlockTests(
        statistic=statistic,
        rank=nonzero.sum(axis=1),
        critical=critical,
        flagged=statistic > critical,
    )


def chi_square_quantile(q: float, degrees: int) -> float:
    """χ² quantile 2·P⁻¹(k/2, q) (the special function scipy.stats.chi2.ppf calls)."""
    return float(2.0 * scipy.special.gammaincinv(degrees / 2.0, q))


def _symmetric_root(matrices: np.ndarray) -> np.ndarray:
    """P^½ of symmetric positive (semi)definite matrices (n, k, k)."""
    values, vectors = np.linalg.eigh(matrices)
    roots = np.sqrt(np.maximum(values, 0.0))
    return (vectors * roots[:, None, :]) @ np.swapaxes(vectors, 1, 2)


def _stacks(
    v: np.ndarray, weight: np.ndarray, qvv: np.ndarray
) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The three inputs as float stacks of matching shapes (one block may come unstacked)."""
    v = np.asarray(v, dtype=float)
    weight = np.asarray(weight, dtype=float)
    qvv = np.asarray(qvv, dtype=float)
    if v.ndim == 1:
        v, weight, qvv = v[None, :], weight[None, :, :], qvv[None, :, :]
    n, k = v.shape
    if weight.shape != (n, k, k) or qvv.shape != (n, k, k):
        raise ValueError(
            f"blocks must be v (n, k), P and Qvv (n, k, k); got {v.shape}, "
            f"{weight.shape}, {qvv.shape}"
        )
    return v, weight, qvv
