"""``plan``: the design figures of planned observations (server/design/, docs/design.md).

Checks, each against a reference that is not the design code itself:

- the figures equal those ``adjust`` gives for an error-free data set of the same design,
  plane and geodetic
  (values computed here with math.hypot/atan2 from the approximate coordinates, so every
  residual is 0) with ``tests precision=prior``: the adjustment's iterations, misclosures and
  statistics are a different route to the same numbers;
- a leveling line of n equal sections between two fixed benchmarks, in closed form
  (docs/references.md "Network design (pre-analysis)", derived again in the test);
- Σr = n − u;
- switching an observation off gives the figures of the book without that line;
- the external reliability equals the coordinate shift of an adjustment with the MDB added to
  that one observation (a direct re-solution, docs/references.md "Network design
  (pre-analysis)").
"""

from __future__ import annotations

import itertools
import json
import math
from pathlib import Path

import pytest
from scipy.stats import chi2

from server.cli import main
from server.design.plan import WEAK_REDUNDANCY, plan_fieldbook, weak_lines
from server.errors import FieldbookError, NetworkError
from server.pipeline import adjust_fieldbook
from server.results.result import AdjustmentResult

ROOT = Path(__file__).resolve().parents[1]
FOOTBRIDGE = ROOT / "demo_projects" / "design" / "footbridge_design.fieldbook"

# An invented traverse-and-braces network: two held marks, four new ones (metres)
POINTS = {
    "W1": (1000.0, 2000.0),
    "W2": (1000.0, 2180.0),
    "E1": (1140.0, 2010.0),
    "E2": (1145.0, 2175.0),
    "A1": (1060.0, 2060.0),
    "A2": (1095.0, 2120.0),
}
HELD = ("W1", "W2")
ROUNDS = {
    "W1": ("W2", "E1", "E2", "A1"),
    "W2": ("W1", "E2", "A2"),
    "E1": ("W1", "E2", "A1"),
    "E2": ("W2", "E1", "A2"),
}
DISTANCES = [
    ("W1", "E1"),
    ("W2", "E2"),
    ("W1", "A1"),
    ("E1", "A1"),
    ("W2", "A2"),
    ("E2", "A2"),
    ("A1", "A2"),
]


def _azimuth_deg(a: str, b: str) -> float:
    (ea, na), (eb, nb) = POINTS[a], POINTS[b]
    return math.degrees(math.atan2(eb - ea, nb - na)) % 360.0


def _length(a: str, b: str) -> float:
    (ea, na), (eb, nb) = POINTS[a], POINTS[b]
    return math.hypot(eb - ea, nb - na)


def network_book(
    *,
    values: bool,
    drop: tuple[str, ...] = (),
    bias: dict[str, float] | None = None,
    held: tuple[str, ...] = HELD,
) -> str:
    """The network as a book: '?' for every value, or the values computed from the
    coordinates (directions with orientation 0, in decimal degrees).  Each observation has a
    key ("W1>E2", "d:W1-E1"); keys in ``drop`` become comment lines (line numbers kept), and
    ``bias`` adds metres or decimal degrees to a value."""
    bias = bias or {}
    out = [
        "fieldbook 1",
        'title "design check"',
        "units length=m angle=deg",
        "tests alpha=0.05 snooping=0.001 power=0.80 confidence=0.95 precision=prior",
        "tolerance relative=5mm+20ppm",
        "defaults direction=1sec distance=1mm+1.5ppm centering=0.5mm",
    ]
    for name, (e, n) in POINTS.items():
        out.append(f"point {name} east={e:.3f} north={n:.3f}" + (" fix" if name in held else ""))

    def value(key: str, computed: float) -> str:
        return f"{computed + bias.get(key, 0.0):.10f}" if values else "?"

    for at, targets in ROUNDS.items():
        out.append(f"directions {at}")
        for to in targets:
            key = f"{at}>{to}"
            line = f"  {to} {value(key, _azimuth_deg(at, to))}"
            out.append(f"#{line}" if key in drop else line)
        out.append("end")
    for a, b in DISTANCES:
        key = f"d:{a}-{b}"
        line = f"distance {a} {b} {value(key, _length(a, b))}"
        out.append(f"# {line}" if key in drop else line)
    return "\n".join(out) + "\n"


