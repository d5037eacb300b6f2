"""Leveling (1D) adjustments checked against closed-form solutions and numpy.

Closed forms are the standard results of a single loop, a run between two
fixed benchmarks, a weighted mean and repeated measurements (any adjustment
text, e.g. Ghilani, *Adjustment Computations*, 6th ed., Wiley 2017; recalled
from memory, and re-derived in each docstring; docs/references.md "Closed forms of small
networks").
"""

from __future__ import annotations

import math

import numpy as np
import pytest

from server.errors import NetworkError
from server.pipeline import adjust_fieldbook


def _result(text: str):
    return adjust_fieldbook(text, source="test.fieldbook")


def _point(result, name):
    return next(p for p in result.points if p.name == name)


LOOP = """
fieldbook 1
defaults level=1.0mm/sqrtkm
point A height=50.0000 fix
level A B  +1.2000 len=0.40km
level B C  +0.8000 len=0.60km
level C D  -0.7000 len=0.50km
level D A  -1.2880 len=0.50km
"""


def test_single_loop_corrections_proportional_to_section_length():
    """Weights 1/L: each section takes −w·L_i/ΣL of the misclosure w; r_i = L_i/ΣL."""
    result = _result(LOOP)
    lengths = np.array([0.40, 0.60, 0.50, 0.50])
    misclosure = 1.2 + 0.8 - 0.7 - 1.288  # +0.012 m around the loop
    residuals = np.array([o.residual for o in result.observations])
    np.testing.assert_allclose(residuals, -misclosure * lengths / lengths.sum(), atol=1e-12)
    redundancy = np.array([o.redundancy for o in result.observations])
    np.testing.assert_allclose(redundancy, lengths / lengths.sum(), atol=1e-12)
    assert result.summary.redundancy == 1
    assert math.isclose(redundancy.sum(), 1.0, abs_tol=1e-12)
    # the loop misclosure is reported before adjustment, same sign as observed
    (loop,) = result.misclosures
    assert loop.kind == "loop"
    assert loop.points[0] == loop.points[-1] == "A"
    assert math.isclose(abs(loop.misclosure), 0.012, abs_tol=1e-12)
    assert math.isclose(loop.length, 2000.0)


def test_single_loop_adjusted_heights_close_exactly():
    result = _result(LOOP)
    b, c, d = (_point(result, n).height for n in "BCD")
    assert math.isclose(b, 50.0 + 1.2 - 0.012 * 0.4 / 2.0, abs_tol=1e-10)
    assert math.isclose(c, b + 0.8 - 0.012 * 0.6 / 2.0, abs_tol=1e-10)
    assert math.isclose(d, c - 0.7 - 0.012 * 0.5 / 2.0, abs_tol=1e-10)


RUN = """
defaults level=2.0mm/sqrtkm
point BM-WEST height=10.0000 fix
point BM-EAST height=12.0000 fix
level BM-WEST T1 +0.5000 len=1.0km
level T1 T2       +0.7000 len=2.0km
level T2 BM-EAST  +0.8100 len=1.0km
"""


def test_run_between_fixed_benchmarks_interpolates_by_cumulative_length():
    """The misclosure +10 mm is distributed in proportion to the cumulative distance; r = 1."""
    result = _result(RUN)
    assert result.summary.redundancy == 1
    assert math.isclose(_point(result, "T1").height, 10.5 - 0.010 * 1 / 4, abs_tol=1e-10)
    assert math.isclose(_point(result, "T2").height, 11.2 - 0.010 * 3 / 4, abs_tol=1e-10)
    (run,) = result.misclosures
    assert run.kind == "run"
    assert {run.points[0], run.points[-1]} == {"BM-WEST", "BM-EAST"}
    assert math.isclose(abs(run.misclosure), 0.010, abs_tol=1e-12)


