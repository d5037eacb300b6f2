"""Blunders the data cannot locate: inseparable w-tests, estimated bias, and the review aids.

Check values:

* a single leveling loop (one condition): r_i = σ_i²/Σσ², v_i = −σ_i²·f/Σσ²
  for the loop misclosure f, so −v_i/r_i = f for every section run in the
  loop's direction, and every pair of w-tests is correlated at |ρ| = 1
  (closed form of the one-condition adjustment);
* a small leveling network re-solved here with numpy from its design matrix:
  Qvv = P⁻¹ − A·(AᵀPA)⁻¹·Aᵀ, ρ_ij = (P·Qvv·P)_ij / √((P·Qvv·P)_ii·(P·Qvv·P)_jj),
  compared pair by pair with the ``inseparable`` lists (dense path) and with
  the large-network path (simulated residuals and exact flagged rows).
"""

from __future__ import annotations

import io

import numpy as np
import pypdf
import pytest

from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook, adjust_parsed
from server.report.tables import verdict
from server.report.text import report_text
from server.review.robust import robust_adjustment
from server.review.snooping import propose_snooping, with_ignored
from server.statistics import separability

# Two benchmarks 3.000 m apart joined by three 1 km sections; the middle one is
# booked 5 mm long (the case).  1 mm per section: the 5 mm misclosure
# gives |w| = 5/√3 = 2.89 for all three, above 2.58 at snooping = 0.01.
CHAIN = """\
fieldbook 1
title "chain of three sections"
units length=m
tests alpha=0.05 snooping=0.01 power=0.80
defaults level=1mm
point BM-WEST height=100.0000 fix
point BM-EAST height=103.0000 fix
level BM-WEST  P1       +1.0000 len=1km
level P1       P2       +1.0050 len=1km
level P2       BM-EAST  +1.0000 len=1km
"""
CHAIN_LINES = (8, 9, 10)


def _line_of(text: str, start: str) -> int:
    return next(k for k, line in enumerate(text.splitlines(), 1) if line.startswith(start))


def test_chain_sections_are_one_test_with_the_blunder_as_estimated_bias():
    result = adjust_fieldbook(CHAIN)
    by_line = {o.line: o for o in result.observations}
    assert tuple(by_line) == CHAIN_LINES
    for line in CHAIN_LINES:
        o = by_line[line]
        assert o.flagged
        assert o.w == pytest.approx(-5.0 / np.sqrt(3.0), abs=1e-6)
        # any one of them alone being 5 mm too long explains the run
        assert o.estimated_bias == pytest.approx(0.005, abs=1e-9)
        assert set(o.inseparable) == set(CHAIN_LINES) - {line}
    json_obs = result.to_json_dict()["observations"]
    assert json_obs[1]["inseparable"] == [8, 10]
    assert json_obs[1]["estimated_bias"] == pytest.approx(0.005, abs=1e-9)


def test_snooping_names_the_chain_and_proposes_no_removal():
    fieldbook = parse_fieldbook(CHAIN)
    plan = propose_snooping(fieldbook)
    assert plan.steps == ()
    assert plan.inseparable == CHAIN_LINES
    for line in CHAIN_LINES:
        assert f"line {line}" in plan.stopped
    assert "cannot tell which" in plan.stopped
    assert "re-observe" in plan.stopped.lower()
    v = verdict(adjust_parsed(fieldbook))
    assert v.state == "fail"
    assert "Lines 8, 9 and 10 are tested by the same check" in " ".join(v.notes)


def test_robust_reweighting_warns_when_its_choice_is_arbitrary():
    robust = robust_adjustment(parse_fieldbook(CHAIN))
    assert robust.down_weighted, "the 5 mm misclosure must cost some observation weight"
    assert robust.inseparable == CHAIN_LINES
    assert "cannot tell which" in robust.inseparable_warning
    # an observation that is not in such a group gets no warning
    plain = robust_adjustment(parse_fieldbook(LOOPS_WITH_BLUNDER))
    assert plain.down_weighted and plain.inseparable_warning == ""