def line_of(key: str) -> int:
    """The line number of an observation of ``network_book`` by its key."""
    text = network_book(values=False).splitlines()
    at_key = None
    for number, line in enumerate(text, start=1):
        words = line.split()
        if words[:1] == ["directions"]:
            at_key = words[1]
        elif words and words[0] in POINTS:
            if f"{at_key}>{words[0]}" == key:
                return number
        elif words[:1] == ["distance"] and f"d:{words[1]}-{words[2]}" == key:
            return number
    raise KeyError(key)


def _by_line(result: AdjustmentResult) -> dict[int, object]:
    return {o.line: o for o in result.observations}


@pytest.fixture(scope="module")
def design() -> AdjustmentResult:
    return plan_fieldbook(network_book(values=False))


@pytest.fixture(scope="module")
def error_free() -> AdjustmentResult:
    return adjust_fieldbook(network_book(values=True))


def test_the_design_equals_adjust_on_error_free_values(design, error_free):
    """Reference: the adjustment of simulated error-free values of the same design (values
    from math.atan2/hypot here), σ0 = 1 by ``tests precision=prior``."""
    assert max(abs(o.residual or 0.0) for o in error_free.observations) < 1e-6
    for planned, adjusted in zip(design.points, error_free.points, strict=True):
        assert planned.name == adjusted.name
        for attr in ("sd_east", "sd_north"):
            assert getattr(planned, attr) == pytest.approx(
                getattr(adjusted, attr), rel=1e-9, abs=1e-12
            )
        if adjusted.ellipse is not None:
            assert planned.ellipse.semi_major == pytest.approx(
                adjusted.ellipse.semi_major, rel=1e-9
            )
            assert planned.ellipse.semi_minor == pytest.approx(
                adjusted.ellipse.semi_minor, rel=1e-9
            )
    for planned, adjusted in zip(design.observations, error_free.observations, strict=True):
        assert planned.redundancy == pytest.approx(adjusted.redundancy, rel=1e-9, abs=1e-12)
        assert planned.mdb == pytest.approx(adjusted.mdb, rel=1e-9)
        assert planned.sd == pytest.approx(adjusted.sd, rel=1e-12)
        assert planned.inseparable == adjusted.inseparable
    for planned, adjusted in zip(design.relative, error_free.relative, strict=True):
        assert planned.semi_major == pytest.approx(adjusted.semi_major, rel=1e-9)
        assert planned.passed == adjusted.passed


def test_the_design_result_has_no_values(design):
    s = design.summary
    assert s.design and s.variance_factor is None and s.global_test is None
    # σ0 = 1 is known, so the ellipses take √χ²(0.95; 2) (reference: scipy.stats.chi2)
    assert s.ellipse_factor == pytest.approx(math.sqrt(chi2.ppf(0.95, 2)), rel=1e-12)
    assert s.precision_factor == 1.0
    document = design.to_json_dict()
    assert document["summary"]["design"] is True
    for o in document["observations"]:
        assert o["observed"] is None and o["residual"] is None and o["w"] is None
        assert o["adjusted"] is None and o["estimated_bias"] is None
        assert "external_reliability" in o


def test_redundancy_numbers_sum_to_n_minus_u(design):
    """Σ r_i = trace(Qvv·P) = n − u (any adjustment text; here n = 20 rows, u = 8
    coordinates + 4 orientations)."""
    total = sum(o.redundancy for o in design.observations)
    assert design.summary.redundancy == 20 - 12
    assert total == pytest.approx(20 - 12, abs=1e-9)


@pytest.mark.parametrize("key", ["d:W1-E1", "E2>A2", "W1>A1"])
def test_switching_off_equals_removing_the_line(key):
    """Reference: the same book with the observation's line commented out."""
    switched = plan_fieldbook(network_book(values=False), switched_off={line_of(key)})
    removed = plan_fieldbook(network_book(values=False, drop=(key,)))
    for a, b in zip(switched.points, removed.points, strict=True):
        assert a.sd_east == pytest.approx(b.sd_east, rel=1e-12)
        assert a.sd_north == pytest.approx(b.sd_north, rel=1e-12)
    kept = _by_line(removed)
    for o in switched.observations:
        if o.line == line_of(key):
            assert o.redundancy is None and o.mdb is None  # left out, like an ignored line
            continue
        assert o.redundancy == pytest.approx(kept[o.line].redundancy, rel=1e-12, abs=1e-12)
        assert o.external_reliability == pytest.approx(kept[o.line].external_reliability, rel=1e-9)


