"""Independent checks of the geodetic 3D adjustment on synthetic field books.

The books come from invented true positions (``tests/geodetic_synthetic.py``); every booked
value there is computed with PROJ (``+proj=cart``, ``+proj=topocentric``, the projections of
EPSG:26910 and EPSG:2286 and a transverse Mercator string for the site grid) and numpy,
never with ``server/``.  The references, and how sure we are of them, are in
docs/references.md, "Geodetic adjustment checks"; the trigonometric heighting formula is in
docs/references.md, "Trigonometric heighting".
"""

from __future__ import annotations

import math
from dataclasses import replace

import numpy as np
import pytest
from scipy import stats

from server.engine.gauss_newton import Solution, adjust
from server.fieldbook.parser import parse_fieldbook
from server.model.network import build_network
from server.pipeline import adjust_fieldbook
from tests import geodetic_synthetic as gs

GRIDS = (gs.SITE_GRID, gs.UTM_10N, gs.WA_SOUTH_FTUS)
TENTH_MM = 1e-4  # metres


def _site_and_truth() -> tuple[gs.Site, list[gs.Obs]]:
    site = gs.harbor_site()
    return site, gs.true_observations(site, gs.HARBOR_PLAN)


def _points(result_json: dict) -> dict[str, dict]:
    return {p["name"]: p for p in result_json["points"]}


def _engine(text: str) -> Solution:
    """The engine's solution, whose rows (three per baseline) are the observations' rows."""
    return adjust(build_network(parse_fieldbook(text)))


def _rows(book: gs.Book) -> list[str]:
    return [o.kind for o in book.observations for _ in o.value]


# --------------------------------------------------------------------------- (a) noise-free


def test_own_model_at_the_truth_gives_back_the_topocentric_values() -> None:
    """The vectorised model the checks solve with (local axes from PROJ's latitude and
    longitude) agrees with PROJ's topocentric conversion at the true positions."""
    site, observations = _site_and_truth()
    book = gs.write_book(site, observations, gs.SITE_GRID)
    model = gs.observe(
        book, gs.true_positions(site, list(site.marks)), np.zeros(len(gs.HARBOR_PLAN.setups))
    )
    for o, value in zip(observations, model):
        v = value - np.asarray(o.value)
        if o.kind == "direction":
            v = gs.wrap(v)
        tolerance = 1e-11 if o.kind in ("direction", "zenith") else 1e-8  # rad, m
        assert np.max(np.abs(v)) < tolerance, (o, v)


@pytest.mark.parametrize("grid", GRIDS, ids=lambda g: g.label)
def test_a_noise_free_book_returns_the_true_grid_coordinates_and_heights(grid: gs.Grid) -> None:
    """True grid east/north from PROJ's projection of the true latitude and longitude, true
    orthometric heights as invented; within 0.1 mm (the book's values are rounded to 1 µm and
    1 µ-arc-second)."""
    site, observations = _site_and_truth()
    book = gs.write_book(site, observations, grid)
    result = adjust_fieldbook(book.text).to_json_dict()
    per = grid.metres_per_unit
    points = _points(result)
    assert result["summary"]["variance_factor"] < 1e-6  # nothing but rounding is left
    for name in book.new:
        mark = site.marks[name]
        east, north = gs.grid_of(grid, np.array([mark.lat]), np.array([mark.lon]))
        got = points[name]
        assert abs(got["east"] - east[0]) * per < TENTH_MM, name
        assert abs(got["north"] - north[0]) * per < TENTH_MM, name
        assert abs(got["height"] * per - mark.height) < TENTH_MM, name


# --------------------------------------------------------------------------- (b) own solution