# The chain beside a loop the crew also ran from BM-WEST (closing to 0.4 mm), so the
# network keeps a check after one chain section is left out.
CHAIN_AND_LOOP = (
    CHAIN
    + """\
level BM-WEST  L1       +0.5000 len=0.5km
level L1       L2       +0.2000 len=0.5km
level L2       BM-WEST  -0.6996 len=0.5km
"""
)


def test_leaving_out_one_section_leaves_the_others_unchecked_and_never_a_plain_pass():
    fieldbook = parse_fieldbook(CHAIN_AND_LOOP)
    plan = propose_snooping(fieldbook)
    assert plan.steps == () and plan.inseparable == CHAIN_LINES
    # what the old snooping proposed: leave out the third section (the blunder is in the second)
    after = adjust_parsed(with_ignored(fieldbook, {10}))
    test = after.summary.global_test
    assert test is not None and test.passed and not any(o.flagged for o in after.observations)
    unchecked = [o.line for o in after.observations if not o.ignored and o.w is None]
    assert unchecked == [8, 9]
    v = verdict(after)
    assert v.state == "warn" and v.unchecked == 2
    assert v.headline.startswith("Passes, but 2 observations can no longer be checked")
    # the verdict box names them, not only the warnings at the bottom
    box = " ".join(v.notes)
    assert "line 8 (level BM-WEST → P1)" in box and "line 9 (level P1 → P2)" in box
    assert "line 10 left out" in box
    text = report_text(after).splitlines()
    assert text[3].startswith("PASSES, BUT 2 OBSERVATIONS CAN NO LONGER BE CHECKED")
    assert any("line 8" in t and "line 9" in t for t in text[4:8])


def test_a_passing_run_with_an_uncontrolled_observation_says_so():
    # a loop (checked) plus a spur to a new mark (no check at all)
    text = """\
fieldbook 1
units length=m
defaults level=1mm
point A height=10.0000 fix
level A B +1.0000
level B C +1.0000
level C A -2.0005
level C SPUR +0.5000
"""
    result = adjust_fieldbook(text)
    assert result.summary.global_test is not None and result.summary.global_test.passed
    v = verdict(result)
    assert v.state == "warn"
    assert v.headline.startswith("Passes, but 1 observation can no longer be checked")
    assert any("line 8" in note for note in v.notes)


# ---------------------------------------------------------------------------------
# closed forms and a dense re-solution

LOOP = """\
fieldbook 1
units length=m
defaults level=0.5mm+1mm/sqrtkm
point BM height=50.0000 fix
level BM Q1 +1.2000 len=0.4km
level Q1 Q2 +0.8000 len=1.1km
level Q3 Q2 +0.3000 len=0.7km
level Q3 BM -1.6970 len=0.9km
"""


def test_single_loop_estimated_bias_is_the_misclosure_and_all_are_inseparable():
    result = adjust_fieldbook(LOOP)
    # along the loop BM → Q1 → Q2 → Q3 → BM: +1.2 + 0.8 − 0.3 − 1.697 = +3 mm
    f = 1.2000 + 0.8000 - 0.3000 - 1.6970
    assert f == pytest.approx(0.003, abs=1e-12)
    lines = [o.line for o in result.observations]
    # Q3 → Q2 is booked against the loop's direction: its bias has the other sign
    expected = {lines[0]: f, lines[1]: f, lines[2]: -f, lines[3]: f}
    for o in result.observations:
        assert o.estimated_bias == pytest.approx(expected[o.line], abs=1e-9)
        assert set(o.inseparable) == set(lines) - {o.line}


