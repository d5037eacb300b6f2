"""The network plot: geometry prepared by server/report/plot.py and the SVG the results page
draws."""

from __future__ import annotations

import html
import json
import math
import re
import warnings
from pathlib import Path

import numpy as np
import pytest

from server.pipeline import adjust_fieldbook
from server.report import plot
from server.report import tables as report
from server.results.result import (
    AdjustmentResult,
    Ellipse,
    GlobalTest,
    ObservationResult,
    PointResult,
    RelativeResult,
    Summary,
)
from server.web import create_app
from server.web.app import make_templates
from tests.synthetic import grid_network

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client warns when it finds only httpx
    from fastapi.testclient import TestClient

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
DIRECTION_BLUNDER_LINE = 94  # tools/DEMOS.md: direction Q13 -> Q15 in the round at Q13, +30″
SCRIPT_NAME = "<script>alert(1)</script>"


def _demo(name: str) -> AdjustmentResult:
    path = DEMOS / f"{name}.fieldbook"
    return adjust_fieldbook(path.read_bytes(), source=path.name)


@pytest.fixture(scope="module")
def control() -> AdjustmentResult:
    return _demo("control_network")


@pytest.fixture(scope="module")
def direction_blunder() -> AdjustmentResult:
    return _demo("network_direction_blunder")


@pytest.fixture(scope="module")
def traverse() -> AdjustmentResult:
    return _demo("closed_traverse")


# --------------------------------------------------------------------------------------
# hand-made results: exact cases no adjustment has to produce


def _point(
    name: str,
    east: float | None,
    north: float | None,
    *,
    fixed: str = "",
    weighted: str = "",
    ellipse: Ellipse | None = None,
    height: float | None = None,
) -> PointResult:
    free = not fixed
    return PointResult(
        name=name,
        east=east,
        north=north,
        height=height,
        sd_east=0.004 if free else 0.0,
        sd_north=0.003 if free else 0.0,
        sd_height=None if height is None else 0.002,
        fixed=fixed,
        weighted=weighted,
        ellipse=ellipse,
    )


def _obs(
    line: int,
    kind: str,
    a: str,
    b: str,
    *,
    at: str | None = None,
    flagged: bool = False,
    ignored: bool = False,
    w: float | None = 0.5,
) -> ObservationResult:
    angular = kind in ("angle", "direction", "azimuth", "zenith")
    return ObservationResult(
        line=line,
        kind=kind,
        from_point=a,
        at=at,
        to=b,
        observed=45.0 if angular else 100.0,
        adjusted=45.0 if angular else 100.0,
        residual=1.2 if angular else 0.0012,
        sd=1.0 if angular else 0.002,
        redundancy=None if ignored else 0.6,
        w=None if ignored else w,
        mdb=None,
        flagged=flagged,
        ignored=ignored,
    )


def _made(
    points: tuple[PointResult, ...],
    observations: tuple[ObservationResult, ...] = (),
    relative: tuple[RelativeResult, ...] = (),
    dimension: int = 2,
) -> AdjustmentResult:
    summary = Summary(
        dimension=dimension,
        points=len(points),
        observations=len(observations),
        used_observations=len(observations),
        unknowns=4,
        redundancy=3,
        iterations=2,
        converged=True,
        variance_factor=1.0,
        global_test=GlobalTest(statistic=3.0, lower=0.2, upper=9.3, alpha=0.05, passed=True),
        critical_w=3.2905,
        lambda0=17.075,
        ellipse_factor=2.45,
        alpha=0.05,
        snooping=0.001,
        power=0.80,
        confidence=0.95,
    )
    return AdjustmentResult(
        title="Hand-made",
        source="hand.fieldbook",
        length_unit="m",
        angle_unit="dms",
        text_sha256="ab" * 32,
        summary=summary,
        points=points,
        observations=observations,
        misclosures=(),
        relative=relative,
        warnings=(),
    )


def _render(data: dict[str, object]) -> str:
    template = make_templates().env.get_template("partials/network_plot.html")
    return template.render(network_plot=data)


