"""``relative A B``: the relative precision of pairs the client asks for, joined or not.

Check values: the covariance of the coordinate (or height) difference is
recomputed here with dense numpy from the observation equations written out
by hand (numerical derivatives of azimuths and distances, Q = (AᵀPA)⁻¹ in
full), never through the project's own assembly or cofactor code.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.stats

from server.engine import gauss_newton as engine
from server.errors import FieldbookError
from server.fieldbook import parser as fieldbook_module
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook
from server.report.tables import pairs_checked, standards_summary
from server.report.text import report_text
from server.units import format_dms

RAD_PER_SEC = math.pi / 648000.0

# An invented boundary survey: two held control marks and the four corners of a lot,
# each corner located by directions and a distance from both control marks.  No
# observation runs between the corners, so the lot's sides are not joined pairs.
CONTROL = {"CM-7": (5120.000, 8240.000), "CM-9": (5420.000, 8260.000)}
CORNERS = {
    "K1": (5230.000, 8330.000),
    "K2": (5290.000, 8334.000),
    "K3": (5287.000, 8374.000),
    "K4": (5227.000, 8370.000),
}
DIRECTION_SD_SEC = 2.0
DISTANCE_SD = (0.003, 3.0)  # 3 mm + 3 ppm


def _azimuth(a, b):
    return math.atan2(b[0] - a[0], b[1] - a[1])


def boundary_text(extra: str = "", *, seed: int = 5, tolerance: str = "2cm+50ppm") -> str:
    rng = np.random.default_rng(seed)
    lines = [
        "fieldbook 1",
        'title "Lot 14, Harrowgate Fields: boundary check"',
        "units length=m angle=dms",
        f"tolerance relative={tolerance}",
        f"defaults direction={DIRECTION_SD_SEC}sec distance=3mm+3ppm centering=0mm",
    ]
    for name, (e, n) in CONTROL.items():
        lines.append(f"point {name} east={e:.3f} north={n:.3f} fix")
    for station, other in (("CM-7", "CM-9"), ("CM-9", "CM-7")):
        here = CONTROL[station]
        orientation = rng.uniform(0.0, 2.0 * math.pi)
        lines.append(f"directions {station}")
        for target, where in [(other, CONTROL[other]), *CORNERS.items()]:
            value = (
                _azimuth(here, where)
                - orientation
                + rng.normal(0.0, DIRECTION_SD_SEC * RAD_PER_SEC)
            )
            lines.append(f"  {target} {format_dms(math.degrees(value) % 360.0, 2)}")
        lines.append("end")
        for target, where in CORNERS.items():
            d = math.dist(here, where)
            sd = math.hypot(DISTANCE_SD[0], DISTANCE_SD[1] * 1e-6 * d)
            lines.append(f"distance {station} {target} {d + rng.normal(0.0, sd):.4f}")
    return "\n".join(lines) + "\n" + extra


ADJACENT = "relative K1 K2\nrelative K2 K3\nrelative K3 K4\nrelative K4 K1\n"


def _dense_relative_covariance(text: str, result, a: str, b: str) -> np.ndarray:
    """Σ of (E_b − E_a, N_b − N_a): σ̂₀²·J·(AᵀPA)⁻¹·Jᵀ with A by central differences."""
    fb = parse_fieldbook(text)
    adjusted = {p.name: (p.east, p.north) for p in result.points}
    free = list(CORNERS)
    rounds = sorted({o.round_line for o in fb.observations if o.round_line})
    n = 2 * len(free) + len(rounds)
    rows, sigmas = [], []

    def value(obs, coords):
        start, end = coords[obs.from_point], coords[obs.to]
        if obs.kind == "distance":
            return math.dist(start, end)
        return _azimuth(start, end)

    for obs in fb.observations:
        row = np.zeros(n)
        for k, name in enumerate(free):
            for axis in range(2):
                step = 1e-4
                plus = dict(adjusted)
                minus = dict(adjusted)
                moved = list(adjusted[name])
                moved[axis] += step
                plus[name] = tuple(moved)
                moved[axis] -= 2 * step
                minus[name] = tuple(moved)
                diff = value(obs, plus) - value(obs, minus)
                if obs.kind == "direction":
                    diff = math.remainder(diff, 2 * math.pi)
                row[2 * k + axis] = diff / (2 * step)
        if obs.kind == "direction":
            row[2 * len(free) + rounds.index(obs.round_line)] = -1.0
            sigmas.append(DIRECTION_SD_SEC * RAD_PER_SEC)
        else:
            sigmas.append(math.hypot(DISTANCE_SD[0], DISTANCE_SD[1] * 1e-6 * obs.value))
        rows.append(row)
    design = np.array(rows)
    weights = np.diag(1.0 / np.array(sigmas) ** 2)
    q = np.linalg.inv(design.T @ weights @ design)
    j = np.zeros((2, n))
    for sign, name in ((-1.0, a), (1.0, b)):
        k = free.index(name)
        j[0, 2 * k] += sign
        j[1, 2 * k + 1] += sign
    return result.summary.variance_factor * (j @ q @ j.T)


@pytest.mark.parametrize("path", ["dense", "sparse"])
def test_adjacent_corners_without_a_measurement_are_reported(path, monkeypatch):
    """The lot's four sides are reported, with the relative ellipse of a dense re-solution."""
    if path == "sparse":
        monkeypatch.setattr(engine, "DENSE_LIMIT", 0)  # the covariance off the factor's pattern
    text = boundary_text(ADJACENT)
    result = adjust_fieldbook(text)
    by_pair = {(r.from_point, r.to_point): r for r in result.relative}
    for a, b in (("K1", "K2"), ("K2", "K3"), ("K3", "K4"), ("K4", "K1")):
        rel = by_pair[(a, b)]
        assert rel.requested and not rel.held
        cov = _dense_relative_covariance(text, result, a, b)
        eigen = np.linalg.eigvalsh(cov)
        factor = result.summary.ellipse_factor
        assert rel.semi_major == pytest.approx(factor * math.sqrt(eigen[1]), rel=1e-6)
        assert rel.semi_minor == pytest.approx(factor * math.sqrt(eigen[0]), rel=1e-6)
        points = {p.name: p for p in result.points}
        pa, pb = points[a], points[b]
        u = np.array([pb.east - pa.east, pb.north - pa.north]) / rel.distance
        assert rel.sd_distance == pytest.approx(math.sqrt(u @ cov @ u), rel=1e-5)
        assert rel.distance == pytest.approx(math.dist(CORNERS[a], CORNERS[b]), abs=0.05)
        # 2 cm + 50 ppm·D, parts added linearly
        assert rel.allowed == pytest.approx(0.02 + 50e-6 * rel.distance, rel=1e-12)
        assert rel.passed is (rel.semi_major <= rel.allowed)
    # the joined pairs (control to corner) are still there, not requested
    joined = [r for r in result.relative if not r.requested]
    assert {(r.from_point, r.to_point) for r in joined} >= {("CM-7", "K1"), ("CM-9", "K4")}
    # without the relative lines the sides are simply absent: that was the gap
    plain = adjust_fieldbook(boundary_text())
    assert not any({r.from_point, r.to_point} == {"K1", "K2"} for r in plain.relative)


