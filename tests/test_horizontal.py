"""Horizontal (2D) adjustments checked against scipy, geometry and simulation."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.optimize
import scipy.stats

from server.errors import NetworkError
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook
from tests.synthetic import grid_network


def _points(result):
    return {p.name: p for p in result.points}


def _reference_solution(text: str):
    """The same model solved independently with scipy.optimize.least_squares."""
    fb = parse_fieldbook(text)
    fixed = {p.name: (p.east, p.north) for p in fb.points if "en" in p.fixed}
    names = sorted(
        {n for o in fb.observations for n in (o.from_point, o.at or o.to, o.to)} - set(fixed)
    )
    rounds = sorted({o.round_line for o in fb.observations if o.round_line})
    col = {n: 2 * k for k, n in enumerate(names)}
    ocol = {r: 2 * len(names) + k for k, r in enumerate(rounds)}
    obs = [o for o in fb.observations if not o.ignored]
    sigma = np.array(
        # σ = √(a² + (b·D·10⁻⁶)²) for a + b ppm (no centering in these books)
        [
            math.hypot(o.sigma.constant, o.sigma.ppm * 1e-6 * o.value)
            if o.kind == "distance"
            else o.sigma.constant
            for o in obs
        ]
    )

    def position(x, n):
        return fixed[n] if n in fixed else (x[col[n]], x[col[n] + 1])

    def azimuth(x, a, b):
        (ea, na), (eb, nb) = position(x, a), position(x, b)
        return math.atan2(eb - ea, nb - na)

    def residuals(x):
        out = np.empty(len(obs))
        for k, o in enumerate(obs):
            if o.kind == "distance":
                value = math.dist(position(x, o.from_point), position(x, o.to)) - o.value
            else:
                if o.kind == "direction":
                    computed = azimuth(x, o.from_point, o.to) - x[ocol[o.round_line]]
                elif o.kind == "angle":
                    computed = azimuth(x, o.at, o.to) - azimuth(x, o.at, o.from_point)
                else:
                    computed = azimuth(x, o.from_point, o.to)
                value = math.remainder(computed - o.value, 2 * math.pi)
            out[k] = value / sigma[k]
        return out

    # start from the adjusted solution's neighbourhood is not allowed: use the adjustment's
    # own approximate values would couple the two; start from the truth-free centroid instead
    return fb, names, rounds, col, ocol, obs, sigma, residuals


@pytest.mark.parametrize("seed", [11, 12])
def test_matches_scipy_least_squares(seed):
    """Coordinates, residuals and standard deviations agree with scipy.optimize.least_squares."""
    rng = np.random.default_rng(seed)
    net = grid_network(rng, size=4)
    result = adjust_fieldbook(net.text)
    _, names, rounds, col, ocol, obs, sigma, residuals = _reference_solution(net.text)
    # start scipy 5 m and 0.5° away from the truth, independent of the engine's start values
    x0 = np.zeros(2 * len(names) + len(rounds))
    for n in names:
        x0[col[n]], x0[col[n] + 1] = net.truth[n][0] + 5.0, net.truth[n][1] - 5.0
    for line in rounds:
        first = next(o for o in obs if o.round_line == line)
        (ea, na), (eb, nb) = net.truth[first.from_point], net.truth[first.to]
        x0[ocol[line]] = math.atan2(eb - ea, nb - na) - first.value + 0.01
    ref = scipy.optimize.least_squares(
        residuals, x0, method="lm", xtol=1e-15, ftol=1e-15, gtol=1e-15
    )
    redundancy = len(obs) - len(x0)
    s0 = float(ref.fun @ ref.fun) / redundancy
    cov = s0 * np.linalg.inv(ref.jac.T @ ref.jac)

    assert result.summary.redundancy == redundancy
    assert result.summary.variance_factor == pytest.approx(s0, rel=1e-6)
    points = _points(result)
    for n in names:
        p = points[n]
        assert p.east == pytest.approx(ref.x[col[n]], abs=1e-6)  # metres
        assert p.north == pytest.approx(ref.x[col[n] + 1], abs=1e-6)
        assert p.sd_east == pytest.approx(math.sqrt(cov[col[n], col[n]]), rel=1e-4)
        assert p.sd_north == pytest.approx(math.sqrt(cov[col[n] + 1, col[n] + 1]), rel=1e-4)
    scale = np.array([3600 * 180 / math.pi if o.kind != "distance" else 1.0 for o in obs])
    ours = np.array([o.residual for o in result.observations if not o.ignored])
    np.testing.assert_allclose(
        ours, ref.fun * sigma * scale, atol=1e-4 * np.max(np.abs(ours)) + 1e-9
    )


def test_free_network_is_invariant_to_translation_and_rotation():
    """The same observations with approximate coordinates moved and rotated: same residuals,
    same variance factor, same distances between adjusted points."""
    rng = np.random.default_rng(5)
    base = grid_network(rng, size=3, fixed=(), give_approximate=True)
    moved = grid_network(
        np.random.default_rng(5),
        size=3,
        fixed=(),
        give_approximate=True,
        origin=(1000.0, 2000.0),
        rotation_deg=37.0,
    )
    a, b = adjust_fieldbook(base.text), adjust_fieldbook(moved.text)
    assert a.summary.variance_factor == pytest.approx(b.summary.variance_factor, rel=1e-8)
    np.testing.assert_allclose(
        [o.residual for o in a.observations], [o.residual for o in b.observations], atol=1e-6
    )
    pa, pb = _points(a), _points(b)
    for x, y in [("P0_0", "P2_2"), ("P0_1", "P1_2")]:
        da = math.dist((pa[x].east, pa[x].north), (pa[y].east, pa[y].north))
        db = math.dist((pb[x].east, pb[x].north), (pb[y].east, pb[y].north))
        assert da == pytest.approx(db, abs=1e-7)
    assert any("adjusted free" in w for w in a.warnings)
    # inner constraints: redundancy counts every observation against all unknowns minus the
    # defect (3)
    assert a.summary.redundancy == a.summary.used_observations - a.summary.unknowns + 3


def test_free_network_without_any_coordinates_still_adjusts():
    rng = np.random.default_rng(6)
    net = grid_network(rng, size=3, fixed=())
    fixed_version = grid_network(np.random.default_rng(6), size=3)
    free, held = adjust_fieldbook(net.text), adjust_fieldbook(fixed_version.text)
    # same observations, different datum: the residual sum of squares is the same only
    # where the held points add no constraint beyond the datum (three held points add some),
    # so compare shape: distances between adjusted points agree with the truth
    points = _points(free)
    for x, y in [("P0_0", "P2_2"), ("P0_2", "P2_0")]:
        d = math.dist((points[x].east, points[x].north), (points[y].east, points[y].north))
        assert d == pytest.approx(math.dist(net.truth[x], net.truth[y]), abs=0.01)
    assert held.summary.converged and free.summary.converged


def test_exact_observations_reproduce_the_truth():
    """Noise-free observations: start values computed by the program converge to the true points."""
    rng = np.random.default_rng(3)
    net = grid_network(rng, size=5, noise=False)
    result = adjust_fieldbook(net.text)
    for p in result.points:
        assert p.east == pytest.approx(net.truth[p.name][0], abs=2e-4)  # rounding of the file
        assert p.north == pytest.approx(net.truth[p.name][1], abs=2e-4)
    assert result.summary.converged and result.summary.iterations <= 6


def test_monte_carlo_variance_factor_and_ellipse_coverage():
    """With the a priori σ true, E[σ̂₀²] = 1 and 95 % ellipses (√(2F) scaling) hold 95 % of true
    points."""
    factors, inside, total = [], 0, 0
    rng = np.random.default_rng(99)
    for _ in range(120):
        net = grid_network(rng, size=3, fixed=("P0_0", "P2_2"), angles=False)
        result = adjust_fieldbook(net.text)
        factors.append(result.summary.variance_factor)
        for p in result.points:
            if p.ellipse is None:
                continue
            de = net.truth[p.name][0] - p.east
            dn = net.truth[p.name][1] - p.north
            t = math.radians(p.ellipse.azimuth)
            major = de * math.sin(t) + dn * math.cos(t)
            minor = de * math.cos(t) - dn * math.sin(t)
            inside += (major / p.ellipse.semi_major) ** 2 + (minor / p.ellipse.semi_minor) ** 2 <= 1
            total += 1
    r = result.summary.redundancy
    assert abs(np.mean(factors) - 1.0) < 4 * math.sqrt(2 / r / len(factors))
    coverage = inside / total
    # binomial: 840 draws (correlated within a network), 95 % expected; allow ±3 %
    assert 0.92 <= coverage <= 0.98, coverage


def test_intersection_and_resection_start_values():
    """A point seen only from two known stations and a station that only resects to known points."""
    truth = {
        "A": (1000.0, 1000.0),
        "B": (1600.0, 1000.0),
        "C": (1300.0, 1500.0),
        "X": (1310.0, 1210.0),
        "R": (1250.0, 700.0),
    }

    def az(a, b):
        return math.degrees(math.atan2(truth[b][0] - truth[a][0], truth[b][1] - truth[a][1])) % 360

    from server.units import format_dms

    text = ["defaults direction=1sec distance=2mm centering=0mm"]
    for n in "ABC":
        text.append(f"point {n} east={truth[n][0]} north={truth[n][1]} fix")
    for station in "AB":
        others = [t for t in "ABC" if t != station]
        text.append(f"directions {station}")
        for t in others + ["X"]:
            text.append(f"  {t} {format_dms(az(station, t), 3)}")
        text.append("end")
    text.append("directions R")
    for t in "ABC":
        text.append(f"  {t} {format_dms((az('R', t) - 40) % 360, 3)}")
    text.append("end")
    result = adjust_fieldbook("\n".join(text))
    points = _points(result)
    for n in "XR":
        assert points[n].east == pytest.approx(truth[n][0], abs=1e-3)
        assert points[n].north == pytest.approx(truth[n][1], abs=1e-3)


def test_angle_across_north_is_reduced_correctly():
    """An angle whose BACK is at 350° and FORE at 10° is 20°, not −340°."""
    text = """
    defaults angle=1sec distance=1mm centering=0mm
    point O east=0 north=0 fix
    point B east=-17.364818 north=98.480775 fix
    angle B O F 20:00:00
    distance O F 100.0000
    """
    result = adjust_fieldbook(text)
    f = _points(result)["F"]
    assert f.east == pytest.approx(17.364818, abs=1e-5)
    assert f.north == pytest.approx(98.480775, abs=1e-5)
    angle = result.observations[0]
    assert angle.observed == pytest.approx(20.0) and abs(angle.residual) < 1e-6


def test_single_fixed_point_with_distances_only_names_missing_rotation():
    text = """
    defaults distance=2mm
    point A east=0 north=0 fix
    point B east=100 north=0
    point C east=50 north=80
    distance A B 100.000
    distance B C 94.340
    distance C A 94.340
    """
    with pytest.raises(NetworkError) as caught:
        adjust_fieldbook(text)
    message = str(caught.value)
    assert "rotation" in message and "translation" not in message
    assert set(caught.value.points) == {"B", "C"}


def test_point_fixed_by_one_direction_only_is_named():
    rng = np.random.default_rng(8)
    net = grid_network(rng, size=3)
    text = net.text + "directions P1_1\n  LONELY 12:00:00\n  P0_0 100:00:00\nend\n"
    with pytest.raises(NetworkError) as caught:
        adjust_fieldbook(text)
    assert "LONELY" in caught.value.points


def test_relative_ellipse_to_a_fixed_point_equals_the_absolute_ellipse():
    rng = np.random.default_rng(4)
    net = grid_network(rng, size=3)
    result = adjust_fieldbook(net.text)
    points = _points(result)
    rel = next(r for r in result.relative if {r.from_point, r.to_point} == {"P0_0", "P0_1"})
    ell = points["P0_1"].ellipse
    assert rel.semi_major == pytest.approx(ell.semi_major, rel=1e-9)
    assert rel.semi_minor == pytest.approx(ell.semi_minor, rel=1e-9)
    assert rel.azimuth == pytest.approx(ell.azimuth, abs=1e-6)
    # pairs of two fixed points are left out
    assert not any({r.from_point, r.to_point} <= set(net.fixed) for r in result.relative)


def test_centering_enters_direction_and_distance_sigmas():
    """Centering c adds 2c² to a distance and 2c²/D² to a direction (contract formulas)."""
    text = """
    defaults direction=1sec distance=2mm+2ppm centering=1.5mm
    point A east=0 north=0 fix
    point B east=0 north=250 fix
    directions A
      B 0:00:00
      C 90:00:00
    end
    distance A C 250.000
    directions B
      A 0:00:00
      C 315:00:00
    end
    """
    result = adjust_fieldbook(text)
    by_line = {(o.kind, o.from_point, o.to): o for o in result.observations}
    d = by_line[("distance", "A", "C")]
    assert d.sd == pytest.approx(math.sqrt(0.002**2 + (2e-6 * 250) ** 2 + 2 * 0.0015**2), rel=1e-9)
    direction = by_line[("direction", "A", "C")]
    c_rad = 0.0015 / 250.0  # distance A–C from the adjusted coordinates ≈ 250 m
    expected = math.sqrt(1.0**2 + 2 * (c_rad * 206264.806) ** 2)
    assert direction.sd == pytest.approx(expected, rel=1e-4)


def test_weighted_control_moves_within_its_standard_deviation():
    """Weighted horizontal control counts in the redundancy and adjusts."""
    rng = np.random.default_rng(14)
    net = grid_network(rng, size=3, fixed=("P0_0",))
    e, n = net.truth["P2_2"]
    text = net.text + f"point P2_2 east={e + 0.004:.4f} north={n:.4f} sd=5mm\n"
    result = adjust_fieldbook(text)
    p = _points(result)["P2_2"]
    assert p.weighted == "en" and p.fixed == ""
    assert 0 < p.sd_east < 0.005
    assert abs(p.east - e) < 0.004  # pulled back toward the observations
    # holding it instead removes two unknowns; weighting adds two control observations
    held = adjust_fieldbook(net.text + f"point P2_2 east={e + 0.004:.4f} north={n:.4f} fix\n")
    assert result.summary.redundancy == held.summary.redundancy
    assert result.summary.unknowns == held.summary.unknowns + 2
