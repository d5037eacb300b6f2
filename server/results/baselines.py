"""The three result entries of each GNSS baseline and its whole-vector test.

A baseline is adjusted as one whitened 3-row block (``model/whitening.py``), so the engine's
per-row figures refer to decorrelated combinations, not to ΔX, ΔY, ΔZ.  Here the block is
taken back to the components: with A_b the baseline's rows of the design matrix (3 × 6,
local corrections of both ends), Qxx the unknowns' cofactors and Σ the baseline's
covariance (booked, plus centering),

    Q_adjusted = A_b·Qxx·A_bᵀ,   Qvv = Σ − Q_adjusted,   P = Σ⁻¹,   v = adjusted − observed

and ``statistics/correlated.py`` gives each component's redundancy (Qvv·P)_ii, w, MDB and
estimated bias, and the block statistic vᵀQvv⁺v against χ²(3).
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from server.engine.gauss_newton import Solution
from server.fieldbook.model import Observation
from server.model.kinds import Positions, batch_of
from server.model.network import Network
from server.results.types import BaselineTestResult, ObservationResult
from server.statistics.correlated import ComponentTests, block_tests, component_tests

COMPONENTS = ("dx", "dy", "dz")


@dataclass(frozen=True)
class BaselineFigures:
    """Each baseline's three entries (by ``id`` of its observation) and the vector tests."""

    entries: dict[int, tuple[ObservationResult, ...]]
    tests: tuple[BaselineTestResult, ...]


def baseline_figures(
    network: Network,
    solution: Solution,
    lambda0: float,
    critical_w: float,
    snooping: float,
    per_m: float,
) -> BaselineFigures:
    """Entries and tests of every baseline of a geodetic solution (used and ignored)."""
    frame = network.geodetic
    if frame is None or solution.positions is None:
        return BaselineFigures({}, ())
    # the table's kind column first: making every Observation of a big book costs seconds
    table = network.fieldbook.table
    rows = np.flatnonzero(table.is_kind("baseline")).tolist()
    if not rows:
        return BaselineFigures({}, ())
    baselines = table.observations_at(rows)
    from server.model.geodetic_kinds import geodetic_kinds  # geodetic books only

    kind = geodetic_kinds(frame.crs, frame.refraction)["baseline"]
    names = list(solution.positions)
    index = {name: k for k, name in enumerate(names)}
    xyz = np.array([solution.positions[n] for n in names], dtype=float).reshape(-1, 3)
    at = Positions(xyz[:, 0], xyz[:, 1], xyz[:, 2], np.zeros(0))
    placed = [o for o in baselines if o.from_point in index and o.to in index and not o.planned]
    if not placed:
        return BaselineFigures({}, ())
    batch = batch_of(kind, placed, index, {})
    linearised = kind.equation(batch, at)
    adjusted = linearised.value.reshape(-1, 3)
    observed = batch.value.reshape(-1, 3)
    covariance = kind.covariance(batch, at) if kind.covariance else np.zeros((len(placed), 3, 3))
    v = adjusted - observed
    used = np.array([not o.ignored for o in placed], dtype=bool)
    qvv = covariance.copy()
    if used.any():
        design = linearised.partials.reshape(-1, 3, 6)[used]
        cofactor = _cofactors(network, solution, [o for o, u in zip(placed, used) if u])
        qvv[used] = covariance[used] - design @ cofactor @ np.swapaxes(design, 1, 2)
    weight = np.linalg.inv(covariance)
    comp = component_tests(v, weight, qvv, lambda0, critical_w)
    blocks = block_tests(v, weight, qvv, snooping)
    sd = np.sqrt(np.einsum("nii->ni", covariance))
    entries = {}
    tests = []
    for k, obs in enumerate(placed):
        entries[id(obs)] = tuple(
            _entry(obs, i, observed[k, i], adjusted[k, i], v[k, i], sd[k, i], comp, k, per_m)
            for i in range(3)
        )
        if not obs.ignored:
            tests.append(
                BaselineTestResult(
                    line=obs.line,
                    from_point=obs.from_point,
                    to_point=obs.to,
                    statistic=float(blocks.statistic[k]),
                    critical=blocks.critical,
                    flagged=bool(blocks.flagged[k]),
                )
            )
    return BaselineFigures(entries, tuple(tests))


def _cofactors(network: Network, solution: Solution, used: Sequence[Observation]) -> np.ndarray:
    """Qxx (m, 6, 6) of each baseline's unknowns in the order of the kind's columns (E, N, H
    of TO, then of FROM); rows and columns of held components are zero."""
    column = {(p.point, p.kind): k for k, p in enumerate(network.parameters)}
    index = np.array(
        [
            [column.get((o.to, c), -1) for c in "ENH"]
            + [column.get((o.from_point, c), -1) for c in "ENH"]
            for o in used
        ],
        dtype=np.int64,
    )
    rows = np.repeat(index, 6, axis=1)
    cols = np.tile(index, (1, 6))
    present = (rows >= 0) & (cols >= 0)
    values = np.zeros(rows.shape)
    if present.any():
        values[present] = solution.covariance_entries(rows[present], cols[present])
    return values.reshape(-1, 6, 6)


def _entry(
    obs: Observation,
    i: int,
    observed: float,
    adjusted: float,
    residual: float,
    sd: float,
    tests: ComponentTests,
    k: int,
    per_m: float,
) -> ObservationResult:
    """One component's entry; statistics only for a used baseline's controlled components."""
    used = not obs.ignored
    controlled = used and bool(tests.controlled[k, i])

    def figure(name: str, scale: float = per_m) -> float | None:
        return float(getattr(tests, name)[k, i]) * scale if controlled else None

    return ObservationResult(
        line=obs.line,
        kind=obs.kind,
        from_point=obs.from_point,
        at=obs.at,
        to=obs.to,
        observed=float(observed) * per_m,
        adjusted=float(adjusted) * per_m,
        residual=float(residual) * per_m,
        sd=float(sd) * per_m,
        redundancy=float(tests.redundancy[k, i]) if used else None,
        w=figure("w", 1.0),
        mdb=figure("mdb"),
        flagged=bool(tests.flagged[k, i]) if used else False,
        ignored=obs.ignored,
        note=obs.note,
        booked=float(observed) * per_m,
        scale_factor=None,
        estimated_bias=figure("estimated_bias"),
        inseparable=(),
        component=COMPONENTS[i],
    )