def test_a_requested_pair_that_is_also_joined_appears_once_as_requested():
    result = adjust_fieldbook(boundary_text("relative K2 CM-7\n"))
    matches = [r for r in result.relative if {r.from_point, r.to_point} == {"CM-7", "K2"}]
    assert len(matches) == 1
    assert matches[0].requested is True
    plain = adjust_fieldbook(boundary_text())
    (before,) = [r for r in plain.relative if {r.from_point, r.to_point} == {"CM-7", "K2"}]
    assert before.requested is False
    assert matches[0].semi_major == pytest.approx(before.semi_major, rel=1e-12)
    data = result.to_json_dict()
    assert all(isinstance(r["requested"], bool) for r in data["relative"])


def test_a_pair_of_two_held_marks_gets_zero_figures_and_is_not_checked():
    """Their relative position is the control's, not something this survey measured."""
    result = adjust_fieldbook(boundary_text("relative CM-7 CM-9\n"))
    (rel,) = [r for r in result.relative if {r.from_point, r.to_point} == {"CM-7", "CM-9"}]
    assert rel.held and rel.requested
    assert (rel.semi_major, rel.semi_minor, rel.sd_distance) == (0.0, 0.0, 0.0)
    assert rel.allowed is None and rel.passed is None
    assert rel.distance == pytest.approx(math.dist(CONTROL["CM-7"], CONTROL["CM-9"]), abs=1e-9)
    assert any("two held points" in w and "CM-7–CM-9" in w for w in result.warnings)
    (check,) = standards_summary(result)
    assert "1 pair of held points not checked" in check.words


