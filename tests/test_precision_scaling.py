"""`tests precision=posterior|prior|larger`: which variance factor scales the precisions.

The adjusted figures are checked against an independent Gauss–Newton re-solution
of a small trilateration network in numpy (Qxx = (AᵀPA)⁻¹, σ̂₀² = vᵀPv / r), and
the ellipse quantiles against closed forms and published tables:

- χ²(p; 2) = −2·ln(1 − p), since the χ² distribution with 2 degrees of freedom is
  exponential; 95 % → 5.9915, √ → 2.4477.  NIST/SEMATECH e-Handbook of Statistical
  Methods, §1.3.6.7.4 "Critical Values of the Chi-Square Distribution", ν = 2, upper
  tail 0.05: 5.991.
- F(p; 2, r) = (r/2)·((1 − p)^(−2/r) − 1), from the F(2, r) distribution function
  1 − (1 + 2x/r)^(−r/2); so √(2·F(0.95; 2, 10)) = 2.8645 and √(2·F(0.95; 2, 5)) =
  3.4018, the values tabulated for the F-based convention (Ghilani, *Adjustment
  Computations*, 6th ed. 2017, ch. 19 — recalled from memory; the numbers are
  computed).
"""

from __future__ import annotations

import io
import json
import math
import re
import warnings
from pathlib import Path

import numpy as np
import pypdf
import pytest
import scipy.stats

from server.errors import FieldbookError
from server.fieldbook.parser import parse_fieldbook
from server.pipeline import adjust_fieldbook
from server.report import html as html_report
from server.report import tables as report
from server.report import text as text_report
from server.report.pdf import report_pdf
from server.statistics import quality as st
from server.store.sqlite import _result_from_detail
from server.web import create_app

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2 and warns
    from fastapi.testclient import TestClient

CONFIDENCE = 0.95

#: Fixed A and B, new points C, D, E; every point pair but A–B measured once.
TRUE = {
    "A": (1000.0, 1000.0),
    "B": (1600.0, 1050.0),
    "C": (1250.0, 1480.0),
    "D": (1580.0, 1530.0),
    "E": (1380.0, 1200.0),
}
FIXED = ("A", "B")
PAIRS = [
    ("A", "C"),
    ("A", "D"),
    ("A", "E"),
    ("B", "C"),
    ("B", "D"),
    ("B", "E"),
    ("C", "D"),
    ("C", "E"),
    ("D", "E"),
]
#: Invented measuring errors in metres (redundancy 9 − 6 = 3).
ERRORS = [0.004, -0.003, 0.005, -0.002, 0.003, -0.004, 0.002, -0.005, 0.001]


def _fieldbook(sd_mm: float, method: str | None) -> str:
    lines = ["fieldbook 1", "units length=m angle=dms"]
    if method is not None:
        lines.append(f"tests confidence={CONFIDENCE} precision={method}")
    lines.append(f"defaults distance={sd_mm}mm centering=0mm")
    for name, (east, north) in TRUE.items():
        # the new points start 0.3 m off, so the adjustment has to iterate
        shift = 0.0 if name in FIXED else 0.3
        fix = " fix" if name in FIXED else ""
        lines.append(f"point {name} east={east + shift:.3f} north={north - shift:.3f}{fix}")
    for (a, b), error in zip(PAIRS, ERRORS, strict=True):
        lines.append(f"distance {a} {b} {math.dist(TRUE[a], TRUE[b]) + error:.4f}")
    return "\n".join(lines) + "\n"


