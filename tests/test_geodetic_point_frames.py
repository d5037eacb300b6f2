"""The geodetic kinds take each point's local frame once per evaluation, not once per row.

Computed per point and taken by row, the frames (φ, λ, h, R, M + h, N + h, ∂û/∂X) are the
numbers the equations would compute row by row, so every value, partial, σ and covariance
must equal, bit for bit, the equations of ``model/geodetic_equations.py`` called on the
rows' own positions (as the kinds called them before).  Checked on the 3D demo (slope,
zenith, direction with centering, level, baseline with centering) and on invented marks
for angles; and the frames must follow positions that change in place between two
evaluations of the same ``Positions``.
"""

from __future__ import annotations

import math
from pathlib import Path

import numpy as np
import pytest

from server.engine.geodetic_state import GeodeticState
from server.fieldbook.parser import parse_fieldbook
from server.geodesy import frames
from server.geodesy.ellipsoid import GRS80
from server.model import geodetic_equations as ge
from server.model.kinds import Batch, Positions
from server.model.network import build_network

ROOT = Path(__file__).resolve().parent.parent


def _row_by_row(kind: str, b: Batch, at: Positions, ell, k: float):
    """Value and partials of a kind from the equations on each row's own positions."""
    xyz = np.stack([at.east, at.north, at.height], axis=1)
    frm, to = xyz[b.frm], xyz[b.to]
    if kind == "slope":
        rows = ge.slope(ell, frm, to, b.instrument_height, b.target_height)
        return rows.value, np.hstack([rows.partials["to"], rows.partials["from"]])
    if kind == "zenith":
        rows = ge.zenith(ell, frm, to, b.instrument_height, b.target_height, k)
        return rows.value, np.hstack([rows.partials["to"], rows.partials["from"]])
    if kind == "direction":
        rows = ge.direction(ell, frm, to)
        minus_one = -np.ones((b.size, 1))
        partials = np.hstack([rows.partials["to"], rows.partials["at"], minus_one])
        return rows.value - at.orientation[b.rnd], partials
    if kind == "level":
        rows = ge.level(ell, frm, to, b.geoid_from, b.geoid_to)
        return rows.value, np.stack([rows.partials["to"][:, 2], rows.partials["from"][:, 2]], 1)
    assert kind == "baseline"
    rows = ge.baseline(ell, frm, to)
    partials = np.concatenate([rows.partials["to"], rows.partials["from"]], axis=2)
    return rows.value.reshape(-1), partials.reshape(-1, 6)


def _demo_state() -> GeodeticState:
    text = (ROOT / "demo_projects" / "dam_control_3d.fieldbook").read_text()
    return GeodeticState(build_network(parse_fieldbook(text)))


def test_every_kind_of_the_demo_equals_its_row_by_row_equations():
    state = _demo_state()
    frame = state.frame
    assembly = state.assembly(state.column)
    east, north, height, orientation = state.arrays()
    at = Positions(east, north, height, orientation)
    seen = set()
    for group in assembly.groups:
        if group.kind is None:
            continue
        kind, batch = group.kind, group.batch
        assert batch is not None
        linearised = kind.equation(batch, at)
        value, partials = _row_by_row(kind.name, batch, at, frame.crs.ellipsoid, frame.refraction)
        assert np.array_equal(linearised.value, value), kind.name
        assert np.array_equal(linearised.partials, partials), kind.name
        xyz = np.stack([east, north, height], axis=1)
        if kind.name == "direction":
            assert np.any(batch.centering)  # the demo centres its instruments: σ uses frames
            sigma = ge.direction_sigma(
                frame.crs.ellipsoid, batch.constant, batch.centering, xyz[batch.frm], xyz[batch.to]
            )
            assert np.array_equal(kind.sigma(batch, at), sigma)
        if kind.name == "baseline":
            assert kind.covariance is not None and batch.covariance is not None
            covariance = ge.baseline_covariance(
                frame.crs.ellipsoid,
                batch.covariance,
                batch.centering,
                xyz[batch.frm],
                xyz[batch.to],
            )
            assert np.array_equal(kind.covariance(batch, at), covariance)
        seen.add(kind.name)
    assert seen == {"slope", "zenith", "direction", "level", "baseline"}


def test_frames_follow_positions_changed_in_place():
    """The same Positions object, its coordinates moved by a metre in place: the kinds must
    see the new frames, not those of the first evaluation."""
    state = _demo_state()
    assembly = state.assembly(state.column)
    east, north, height, orientation = (a.copy() for a in state.arrays())
    at = Positions(east, north, height, orientation)
    group = next(g for g in assembly.groups if g.kind is not None and g.kind.name == "zenith")
    assert group.kind is not None and group.batch is not None
    before = group.kind.equation(group.batch, at).value
    at.east[:] += 1.0
    at.height[:] -= 1.0
    after = group.kind.equation(group.batch, at).value
    fresh = group.kind.equation(
        group.batch, Positions(*(a.copy() for a in (east, north, height, orientation)))
    )
    assert not np.array_equal(before, after)
    assert np.array_equal(after, fresh.value)


@pytest.mark.parametrize("seed", [1, 2])
def test_angles_with_frames_taken_by_row_equal_the_row_by_row_angles(seed):
    """Invented marks near 47° N, 123° W; rows share marks, as a network's rows do."""
    rng = np.random.default_rng(seed)
    count = 12
    lat = math.radians(47.05) + rng.uniform(-0.015, 0.015, count)
    lon = math.radians(-122.89) + rng.uniform(-0.02, 0.02, count)
    xyz = GRS80.to_ecef(lat, lon, rng.uniform(20.0, 180.0, count))
    back, at, fore = (rng.integers(0, count, 40) for _ in range(3))
    keep = (back != at) & (fore != at)
    back, at, fore = back[keep], at[keep], fore[keep]
    every = frames.local_frames(GRS80, xyz).with_up_derivative()
    taken = ge.angle(
        GRS80, xyz[back], xyz[at], xyz[fore], every.take(back), every.take(at), every.take(fore)
    )
    plain = ge.angle(GRS80, xyz[back], xyz[at], xyz[fore])
    assert np.array_equal(taken.value, plain.value)
    for role in ("to", "from", "at"):
        assert np.array_equal(taken.partials[role], plain.partials[role]), role


def test_the_azimuth_alone_is_the_azimuth_of_the_full_equation():
    """The rounds' start orientations need the horizon azimuth without its partials."""
    rng = np.random.default_rng(3)
    lat = math.radians(47.05) + rng.uniform(-0.015, 0.015, 30)
    lon = math.radians(-122.89) + rng.uniform(-0.02, 0.02, 30)
    xyz = GRS80.to_ecef(lat, lon, rng.uniform(20.0, 180.0, 30))
    frm, to = xyz[:15], xyz[15:]
    every = frames.local_frames(GRS80, xyz)
    alone = frames.horizon_azimuth_value(
        GRS80,
        frm,
        to,
        frames_from=every.take(np.arange(15)),
        frames_to=every.take(15 + np.arange(15)),
    )
    assert np.array_equal(alone, frames.horizon_azimuth(GRS80, frm, to).value)
    assert np.array_equal(frames.horizon_azimuth_value(GRS80, frm, to), alone)
    with pytest.raises(ZeroDivisionError):
        frames.horizon_azimuth_value(GRS80, frm[:1], frm[:1].copy())  # coincident marks