def test_banner_names_the_joined_and_requested_pairs_it_checked():
    result = adjust_fieldbook(boundary_text(ADJACENT, tolerance="50cm+50ppm"))
    (check,) = standards_summary(result)
    joined = sum(1 for r in result.relative if not r.requested)
    assert joined == 8  # two control marks to four corners
    assert check.state == "pass"
    assert check.words.startswith("Pass: 8 joined pairs and 4 requested pairs within the allowance")
    assert "were not checked" in check.words and "all" not in check.words.split()
    assert pairs_checked(result.relative) == "8 joined pairs and 4 requested pairs"
    assert "8 joined pairs and 4 requested pairs" in report_text(result)


def test_banner_on_failure_says_how_many_of_which_pairs():
    result = adjust_fieldbook(boundary_text(ADJACENT, tolerance="0.1mm"))
    (check,) = standards_summary(result)
    assert check.state == "fail"
    assert (
        check.words == "Fail: 12 of 12 pairs exceed the allowance "
        "(8 joined pairs and 4 requested pairs checked)"
    )


@pytest.mark.parametrize("path", ["dense", "sparse"])
def test_leveling_pair_gives_the_sd_of_the_height_difference(path, monkeypatch):
    """Two new marks between two benchmarks; ΔH(N1, N2) carries their correlation."""
    if path == "sparse":
        monkeypatch.setattr(engine, "DENSE_LIMIT", 0)
    text = (
        "fieldbook 1\n"
        "defaults level=1.0mm/sqrtkm\n"
        "point BM-A height=50.0000 fix\n"
        "point BM-B height=52.0000 fix\n"
        "level BM-A N1 +0.8123 len=0.8km\n"
        "level N1 BM-B +1.1890 len=0.6km\n"
        "level BM-A N2 +1.4002 len=1.1km\n"
        "level N2 BM-B +0.5985 len=0.9km\n"
        "level N1 N2 +0.5871 len=0.5km\n"
        "relative N1 N2\n"
        "relative BM-B N2\n"
    )
    result = adjust_fieldbook(text)
    assert result.relative == ()
    n1n2, bn2 = result.relative_heights
    # dense re-solution: unknowns H(N1), H(N2)
    design = np.array([[1, 0], [-1, 0], [0, 1], [0, -1], [-1, 1]], dtype=float)
    lengths = np.array([0.8, 0.6, 1.1, 0.9, 0.5])
    q = np.linalg.inv(design.T @ np.diag(1.0 / (1e-6 * lengths)) @ design)
    vf = result.summary.variance_factor
    assert n1n2.sd == pytest.approx(math.sqrt(vf * (q[0, 0] + q[1, 1] - 2 * q[0, 1])), rel=1e-9)
    assert bn2.sd == pytest.approx(math.sqrt(vf * q[1, 1]), rel=1e-9)
    t = scipy.stats.t.ppf(0.975, result.summary.redundancy)
    assert n1n2.half_width == pytest.approx(t * n1n2.sd, rel=1e-9)
    points = {p.name: p for p in result.points}
    assert n1n2.height_difference == pytest.approx(
        points["N2"].height - points["N1"].height, abs=1e-12
    )
    data = result.to_json_dict()
    assert data["relative_heights"][0]["from"] == "N1" and data["relative_heights"][0]["to"] == "N2"


def test_a_point_not_tied_to_the_survey_is_left_out_with_a_warning():
    text = boundary_text("point LOOSE east=5000.0 north=8000.0\nrelative K1 LOOSE\n")
    result = adjust_fieldbook(text)
    assert not any("LOOSE" in (r.from_point, r.to_point) for r in result.relative)
    assert any("relative K1 LOOSE is not reported" in w for w in result.warnings)


# ------------------------------------------------------------------ parser


def test_parser_reads_pairs_with_their_lines_anywhere_after_the_header():
    text = (
        "units length=m\n"
        "defaults distance=2mm\n"
        "relative A C\n"  # before either point is named: names are checked at the end
        "distance A B 10.0\n"
        "relative   B   C   # adjacent corners\n"
        "distance B C 12.0\n"
    )
    book = parse_fieldbook(text)
    assert [(p.line, p.first, p.second) for p in book.relative_pairs] == [
        (3, "A", "C"),
        (5, "B", "C"),
    ]


def test_parser_fast_path_and_careful_path_agree_with_relative_lines(monkeypatch):
    text = boundary_text(ADJACENT)
    monkeypatch.setattr(fieldbook_module, "_FAST_LINES", False)
    careful = parse_fieldbook(text)
    monkeypatch.setattr(fieldbook_module, "_FAST_LINES", True)
    assert parse_fieldbook(text) == careful
    assert len(careful.relative_pairs) == 4