@pytest.mark.parametrize("grid", GRIDS, ids=lambda g: g.label)
def test_a_noisy_book_is_the_least_squares_solution_scipy_finds(grid: gs.Grid) -> None:
    """scipy.optimize.least_squares on our own residual function (PROJ + numpy, whitened by
    the book's σ, Jacobian by finite differences) is the reference: positions within 0.1 mm,
    vᵀPv and the variance factor within 1e-6 relative, residuals within 1e-3 σ, redundancy
    numbers, standard deviations and 95 % ellipses from our own Jacobian."""
    site, observations = _site_and_truth()
    noisy = gs.with_noise(observations, np.random.default_rng(20261204))
    book = gs.write_book(site, noisy, grid)
    result = adjust_fieldbook(book.text).to_json_dict()
    start = {n: site.xyz([n])[0] + 0.3 for n in book.new}  # 0.5 m off in each mark
    own = gs.solve_independently(book, start)

    summary = result["summary"]
    assert summary["redundancy"] == own.redundancy
    assert summary["global_test"]["statistic"] == pytest.approx(own.vtpv, rel=1e-6)
    assert summary["variance_factor"] == pytest.approx(own.variance_factor, rel=1e-6)
    per = grid.metres_per_unit
    points = _points(result)
    for name in book.new:
        east, north, height = gs.grid_and_height(book, own.positions[name], name)
        got = points[name]
        assert abs(got["east"] - east) * per < TENTH_MM, name
        assert abs(got["north"] - north) * per < TENTH_MM, name
        assert abs(got["height"] - height) * per < TENTH_MM, name
    # residuals row by row (the engine's rows: three per baseline)
    # (a baseline's engine rows are whitened, so its components are compared in the result,
    # where they are v = L·v̄ again, in the book's unit)
    solution = _engine(book.text)
    own_rows = np.concatenate(own.residuals)
    sigma = np.concatenate([o.sigma for o in book.observations])
    is_baseline = np.array([k == "baseline" for k in _rows(book)])
    scalar = ~is_baseline
    np.testing.assert_allclose(
        solution.residuals[: len(own_rows)][scalar] / sigma[scalar],
        own_rows[scalar] / sigma[scalar],
        atol=1e-3,
    )
    components = (
        np.array([o["residual"] for o in result["observations"] if o["kind"] == "baseline"]) * per
    )
    np.testing.assert_allclose(
        components / sigma[is_baseline], own_rows[is_baseline] / sigma[is_baseline], atol=1e-3
    )
    # redundancy numbers from our own central-difference Jacobian (good to about 1e-5);
    # baselines are booked last, so the result's
    # observation rows are the engine's rows up to the first baseline
    own_r = own.redundancy_numbers()
    terrestrial = [o for o in result["observations"] if o["kind"] != "baseline"]
    assert len(terrestrial) == sum(o.kind != "baseline" for o in book.observations)
    np.testing.assert_allclose(
        [o["redundancy"] for o in terrestrial], own_r[: len(terrestrial)], atol=1e-4
    )
    _check_precisions(book, own, points, summary["redundancy"])


def _check_precisions(
    book: gs.Book, own: gs.Independent, points: dict[str, dict], redundancy: int
) -> None:
    """Each new mark's standard deviations along local east, north, up and its 95 % ellipse
    from our own cofactors: (JᵀJ)⁻¹ of the whitened Jacobian, rotated to the mark's local
    axes, times the variance factor (precision=posterior), semi-axes times
    √(2·F(0.95; 2, r)) from scipy.stats.f."""
    per = book.grid.metres_per_unit
    cofactor = np.linalg.inv(own.jacobian.T @ own.jacobian)
    factor = math.sqrt(2.0 * stats.f.ppf(0.95, 2, redundancy))
    for k, name in enumerate(book.new):
        axes = gs.local_axes(np.asarray(own.positions[name])[None, :])[0]
        block = own.variance_factor * (
            axes @ cofactor[3 * k : 3 * k + 3, 3 * k : 3 * k + 3] @ axes.T
        )
        got = points[name]
        sd = np.array([got["sd_east"], got["sd_north"], got["sd_height"]]) * per
        np.testing.assert_allclose(sd, np.sqrt(np.diag(block)), rtol=1e-3, err_msg=name)
        values, vectors = np.linalg.eigh(block[:2, :2])
        ellipse = got["ellipse"]
        assert ellipse["semi_major"] * per == pytest.approx(factor * math.sqrt(values[1]), rel=1e-3)
        assert ellipse["semi_minor"] * per == pytest.approx(factor * math.sqrt(values[0]), rel=1e-3)
        azimuth = math.degrees(math.atan2(vectors[0, 1], vectors[1, 1])) % 180.0
        difference = (ellipse["azimuth"] - azimuth + 90.0) % 180.0 - 90.0
        assert abs(difference) < 0.1, (name, ellipse["azimuth"], azimuth)


def test_correlated_baselines_are_weighted_with_their_full_covariance() -> None:
    """As the test above, with corr= on every baseline: the reference whitens each vector by
    the inverse Cholesky factor of diag(σ)·ρ·diag(σ) (numpy)."""
    site = gs.harbor_site()
    plan = replace(gs.HARBOR_PLAN, baseline_corr=(0.45, -0.55, -0.35))
    noisy = gs.with_noise(gs.true_observations(site, plan), np.random.default_rng(11))
    book = gs.write_book(site, noisy, gs.SITE_GRID)
    assert " corr=0.45,-0.55,-0.35" in book.text
    result = adjust_fieldbook(book.text).to_json_dict()
    own = gs.solve_independently(book, {n: site.xyz([n])[0] + 0.3 for n in book.new})
    assert result["summary"]["global_test"]["statistic"] == pytest.approx(own.vtpv, rel=1e-6)
    points = _points(result)
    for name in book.new:
        east, north, height = gs.grid_and_height(book, own.positions[name], name)
        assert abs(points[name]["east"] - east) < TENTH_MM, name
        assert abs(points[name]["north"] - north) < TENTH_MM, name
        assert abs(points[name]["height"] - height) < TENTH_MM, name