LOOPS_WITH_BLUNDER = """\
fieldbook 1
units length=m
tests alpha=0.05 snooping=0.001 power=0.80
defaults level=0.5mm+1mm/sqrtkm
point BM-A height=50.0000 fix
point BM-B height=52.0000 fix
level BM-A N1 +0.5000 len=0.8km
level N1 N2 +0.4000 len=1.0km
level N2 BM-B +1.1000 len=0.7km
level BM-A N3 +0.7000 len=0.9km
level N3 N2 +0.2080 len=1.2km
level N1 N3 +0.2000 len=0.6km
level N3 N4 +0.3000 len=0.5km
level N4 BM-B +1.0000 len=0.6km
level N4 N5 -0.4000 len=0.4km
level N5 N6 +0.1000 len=0.5km
level N6 N7 +0.1000 len=0.5km
level N7 N2 +0.1000 len=0.7km
level N5 BM-A -0.6000 sd=25mm
level N2 N8 +0.3000 len=0.3km
"""


def _dense_rho(result, text: str):
    """ρ of every pair of used sections, P·Qvv·P built here with numpy from the sections."""
    fixed = {"BM-A", "BM-B", "BM"}
    used = [o for o in result.observations if not o.ignored]
    names = sorted({n for o in used for n in (o.from_point, o.to)} - fixed)
    col = {n: k for k, n in enumerate(names)}
    a = np.zeros((len(used), len(names)))
    for i, o in enumerate(used):
        if o.to in col:
            a[i, col[o.to]] += 1.0
        if o.from_point in col:
            a[i, col[o.from_point]] -= 1.0
    p = np.diag([1.0 / o.sd**2 for o in used])
    qvv = np.linalg.inv(p) - a @ np.linalg.inv(a.T @ p @ a) @ a.T
    pqp = p @ qvv @ p
    d = np.sqrt(np.clip(np.diag(pqp), 0.0, None))
    with np.errstate(divide="ignore", invalid="ignore"):
        rho = pqp / np.outer(d, d)
    return used, a, p, rho, np.diag(qvv @ p)


def test_inseparable_lists_match_a_dense_numpy_solution():
    result = adjust_fieldbook(LOOPS_WITH_BLUNDER)
    used, _, _, rho, r = _dense_rho(result, LOOPS_WITH_BLUNDER)
    controlled = r >= 0.001
    checked = 0
    for i, o in enumerate(used):
        expected = {
            used[j].line
            for j in range(len(used))
            if j != i and controlled[i] and controlled[j] and abs(rho[i, j]) >= 0.99
        }
        assert set(o.inseparable) == expected, f"line {o.line}"
        if controlled[i]:
            assert o.estimated_bias == pytest.approx(-o.residual / r[i], abs=1e-9)
        else:
            assert o.estimated_bias is None
        checked += bool(expected)
    # the chain N4 → N5 → N6 → N7 → N2 is nearly in series (the weak N5 tie): a real group
    chain = {
        _line_of(LOOPS_WITH_BLUNDER, f"level {a} {b}")
        for a, b in (("N4", "N5"), ("N5", "N6"), ("N6", "N7"), ("N7", "N2"))
    }
    n6 = next(
        o for o in result.observations if o.line == _line_of(LOOPS_WITH_BLUNDER, "level N6 N7")
    )
    assert set(n6.inseparable) >= chain - {n6.line}
    assert checked >= 4
    # the blunder (8 mm in N3 → N2) stands alone: snooping may and does name it
    plan = propose_snooping(parse_fieldbook(LOOPS_WITH_BLUNDER))
    assert plan.steps and plan.steps[0].line == _line_of(LOOPS_WITH_BLUNDER, "level N3 N2")


def _numpy_reference():
    """The loops' hat product, σ, ρ, r and controlled rows, all from numpy's dense inverse."""
    result = adjust_fieldbook(LOOPS_WITH_BLUNDER)
    _used, a, p, rho, r = _dense_rho(result, LOOPS_WITH_BLUNDER)
    qxx = np.linalg.inv(a.T @ p @ a)

    def hat(block):
        return a @ (qxx @ (a.T @ block))

    sigmas = 1.0 / np.sqrt(np.diag(p))
    return hat, sigmas, rho, r, np.flatnonzero(r >= 0.001)