@pytest.mark.parametrize("key", ["d:W1-E1", "W1>A1", "E1>E2"])
def test_external_reliability_is_the_shift_of_an_adjustment_with_the_mdb_added(design, key):
    """Reference: adjust the error-free values with the MDB added to this one observation and
    take the largest point shift (docs/references.md "Network design (pre-analysis)").  The
    model is nonlinear, so the shift agrees to the linearisation error (measured: 1e-5)."""
    planned = _by_line(design)[line_of(key)]
    size = planned.mdb if key.startswith("d:") else planned.mdb / 3600.0  # arcsec → degrees
    clean = adjust_fieldbook(network_book(values=True))
    biased = adjust_fieldbook(network_book(values=True, bias={key: size}))
    largest = max(
        math.hypot(b.east - c.east, b.north - c.north)
        for b, c in zip(biased.points, clean.points, strict=True)
    )
    assert planned.external_reliability == pytest.approx(largest, rel=1e-4)


def test_external_reliability_of_a_free_network_is_the_inner_constraint_shift():
    """Reference: a free network (no point held) re-adjusted with the MDB added to one
    distance; both solutions are the inner-constraint (minimum-trace) ones, so the point
    shifts compare directly."""
    key = "d:A1-A2"
    design = plan_fieldbook(network_book(values=False, held=()))
    planned = _by_line(design)[line_of(key)]
    clean = adjust_fieldbook(network_book(values=True, held=()))
    biased = adjust_fieldbook(network_book(values=True, held=(), bias={key: planned.mdb}))
    largest = max(
        math.hypot(b.east - c.east, b.north - c.north)
        for b, c in zip(biased.points, clean.points, strict=True)
    )
    assert planned.external_reliability == pytest.approx(largest, rel=1e-4)


def test_every_back_end_gives_the_same_design(monkeypatch):
    """Regression across the engine's back ends (dense LAPACK and the sparse ones): the same
    design, also for the external reliability, which solves with each factor."""
    from server.engine import linearisation

    original = linearisation.linearise_once
    results = {}
    for method in ("dense", "sparse"):
        monkeypatch.setattr(
            "server.design.plan.linearise_once",
            lambda network, state, m=method: original(network, state, method=m),
        )
        results[method] = plan_fieldbook(network_book(values=False))
    for a, b in zip(results["dense"].observations, results["sparse"].observations, strict=True):
        assert a.redundancy == pytest.approx(b.redundancy, rel=1e-9, abs=1e-12)
        assert a.external_reliability == pytest.approx(b.external_reliability, rel=1e-9)


LEVEL_LINE = """fieldbook 1
units length=m
point BM-A height=10.000 fix
point BM-B height=14.000 fix
{points}
{levels}
"""


def leveling_line(n: int, sigma_mm: float) -> str:
    names = ["BM-A"] + [f"P{k}" for k in range(1, n)] + ["BM-B"]
    points = "\n".join(f"point P{k} height={10.0 + 4.0 * k / n:.4f}" for k in range(1, n))
    levels = "\n".join(f"level {a} {b} ? sd={sigma_mm}mm" for a, b in itertools.pairwise(names))
    return LEVEL_LINE.format(points=points, levels=levels)