def _numpy_solution(sd_mm: float):
    """Independent Gauss–Newton on the distances: (coordinates, Qxx, σ̂₀², r, order)."""
    free = [n for n in TRUE if n not in FIXED]
    column = {(n, axis): 2 * i + axis for i, n in enumerate(free) for axis in (0, 1)}
    xy = {n: np.array(TRUE[n]) + (0.0 if n in FIXED else np.array([0.3, -0.3])) for n in TRUE}
    observed = np.array(
        [round(math.dist(TRUE[a], TRUE[b]) + e, 4) for (a, b), e in zip(PAIRS, ERRORS, strict=True)]
    )
    weight = np.eye(len(PAIRS)) / (sd_mm / 1000.0) ** 2
    for _ in range(20):
        design = np.zeros((len(PAIRS), 2 * len(free)))
        computed = np.empty(len(PAIRS))
        for row, (a, b) in enumerate(PAIRS):
            delta = xy[b] - xy[a]
            computed[row] = np.hypot(*delta)
            unit = delta / computed[row]
            for axis in (0, 1):
                if (b, axis) in column:
                    design[row, column[(b, axis)]] = unit[axis]
                if (a, axis) in column:
                    design[row, column[(a, axis)]] = -unit[axis]
        normal = design.T @ weight @ design
        step = np.linalg.solve(normal, design.T @ weight @ (observed - computed))
        for n in free:
            xy[n] = xy[n] + step[[column[(n, 0)], column[(n, 1)]]]
        if np.max(np.abs(step)) < 1e-10:
            break
    residuals = computed - observed  # from the last linearization; the step is below 1e-10 m
    redundancy = len(PAIRS) - 2 * len(free)
    variance = float(residuals @ weight @ residuals) / redundancy
    return xy, np.linalg.inv(normal), variance, redundancy, column


def _k_chi2(p: float) -> float:
    return math.sqrt(-2.0 * math.log(1.0 - p))


def _k_f(p: float, r: int) -> float:
    return math.sqrt(r * ((1.0 - p) ** (-2.0 / r) - 1.0))


def _axes(cov: np.ndarray) -> tuple[float, float]:
    low, high = np.linalg.eigvalsh(cov)
    return math.sqrt(high), math.sqrt(low)


# ---------------------------------------------------------------------------------------
# the quantiles


def test_chi_square_ellipse_factor_matches_nist_table_and_closed_form():
    # NIST/SEMATECH §1.3.6.7.4, ν = 2, upper tail 0.05: 5.991 (table printed to 3 decimals)
    assert st.ellipse_factor(0.95, 10, estimated=False) ** 2 == pytest.approx(5.991, abs=5e-4)
    for p in (0.39346934, 0.90, 0.95, 0.99):
        for r in (0, 1, 10, 400):  # a known variance: the redundancy plays no part
            assert st.ellipse_factor(p, r, estimated=False) == pytest.approx(_k_chi2(p), rel=1e-12)
    assert st.ellipse_factor(0.95, 3, estimated=False) == pytest.approx(2.4477, abs=5e-5)
    # the standard ellipse holds 1 − e^(−1/2) = 39.35 % of a 2D normal: k = 1
    assert st.ellipse_factor(1 - math.exp(-0.5), 7, estimated=False) == pytest.approx(
        1.0, rel=1e-12
    )


def test_f_ellipse_factor_matches_closed_form_and_scipy():
    for r in (1, 2, 3, 5, 10, 20, 100):
        for p in (0.90, 0.95, 0.99):
            k = st.ellipse_factor(p, r, estimated=True)
            assert k == pytest.approx(_k_f(p, r), rel=1e-10)
            assert k == pytest.approx(math.sqrt(2 * scipy.stats.f.ppf(p, 2, r)), rel=1e-10)
            assert k > _k_chi2(p)  # an estimated variance always widens the ellipse
    assert st.ellipse_factor(0.95, 10) == pytest.approx(2.8645, abs=5e-5)
    assert st.ellipse_factor(0.95, 5) == pytest.approx(3.4018, abs=5e-5)


def test_precision_variance_branches():
    assert st.precision_variance("posterior", 1.84) == (1.84, True)
    assert st.precision_variance("posterior", 0.40) == (0.40, True)
    assert st.precision_variance("prior", 1.84) == (1.0, False)
    assert st.precision_variance("larger", 1.84) == (1.84, True)
    assert st.precision_variance("larger", 0.40) == (1.0, False)
    for method in ("posterior", "prior", "larger"):  # no redundancy: σ̂₀² does not exist
        assert st.precision_variance(method, None) == (1.0, False)