def test_large_network_path_agrees_with_the_dense_one(monkeypatch):
    hat, sigmas, rho, r, candidates = _numpy_reference()
    exact_ones = {
        (int(i), int(j))
        for i in candidates
        for j in candidates
        if i != j and abs(rho[i, j]) > 1.0 - 1e-9
    }
    assert exact_ones, "the network must hold a group in series"
    near = {
        (int(i), int(j))
        for i in candidates
        for j in candidates
        if i != j and abs(rho[i, j]) >= 0.99
    }
    assert near - exact_ones, "and a pair at 0.99 ≤ |ρ| < 1 (the weakly tied chain)"
    # simulated residuals alone: exactly the |ρ| = 1 pairs
    rows = separability.correlated_rows(hat, sigmas, r, candidates, [], dense_rows=0)
    assert {(i, j) for i, js in enumerate(rows) for j in js} == exact_ones
    # with every row exact (as every flagged row is): every pair at |ρ| ≥ 0.99
    rows = separability.correlated_rows(
        hat, sigmas, r, candidates, candidates.tolist(), dense_rows=0
    )
    assert {(i, j) for i, js in enumerate(rows) for j in js} == near
    # in blocks of two right-hand sides (as a million-row network is solved): the same pairs
    monkeypatch.setattr(separability, "MAX_BLOCK_ELEMENTS", 2 * len(sigmas))
    rows = separability.correlated_rows(
        hat, sigmas, r, candidates, candidates.tolist(), dense_rows=0
    )
    assert {(i, j) for i, js in enumerate(rows) for j in js} == near
    # the exact rows themselves against numpy
    got = separability.correlation_rows(hat, sigmas, r, candidates[:3])
    assert np.allclose(got[:, candidates], rho[np.ix_(candidates[:3], candidates)], atol=1e-9)


def _engine_solution(text: str, backend: str):
    from server.engine import gauss_newton as engine
    from server.model.network import build_network

    return engine.adjust(
        build_network(parse_fieldbook(text)), method="sparse", factorization=backend
    )


def _backends() -> list[str]:
    from server.engine.backends import cholmod_available

    return ["superlu"] + (["cholmod"] if cholmod_available() else [])


@pytest.mark.parametrize("backend", _backends())
def test_hat_product_halves_match_numpy(backend):
    # check values: A·(AᵀPA)⁻¹·Aᵀ·B built here with numpy from the sections (_dense_rho)
    result = adjust_fieldbook(LOOPS_WITH_BLUNDER)
    _used, a, p, _rho, _r = _dense_rho(result, LOOPS_WITH_BLUNDER)
    solution = _engine_solution(LOOPS_WITH_BLUNDER, backend)
    hat = solution.hat
    np.testing.assert_allclose(np.asarray(solution.sigmas), 1.0 / np.sqrt(np.diag(p)))
    rows = np.array([0, 4, 9, 13])
    scale = np.array([2.0, -1.0, 0.5, 3.0])
    block = np.zeros((a.shape[0], rows.size))
    block[rows, np.arange(rows.size)] = scale
    expected = a @ np.linalg.solve(a.T @ p @ a, a.T @ block)
    np.testing.assert_allclose(hat(block), expected, atol=1e-12)
    got = hat.design @ hat.solve_rows(rows, scale)
    np.testing.assert_allclose(got, expected, atol=1e-12)
    # the halves give the product's own numbers, bit for bit
    assert np.array_equal(got, hat(block))


@pytest.mark.parametrize("backend", _backends())
def test_pairs_through_the_engine_in_small_slices_match_numpy(monkeypatch, backend):
    result = adjust_fieldbook(LOOPS_WITH_BLUNDER)
    _used, _a, _p, rho, r = _dense_rho(result, LOOPS_WITH_BLUNDER)
    solution = _engine_solution(LOOPS_WITH_BLUNDER, backend)
    sigmas = np.asarray(solution.sigmas)
    candidates = np.flatnonzero(r >= 0.001)
    near = {
        (int(i), int(j))
        for i in candidates
        for j in candidates
        if i != j and abs(rho[i, j]) >= 0.99
    }
    assert near
    # three products per slice: every slice boundary is crossed
    monkeypatch.setattr(separability, "CHUNK_ELEMENTS", 3)
    for dense_rows in (0, separability.DENSE_ROWS):
        rows = separability.correlated_rows(
            solution.hat, sigmas, r, candidates, candidates.tolist(), dense_rows=dense_rows
        )
        assert {(i, j) for i, js in enumerate(rows) for j in js} == near


