"""Congruence test of two epochs (server/monitoring/congruence.py, epochs.py).

Checks: the S-transformation against an independent least-squares solution with the other
datum held (numpy, closed form of a small leveling net); F quantiles against scipy and a
published table (docs/references.md "F quantiles of the congruence test"); the test's size
and power by seeded Monte Carlo; the localisation of a moved mark.
"""

from __future__ import annotations

import numpy as np
import pytest
import scipy.stats

from server.fieldbook.parser import parse_fieldbook
from server.monitoring import congruence as cg
from server.monitoring.epochs import adjust_epoch

LEVELING = """fieldbook 1
units length=m
epoch {epoch}
point {held} height={height} fix
level A B +1.2340 sd=1mm
level B C -0.5120 sd=1mm
level C A -0.7230 sd=2mm
level C D +2.0010 sd=1mm
level D A -1.2760 sd=1.5mm
"""
#: (from, to, dh m, sd m): the same lines as LEVELING
LINES = (
    ("A", "B", 1.2340, 1e-3),
    ("B", "C", -0.5120, 1e-3),
    ("C", "A", -0.7230, 2e-3),
    ("C", "D", 2.0010, 1e-3),
    ("D", "A", -1.2760, 1.5e-3),
)
NAMES = ("A", "B", "C", "D")


def _numpy_leveling(held: str, height: float) -> tuple[np.ndarray, np.ndarray]:
    """Heights and cofactor with ``held`` fixed: weighted least squares by numpy (σ₀ = 1)."""
    free = [n for n in NAMES if n != held]
    a = np.zeros((len(LINES), len(free)))
    l = np.zeros(len(LINES))
    w = np.zeros(len(LINES))
    for i, (p, q, dh, sd) in enumerate(LINES):
        l[i] = dh
        w[i] = 1.0 / sd
        for name, sign in ((p, -1.0), (q, 1.0)):
            if name == held:
                l[i] -= sign * height
            else:
                a[i, free.index(name)] = sign
    aw = a * w[:, None]
    x, *_ = np.linalg.lstsq(aw, l * w, rcond=None)
    q_free = np.linalg.inv(aw.T @ aw)
    heights = np.zeros(4)
    cof = np.zeros((4, 4))
    idx = [NAMES.index(n) for n in free]
    heights[idx] = x
    heights[NAMES.index(held)] = height
    cof[np.ix_(idx, idx)] = q_free
    return heights, cof


def _epoch(held: str, height: float):
    text = LEVELING.format(epoch="2026-03-14", held=held, height=height)
    return adjust_epoch(parse_fieldbook(text, source="net.fieldbook"))


def test_the_engine_epoch_matches_the_numpy_solution_of_the_same_net():
    epoch = _epoch("A", 100.0)
    heights, cof = _numpy_leveling("A", 100.0)
    order = [epoch.marks.index(n) for n in NAMES]
    assert np.allclose(epoch.values[order, 0], heights, atol=1e-9)
    assert np.allclose(epoch.cofactor[np.ix_(order, order)], cof, atol=1e-12)


def test_s_transformation_onto_b_reproduces_the_adjustment_with_b_held():
    """Closed form: heights with A held, moved onto the datum {B}, are the heights of the
    adjustment with B held (less B's height), and S·Q·Sᵀ is its cofactor matrix."""
    with_a, _ = _numpy_leveling("A", 100.0)
    _, q_a = _numpy_leveling("A", 100.0)
    h_b = with_a[1]
    with_b, q_b = _numpy_leveling("B", h_b)
    h = cg.datum_directions(1, np.zeros((4, 2)))
    s = cg.s_matrix(h, np.array([False, True, False, False]))
    assert np.allclose(s @ with_a + h_b, with_b, atol=1e-12)
    assert np.allclose(s @ q_a @ s.T, q_b, atol=1e-15)
    # and through the engine: a book held at B gives the same transformed figures
    epoch_b = _epoch("B", h_b)
    order = [epoch_b.marks.index(n) for n in NAMES]
    assert np.allclose(epoch_b.cofactor[np.ix_(order, order)], q_b, atol=1e-12)