# ---------------------------------------------------------------------------------------
# the adjusted figures against numpy


@pytest.fixture(scope="module")
def tight():
    """1 mm a priori against errors of up to 5 mm: σ̂₀² well above 1."""
    return _numpy_solution(1.0), {
        m: adjust_fieldbook(_fieldbook(1.0, m)) for m in ("posterior", "prior", "larger")
    }


@pytest.fixture(scope="module")
def loose():
    """20 mm a priori: σ̂₀² well below 1."""
    return _numpy_solution(20.0), {
        m: adjust_fieldbook(_fieldbook(20.0, m)) for m in ("posterior", "prior", "larger")
    }


@pytest.mark.parametrize("case", ["tight", "loose"])
@pytest.mark.parametrize("method", ["posterior", "prior", "larger"])
def test_each_method_scales_sd_ellipses_and_relative_precision(case, method, request):
    (xy, qxx, variance, r, column), results = request.getfixturevalue(case)
    result = results[method]
    assert result.summary.redundancy == r == 3
    assert result.summary.variance_factor == pytest.approx(variance, rel=1e-6)
    assert (variance > 4.0) if case == "tight" else (variance < 0.25)
    used = {"posterior": variance, "prior": 1.0, "larger": max(variance, 1.0)}[method]
    k = _k_f(CONFIDENCE, r) if used == variance else _k_chi2(CONFIDENCE)
    data = result.to_json_dict()
    assert data["summary"]["precision_scaling"]["method"] == method
    assert data["summary"]["precision_scaling"]["factor"] == pytest.approx(used, rel=1e-6)
    assert data["settings"]["ellipse_factor"] == pytest.approx(k, rel=1e-10)
    points = {p["name"]: p for p in data["points"]}
    for name in ("C", "D", "E"):
        ke, kn = column[(name, 0)], column[(name, 1)]
        p = points[name]
        assert p["east"] == pytest.approx(xy[name][0], abs=1e-6)
        assert p["sd_east"] == pytest.approx(math.sqrt(used * qxx[ke, ke]), rel=1e-6)
        assert p["sd_north"] == pytest.approx(math.sqrt(used * qxx[kn, kn]), rel=1e-6)
        major, minor = _axes(used * qxx[np.ix_([ke, kn], [ke, kn])])
        assert p["ellipse"]["semi_major"] == pytest.approx(k * major, rel=1e-6)
        assert p["ellipse"]["semi_minor"] == pytest.approx(k * minor, rel=1e-6)
    # C–D: Σ_Δ = Σ_CC + Σ_DD − Σ_CD − Σ_DC, and the sd of the distance along the line
    c, d = [column[("C", 0)], column[("C", 1)]], [column[("D", 0)], column[("D", 1)]]
    sigma = used * (qxx[np.ix_(c, c)] + qxx[np.ix_(d, d)] - qxx[np.ix_(c, d)] - qxx[np.ix_(d, c)])
    (pair,) = [x for x in result.relative if {x.from_point, x.to_point} == {"C", "D"}]
    major, minor = _axes(sigma)
    assert pair.semi_major == pytest.approx(k * major, rel=1e-6)
    assert pair.semi_minor == pytest.approx(k * minor, rel=1e-6)
    along = (xy["D"] - xy["C"]) / np.hypot(*(xy["D"] - xy["C"]))
    assert pair.sd_distance == pytest.approx(math.sqrt(along @ sigma @ along), rel=1e-6)