# --------------------------------------------------------------------------- (c) invariance


def test_the_same_network_in_three_crss_has_the_same_residuals_and_variance_factor() -> None:
    """One set of observations, the control written in the site grid (m), UTM zone 10N (m)
    and Washington South (US survey feet), each by PROJ to 1 nm, and once more by latitude and
    longitude (decimal degrees, every digit) under the UTM crs line: the slope, zenith, direction
    and baseline residuals agree to 1e-6 of their σ, and the variance factor to 1e-6.  Level
    residuals (σ under 1 mm) agree to 3 nm, a few units in the last place of an Earth-centred
    coordinate (6.4e6 m carries 0.93 nm), which is where an ellipsoidal height comes from.
    (Lengths are written to 1e-9 of the file's unit so that rounding does not differ.)"""
    site, observations = _site_and_truth()
    noisy = gs.with_noise(observations, np.random.default_rng(5))
    runs = []
    for grid, latlon in [(g, False) for g in GRIDS] + [(gs.UTM_10N, True)]:
        book = gs.write_book(site, noisy, grid, decimals=9, latlon=latlon)
        assert ("fix\n" in book.text and "\npoint RIDGE lat=" in book.text) is latlon
        solution = _engine(book.text)
        sigma = np.concatenate([o.sigma for o in book.observations])
        variance = adjust_fieldbook(book.text).summary.variance_factor
        # a baseline's engine rows are already whitened (unit σ): compared as they are
        rows = np.array(_rows(book))
        scale = np.where(rows == "baseline", 1.0, sigma)
        runs.append((solution.residuals[: len(sigma)] / scale, variance))
    kinds = np.array(_rows(book))
    assert {"slope", "zenith", "baseline", "direction", "level"} <= set(kinds)
    sigma = np.concatenate([o.sigma for o in book.observations])
    allowed = np.where(kinds == "level", 3e-9 / sigma, 1e-6)
    reference, variance_ref = runs[0]
    for whitened, variance in runs[1:]:
        assert np.all(np.abs(whitened - reference) <= allowed), np.abs(whitened - reference)
        assert variance == pytest.approx(variance_ref, rel=1e-6)


# --------------------------------------------------------------------------- (d) Monte Carlo

RUNS = 200
SEED = 1960


@pytest.fixture(scope="module")
def monte_carlo() -> dict[str, object]:
    """RUNS noisy copies of one book (seeded): variance factors, w by kind and line, and
    whether each new mark's 95 % ellipse holds its true position."""
    site, observations = _site_and_truth()
    rng = np.random.default_rng(SEED)
    book0 = gs.write_book(site, observations, gs.SITE_GRID)
    true_xyz = gs.true_positions(site, book0.new)
    variance, redundancy, covered = [], 0, []
    w_by_line: dict[int, list[float]] = {}
    kind_of: dict[int, str] = {}
    for _ in range(RUNS):
        book = gs.write_book(site, gs.with_noise(observations, rng), gs.SITE_GRID)
        result = adjust_fieldbook(book.text).to_json_dict()
        variance.append(result["summary"]["variance_factor"])
        redundancy = result["summary"]["redundancy"]
        for o in result["observations"]:
            if o["kind"] in ("slope", "zenith", "direction"):
                w_by_line.setdefault(o["line"], []).append(o["w"])
                kind_of[o["line"]] = o["kind"]
        for name, p in _points(result).items():
            if name in true_xyz:
                covered.append(_inside_ellipse(book, p, true_xyz[name]))
    return {
        "variance": np.array(variance),
        "redundancy": redundancy,
        "covered": np.array(covered),
        "w": w_by_line,
        "kind": kind_of,
    }