def test_capped_exact_rows_take_the_largest_w_first(monkeypatch):
    hat, sigmas, rho, r, candidates = _numpy_reference()

    def partners(i, low):
        return {int(j) for j in candidates if j != i and abs(rho[i, j]) >= low}

    # a row with a partner at 0.99 ≤ |ρ| < 1 (the weakly tied chain), given the largest |w|
    top = next(int(i) for i in candidates if partners(i, 0.99) - partners(i, 1.0 - 1e-9))
    priority = np.zeros(len(sigmas))
    priority[top] = 5.0
    priority[candidates[candidates != top]] = 1.0
    monkeypatch.setattr(separability, "EXACT_WORK", 0)
    monkeypatch.setattr(separability, "MIN_EXACT_ROWS", 1)
    rows = separability.correlated_rows(
        hat, sigmas, r, candidates, candidates.tolist(), dense_rows=0, priority=priority
    )
    # the one exact row is the largest w-test's, whatever its place in the book ...
    assert set(rows[top]) == partners(top, 0.99)
    group = {top} | partners(top, 1.0 - 1e-9)
    for i in candidates.tolist():
        expected = partners(i, 1.0 - 1e-9)  # ... the rest: their |ρ| = 1 partners
        if i in group:
            expected |= partners(top, 0.99) - {i}
        if i in partners(top, 0.99):
            expected |= group - {i}
        assert set(rows[i]) == expected, i
    # without the priority the first flagged row in the book is the exact one
    rows = separability.correlated_rows(
        hat, sigmas, r, candidates, candidates.tolist(), dense_rows=0
    )
    first = int(candidates[0])
    assert set(rows[first]) == partners(first, 0.99)


# ---------------------------------------------------------------------------------
# through the web pages


def test_review_compare_projects_and_reports_never_show_a_false_pass(tmp_path):
    import re
    import warnings

    from server.web import create_app

    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        from fastapi.testclient import TestClient

    def token(html: str) -> str:
        return re.search(r'name="token" value="([0-9a-f]{32})"', html).group(1)

    def plain(html: str) -> str:
        return re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", html))

    with TestClient(create_app(tmp_path / "data")) as client:
        upload = client.post(
            "/projects",
            follow_redirects=False,
            files={"fieldbook": ("chain.fieldbook", CHAIN_AND_LOOP.encode(), "text/plain")},
        )
        project = upload.headers["location"].rsplit("/", 1)[1]
        results = plain(client.get(f"/projects/{project}").text)
        assert "Est. bias" in results and "same test as lines 8, 10" in results

        review = client.get(f"/projects/{project}/review?suggest=1").text
        box = re.search(r'id="snooping-inseparable">(.*?)</p>', review, re.DOTALL).group(1)
        for line in CHAIN_LINES:
            assert f"line {line}" in box.lower()
        assert "cannot tell which" in box
        assert "Accept step" not in review  # no single section is proposed
        assert 'id="robust-inseparable"' in review

        # the surveyor leaves out the third section anyway and re-runs
        t = token(client.get(f"/projects/{project}/review").text)
        client.post(
            f"/projects/{project}/edits",
            follow_redirects=False,
            data={"token": t, "line": "10", "action": "exclude", "reason": "suspect"},
        )
        t = token(client.get(f"/projects/{project}/review").text)
        rerun = client.post(f"/projects/{project}/runs", data={"token": t}, follow_redirects=False)
        compare = client.get(rerun.headers["location"]).text
        cleared = re.search(r'id="flags-cleared".*?</div>', compare, re.DOTALL).group(0)
        assert 'data-line="8"' not in cleared and 'data-line="9"' not in cleared
        lost = re.search(r'id="flags-unchecked".*?</div>', compare, re.DOTALL).group(0)
        assert 'data-line="8"' in lost and 'data-line="9"' in lost
        assert "2 observations can no longer be checked" in plain(compare)
        assert "Passes, 2 unchecked" in plain(compare) and "✓ Passes" not in plain(compare)

        listing = plain(client.get("/projects").text)
        assert "Passes, but 2 observations can no longer be checked" in listing
        assert "✓ Passes" not in listing
        results = client.get(f"/projects/{project}").text
        verdict_box = re.search(r'<section class="verdict.*?</section>', results, re.DOTALL).group(
            0
        )
        assert "verdict-pass" not in verdict_box
        assert "line 8 (level BM-WEST → P1)" in plain(verdict_box)
        report = plain(client.get(f"/projects/{project}/report.html").text)
        assert "Passes, but 2 observations can no longer be checked" in report
        pdf = client.get(f"/projects/{project}/report.pdf")
        assert pdf.status_code == 200
        pages = pypdf.PdfReader(io.BytesIO(pdf.content)).pages
        first = re.sub(r"\s+", " ", pages[0].extract_text())
        assert "can no longer be checked" in first and "line 8" in first