def test_two_epochs_held_at_different_marks_are_congruent():
    """The same observations with another mark held differ only by the datum: d = 0."""
    first, second = _epoch("A", 100.0), _epoch("B", 101.234)
    names = list(NAMES)
    x1 = first.values[[first.marks.index(n) for n in names]]
    x2 = second.values[[second.marks.index(n) for n in names]]
    i1 = [first.marks.index(n) for n in names]
    i2 = [second.marks.index(n) for n in names]
    pair = cg.EpochPair(
        marks=tuple(names),
        dimension=1,
        first=x1,
        second=x2,
        q_first=first.cofactor[np.ix_(i1, i1)],
        q_second=second.cofactor[np.ix_(i2, i2)],
        plan=np.zeros((4, 2)),
        vtpv=first.vtpv + second.vtpv,
        dof=first.redundancy + second.redundancy,
    )
    result = cg.congruence_test(pair)
    assert result.steps[0].passed and result.steps[0].omega == pytest.approx(0.0, abs=1e-9)
    assert result.steps[0].rank == 3  # four marks, one height datum
    assert all(abs(d.components[0]) < 1e-9 for d in result.displacements)


@pytest.mark.parametrize(
    ("p", "h", "f", "table"),
    [
        # docs/references.md "F quantiles of the congruence test" (from memory)
        (0.95, 1, 10, 4.96),
        (0.95, 2, 10, 4.10),
        (0.95, 5, 10, 3.33),
        (0.95, 10, 10, 2.98),
        (0.95, 3, 20, 3.10),
        (0.99, 2, 10, 7.56),
    ],
)
def test_f_quantiles_match_scipy_and_the_published_table(p, h, f, table):
    value = cg.f_quantile(p, h, f)
    assert value == pytest.approx(float(scipy.stats.f.ppf(p, h, f)), rel=1e-12)
    assert value == pytest.approx(table, abs=0.006)
    # f = 0: the variance is known, F(h, ∞) = χ²(h)/h
    assert cg.f_quantile(p, h, 0) == pytest.approx(scipy.stats.chi2.ppf(p, h) / h)


def _free_trilateration(rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray]:
    """Six marks, distances between all pairs (σ = 1 mm); Q = N⁺ of the free network."""
    plan = rng.uniform(0.0, 200.0, size=(6, 2))
    rows = []
    for i in range(6):
        for j in range(i + 1, 6):
            u = (plan[j] - plan[i]) / np.linalg.norm(plan[j] - plan[i])
            row = np.zeros(12)
            row[2 * i : 2 * i + 2] = -u
            row[2 * j : 2 * j + 2] = u
            rows.append(row / 0.001)
    a = np.array(rows)
    return plan, np.linalg.pinv(a.T @ a, rcond=1e-10, hermitian=True)


def _simulate(rng, plan, q, dof, shift=None):
    values, vectors = np.linalg.eigh(q)
    root = vectors * np.sqrt(np.clip(values, 0.0, None))
    x1 = (root @ rng.standard_normal(12)).reshape(6, 2)
    x2 = (root @ rng.standard_normal(12)).reshape(6, 2)
    if shift is not None:
        x2 = x2 + shift
    vtpv = float(np.sum(rng.standard_normal(dof) ** 2))
    marks = tuple(f"P{i}" for i in range(6))
    return cg.EpochPair(
        marks=marks,
        dimension=2,
        first=x1,
        second=x2,
        q_first=q,
        q_second=q,
        plan=plan,
        vtpv=vtpv,
        dof=dof,
    )


def test_without_movement_the_test_rejects_at_its_size():
    """Monte Carlo (seeded, 3000 runs): under "no mark moved" T ~ F(h, f), so the global test
    rejects in α = 5 % ± 1 % of the runs."""
    rng = np.random.default_rng(20261204)
    plan, q = _free_trilateration(rng)
    runs, rejected = 3000, 0
    for _ in range(runs):
        pair = _simulate(rng, plan, q, dof=18)
        d = (pair.second - pair.first).ravel()
        omega, rank = cg._omega(d, 2 * q, cg.datum_directions(2, plan), np.ones(6, bool), 2)
        assert rank == 9  # 12 coordinates less two translations and the rotation
        statistic = omega / rank / (pair.vtpv / pair.dof)
        rejected += statistic > cg.f_quantile(0.95, rank, pair.dof)
    assert 0.04 <= rejected / runs <= 0.06