@pytest.mark.parametrize("n", [2, 4, 7])
def test_a_leveling_line_between_two_benchmarks_in_closed_form(n):
    """Closed form (docs/references.md "Network design (pre-analysis)"; the textbook result is
    recalled from memory, derived here): point k is reached from BM-A over k sections
    (variance kσ²) and from BM-B over n − k (variance (n − k)σ²); their weighted mean has
    variance σ²·k(n − k)/n, σ·√n/2 at the midpoint.  One condition (the run's closure) is
    shared by n equal sections: r = 1/n each.  An error ∇ in section 1 is spread back along
    the run like a misclosure: point k moves ∇·(n − k)/n, most at k = 1, with
    ∇ = MDB = σ·√(λ0/r)."""
    sigma = 0.0015
    result = plan_fieldbook(leveling_line(n, sigma * 1000))
    sd = {p.name: p.sd_height for p in result.points}
    for k in range(1, n):
        assert sd[f"P{k}"] == pytest.approx(sigma * math.sqrt(k * (n - k) / n), rel=1e-10)
    if n % 2 == 0:
        assert sd[f"P{n // 2}"] == pytest.approx(sigma * math.sqrt(n) / 2, rel=1e-10)
    lambda0 = result.summary.lambda0
    first = result.observations[0]
    for o in result.observations:
        assert o.redundancy == pytest.approx(1 / n, rel=1e-10)
        assert o.mdb == pytest.approx(sigma * math.sqrt(lambda0 * n), rel=1e-10)
    mdb = sigma * math.sqrt(lambda0 * n)
    assert first.external_reliability == pytest.approx(mdb * (n - 1) / n, rel=1e-10)
    # every section is weak below 1/0.3 ≈ 3.3 sections; none from 4 on
    assert (weak_lines(result) != []) == (1 / n < WEAK_REDUNDANCY)


def test_a_point_without_approximate_coordinates_is_named(tmp_path, capsys):
    book = network_book(values=False).replace("point A2 east=1095.000 north=2120.000\n", "")
    with pytest.raises(NetworkError, match=r"A2 \(no point line\)"):
        plan_fieldbook(book)
    path = tmp_path / "design.fieldbook"
    path.write_text(book, encoding="utf-8")
    assert main(["plan", str(path)]) == 3
    assert "A2" in capsys.readouterr().err


def test_a_measured_value_in_a_plan_book_is_read_and_not_used():
    """A booked value counts as planned: the figures are those of the '?' book."""
    measured = plan_fieldbook(network_book(values=True))
    planned = plan_fieldbook(network_book(values=False))
    for a, b in zip(measured.observations, planned.observations, strict=True):
        assert a.redundancy == pytest.approx(b.redundancy, rel=1e-9)
        assert a.observed is None


def test_adjust_still_refuses_a_planned_observation():
    with pytest.raises(FieldbookError, match="planned observation"):
        adjust_fieldbook(network_book(values=False))


def test_plan_on_the_command_line_json_html_pdf(tmp_path, capsys):
    html, pdf = tmp_path / "design.html", tmp_path / "design.pdf"
    assert main(["plan", str(FOOTBRIDGE), "--json", "--report", str(html), "--pdf", str(pdf)]) == 0
    document = json.loads(capsys.readouterr().out)
    assert document["summary"]["design"] is True and document["summary"]["variance_factor"] is None
    text = html.read_text(encoding="utf-8")
    assert text.count("Caution.") == 2 and "<script" not in text
    assert "Ext. reliability" in text and "Quillmere" in text
    assert pdf.read_bytes().startswith(b"%PDF")


def test_the_plan_json_validates_against_the_schema(capsys):
    jsonschema = pytest.importorskip("jsonschema")
    schema = json.loads((ROOT / "docs" / "result.schema.json").read_text(encoding="utf-8"))
    assert main(["plan", str(FOOTBRIDGE), "--json"]) == 0
    document = json.loads(capsys.readouterr().out)
    errors = [e.message for e in jsonschema.Draft202012Validator(schema).iter_errors(document)]
    assert errors == []


GEODETIC = ROOT / "tests" / "data" / "design_geodetic.fieldbook"


def test_a_geodetic_design_sums_its_redundancy_and_tests_baselines_by_component():
    """The geodetic model evaluates A at the given positions: Σr = n − u (trace identity) with
    a baseline's three components among the n rows; a baseline has its per-component r and
    MDB but no external reliability (its components are tested together)."""
    result = plan_fieldbook(GEODETIC.read_text(encoding="utf-8"))
    s = result.summary
    assert s.design and s.model == "geodetic"
    rows = [o for o in result.observations if o.redundancy is not None]
    assert len(rows) == 2 * 3 + 5 + 3
    assert sum(o.redundancy for o in rows) == pytest.approx(s.redundancy, abs=1e-9)
    baselines = [o for o in rows if o.kind == "baseline"]
    assert {o.component for o in baselines} == {"dx", "dy", "dz"}
    assert all(o.mdb is not None and o.external_reliability is None for o in baselines)
    assert all(o.external_reliability is not None for o in rows if o.kind != "baseline")
    assert weak_lines(result) == [12, 14, 16]