def test_point_joined_to_k_benchmarks_is_the_weighted_mean():
    """One unknown from k fixed benchmarks: the weighted mean, r = k − 1, σ² = σ̂₀²/Σp."""
    text = """
    defaults level=1mm
    point B1 height=100.000 fix
    point B2 height=101.000 fix
    point B3 height=99.000 fix
    level B1 P +2.0040 sd=1mm
    level B2 P +0.9990 sd=2mm
    level B3 P +3.0020 sd=4mm
    """
    result = _result(text)
    estimates = np.array([102.004, 101.999, 102.002])
    weights = 1 / np.array([1e-3, 2e-3, 4e-3]) ** 2
    mean = float(np.sum(weights * estimates) / weights.sum())
    assert math.isclose(_point(result, "P").height, mean, abs_tol=1e-11)
    assert result.summary.redundancy == 2
    vtpv = float(np.sum(weights * (mean - estimates) ** 2))
    assert math.isclose(result.summary.variance_factor, vtpv / 2, rel_tol=1e-9)
    sd = math.sqrt(vtpv / 2 / weights.sum())
    assert math.isclose(_point(result, "P").sd_height, sd, rel_tol=1e-9)


def test_repeated_measurements_give_sample_variance_and_qvv():
    """n equal-weight repeats: σ̂₀² = Σv²/(n−1)/σ², redundancy numbers (n−1)/n each."""
    values = [1.2345, 1.2351, 1.2339, 1.2348, 1.2342]
    lines = "\n".join(f"level BM X {v:+.4f}" for v in values)
    result = _result(f"defaults level=0.5mm\npoint BM height=0 fix\n{lines}\n")
    n = len(values)
    sample_var = float(np.var(values, ddof=1))
    assert math.isclose(result.summary.variance_factor, sample_var / 0.0005**2, rel_tol=1e-9)
    for o in result.observations:
        assert math.isclose(o.redundancy, (n - 1) / n, rel_tol=1e-12)
    assert math.isclose(_point(result, "X").height, float(np.mean(values)), abs_tol=1e-12)


def _random_network(rng: np.random.Generator, n_points: int, n_obs: int):
    names = [f"M{k}" for k in range(n_points)]
    heights = rng.uniform(90, 130, n_points)
    pairs = [(k, k + 1) for k in range(n_points - 1)]  # a connected chain
    while len(pairs) < n_obs:
        i, j = rng.choice(n_points, 2, replace=False)
        pairs.append((int(i), int(j)))
    lengths = rng.uniform(0.1, 2.0, len(pairs))
    sigmas = 1e-3 * np.sqrt(lengths)
    observed = np.array([heights[j] - heights[i] for i, j in pairs]) + rng.normal(0, sigmas)
    return names, heights, pairs, lengths, sigmas, observed


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_random_networks_match_numpy_weighted_least_squares(seed):
    """Heights, σ, residuals and redundancy numbers agree with a direct numpy solution."""
    rng = np.random.default_rng(seed)
    names, heights, pairs, lengths, _, observed = _random_network(rng, 25, 60)
    # use exactly the values the field book carries
    heights[0] = round(heights[0], 6)
    observed, lengths = np.round(observed, 9), np.round(lengths, 6)
    text = ["defaults level=1.0mm/sqrtkm", f"point {names[0]} height={heights[0]:.6f} fix"]
    text += [
        f"level {names[i]} {names[j]} {dh:+.9f} len={length:.6f}km"
        for (i, j), dh, length in zip(pairs, observed, lengths)
    ]
    result = _result("\n".join(text))

    # the same model assembled directly: unknowns M1..M24, M0 held fixed
    a = np.zeros((len(pairs), len(names) - 1))
    l = observed.copy()
    for row, (i, j) in enumerate(pairs):
        for k, sign in ((i, -1.0), (j, 1.0)):
            if k == 0:
                l[row] -= sign * heights[0]
            else:
                a[row, k - 1] += sign
    w = 1 / (1e-3 * np.sqrt(lengths)) ** 2
    sw = np.sqrt(w)
    x, *_ = np.linalg.lstsq(a * sw[:, None], l * sw, rcond=None)
    v = a @ x - l
    r = len(pairs) - a.shape[1]
    s0 = float(v @ (w * v) / r)
    qxx = np.linalg.inv(a.T @ (a * w[:, None]))
    r_i = 1 - np.einsum("ij,jk,ik->i", a, qxx, a) * w

    for k, name in enumerate(names[1:]):
        p = _point(result, name)
        assert math.isclose(p.height, x[k], abs_tol=1e-9)
        assert math.isclose(p.sd_height, math.sqrt(s0 * qxx[k, k]), rel_tol=1e-7)
    np.testing.assert_allclose([o.residual for o in result.observations], v, atol=1e-10)
    np.testing.assert_allclose([o.redundancy for o in result.observations], r_i, atol=1e-9)
    assert math.isclose(result.summary.variance_factor, s0, rel_tol=1e-8)
    assert math.isclose(sum(o.redundancy for o in result.observations), r, rel_tol=1e-9)