@pytest.mark.parametrize("case", ["tight", "loose"])
def test_the_choice_leaves_coordinates_and_tests_alone(case, request):
    """Only precisions change: coordinates, w, MDB and the global test use the a priori σ."""
    _, results = request.getfixturevalue(case)
    base = results["posterior"].to_json_dict()
    for method in ("prior", "larger"):
        other = results[method].to_json_dict()
        assert other["observations"] == base["observations"]
        assert other["summary"]["global_test"] == base["summary"]["global_test"]
        assert [(p["east"], p["north"]) for p in other["points"]] == [
            (p["east"], p["north"]) for p in base["points"]
        ]


def test_sd_ratio_between_methods_is_the_square_root_of_the_variance_factor(tight):
    (_, _, variance, _, _), results = tight
    post = {p.name: p for p in results["posterior"].points}
    prior = {p.name: p for p in results["prior"].points}
    for name in ("C", "D", "E"):
        assert post[name].sd_north / prior[name].sd_north == pytest.approx(
            math.sqrt(variance), rel=1e-9
        )


def test_default_is_posterior_and_matches_today():
    default = adjust_fieldbook(_fieldbook(1.0, None))
    explicit = adjust_fieldbook(_fieldbook(1.0, "posterior"))
    assert default.summary.precision_method == "posterior"
    assert default.to_json_dict()["summary"]["precision_scaling"] == {
        "method": "posterior",
        "factor": default.summary.variance_factor,
    }
    assert default.to_json_dict()["points"] == explicit.to_json_dict()["points"]


#: One new point from a fixed one by a distance and an azimuth: no redundancy.
NO_REDUNDANCY = """fieldbook 1
tests precision={method}
defaults distance=5mm azimuth=5sec centering=0mm
point A east=1000 north=1000 fix
distance A P 400.000
azimuth A P 90:00:00
"""


@pytest.mark.parametrize("method", ["posterior", "prior", "larger"])
def test_zero_redundancy_uses_the_a_priori_variance_whatever_the_method(method):
    result = adjust_fieldbook(NO_REDUNDANCY.format(method=method))
    assert result.summary.redundancy == 0
    assert result.to_json_dict()["summary"]["precision_scaling"] == {
        "method": method,
        "factor": 1.0,
    }
    (p,) = [p for p in result.points if p.name == "P"]
    # east is along the distance (5 mm), north across it (400 m · 5″)
    assert p.sd_east == pytest.approx(0.005, rel=1e-6)
    across = 400.0 * 5.0 / 206264.806  # 9.7 mm: the major axis
    assert p.sd_north == pytest.approx(across, rel=1e-5)
    assert p.ellipse.semi_major == pytest.approx(2.4477 * across, rel=1e-4)
    assert p.ellipse.semi_minor == pytest.approx(2.4477 * 0.005, rel=1e-4)
    note = report.precision_note(result)
    assert "no redundancy" in note and f"precision={method}" in note


# ---------------------------------------------------------------------------------------
# the field book


@pytest.mark.parametrize(
    ("text", "method"),
    [
        ("precision=prior", "prior"),
        ("precision=LARGER", "larger"),
        ("alpha=0.01 precision=Posterior", "posterior"),
    ],
)
def test_parser_reads_the_method_in_any_case(text, method):
    book = parse_fieldbook(f"fieldbook 1\ntests {text}\n" + "point A east=0 north=0 fix\n")
    assert book.tests.precision == method


@pytest.mark.parametrize(
    ("value", "hint"),
    [
        ("posterier", "did you mean 'posterior'?"),
        ("apriori", "did you mean 'prior'?"),
        ("max", ""),
        ("1.0", ""),
    ],
)
def test_parser_refuses_an_unknown_method_naming_the_line_and_the_choices(value, hint):
    text = (
        f"fieldbook 1\nunits length=m\ntests alpha=0.05 precision={value}\n"
        "point A east=0 north=0 fix\n"
    )
    with pytest.raises(FieldbookError) as caught:
        parse_fieldbook(text)
    message = str(caught.value)
    assert re.search(rf"line 3\b.*'{re.escape(value)}' is not a precision scaling", message)
    for allowed in ("posterior", "prior", "larger"):
        assert allowed in message
    assert hint in message
    if not hint:
        assert "did you mean" not in message