def _by_name(data: dict, name: str) -> dict:
    return next(p for p in data["points"] if p["name"] == name)


def _line_between(data: dict, a: str, b: str) -> dict:
    return next(ln for ln in data["lines"] if set(ln["names"]) == {a, b})


# --------------------------------------------------------------------------------------
# where things are drawn


def test_grid_north_is_up_and_east_is_right_at_true_scale():
    """SVG y grows downward: a point 300 m north is drawn 300 units higher (smaller y)."""
    result = _made(
        (
            _point("BASE", 5000.0, 2000.0, fixed="en"),
            _point("EAST", 5100.0, 2000.0),
            _point("NORTH", 5000.0, 2300.0),
            _point("SOUTHWEST", 4950.0, 1900.0),
        ),
        (_obs(1, "distance", "BASE", "EAST"), _obs(2, "distance", "BASE", "NORTH")),
    )
    data = plot.network_plot_data(result)
    base, east, north, sw = (_by_name(data, n) for n in ("BASE", "EAST", "NORTH", "SOUTHWEST"))
    assert (east["x"] - base["x"], east["y"] - base["y"]) == (100.0, 0.0)
    assert (north["x"] - base["x"], north["y"] - base["y"]) == (0.0, -300.0)
    assert (sw["x"] - base["x"], sw["y"] - base["y"]) == (-50.0, 100.0)
    # the origin is the north-west corner, so every drawn coordinate is >= 0
    assert min(p["x"] for p in data["points"]) == 0.0 == min(p["y"] for p in data["points"])
    assert data["extent"] == {"width": 150.0, "height": 400.0}
    # and the SVG puts each symbol exactly there
    svg = _render(data)
    assert f'data-point="{north["id"]}" tabindex="0" role="button" aria-label="Point NORTH' in svg
    assert f'transform="translate({north["x"]} {north["y"]})"' in svg


def test_the_whole_network_fits_the_initial_view_with_room_for_labels(control):
    data = plot.network_plot_data(control)
    view, per_px, margin = data["view"], data["nominal"]["per_px"], data["nominal"]["margin"]
    assert view["width"] / view["height"] == pytest.approx(8 / 5)
    for p in data["points"]:
        px = (p["x"] - view["x"]) / per_px
        py = (p["y"] - view["y"]) / per_px
        assert margin["left"] - 0.5 <= px <= data["nominal"]["width"] - margin["right"] + 0.5
        assert margin["top"] - 0.5 <= py <= data["nominal"]["height"] - margin["bottom"] + 0.5


def test_ellipse_major_axis_is_drawn_at_its_azimuth_from_grid_north():
    """ry is the semi-major axis; SVG rotate(θ) with y down turns it clockwise from north."""
    ellipse = Ellipse(semi_major=0.012, semi_minor=0.004, azimuth=30.0, confidence=0.95)
    result = _made(
        (_point("A", 0.0, 1000.0, fixed="en"), _point("B", 800.0, 0.0, ellipse=ellipse)),
        (_obs(1, "distance", "A", "B"),),
    )
    data = plot.network_plot_data(result)
    b = _by_name(data, "B")["ellipse"]
    f = data["exaggeration"]
    assert (b["ry"], b["rx"], b["azimuth"]) == (
        pytest.approx(0.012 * f),
        pytest.approx(0.004 * f),
        30.0,
    )
    # where SVG puts the tip of the ry axis: rotate(θ) maps (0, -ry) to (ry sinθ, -ry cosθ)
    theta = math.radians(b["azimuth"])
    tip_x, tip_y = b["ry"] * math.sin(theta), -b["ry"] * math.cos(theta)
    assert math.degrees(math.atan2(tip_x, -tip_y)) == pytest.approx(30.0)  # back in E/N: N30°E
    svg = _render(data)
    assert re.search(
        r'<ellipse class="np-ell" data-point="1"[^>]*rx="{}" ry="{}"[^>]*'
        r"rotate\(30\.0\)".format(re.escape(str(b["rx"])), re.escape(str(b["ry"]))),
        svg,
    )