def test_missing_height_datum_names_the_points():
    text = "defaults level=1mm\nlevel P Q +1.0\nlevel Q R +1.0\nlevel R P -2.001\n"
    with pytest.raises(NetworkError) as caught:
        _result(text)
    assert set(caught.value.points) == {"P", "Q", "R"}
    assert "no height datum" in str(caught.value)


def test_part_without_control_is_named():
    text = """
    defaults level=1mm
    point BM height=5 fix
    level BM A +1.0
    level X Y +0.5
    level Y X -0.5
    """
    with pytest.raises(NetworkError) as caught:
        _result(text)
    assert set(caught.value.points) == {"X", "Y"}


def test_weighted_benchmark_counts_in_redundancy_and_moves():
    """A weighted benchmark is an observation of its height: r grows by one, the mark adjusts."""
    text = """
    defaults level=1mm
    point BM1 height=100.000 fix
    point BM2 height=101.010 sd=2mm
    level BM1 P +0.5000
    level P BM2 +0.5000
    """
    result = _result(text)
    assert result.summary.redundancy == 1
    bm2 = _point(result, "BM2")
    assert bm2.weighted == "h" and bm2.fixed == ""
    # misclosure 10 mm shared in proportion to variances 1:1:4
    assert math.isclose(bm2.height, 101.010 - 0.010 * 4 / 6, abs_tol=1e-10)
    assert bm2.sd_height > 0


def test_ignored_observation_gets_residual_but_no_statistics():
    text = LOOP + "level A C +2.0500 len=1.0km ignore\n"
    result = _result(text)
    ignored = result.observations[-1]
    assert ignored.ignored and not ignored.flagged
    assert ignored.redundancy is None and ignored.w is None and ignored.mdb is None
    c = _point(result, "C").height
    assert math.isclose(ignored.adjusted, c - 50.0, abs_tol=1e-12)
    assert math.isclose(ignored.residual, ignored.adjusted - 2.05, abs_tol=1e-12)
    assert result.summary.used_observations == 4 and result.summary.observations == 5


def test_spur_observation_is_uncontrolled_and_warned():
    """A side shot to a new mark has r = 0: no w, no MDB, never flagged, named in a warning."""
    result = _result(LOOP + "level C SPUR +0.3000 len=0.1km\n")
    spur = result.observations[-1]
    assert spur.redundancy < 0.001
    assert spur.w is None and spur.mdb is None and not spur.flagged
    assert any("uncontrolled" in w and "line" in w for w in result.warnings)


def test_blunder_is_flagged_by_w_test():
    """A 20 mm blunder in one section of a well-checked network exceeds the 3.29 critical w."""
    rng = np.random.default_rng(7)
    text = ["defaults level=1.0mm/sqrtkm", "point M0 height=100 fix"]
    heights = {f"M{k}": 100 + rng.uniform(-5, 5) for k in range(8)}
    heights["M0"] = 100.0
    k = 0
    for i in range(8):
        for j in range(i + 1, 8):
            dh = heights[f"M{j}"] - heights[f"M{i}"] + rng.normal(0, 0.0005)
            if (i, j) == (2, 5):
                dh += 0.020
            text.append(f"level M{i} M{j} {dh:+.5f} len=0.25km")
            k += 1
    result = _result("\n".join(text))
    worst = max(result.observations, key=lambda o: abs(o.w or 0))
    assert (worst.from_point, worst.to) == ("M2", "M5")
    assert worst.flagged
    assert not result.summary.global_test.passed