@pytest.mark.parametrize(
    ("line", "token", "words"),
    [
        (
            "relative K1 k2",
            "k2",
            "point k2 is not in this field book (no point line or observation names it); "
            "did you mean 'K2'?",
        ),
        ("relative K1 K22", "K22", "did you mean 'K2'?"),
        ("relative K1 K1", "K1", "relative from K1 to itself"),
        ("relative K1", "relative", "relative needs the first point A and the second point B"),
        ("relative K1 K2 K3", "K3", "not expected here"),
        ("relative K1 K2 sd=2mm", "sd=2mm", "does not apply to relative"),
        ("relatve K1 K2", "relatve", "did you mean 'relative'?"),
    ],
)
def test_parser_refuses_bad_relative_lines_naming_the_line(line, token, words):
    text = boundary_text(line + "\n")
    number = text.count("\n")
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(text, source="lot14.fieldbook")
    (issue,) = caught.value.issues
    assert issue.line == number
    assert issue.token == token
    assert words in issue.message


def test_a_pair_named_twice_is_reported_once_with_a_warning():
    book = parse_fieldbook(boundary_text("relative K1 K2\nrelative K2 K1\n"))
    assert len(book.relative_pairs) == 1
    assert any("already asked for" in w.message for w in book.warnings)


def test_relative_is_a_body_statement_so_a_header_after_it_is_refused():
    text = "relative A B\ntolerance relative=2cm\ndefaults distance=2mm\ndistance A B 10.0\n"
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(text)
    assert any(
        "must come before the first point or observation" in i.message for i in caught.value.issues
    )


def test_joint_network_pair_with_a_height_only_point_is_named_in_a_warning():
    """A turning point only levelled has no position: no horizontal ellipse can be given."""
    text = (
        "defaults distance=2mm level=1mm/sqrtkm direction=2sec\n"
        "point A east=0 north=0 height=10 fix\n"
        "point B east=100 north=0 height=11 fix\n"
        "directions A\n  B 0:00:00\n  C 45:00:00\nend\n"
        "directions B\n  A 0:00:00\n  C 315:00:00\nend\n"
        "distance A C 70.7107\n"
        "level A TP +0.5 len=0.1km\n"
        "level TP B +0.5 len=0.1km\n"
        "relative C TP\n"
        "relative C A\n"
    )
    result = adjust_fieldbook(text)
    assert result.summary.dimension == 3
    assert [(r.from_point, r.to_point, r.requested) for r in result.relative] == [
        ("A", "C", True),
        ("B", "C", False),
    ]
    assert result.relative_heights == ()
    assert any(
        w.startswith(
            "line 15: relative C TP is not reported: TP has no adjusted horizontal position"
        )
        for w in result.warnings
    )


def test_a_relative_decision_appends_lines_keeping_every_line_number_and_the_line_ends():
    from server.fieldbook.edits import EditError, ObservationEdit, apply_edits

    text = boundary_text("relative K1 K2").replace("\n", "\r\n")  # CRLF, no final line end
    edit = ObservationEdit(
        line=0,
        action="relative",
        reason="adjacent\ncorners",
        date="2026-12-03",
        pairs=(("K2", "K1"), ("K2", "K3")),
    )
    edited = apply_edits(text, [edit])
    assert edited.startswith(text + "\r\n")  # K2–K1 is already asked for: not repeated
    assert edited[len(text) + 2 :] == (
        "relative K2 K3  # 2026-12-03 relative precision asked for: adjacent corners\r\n"
    )
    assert [(p.first, p.second) for p in parse_fieldbook(edited).relative_pairs] == [
        ("K1", "K2"),
        ("K2", "K3"),
    ]
    for pairs, words in (
        ((), "at least one pair"),
        ((("K1", "K1"),), "same point twice"),
        ((("K1", "K 2"),), "cannot be written"),
        (tuple(("K1", f"P{k}") for k in range(201)), "at most 200"),
    ):
        bad = ObservationEdit(line=0, action="relative", reason="r", date="2026-12-03", pairs=pairs)
        with pytest.raises(EditError, match=words):
            apply_edits(text, [bad])
    unknown = ObservationEdit(
        line=0, action="relative", reason="r", date="2026-12-03", pairs=(("K1", "K33"),)
    )
    with pytest.raises(EditError, match=r"line 31: relative: point K33 .*did you mean .K3.?"):
        apply_edits(text, [unknown])