def test_precision_given_twice_is_refused():
    with pytest.raises(FieldbookError, match="line 2"):
        parse_fieldbook("fieldbook 1\ntests precision=prior precision=larger\n")


# ---------------------------------------------------------------------------------------
# every report states the choice and its effect


def test_text_summary_states_choice_and_effect(tight):
    (_, _, variance, _, _), results = tight
    vf, times = f"{variance:.3f}", f"{math.sqrt(variance):.3f}"
    post = text_report.report_text(results["posterior"])
    assert (
        f"Precisions scaled by the a posteriori variance factor {vf} "
        f"(standard deviations × {times})"
    ) in post
    prior = text_report.report_text(results["prior"])
    assert (
        "Precisions scaled by the a priori variance factor 1 (standard deviations × 1.000" in prior
    )
    assert f"would have given standard deviations × {times}" in prior
    larger = text_report.report_text(results["larger"])
    assert f"the a posteriori one, standard deviations × {times}" in larger


def test_larger_picking_the_a_priori_factor_says_so(loose):
    (_, _, variance, _, _), results = loose
    text = report.precision_note(results["larger"])
    assert "the a priori one, standard deviations × 1.000" in text
    assert f"would have given standard deviations × {math.sqrt(variance):.3f}" in text
    assert report.precision_short(results["larger"]).startswith("larger: a priori σ₀² = 1.000")
    ellipse = report.ellipse_convention(results["larger"])
    assert "√χ²(95%; 2) = 2.4477" in ellipse and "precision=larger" in ellipse


def test_html_report_and_pdf_state_choice_and_ellipse_quantile(tight):
    _, results = tight
    html = html_report.report_html(results["prior"])
    assert "Precisions scaled by the a priori variance factor 1" in html
    assert "k = √χ²(95%; 2) = 2.4477" in html
    assert "Precisions scaled by" in html and "a priori σ₀² = 1.000 (sd × 1.000)" in html
    pdf = report_pdf(results["prior"])
    text = " ".join(
        re.sub(r"\s+", " ", page.extract_text()) for page in pypdf.PdfReader(io.BytesIO(pdf)).pages
    )
    assert "Precisions scaled by the a priori variance factor 1" in text
    assert "standard deviations are a priori (σ₀² = 1)" in text
    post_html = html_report.report_html(results["posterior"])
    assert f"k = √(2·F(95%; 2, r)) = {_k_f(0.95, 3):.4f}" in post_html


def test_results_page_states_choice(tmp_path: Path, tight):
    (_, _, variance, _, _), _ = tight
    with TestClient(create_app(tmp_path / "data")) as client:
        response = client.post(
            "/projects",
            follow_redirects=False,
            files={
                "fieldbook": ("larger.fieldbook", _fieldbook(1.0, "larger").encode(), "text/plain")
            },
        )
        assert response.status_code == 303, response.text
        page = client.get(response.headers["location"])
        for _ in range(100):  # the adjustment may run in the background
            if "precision-note" in page.text:
                break
            page = client.get(response.headers["location"])
    assert page.status_code == 200
    assert "larger of the a priori and a posteriori variance factors" in page.text
    assert f"the a posteriori one, standard deviations × {math.sqrt(variance):.3f}" in page.text


def test_runs_stored_before_the_choice_read_back_as_posterior(tight):
    """A stored run without the new fields was scaled by σ̂₀², as every run then was."""
    _, results = tight

    detail = json.loads(json.dumps(results["posterior"].detail_dict()))
    detail["summary"].pop("precision_method")
    detail["summary"].pop("precision_factor")
    old = _result_from_detail(detail)
    assert old.summary.precision_method == "posterior"
    assert old.summary.precision_factor == results["posterior"].summary.variance_factor
    assert old.to_json_dict() == results["posterior"].to_json_dict()