def _inside_ellipse(book: gs.Book, point: dict, truth: np.ndarray) -> bool:
    """The true mark's local east/north offset (numpy axes at the adjusted position, PROJ's
    latitude and longitude) inside the reported ellipse (semi-axes, azimuth of the major
    axis clockwise from north)."""
    per = book.grid.metres_per_unit
    lat, lon = gs.from_grid(book.grid, np.array([point["east"]]), np.array([point["north"]]))
    h = point["height"] * per + book.undulation[point["name"]]
    adjusted = gs.ecef(lat, lon, np.array([h]))[0]
    axes = gs.local_axes(adjusted[None, :])[0]
    east, north = axes[0] @ (truth - adjusted), axes[1] @ (truth - adjusted)
    ellipse = point["ellipse"]
    az = math.radians(ellipse["azimuth"])
    along = east * math.sin(az) + north * math.cos(az)
    across = east * math.cos(az) - north * math.sin(az)
    return bool(
        (along / (ellipse["semi_major"] * per)) ** 2 + (across / (ellipse["semi_minor"] * per)) ** 2
        <= 1.0
    )


def test_monte_carlo_mean_variance_factor_is_one(monte_carlo: dict) -> None:
    """RUNS independent variance factors: their sum times r is χ²(RUNS·r), so the mean lies
    within the χ² quantiles at 0.0005 and 0.9995 (scipy.stats.chi2; docs/references.md,
    "Geodetic adjustment checks")."""
    r = monte_carlo["redundancy"]
    dof = RUNS * r
    low, high = stats.chi2.ppf([0.0005, 0.9995], dof) / dof
    mean = float(np.mean(monte_carlo["variance"]))
    assert low < mean < high, (mean, low, high)
    assert high - low < 0.1  # the band is tight enough to mean something


def test_monte_carlo_95_percent_ellipses_hold_the_truth_95_percent_of_the_time(
    monte_carlo: dict,
) -> None:
    """The ellipse uses √(2·F(0.95; 2, r)) with the estimated variance factor, exact for
    normal errors; over RUNS × 5 marks the share must lie in 92–98 %."""
    share = float(np.mean(monte_carlo["covered"]))
    assert len(monte_carlo["covered"]) == RUNS * 5
    assert 0.92 <= share <= 0.98, share


def test_monte_carlo_w_statistics_are_standard_normal(monte_carlo: dict) -> None:
    """Each slope, zenith and direction line's w over RUNS books is N(0, 1) (w = v/(σ·√r),
    Baarda: docs/references.md, "Baarda's w-test"): per line, the mean is inside
    ±z/√RUNS and Σw² inside the χ²(RUNS) quantiles, with a Bonferroni level of 1 % over all
    lines; pooled by kind, the standard deviation is within 10 % of 1.  At that level one
    seed in a hundred fails by chance: seed 1959 did (one direction, Σw² = 284, family-wise
    p ≈ 0.007) while 1960 and 1961 pass with every Σw²/RUNS in 0.80–1.24, and the redundancy
    numbers are checked row by row against our own Jacobian above."""
    lines = monte_carlo["w"]
    alpha = 0.01 / len(lines)
    z = stats.norm.ppf(1 - alpha / 2)
    low, high = stats.chi2.ppf([alpha / 2, 1 - alpha / 2], RUNS)
    for line, values in lines.items():
        w = np.asarray(values, dtype=float)
        assert len(w) == RUNS and np.all(np.isfinite(w)), line
        assert abs(w.mean()) < z / math.sqrt(RUNS), (line, w.mean())
        assert low < float(np.sum(w**2)) < high, (line, np.sum(w**2))
    for kind in ("slope", "zenith", "direction"):
        pooled = np.concatenate([v for k, v in lines.items() if monte_carlo["kind"][k] == kind])
        assert 0.9 < float(np.std(pooled)) < 1.1, kind


# --------------------------------------------------------------------------- (e) heighting