# --------------------------------------------------------------------------------------
# what is drawn


def test_symbol_follows_how_the_position_is_held():
    result = _made(
        (
            _point("HELD", 0.0, 0.0, fixed="en"),
            _point("HELD3D", 10.0, 0.0, fixed="enh", height=5.0),
            _point("WEIGHTED", 20.0, 0.0, weighted="en"),
            _point("HEIGHT_ONLY_FIXED", 30.0, 0.0, fixed="h", height=6.0),
            _point("NEW", 40.0, 0.0),
        ),
        (_obs(1, "distance", "HELD", "NEW"),),
        dimension=3,
    )
    data = plot.network_plot_data(result)
    kinds = {p["name"]: p["kind"] for p in data["points"]}
    assert kinds == {
        "HELD": "fixed",
        "HELD3D": "fixed",
        "WEIGHTED": "weighted",
        "HEIGHT_ONLY_FIXED": "free",
        "NEW": "free",
    }
    svg = _render(data)
    assert svg.count('class="np-pt np-pt-fixed"') == 2
    assert svg.count('class="np-pt np-pt-weighted"') == 1
    assert svg.count('class="np-pt np-pt-free"') == 2
    # a height held fixed still shows in the panel, and 3D points carry their height
    detail = dict(map(tuple, _by_name(data, "HEIGHT_ONLY_FIXED")["detail"]))
    assert detail["Role"] == "fixed height"
    assert detail["Height"] == "6.0000 m"


def test_weighted_control_from_a_field_book_gets_its_own_symbol_and_legend():
    net = grid_network(np.random.default_rng(11), size=3, fixed=("P0_0", "P0_2"))
    e, n = net.truth["P2_0"]
    text = net.text + f"point P2_0 east={e + 0.003:.4f} north={n - 0.002:.4f} sd=5mm\n"
    data = plot.network_plot_data(adjust_fieldbook(text.encode(), source="weighted.fieldbook"))
    assert {p["name"]: p["kind"] for p in data["points"]}["P2_0"] == "weighted"
    assert [p["name"] for p in data["points"] if p["kind"] == "fixed"] == ["P0_0", "P0_2"]
    assert _by_name(data, "P2_0")["ellipse"] is not None  # weighted control is adjusted
    svg = _render(data)
    assert "Weighted control</li>" in svg and "Held fixed</li>" in svg


def test_points_without_a_horizontal_position_are_listed_not_drawn():
    result = _made(
        (
            _point("A", 0.0, 0.0, fixed="en"),
            _point("B", 100.0, 0.0),
            _point("BM", None, None, fixed="h", height=12.0),
        ),
        (_obs(1, "distance", "A", "B"), _obs(2, "level", "A", "BM")),
        dimension=3,
    )
    data = plot.network_plot_data(result)
    assert [p["name"] for p in data["points"]] == ["A", "B"]
    assert data["not_drawn"] == ["BM"]
    assert len(data["lines"]) == 1
    assert "Not drawn (no horizontal position)" in _render(data)


def test_one_line_per_pair_and_an_angle_joins_its_station_with_back_and_fore():
    result = _made(
        (_point("A", 0.0, 0.0, fixed="en"), _point("B", 100.0, 0.0), _point("C", 0.0, 100.0)),
        (
            _obs(10, "direction", "A", "B"),
            _obs(11, "direction", "B", "A"),
            _obs(12, "distance", "A", "B"),
            _obs(13, "angle", "B", "C", at="A"),
            _obs(14, "azimuth", "C", "B"),
        ),
    )
    data = plot.network_plot_data(result)
    pairs = {frozenset(ln["names"]): ln for ln in data["lines"]}
    assert set(pairs) == {frozenset("AB"), frozenset("AC"), frozenset("BC")}
    assert pairs[frozenset("AB")]["observations"] == [0, 1, 2, 3]  # both ways, distance, angle
    assert pairs[frozenset("AC")]["observations"] == [3]
    assert [o["line"] for o in pairs[frozenset("AB")]["detail"]] == [10, 11, 12, 13]
    # measured distances are drawn solid; pairs only sighted are drawn dashed
    assert pairs[frozenset("AB")]["style"] == "distance"
    assert pairs[frozenset("AC")]["style"] == "sighting"
    assert pairs[frozenset("BC")]["style"] == "sighting"
    svg = _render(data)
    assert svg.count('class="np-ln np-ln-distance"') == 1
    assert svg.count('class="np-ln np-ln-sighting"') == 2