# A geodetic design with values simulated independently: pyproj places the marks (the local
# grid as a transverse Mercator on GRS80 with its origin at the crs line's point, and
# Earth-centred X, Y, Z); baselines are ΔX, ΔY, ΔZ and slope distances the chords.
GEO_MARKS = {
    "G1": (5000.0, 5000.0, 100.0),
    "G2": (5600.0, 5100.0, 120.0),
    "N1": (5300.0, 5400.0, 110.0),
    "N2": (5350.0, 4700.0, 95.0),
}
GEO_BASELINES = [("G1", "N1"), ("G2", "N2"), ("G1", "N2")]
GEO_SLOPES = [("N1", "N2"), ("G2", "N1"), ("G1", "N2")]


def geodetic_book(*, values: bool) -> str:
    pyproj = pytest.importorskip("pyproj")
    grid = pyproj.CRS.from_proj4(
        "+proj=tmerc +lat_0=47.05 +lon_0=-122.8916666666667 +k=1 "
        "+x_0=5000 +y_0=5000 +ellps=GRS80 +units=m"
    )
    to_xyz = pyproj.Transformer.from_crs(
        grid, pyproj.CRS.from_proj4("+proj=geocent +ellps=GRS80 +units=m"), always_xy=True
    )
    xyz = {name: to_xyz.transform(*mark) for name, mark in GEO_MARKS.items()}
    out = [
        "fieldbook 1",
        "units length=m angle=dms",
        "crs local lat=47:03:00 lon=-122:53:30 east=5000m north=5000m",
        "tests precision=prior",
        "defaults slope=1mm+1.5ppm",
    ]
    for name, (e, n, h) in GEO_MARKS.items():
        held = " fix" if name.startswith("G") else ""
        out.append(f"point {name} east={e:.3f} north={n:.3f} height={h:.3f}{held}")
    for a, b in GEO_BASELINES:
        delta = " ".join(f"{xyz[b][k] - xyz[a][k]:.5f}" for k in range(3))
        out.append(f"baseline {a} {b} {delta if values else '? ? ?'} sd=3mm,3mm,5mm")
    for a, b in GEO_SLOPES:
        out.append(
            f"slope {a} {b} {math.dist(xyz[a], xyz[b]):.5f}" if values else f"slope {a} {b} ?"
        )
    return "\n".join(out) + "\n"


def test_a_geodetic_design_equals_adjust_on_error_free_values():
    """Reference: the geodetic adjustment of values simulated with pyproj (not the model's
    own equations) from the same approximate positions; values rounded to 0.01 mm."""
    adjusted = adjust_fieldbook(geodetic_book(values=True))
    design = plan_fieldbook(geodetic_book(values=False))
    assert max(abs(o.residual) for o in adjusted.observations) < 2e-5
    for a, d in zip(adjusted.points, design.points, strict=True):
        for attr in ("sd_east", "sd_north", "sd_height"):
            assert getattr(d, attr) == pytest.approx(getattr(a, attr), rel=1e-6, abs=1e-12)
    for a, d in zip(adjusted.observations, design.observations, strict=True):
        assert (d.line, d.component) == (a.line, a.component)
        assert d.redundancy == pytest.approx(a.redundancy, rel=1e-6)
        assert d.mdb == pytest.approx(a.mdb, rel=1e-6)


def test_the_monitoring_demo_has_its_design():
    """The weir's design book (demo_projects/design/corran_weir_design.fieldbook) plans the
    same level runs as its epochs: every section of the first epoch is planned, and the design
    places each crest mark to better than a millimetre (a priori, σ0 = 1), so a settlement of a
    few millimetres is within reach of the monitoring."""
    from pathlib import Path

    from server.design.plan import plan_fieldbook

    root = Path(__file__).resolve().parents[1] / "demo_projects"
    design = plan_fieldbook((root / "design" / "corran_weir_design.fieldbook").read_text())
    epoch = (root / "monitoring" / "corran_weir_2025-03-10.fieldbook").read_text()
    sections = {tuple(l.split()[1:3]) for l in epoch.splitlines() if l.startswith("level ")}
    assert {(o.from_point, o.to) for o in design.observations} == sections
    crest = [p for p in design.points if p.name.startswith("W-")]
    assert len(crest) == 4 and all(p.sd_height is not None and p.sd_height < 0.001 for p in crest)