def test_trigonometric_heighting_on_a_short_line_follows_the_textbook() -> None:
    """One setup on a held mark, a direction round to a reference mark and the new mark,
    slope and zenith to the new mark 300 m away, k = 0.13 (docs/references.md, "Trigonometric
    heighting"): ΔH = S·cos z + (1 − k)·D²/(2R) + hi − ht with D = S·sin z, z the booked
    zenith angle.  The textbook's sphere of radius R stands for the ellipsoid, whose radius
    in this azimuth differs by under 0.5 %: 0.5 % of the 6.2 mm term, 0.03 mm, plus
    S²·cos z·… terms of a few µm, is the allowance (measured: 0.010 mm); dropping the term
    misses by 6 mm."""
    marks = {
        "BM-2": gs.Mark("BM-2", 47.05, -122.9, 40.0, -23.84, "control"),
        "RO": gs.Mark("RO", *gs._offset(47.05, -122.9, 0.0, 900.0), 41.0, -23.84, "control"),
        "T-1": gs.Mark("T-1", *gs._offset(47.05, -122.9, 212.0, 212.0), 52.731, -23.84, "new"),
    }
    site = gs.Site(marks)
    plan = gs.Plan(setups=(("BM-2", 1.561, (("RO", 0.0), ("T-1", 1.70))),))
    observations = [
        o for o in gs.true_observations(site, plan) if o.kind == "direction" or o.to == "T-1"
    ]
    book = gs.write_book(site, observations, gs.SITE_GRID)
    result = adjust_fieldbook(book.text).to_json_dict()
    assert result["summary"]["redundancy"] == 0  # exactly determined
    slope = next(o for o in book.observations if o.kind == "slope")
    zenith = next(o for o in book.observations if o.kind == "zenith")
    s, z, k, radius = slope.value[0], zenith.value[0], 0.13, gs.R_REFRACTION
    d = s * math.sin(z)
    curvature_refraction = (1 - k) * d**2 / (2 * radius)
    textbook = 40.0 + s * math.cos(z) + curvature_refraction + slope.hi - slope.ht
    height = _points(result)["T-1"]["height"]
    assert 0.006 < curvature_refraction < 0.007
    assert height == pytest.approx(textbook, abs=3e-5)
    assert height == pytest.approx(52.731, abs=TENTH_MM)  # and the truth
    assert abs(height - (textbook - curvature_refraction)) > 0.006


# --------------------------------------------------------------------------- (f) blunder


def test_a_five_centimetre_blunder_in_a_slope_distance_has_the_largest_w_and_is_flagged() -> None:
    """5 cm added to one slope distance: its |w| is the largest of the book and above the
    critical value 3.29 (α₀ = 0.001, docs/references.md, "Baarda's w-test")."""
    site, observations = _site_and_truth()
    noisy = gs.with_noise(observations, np.random.default_rng(42))
    target = next(
        i for i, o in enumerate(noisy) if o.kind == "slope" and (o.frm, o.to) == ("K-8", "K-11")
    )
    noisy[target] = replace(noisy[target], value=(noisy[target].value[0] + 0.05,))
    book = gs.write_book(site, noisy, gs.SITE_GRID)
    result = adjust_fieldbook(book.text).to_json_dict()
    used = [o for o in result["observations"] if o["w"] is not None]
    worst = max(used, key=lambda o: abs(o["w"]))
    assert (worst["kind"], worst["from"], worst["to"]) == ("slope", "K-8", "K-11")
    assert worst["line"] == book.lines[target]
    assert worst["flagged"] and abs(worst["w"]) > 3.29
    assert worst["mdb"] < 50.0  # mm: 5 cm is detectable on this line


# --------------------------------------------------------------------------- known gaps


def test_observation_figures_after_a_baseline_are_their_own_rows() -> None:
    """A baseline booked before the terrestrial lines: each slope's residual in the result is
    still the engine's residual of that slope's row (metres, the book's unit)."""
    site, observations = _site_and_truth()
    noisy = gs.with_noise(observations, np.random.default_rng(3))
    noisy.sort(key=lambda o: o.kind != "baseline")  # baselines first
    book = gs.write_book(site, noisy, gs.SITE_GRID)
    result = adjust_fieldbook(book.text).to_json_dict()
    solution = _engine(book.text)
    rows = np.cumsum([0] + [len(o.value) for o in book.observations])
    slopes = [o for o in result["observations"] if o["kind"] == "slope"]
    expected = [
        solution.residuals[rows[i]] for i, o in enumerate(book.observations) if o.kind == "slope"
    ]
    assert [o["residual"] for o in slopes] == pytest.approx(expected, abs=1e-6)


def test_a_sighted_benchmark_holds_its_booked_height() -> None:
    """K-7 sights BM-4 (held in height, placed by the sights): BM-4's held orthometric height
    is the booked one, and the level line BM-4 → K-7 fits the reference solution."""
    site = gs.harbor_site()
    setups = list(gs.HARBOR_PLAN.setups)
    setups[3] = ("K-7", 1.455, (("BM-4", 1.30), ("K-9", 1.80), ("RIDGE", 1.80)))
    plan = replace(gs.HARBOR_PLAN, setups=tuple(setups))
    noisy = gs.with_noise(gs.true_observations(site, plan), np.random.default_rng(7))
    book = gs.write_book(site, noisy, gs.SITE_GRID)
    solution = _engine(book.text)
    assert solution.positions is not None
    _, _, h = gs.geodetic(np.array([solution.positions["BM-4"]]))
    assert float(h[0]) - book.undulation["BM-4"] == pytest.approx(74.215, abs=1e-6)