def test_a_movement_of_three_sd_is_found_as_often_as_the_power_says():
    """Monte Carlo (seeded, 1000 runs): one mark moved by 3× the sd of its displacement (on
    the datum of the others).  The global test rejects as often as the non-central F power
    (scipy.stats.ncf) says, and when it rejects, the localisation names that mark.

    Measured: power 0.39 here (h = 9 coordinates tested at once dilute a single 3σ shift);
    the moved mark is named in over 90 % of the rejecting runs."""
    rng = np.random.default_rng(7)
    plan, q = _free_trilateration(rng)
    h = cg.datum_directions(2, plan)
    others = np.ones(6, bool)
    others[2] = False
    s = cg.s_matrix(h, np.repeat(others, 2))
    q_d = s @ (2 * q) @ s.T
    direction = np.array([1.0, 0.0])
    sd = float(np.sqrt(direction @ q_d[4:6, 4:6] @ direction))
    shift = np.zeros((6, 2))
    shift[2] = 3.0 * sd * direction
    # non-centrality of the global test on the datum of all marks
    s_all = cg.s_matrix(h, np.ones(12, bool))
    inverse, rank = cg.pseudo_inverse(s_all @ (2 * q) @ s_all.T)
    delta = s_all @ shift.ravel()
    lam = float(delta @ inverse @ delta)
    dof = 18
    power = 1.0 - scipy.stats.ncf.cdf(cg.f_quantile(0.95, rank, dof), rank, dof, lam)
    runs, rejected, named = 1000, 0, 0
    for _ in range(runs):
        result = cg.congruence_test(_simulate(rng, plan, q, dof=dof, shift=shift))
        if not result.steps[0].passed:
            rejected += 1
            named += "P2" in result.moved
    print(f"power {power:.3f}, rejected {rejected / runs:.3f}, named {named / rejected:.3f}")
    assert abs(rejected / runs - power) < 0.05, (rejected / runs, power)
    assert named / rejected > 0.8, named / rejected


def test_a_large_movement_is_localised_and_the_rest_is_congruent():
    rng = np.random.default_rng(11)
    plan, q = _free_trilateration(rng)
    shift = np.zeros((6, 2))
    shift[4] = (0.02, -0.015)  # 25 mm against sd of about 1 mm
    result = cg.congruence_test(_simulate(rng, plan, q, dof=18, shift=shift))
    assert result.moved == ("P4",)
    assert result.congruent_set_found and result.steps[-1].passed
    moved = next(d for d in result.displacements if d.mark == "P4")
    assert moved.significant and moved.length == pytest.approx(0.025, abs=0.005)
    assert moved.ellipse is not None and moved.ellipse[0] >= moved.ellipse[1] > 0


def test_a_common_rotation_and_translation_is_no_movement():
    """The datum directions cover translation and rotation: a figure turned by 2 µrad and
    shifted 5 cm as a whole gives d = 0."""
    rng = np.random.default_rng(3)
    plan, q = _free_trilateration(rng)
    centred = plan - plan.mean(axis=0)
    eps = 2e-6
    moved = plan + eps * np.column_stack([centred[:, 1], -centred[:, 0]]) + (0.05, -0.03)
    pair = cg.EpochPair(
        marks=tuple("ABCDEF"),
        dimension=2,
        first=plan,
        second=moved,
        q_first=q,
        q_second=q,
        plan=plan,
        vtpv=10.0,
        dof=10,
    )
    result = cg.congruence_test(pair)
    assert result.steps[0].omega == pytest.approx(0.0, abs=1e-12)
    assert result.moved == ()


def test_the_alarm_is_the_one_sided_lower_bound_above_the_threshold():
    """Definition (docs/monitoring.md): |d| − t(P; f)·σ_|d| > threshold, and in 3D the height
    change is judged apart from the plan length."""
    cov = np.diag([1e-6, 1e-6, 4e-6])
    q = float(scipy.stats.t.ppf(0.95, 10))
    d = np.array([0.003, 0.004, 0.0])  # 5 mm in plan, σ along it 1 mm
    below = cg._displacement("M", False, d, cov, 0.05, 10, 0.005 - q * 1e-3 + 1e-5, 0.95)
    above = cg._displacement("M", False, d, cov, 0.05, 10, 0.005 - q * 1e-3 - 1e-5, 0.95)
    assert (below.alarm, above.alarm) == (False, True)
    settling = cg._displacement(
        "M", False, np.array([0.0, 0.0, -0.012]), cov, 0.05, 10, 0.005, 0.95
    )
    assert settling.length == 0.0 and settling.alarm  # 12 mm − 1.81·2 mm > 5 mm


def test_an_exact_fit_gives_an_infinite_statistic_not_a_crash():
    """vᵀPv = 0 (error-free books): any displacement is infinitely significant, none is 0/0."""
    q = np.eye(3) * 1e-6
    first = np.zeros((3, 1))
    second = np.array([[0.0], [0.0], [0.002]])
    pair = cg.EpochPair(
        marks=("A", "B", "C"),
        dimension=1,
        first=first,
        second=second,
        q_first=q,
        q_second=q,
        plan=np.zeros((3, 2)),
        vtpv=0.0,
        dof=4,
    )
    result = cg.congruence_test(pair)
    assert not result.steps[0].passed and result.moved == ("C",)
    assert all(np.isfinite(d.components[0]) for d in result.displacements)
