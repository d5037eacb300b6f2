"""The blunder review tools: edits written into the field book, snooping, robust reweighting,
tau."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from server.fieldbook.edits import EditError, ObservationEdit, apply_edits
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook
from server.review.robust import huber_weight, robust_adjustment
from server.review.snooping import propose_snooping
from server.review.tau import tau_critical, tau_test
from tests.synthetic import grid_network

TODAY = "2026-12-02"


def leveling_with_blunders(blunders: dict[tuple[int, int], float], seed: int = 21) -> str:
    """Ten marks, every pair with |i − j| ≤ 3 levelled once (good redundancy), 1 mm σ."""
    rng = np.random.default_rng(seed)
    heights = 100 + rng.uniform(-4, 4, 10)
    lines = ["defaults level=1.0mm", f"point M0 height={heights[0]:.4f} fix"]
    for i in range(10):
        for j in range(i + 1, min(i + 4, 10)):
            dh = heights[j] - heights[i] + rng.normal(0, 0.001) + blunders.get((i, j), 0.0)
            lines.append(f"level M{i} M{j} {dh:+.5f}")
    return "\n".join(lines) + "\n"


def _line_of(text: str, start: str) -> int:
    return next(k for k, line in enumerate(text.splitlines(), 1) if line.startswith(start))


TWO_BLUNDERS = {(2, 4): 0.015, (6, 7): -0.012}


def test_snooping_sequence_finds_both_injected_blunders():
    text = leveling_with_blunders(TWO_BLUNDERS)
    plan = propose_snooping(parse_fieldbook(text))
    expected = {_line_of(text, "level M2 M4"), _line_of(text, "level M6 M7")}
    assert {step.line for step in plan.steps} == expected
    assert plan.steps[-1].flagged_after == 0
    assert plan.steps[-1].global_test_passed_after
    assert "no observation is flagged" in plan.stopped


def test_robust_adjustment_suspects_the_same_two():
    text = leveling_with_blunders(TWO_BLUNDERS)
    robust = robust_adjustment(parse_fieldbook(text))
    expected = {_line_of(text, "level M2 M4"), _line_of(text, "level M6 M7")}
    assert set(robust.suspects) == expected
    assert robust.converged
    lowest = {o.line for o in robust.down_weighted[:2]}
    assert lowest == expected
    # the estimated blunders come out close to their injected size (|u|·σ·√r ≈ |v| ≈ 15 and 12 mm)
    by_line = {o.line: o for o in robust.observations}
    assert abs(by_line[_line_of(text, "level M2 M4")].u) > 10


def test_clean_network_needs_no_snooping_and_keeps_full_weights():
    text = leveling_with_blunders({})
    assert propose_snooping(parse_fieldbook(text)).steps == ()
    robust = robust_adjustment(parse_fieldbook(text))
    assert robust.suspects == ()
    assert min(o.weight for o in robust.observations) > 0.4


def test_huber_weight_function():
    """Huber (1964): full weight inside ±k, k/|u| outside."""
    assert huber_weight(1.0) == 1.0
    assert huber_weight(-1.5) == 1.0
    assert huber_weight(3.0) == pytest.approx(0.5)
    assert huber_weight(-6.0, k=2.0) == pytest.approx(1 / 3)


# Pope (1976) tau critical values, Bonferroni α_i = α/n with α = 0.05.  These four are
# computed, not published (docs/references.md, "Pope's tau"): a regression guard only.  The
# checks that follow compare the code with a published table and with the distribution
# reached by two routes other than the code's Student-t formula.
POPE = [(3, 6, 1.7176), (5, 10, 2.1057), (10, 20, 2.5619), (20, 40, 2.9325)]


@pytest.mark.parametrize(("r", "n", "critical"), POPE)
def test_tau_critical_values(r, n, critical):
    assert tau_critical(0.05, n, r) == pytest.approx(critical, abs=5e-5)


# Published critical values of Grubbs' statistic G = max|x_i − x̄|/s at α = 0.05 (two-sided),
# by sample size n: Harvey, *Analytical Chemistry 2.1*, Appendix 7 "Critical Values for
# Grubbs' Test" (docs/references.md, "Grubbs' table").  For the mean of n equally weighted
# observations (r = n − 1, q_vv = (n − 1)/n) Pope's τ_i is G_i·√(n/(n − 1)), so the table is
# also a published table of τ critical values for that network.
GRUBBS_005 = {4: 1.481, 5: 1.715, 6: 1.887, 8: 2.126, 10: 2.290, 12: 2.412, 14: 2.507}


def _mean_network(n: int, seed: int = 5) -> tuple[str, np.ndarray]:
    """One mark levelled once from each of n benchmarks, 1 mm each: its height is the mean."""
    rng = np.random.default_rng(seed)
    heights = 100 + rng.uniform(-3, 3, n)
    readings = 5.0 - heights + rng.normal(0, 0.001, n)  # true height of P: 105 - 100 = 5 above
    lines = ["defaults level=1.0mm"]
    lines += [f"point B{i} height={h:.4f} fix" for i, h in enumerate(heights)]
    lines += [f"level B{i} P {dh + 100:+.5f}" for i, dh in enumerate(readings)]
    derived = np.round(heights, 4) + np.round(readings + 100, 5)  # each reading's height of P
    return "\n".join(lines) + "\n", derived


@pytest.mark.parametrize(("n", "published"), sorted(GRUBBS_005.items()))
def test_tau_of_a_mean_agrees_with_the_published_grubbs_table(n, published):
    text, derived = _mean_network(n)
    result = adjust_fieldbook(text)
    test = tau_test(result, alpha=0.05)
    assert test is not None and test.redundancy == n - 1 and test.tested == n
    # the critical value: the published G (three decimals) times √(n/(n − 1))
    assert test.critical * math.sqrt((n - 1) / n) == pytest.approx(published, abs=1e-3)
    # each τ is Grubbs' G_i of the derived heights, computed here from its definition
    grubbs = np.abs(derived - derived.mean()) / derived.std(ddof=1)
    by_line = {o.line: abs(o.tau) for o in test.observations}
    first = min(by_line)
    taus = np.array([by_line[first + i] for i in range(n)])
    assert np.allclose(taus * math.sqrt((n - 1) / n), grubbs, atol=1e-6)


@pytest.mark.parametrize(("r", "n"), [(r, n) for r, n, _ in POPE])
def test_tau_critical_value_by_the_beta_relation(r, n):
    """τ²/r follows Beta(1/2, (r − 1)/2) (docs/references.md, "Pope's tau"): the tail beyond
    τ_crit must be exactly the per-observation level α/n.  A route through the Beta
    distribution, not the Student-t quantile the code uses."""
    critical = tau_critical(0.05, n, r)
    tail = scipy.stats.beta.sf(critical**2 / r, 0.5, (r - 1) / 2)
    assert tail == pytest.approx(0.05 / n, rel=1e-9)


def test_tau_critical_value_by_monte_carlo_of_a_network():
    """Simulate the residuals of a 20-observation, 10-unknown network with normal errors and
    compute τ_i = v_i/(σ̂₀·√q_vv,ii) from its definition: the share of |τ| beyond the code's
    critical value is α/n = 0.0025 (the counts' standard error is about 1.5 %)."""
    rng = np.random.default_rng(1976)
    n, u = 20, 10
    design = rng.normal(size=(n, u))
    projector = np.eye(n) - design @ np.linalg.solve(design.T @ design, design.T)
    errors = rng.normal(size=(200_000, n))
    residuals = errors @ projector  # the projector is symmetric
    sigma0 = np.sqrt((residuals**2).sum(axis=1, keepdims=True) / (n - u))
    tau = residuals / (sigma0 * np.sqrt(np.diag(projector)))
    assert np.abs(tau).max() <= math.sqrt(n - u) + 1e-9  # |τ| ≤ √r always
    share = float((np.abs(tau) > tau_critical(0.05, n, n - u)).mean())
    assert share == pytest.approx(0.05 / n, rel=0.06)


def test_tau_is_bounded_by_root_r_and_flags_the_blunder():
    text = leveling_with_blunders({(3, 5): 0.02})
    result = adjust_fieldbook(text)
    test = tau_test(result)
    assert test is not None
    assert all(abs(o.tau) <= math.sqrt(test.redundancy) + 1e-9 for o in test.observations)
    assert test.flagged_lines[0] == _line_of(text, "level M3 M5")


# -- edits written into the field book ------------------------------------------------------

BOOK = """fieldbook 1
defaults level=1.0mm/sqrtkm
point A height=50.0000 fix
level A B  +1.2000 len=0.40km   # first run
level B C  +0.8000 len=0.60km
level C D  -0.7000 len=0.50km note="rod #2"
level D A  -1.2880 len=0.50km
level A C  +2.0130 len=0.90km ignore
"""


def test_exclude_include_and_sd_keep_line_numbers_and_comment_the_reason():
    edits = [
        ObservationEdit(line=5, action="exclude", reason="bubble off level", date=TODAY),
        ObservationEdit(line=8, action="include", reason="re-checked the booking", date=TODAY),
        ObservationEdit(line=4, action="sd", sd="0.8mm/sqrtkm", reason="digital level", date=TODAY),
    ]
    edited = apply_edits(BOOK, edits)
    assert len(edited.splitlines()) == len(BOOK.splitlines())
    lines = edited.splitlines()
    assert lines[4].split("#")[0].split()[-1] == "ignore"
    assert "2026-12-02 left out: bubble off level" in lines[4]
    assert " ignore" not in lines[7].split("#")[0]
    assert "brought back: re-checked the booking" in lines[7]
    assert "sd=0.8mm/sqrtkm" in lines[3] and "# first run; 2026-12-02 sd set to" in lines[3]
    # the '#' inside the quoted note is not a comment
    assert 'note="rod #2"' in lines[5]
    fieldbook = parse_fieldbook(edited)
    by_line = {o.line: o for o in fieldbook.observations}
    assert by_line[5].ignored and not by_line[8].ignored
    assert by_line[4].sigma.per_sqrtkm == pytest.approx(0.0008)


def test_round_trip_exclude_download_reupload_gives_the_same_result():
    """upload → exclude → re-run → download edited field book → re-upload: identical result."""
    text = leveling_with_blunders(TWO_BLUNDERS)
    blunder = _line_of(text, "level M2 M4")
    first = parse_fieldbook(text)
    from server.pipeline import adjust_parsed
    from server.review.snooping import with_ignored

    rerun = adjust_parsed(with_ignored(first, {blunder}))
    edited = apply_edits(text, [ObservationEdit(blunder, "exclude", "staff misread", TODAY)])
    again = adjust_fieldbook(edited)
    assert again.summary.variance_factor == pytest.approx(rerun.summary.variance_factor, rel=1e-12)
    for a, b in zip(again.points, rerun.points):
        assert a.height == pytest.approx(b.height, abs=1e-12)


def test_direction_inside_a_round_can_be_left_out():
    net = grid_network(np.random.default_rng(1), size=3)
    line = next(k for k, l in enumerate(net.text.splitlines(), 1) if l.startswith("  P"))
    edited = apply_edits(net.text, [ObservationEdit(line, "exclude", "wrong target", TODAY)])
    obs = next(o for o in parse_fieldbook(edited).observations if o.line == line)
    assert obs.kind == "direction" and obs.ignored


@pytest.mark.parametrize(
    ("edit", "message"),
    [
        (ObservationEdit(3, "exclude", "why", TODAY), "holds no observation"),
        (ObservationEdit(5, "exclude", "   ", TODAY), "needs a reason"),
        (ObservationEdit(5, "sd", "ok", TODAY, sd="3"), "unit"),
        (ObservationEdit(5, "sd", "ok", TODAY, sd="2sec"), "no longer reads"),
        (ObservationEdit(5, "sd", "ok", TODAY, sd="-1mm"), "positive"),
        (ObservationEdit(5, "drop", "ok", TODAY), "unknown decision"),
    ],
)
def test_bad_edits_are_refused_with_a_reason(edit, message):
    with pytest.raises(EditError) as caught:
        apply_edits(BOOK, [edit])
    assert message in str(caught.value)


def test_reason_cannot_inject_a_new_line():
    edited = apply_edits(BOOK, [ObservationEdit(5, "exclude", "x\nlevel A Z +9.0 len=1km", TODAY)])
    assert len(edited.splitlines()) == len(BOOK.splitlines())
    assert all(o.to != "Z" for o in parse_fieldbook(edited).observations)


def test_form_feed_in_a_comment_does_not_shift_the_edited_line():
    """Regression (found 2026-12-02): apply_edits split lines with str.splitlines, which also
    breaks at form feeds and U+2028, so the decision landed on the wrong line."""
    book = BOOK.replace("# first run", "# first run\f page 2\u2028 of the booking")
    edited = apply_edits(book, [ObservationEdit(5, "exclude", "bubble off level", TODAY)])
    by_line = {o.line: o for o in parse_fieldbook(edited).observations}
    assert by_line[5].ignored and not by_line[4].ignored
    assert edited.split("\n")[4].startswith("level B C +0.8000 len=0.60km ignore")


# ---------------------------------------------------------------------------------------
# correcting a misbooked value


def _round_book(misbooked_b: str | None = None) -> tuple[str, dict[str, str]]:
    """Four held corners and a free mark P at (400, 300) m; a round at P booked from the
    coordinates (azimuths computed here with atan2, reference direction to A)."""
    corners = {"A": (0.0, 0.0), "B": (1000.0, 0.0), "C": (1000.0, 1000.0), "D": (0.0, 1000.0)}
    p = (400.0, 300.0)

    def azimuth(to):
        e, n = corners[to][0] - p[0], corners[to][1] - p[1]
        return math.degrees(math.atan2(e, n)) % 360.0

    def dms(deg):
        tenths = round(deg * 36000)
        d, rest = divmod(tenths, 36000)
        m, s = divmod(rest, 600)
        return f"{d}:{m:02d}:{s // 10:02d}.{s % 10}"

    booked = {t: dms((azimuth(t) - azimuth("A")) % 360.0) for t in corners}
    if misbooked_b is not None:
        booked["B"] = misbooked_b
    lines = ["fieldbook 1", "units angle=dms", "defaults direction=1sec distance=2mm centering=0mm"]
    lines += [f"point {k} east={e:.3f} north={n:.3f} fix" for k, (e, n) in corners.items()]
    lines += ["point P east=401 north=299", "directions P"]
    lines += [f"  {t} {booked[t]}" + ("  # second face" if t == "C" else "") for t in corners]
    lines += ["end"]
    lines += [f"distance P {t} {math.dist(p, xy):.4f}" for t, xy in corners.items()]
    return "\n".join(lines) + "\n", booked


def test_a_misbooked_minute_in_a_round_is_corrected_in_place_and_the_original_kept():
    _good, true_values = _round_book()
    right = true_values["B"]
    d, m, s = right.split(":")
    wrong = f"{d}:{int(m) + 1:02d}:{s}" if int(m) < 59 else f"{d}:{int(m) - 1:02d}:{s}"
    text, _ = _round_book(wrong)
    line_b = _line_of(text, "  B ")
    before = adjust_fieldbook(text)
    assert any(o.flagged for o in before.observations)  # a minute is a blunder at 1″ σ
    edit = ObservationEdit(
        line_b, "correct", "minute misread from the field sheet", TODAY, value=right
    )
    edited = apply_edits(text, [edit])
    assert len(edited.splitlines()) == len(text.splitlines())
    new_line = edited.splitlines()[line_b - 1]
    assert new_line == (
        f"  B {right}  # corrected from {wrong} on {TODAY}: minute misread from the field sheet"
    )
    # every other line is untouched
    assert [l for k, l in enumerate(edited.splitlines()) if k != line_b - 1] == [
        l for k, l in enumerate(text.splitlines()) if k != line_b - 1
    ]
    after = adjust_fieldbook(edited)
    obs = {o.line: o for o in after.observations}
    d_, m_, s_ = right.split(":")
    assert obs[line_b].booked == pytest.approx(int(d_) + int(m_) / 60 + float(s_) / 3600, abs=1e-12)
    assert not any(o.flagged for o in after.observations)
    # the booked values were rounded to 0.1″ from the true geometry: residuals stay below 0.2″
    assert max(abs(o.residual) for o in after.observations if o.kind == "direction") < 0.2
    p = next(pt for pt in after.points if pt.name == "P")
    assert (p.east, p.north) == (pytest.approx(400.0, abs=2e-4), pytest.approx(300.0, abs=2e-4))


def test_a_correction_joins_an_existing_comment_and_other_decisions_on_the_line():
    text, booked = _round_book()
    line_c = _line_of(text, "  C ")
    edits = [
        ObservationEdit(line_c, "sd", "old theodolite", TODAY, sd="2sec"),
        ObservationEdit(line_c, "correct", "booked twice", TODAY, value="45:00:00.0"),
    ]
    line = apply_edits(text, edits).splitlines()[line_c - 1]
    assert line.startswith("  C 45:00:00.0 sd=2sec  # second face; ")
    assert line.endswith(f"; corrected from {booked['C']} on {TODAY}: booked twice")
    assert f"{TODAY} sd set to 2sec: old theodolite" in line


def test_a_leveling_value_is_corrected_with_its_sign_and_options_kept():
    edited = apply_edits(
        BOOK, [ObservationEdit(5, "correct", "rod read 0.81", TODAY, value="+0.8100")]
    )
    assert edited.splitlines()[4] == (
        f"level B C  +0.8100 len=0.60km  # corrected from +0.8000 on {TODAY}: rod read 0.81"
    )
    obs = {o.line: o for o in parse_fieldbook(edited).observations}
    assert obs[5].value == pytest.approx(0.81) and obs[5].length_km == pytest.approx(0.6)


@pytest.mark.parametrize(
    ("value", "message"),
    [
        ("291.1650", "line 10: the corrected value does not read: '291.1650'"),
        ("12:75:00", "minutes must be below 60"),
        ("12 34 56", "without spaces"),
        ("1#2", "without spaces, quotes, '#' or '='"),
        ("", "type the corrected value"),
        ("x" * 41, "too long"),
    ],
)
def test_a_malformed_correction_is_refused_with_a_clear_message(value, message):
    text, _ = _round_book()
    with pytest.raises(EditError) as caught:
        apply_edits(text, [ObservationEdit(10, "correct", "why", TODAY, value=value)])
    assert message in str(caught.value).lower()


def test_correcting_to_the_same_value_or_a_distance_with_a_unit_is_refused():
    text, booked = _round_book()
    with pytest.raises(EditError, match="the value is already"):
        apply_edits(text, [ObservationEdit(10, "correct", "why", TODAY, value=booked["A"])])
    line = _line_of(text, "distance P A")
    refused = r"line \d+: the corrected value does not read: .*leave out the unit"
    with pytest.raises(EditError, match=refused):
        apply_edits(text, [ObservationEdit(line, "correct", "why", TODAY, value="500.0m")])


def test_a_correction_survives_storage_as_json_and_reads_in_words():
    from server.fieldbook.edits import booked_value
    from server.report.review import decision_words, edit_from_json, edit_to_json

    edit = ObservationEdit(
        5, "correct", "rod", TODAY, value="+0.8100", previous=booked_value(BOOK, 5)
    )
    assert edit.previous == "+0.8000"
    assert edit_from_json(edit_to_json(edit)) == edit
    assert decision_words(edit) == "Correct the value from +0.8000 to +0.8100"
    with pytest.raises(EditError):
        edit_from_json({**edit_to_json(edit), "value": 0.81})