def test_a_pair_with_only_ignored_observations_is_drawn_as_not_used():
    result = _made(
        (_point("A", 0.0, 0.0, fixed="en"), _point("B", 100.0, 0.0), _point("C", 0.0, 100.0)),
        (
            _obs(1, "distance", "A", "B"),
            _obs(2, "distance", "A", "C", ignored=True),
            _obs(3, "distance", "A", "B", ignored=True),
            _obs(4, "distance", "B", "C"),
        ),
    )
    data = plot.network_plot_data(result)
    ac, ab = _line_between(data, "A", "C"), _line_between(data, "A", "B")
    assert (ac["used"], ac["style"], ac["has_ignored"]) == (False, "ignored", False)
    assert (ab["used"], ab["style"], ab["has_ignored"]) == (True, "distance", True)
    svg = _render(data)
    line_ac = re.search(
        r'<g class="np-ln np-ln-ignored" data-line="{}".*?</g>'.format(ac["id"]), svg, re.DOTALL
    )
    assert line_ac and 'stroke-dasharray="1.5 3.5"' in line_ac.group(0)  # dotted grey
    assert f'class="np-mark np-mark-ignored" data-line="{ab["id"]}"' in svg
    assert f'class="np-mark np-mark-ignored" data-line="{ac["id"]}"' not in svg


def test_the_ignored_distance_of_the_control_demo_stays_visible_on_its_line(control):
    """tools/DEMOS.md: HARROW-LF-101 was measured twice, once with the wrong prism constant."""
    line = _line_between(plot.network_plot_data(control), "HARROW", "LF-101")
    assert line["used"] and line["has_ignored"]
    statuses = [(o["kind"], o["status"]) for o in line["detail"]]
    assert ("distance", "ignored") in statuses and ("distance", "ok") in statuses


def test_flagged_observation_marks_its_line_with_colour_and_a_flag():
    result = _made(
        (_point("A", 0.0, 0.0, fixed="en"), _point("B", 100.0, 0.0), _point("C", 0.0, 100.0)),
        (
            _obs(7, "distance", "A", "B", flagged=True, w=-5.12),
            _obs(8, "distance", "A", "C"),
            _obs(9, "distance", "B", "C"),
        ),
    )
    data = plot.network_plot_data(result)
    ab = _line_between(data, "A", "B")
    assert ab["flagged"] and "line 7" in ab["flag_title"] and "-5.12" in ab["flag_title"]
    assert [ln["flagged"] for ln in data["lines"]].count(True) == 1
    assert data["lines"][-1] is ab  # drawn last, so nothing covers it
    svg = _render(data)
    assert svg.count('class="np-mark np-mark-flag"') == 1
    assert f'class="np-mark np-mark-flag" data-line="{ab["id"]}"' in svg
    flagged = re.search(r'<g class="np-ln np-ln-distance is-flagged".*?</g>', svg, re.DOTALL)
    assert flagged and 'class="np-halo"' in flagged.group(0)  # the dashed highlight
    assert 'stroke-dasharray="9 5"' in flagged.group(0)


def test_the_direction_blunder_is_flagged_on_the_line_q13_q15(direction_blunder):
    data = plot.network_plot_data(direction_blunder)
    line = _line_between(data, "Q13", "Q15")
    assert line["flagged"]
    blunder = [o for o in line["detail"] if o["line"] == DIRECTION_BLUNDER_LINE]
    assert blunder and blunder[0]["flagged"] and blunder[0]["kind"] == "direction"
    assert blunder[0]["marks"] == "Q13 → Q15"
    flagged_lines = {o.line for o in direction_blunder.observations if o.flagged}
    drawn_flags = {o["line"] for ln in data["lines"] for o in ln["detail"] if o["flagged"]}
    assert drawn_flags == flagged_lines  # every flagged observation is on a flagged line
    assert not any(
        ln["flagged"] for ln in data["lines"] if not any(o["flagged"] for o in ln["detail"])
    )


