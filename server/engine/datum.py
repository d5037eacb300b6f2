"""The free network's datum: a minimal datum for the factor, the S-transformation after it.

A network without control has a datum defect: N is singular along the
directions H that move the whole figure (translation, and rotation without
an observed azimuth), N·H = 0.  The engine holds a minimal datum (one point's
E and N, and one more component for rotation), so that N restricted to the
other unknowns is regular, solves there, and carries the result to the inner
constraints Gᵀ·dx = 0 by the S-transformation

    dx = S·dx_min,   Qxx = S·Q_min·Sᵀ,   S = I − H·(GᵀH)⁻¹·Gᵀ,

which removes from dx_min its component along H measured by G.  With G = H
(the orientations aside) this is the minimum-norm solution of the points.
A·H = 0, so A·Qxx·Aᵀ = A·Q_min·Aᵀ: residuals and redundancy numbers need no
transformation, only the coordinates and their covariances do.
"""

from __future__ import annotations

from typing import Protocol

import numpy as np

from server.engine.state import EAST, NORTH, ORIENTATION, State


class Entries(Protocol):
    """Anything that serves elements of a cofactor matrix."""

    def entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray: ...


class Solver(Protocol):
    def solve(self, rhs: np.ndarray) -> np.ndarray: ...


def minimal_datum(state: State) -> np.ndarray:
    """Unknowns to hold for a minimal datum: E and N of the first point, and for rotation
    the component of the farthest point that the rotation moves most."""
    e_cols = np.flatnonzero(state.kind == EAST)
    if e_cols.size == 0:
        return np.zeros(0, np.int64)
    first = int(state.target[e_cols[0]])
    held = [int(state.column["E"][first]), int(state.column["N"][first])]
    if "rotation" in state.network.free_datum:
        points = state.target[e_cols]
        d_east = state.east[points] - state.east[first]
        d_north = state.north[points] - state.north[first]
        far = int(points[np.argmax(np.hypot(d_east, d_north))])
        de, dn = state.east[far] - state.east[first], state.north[far] - state.north[first]
        # a rotation moves the far point along (ΔN, −ΔE): hold the larger of the two
        held.append(int(state.column["E" if abs(dn) >= abs(de) else "N"][far]))
    return np.array(held, dtype=np.int64)


def inner_constraints(state: State) -> np.ndarray:
    """G for the free datum: translations in E and N, and rotation about the centroid."""
    n = len(state.network.parameters)
    e_cols = np.flatnonzero(state.kind == EAST)
    n_cols = np.flatnonzero(state.kind == NORTH)
    east = state.east[state.target[e_cols]]
    north = state.north[state.target[n_cols]]
    rotation = "rotation" in state.network.free_datum
    g = np.zeros((n, 3 if rotation else 2))
    g[e_cols, 0] = 1.0
    g[n_cols, 1] = 1.0
    if rotation:
        spread = max(float(np.max(np.hypot(east - east.mean(), north - north.mean()))), 1.0)
        g[e_cols, 2] = (north - north.mean()) / spread
        g[n_cols, 2] = -(east - east.mean()) / spread
    return g / np.linalg.norm(g, axis=0)


def datum_directions(state: State, g: np.ndarray) -> np.ndarray:
    """H with N·H = 0: G's translations, and its rotation carried into the orientations.

    Turning every point about the centroid by ε turns every azimuth, so
    each round's orientation turns with it by the same angle.
    """
    h = g.copy()
    if h.shape[1] == 3:
        e_cols = np.flatnonzero(state.kind == EAST)
        n_cols = np.flatnonzero(state.kind == NORTH)
        # G's rotation column is (N − N̄, −(E − Ē))/‖(N − N̄, −(E − Ē))‖: a step of ε
        # along it turns the figure by ε/‖·‖ radians, and every orientation with it.
        east = state.east[state.target[e_cols]]
        north = state.north[state.target[n_cols]]
        lever = np.concatenate([north - north.mean(), -(east - east.mean())])
        h[state.kind == ORIENTATION, 2] = 1.0 / float(np.linalg.norm(lever))
    return h


def s_transform(correction: np.ndarray, g: np.ndarray, h: np.ndarray) -> np.ndarray:
    """dx = S·dx_min with S = I − H·(GᵀH)⁻¹·Gᵀ."""
    return correction - h @ np.linalg.solve(g.T @ h, g.T @ correction)


class FreeDatumCofactor:
    """Qxx of the inner-constraint solution from the minimal-datum one.

    Qxx = S·Qm·Sᵀ, S = I − H·C·Gᵀ, C = (GᵀH)⁻¹, Qm the minimal-datum cofactor
    (zero for the held unknowns); with W = Qm·G:
    Qxx = Qm − H·C·Wᵀ − W·Cᵀ·Hᵀ + H·C·(GᵀW)·Cᵀ·Hᵀ.
    """

    def __init__(
        self,
        base: Entries,
        factorization: Solver,
        factor_column: np.ndarray,
        g: np.ndarray,
        h: np.ndarray,
    ) -> None:
        self.base = base
        self.factor_column = factor_column
        kept = factor_column >= 0
        w = np.zeros_like(g)
        for k in range(g.shape[1]):
            w[kept, k] = factorization.solve(np.ascontiguousarray(g[kept, k]))
        c = np.linalg.inv(g.T @ h)
        self.hc = h @ c
        self.w = w
        self.middle = g.T @ w

    def entries(self, rows: np.ndarray, cols: np.ndarray) -> np.ndarray:
        fr, fc = self.factor_column[rows], self.factor_column[cols]
        both = (fr >= 0) & (fc >= 0)
        base = np.zeros(rows.shape[0])
        base[both] = self.base.entries(fr[both], fc[both])
        hc_r, hc_c = self.hc[rows], self.hc[cols]
        return (
            base
            - np.einsum("pk,pk->p", hc_r, self.w[cols])
            - np.einsum("pk,pk->p", self.w[rows], hc_c)
            + np.einsum("pk,kl,pl->p", hc_r, self.middle, hc_c)
        )