# ---------------------------------------------------------------------------------
# every engine path gives the same ρ (free networks by their minimal-datum factor)


@pytest.mark.parametrize(
    "name",
    [
        "leveling",
        "2D held control",
        "2D free network",
        "2D free network with an azimuth",
        "2D weighted control",
    ],
)
def test_sparse_and_free_datum_paths_give_the_dense_correlations(name):
    from server.engine import gauss_newton as engine
    from server.engine.backends import cholmod_available
    from server.model.network import build_network
    from tests.test_sparse import NETWORKS

    network = build_network(parse_fieldbook(NETWORKS[name]))
    dense = engine.adjust(network, method="dense")
    r = 1.0 - np.asarray(dense.adjusted_cofactor) / np.asarray(dense.sigmas) ** 2
    rows = np.arange(0, len(r), max(1, len(r) // 7))
    # reference: P^½·A·Qxx·Aᵀ·P^½ from the dense back end (LAPACK Cholesky of N)
    expected = separability.correlation_rows(dense.hat, np.asarray(dense.sigmas), r, rows)
    assert np.allclose(np.abs(expected[np.arange(rows.size), rows]), 1.0)
    for backend in ["superlu"] + (["cholmod"] if cholmod_available() else []):
        sparse_solution = engine.adjust(network, method="sparse", factorization=backend)
        got = separability.correlation_rows(
            sparse_solution.hat, np.asarray(sparse_solution.sigmas), r, rows
        )
        # N of a free network with orientations (radians) beside coordinates (metres) has a
        # condition number near 2e10: ρ near zero agree to a few 1e-7 between factorizations
        # (measured: each back end within 5e-7 of the bordered inner-constraint inverse)
        np.testing.assert_allclose(got, expected, atol=1e-6)


def _junction_grid(side: int, per_line: int, blunder_m: float) -> tuple[str, int]:
    """Junctions on a grid joined by lines of ``per_line`` marks (sections in series), a
    weak tie on one line (nearly, not exactly, in series) and a blunder on that line."""
    rng = np.random.default_rng(7)
    out = ["fieldbook 1", "units length=m", "tests snooping=0.001", "defaults level=1mm/sqrtkm"]
    height = {}
    for i in range(side):
        for j in range(side):
            height[f"J{i}_{j}"] = 100.0 + rng.normal(0, 3)
            if (i, j) in ((0, 0), (side - 1, side - 1)):
                out.append(f"point J{i}_{j} height={height[f'J{i}_{j}']:.5f} fix")
    blunder_line = 0
    for i in range(side):
        for j in range(side):
            for di, dj in ((0, 1), (1, 0)):
                if i + di >= side or j + dj >= side:
                    continue
                start, end = f"J{i}_{j}", f"J{i + di}_{j + dj}"
                previous = start
                for k in range(1, per_line + 2):
                    mark = f"L{i}_{j}_{di}{dj}_{k}" if k <= per_line else end
                    height.setdefault(mark, height[start] + rng.normal(0, 1))
                    dh = height[mark] - height[previous] + rng.normal(0, 5e-4)
                    if (i, j, di, dj, k) == (1, 1, 0, 1, 2):
                        dh += blunder_m
                        blunder_line = len(out) + 1
                    out.append(f"level {previous} {mark} {dh:+.5f} len=0.5km")
                    previous = mark
    tie = "L1_1_01_3"
    out.append(f"level {tie} J0_0 {height['J0_0'] - height[tie]:+.5f} sd=30mm")
    return "\n".join(out) + "\n", blunder_line


def test_large_network_lists_agree_with_the_dense_computation(monkeypatch):
    text, blunder_line = _junction_grid(side=13, per_line=6, blunder_m=0.012)
    large = adjust_fieldbook(text)
    assert len(large.observations) > separability.DENSE_ROWS
    monkeypatch.setattr(separability, "DENSE_ROWS", 10**6)
    dense = adjust_fieldbook(text)
    worst = max((o for o in large.observations if o.flagged), key=lambda o: abs(o.w))
    assert worst.line in {
        blunder_line,
        *next(o for o in large.observations if o.line == blunder_line).inseparable,
    }
    # the flagged line's group: its own four sections, and the weakly tied one at 0.99 ≤ |ρ| < 1
    assert len(worst.inseparable) >= 6
    by_line = {o.line: o for o in dense.observations}
    for o in large.observations:
        if o.flagged:
            assert o.inseparable == by_line[o.line].inseparable  # exact rows for flagged
        else:
            # unflagged: the |ρ| = 1 groups, which the dense lists contain
            assert set(o.inseparable) <= set(by_line[o.line].inseparable)
    same = sum(o.inseparable == by_line[o.line].inseparable for o in large.observations)
    assert same >= 0.95 * len(large.observations)


def test_json_text_of_the_new_keys_reads_back_as_written():
    import json

    from server.results.json_writer import json_bytes

    result = adjust_fieldbook(CHAIN_AND_LOOP)
    data = result.to_json_dict()
    assert json.loads(json_bytes(data)) == data
    # a column mixing empty lists, null and lists of lines
    rows = [{"a": 1, "inseparable": v} for v in ([], [3, 4], None, [12])]
    assert json.loads(json_bytes({"x": rows})) == {"x": rows}


@pytest.mark.parametrize("name", ["2D free network with an azimuth", "loops with a blunder"])
def test_small_network_pairs_from_the_full_inverse_match_the_block_solves(name):
    """Small networks take every pair from N⁻¹ in full (one solve of the identity); the
    block solves, one per observation, are the reference: the same lists, free datum too."""
    from server.engine import gauss_newton as engine
    from server.model.network import build_network
    from tests.test_sparse import NETWORKS

    text = LOOPS_WITH_BLUNDER if name == "loops with a blunder" else NETWORKS[name]
    network = build_network(parse_fieldbook(text))
    solution = engine.adjust(network, method="sparse")
    sigmas = np.asarray(solution.sigmas)
    r = 1.0 - np.asarray(solution.adjusted_cofactor) / sigmas**2
    candidates = np.flatnonzero(r >= 0.001)
    assert hasattr(solution.hat, "inverse")
    from_inverse = separability.correlated_rows(
        solution.hat, sigmas, r, candidates, candidates.tolist()
    )

    def blocks(block):  # the same product without the engine's halves: the block path
        return solution.hat(block)

    from_blocks = separability.correlated_rows(blocks, sigmas, r, candidates, [])
    assert any(from_inverse)  # each network has inseparable pairs to agree on
    assert from_inverse == from_blocks