def test_clean_control_network_shows_no_flag(control):
    data = plot.network_plot_data(control)
    assert not any(ln["flagged"] for ln in data["lines"])
    assert "np-mark-flag" not in _render(data)


def test_side_panel_figures_are_the_tables_figures(control):
    data = plot.network_plot_data(control)
    rows = {r.name: r for r in report.point_rows(control)}
    for p in data["points"]:
        detail = dict(map(tuple, p["detail"]))
        assert detail["East"] == f"{rows[p['name']].east} m"
        assert detail["North"] == f"{rows[p['name']].north} m"
        assert detail["Role"] == rows[p["name"]].role
    line = _line_between(data, "HARROW", "LF-107")
    relative = next(
        r for r in control.relative if {r.from_point, r.to_point} == {"HARROW", "LF-107"}
    )
    assert ["Relative ellipse a (95%)", f"{report.fmt_length(relative.semi_major, 'm')} m"] in line[
        "relative"
    ]


# --------------------------------------------------------------------------------------
# ellipse exaggeration and scale bars


@pytest.mark.parametrize("demo", ["control", "direction_blunder", "traverse"])
def test_default_exaggeration_makes_the_largest_ellipse_a_few_percent_of_the_network(demo, request):
    result = request.getfixturevalue(demo)
    data = plot.network_plot_data(result)
    factor = data["exaggeration"]
    assert factor in plot.EXAGGERATIONS
    assert data["exaggerations"][data["exaggeration_index"]] == factor
    extent = max(data["extent"]["width"], data["extent"]["height"])
    largest = max(p["ellipse"]["ry"] for p in data["points"] if p["ellipse"])
    assert 0.025 * extent <= largest <= 0.065 * extent
    for p, point in zip(
        data["points"], (q for q in result.points if q.east is not None), strict=True
    ):
        if point.ellipse is None:
            assert p["ellipse"] is None and point.fixed == "en"  # held fixed: no ellipse
            continue
        assert p["ellipse"]["ry"] == pytest.approx(point.ellipse.semi_major * factor, rel=1e-5)
        assert p["ellipse"]["rx"] == pytest.approx(point.ellipse.semi_minor * factor, rel=1e-5)
        assert p["ellipse"]["a"] == point.ellipse.semi_major  # unexaggerated, for the JS


def test_scale_bars_tell_the_truth(control, traverse):
    for result, unit in ((control, "m"), (traverse, "ft")):
        data = plot.network_plot_data(result)
        per_px = data["view"]["width"] / data["nominal"]["width"]
        bar = data["map_bar"]
        assert bar["px"] * per_px == pytest.approx(bar["length"], rel=1e-3)
        assert bar["px"] <= plot.MAP_BAR_PX
        ebar = data["ellipse_bar"]
        assert ebar["px"] * per_px == pytest.approx(ebar["length"] * data["exaggeration"], rel=1e-3)
        assert ebar["label"].endswith(" mm" if unit == "m" else " ft")
        svg = _render(data)
        assert f"{ebar['label']} on the ellipses ({data['exaggeration_label']})</text>" in svg


@pytest.mark.parametrize(
    ("value", "unit", "text"),
    [
        (0.01, "m", "10 mm"),
        (0.0005, "m", "0.5 mm"),
        (200.0, "m", "200 m"),
        (2000.0, "m", "2 km"),
        (0.05, "ft", "0.05 ft"),
        (500.0, "usft", "500 US ft"),
    ],
)
def test_scale_bar_lengths_read_as_a_surveyor_writes_them(value, unit, text):
    assert plot.length_text(value, unit) == text


def test_bar_length_is_the_longest_1_2_5_step_that_fits():
    assert plot.bar_length(130.0) == 100.0
    assert plot.bar_length(0.0249) == 0.02
    assert plot.bar_length(50.0) == 50.0
    assert plot.exaggeration_at_most(7999.0) == 5000
    assert plot.exaggeration_at_most(0.3) == 1  # never shrink an ellipse


# --------------------------------------------------------------------------------------
# legibility


@pytest.mark.parametrize("demo", ["control", "direction_blunder", "traverse"])
def test_labels_cover_no_other_label_or_symbol_and_stay_on_the_canvas(demo, request):
    data = plot.network_plot_data(request.getfixturevalue(demo))
    view, per_px = data["view"], data["nominal"]["per_px"]
    boxes = [p["label"]["box"] for p in data["points"]]
    symbols = [
        ((p["x"] - view["x"]) / per_px, (p["y"] - view["y"]) / per_px) for p in data["points"]
    ]

    def overlap(a, b):
        return min(a[2], b[2]) > max(a[0], b[0]) and min(a[3], b[3]) > max(a[1], b[1])

    for i, box in enumerate(boxes):
        assert box[0] >= 0 and box[2] <= data["nominal"]["width"]
        assert box[1] >= 0 and box[3] <= data["nominal"]["height"]
        for j, other in enumerate(boxes[i + 1 :], start=i + 1):
            assert not overlap(box, other), (data["points"][i]["name"], data["points"][j]["name"])
        for j, (x, y) in enumerate(symbols):
            if j != i:
                assert not overlap(box, (x - 6, y - 6, x + 6, y + 6))


# --------------------------------------------------------------------------------------
# the results page


def test_leveling_network_has_no_plot(tmp_path):
    assert plot.network_plot_data(_demo("leveling_clean")) is None
    with TestClient(create_app(tmp_path / "data")) as client:
        page = client.post("/demos/leveling_clean").text
    assert 'id="network-plot"' not in page and "plot.js" not in page


def test_point_names_are_escaped_in_the_svg_and_the_data_block(tmp_path):
    net = grid_network(np.random.default_rng(5), size=3)
    text = net.text.replace("P1_1", SCRIPT_NAME)
    with TestClient(create_app(tmp_path / "data")) as client:
        response = client.post(
            "/projects", files={"fieldbook": ("x.fieldbook", text.encode(), "text/plain")}
        )
    page = response.text
    assert response.status_code == 200
    assert "<script>alert" not in page
    section = page[
        page.index('<section id="network-plot"') : page.index("</section>", page.index("np-data"))
    ]
    assert f'paint-order="stroke">{html.escape(SCRIPT_NAME, quote=False)}</text>' in section
    assert f'aria-label="Point {html.escape(SCRIPT_NAME)}' in section
    block = re.search(
        r'<script type="application/json" id="np-data">(.*?)</script>', section, re.DOTALL
    )
    assert block and "\\u003cscript\\u003e" in block.group(1)
    data = json.loads(block.group(1))
    assert SCRIPT_NAME in [p["name"] for p in data["points"]]  # the JSON round-trips the name
    # no inline style or inline script anywhere in the plot (the CSP forbids them)
    assert "style=" not in section
    assert re.findall(r"<script(?![^>]*(?:type=\"application/json\"|src=))", section) == []


def test_results_page_links_the_plot_assets_and_draws_every_point(tmp_path, control):
    with TestClient(create_app(tmp_path / "data")) as client:
        page = client.post("/demos/control_network").text
        assert client.get("/static/plot.js").status_code == 200
        assert client.get("/static/plot.css").status_code == 200
    assert '<script src="/static/plot.js' in page and 'href="/static/plot.css' in page
    assert len(re.findall(r'<g class="np-pt np-pt-', page)) == len(control.points) == 26
    assert len(re.findall(r'<g class="np-pt np-pt-fixed', page)) == 3  # HARROW, LINDEN, WEIR
    assert len(re.findall(r'<ellipse class="np-ell"', page)) == 23
