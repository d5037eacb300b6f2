"""Readers of a ``baseline`` line: its three components, ``sd=``, ``corr=``, the covariance.

A baseline is ΔX, ΔY, ΔZ of TO − FROM in the Earth-centred frame of the CRS's
ellipsoid, with a 3×3 covariance built from three standard deviations and three
correlations: C = S·R·S, S = diag(F·σx, F·σy, F·σz) (F the ``scale baseline=``
factor in force), R the correlation matrix.  C is positive definite exactly when R
is (S is a positive diagonal), and R is when its leading minors are positive
(Sylvester's criterion): 1, 1 − ρxy², and det R = 1 − ρxy² − ρxz² − ρyz² +
2·ρxy·ρxz·ρyz.  Each |ρ| < 1 makes the second positive, so det R decides.
"""

from __future__ import annotations

import math

from server.fieldbook.lexer import (
    MAX_LENGTH_M,
    SD_RULES,
    bounded_length,
    file_number,
    read_quantity,
    show,
)
from server.fieldbook.model import BaselineVector
from server.units import UnitError, parse_length, parse_number

#: Longest baseline (metres): a chord of the Earth is at most its diameter, 12 756 km.
MAX_BASELINE_M = 12_800_000.0
#: Smallest det R accepted: below it the covariance is singular to working precision
#: and its weights would be meaningless (a real processor's correlations stay far above).
MIN_CORRELATION_DETERMINANT = 1e-9
#: Plausibility bounds of ``scale baseline=`` (processors' formal errors are typically
#: scaled by 1 to 10; a factor outside these is a typing mistake).
BASELINE_SCALE_LIMITS = (0.001, 1000.0)
_COMPONENTS = ("DX", "DY", "DZ")


def baseline_component(text: str, unit: str, factor: float) -> float:
    """One of DX, DY, DZ in metres: a number in the file's unit, or with its own length unit.

    GNSS processing reports Earth-centred vectors in metres whatever unit the
    grid coordinates use, so ``12.3456m`` may be written in a foot file.
    """
    if text and text[-1].isalpha():
        return bounded_length(text, parse_length(text))
    return bounded_length(text, file_number(text, "baseline components", unit) * factor)


def baseline_length(components: tuple[float, float, float], text: str) -> float:
    """The length of the vector, refused when no baseline can be that short or long."""
    length = math.sqrt(sum(c * c for c in components))
    if length < 1e-3:
        raise UnitError(
            f"'{show(text)}': a baseline shorter than 1 mm is not a measured vector; "
            "check the components and their unit"
        )
    if length > MAX_BASELINE_M:
        raise UnitError(
            f"'{show(text)}': a baseline of {length / 1000:.6g} km is longer than the "
            "Earth's diameter; check the components and their unit"
        )
    assert length <= MAX_LENGTH_M
    return length


def read_sd_triple(text: str) -> tuple[float, float, float]:
    """``sd=SX,SY,SZ``: three lengths with units, metres."""
    parts = text.split(",")
    if len(parts) != 3:
        raise UnitError(
            f"'{show(text)}': a baseline takes three standard deviations, one for each of "
            "DX, DY and DZ, with their units and commas between them, e.g. sd=3mm,3mm,6mm"
        )
    rule = SD_RULES["baseline"]
    sx, sy, sz = (read_quantity(part, rule).constant for part in parts)
    return sx, sy, sz


def read_correlations(text: str) -> tuple[float, float, float]:
    """``corr=RXY,RXZ,RYZ``: three correlations forming a positive definite matrix."""
    parts = text.split(",")
    if len(parts) != 3:
        raise UnitError(
            f"'{show(text)}': corr= takes three correlations, of DX with DY, DX with DZ and "
            "DY with DZ, with commas between them, e.g. corr=0.12,-0.31,0.05"
        )
    values = []
    for part in parts:
        value = parse_number(part)
        if not -1.0 < value < 1.0:
            raise UnitError(
                f"'{show(part)}': a correlation lies strictly between -1 and 1 (write them "
                "unitless, as the processing report gives them, e.g. corr=0.12,-0.31,0.05)"
            )
        values.append(value)
    rxy, rxz, ryz = values
    determinant = correlation_determinant(rxy, rxz, ryz)
    if determinant <= MIN_CORRELATION_DETERMINANT:
        raise UnitError(
            f"'{show(text)}': these three correlations cannot belong together: their "
            f"matrix is not positive definite (determinant {determinant:.3g}), so no "
            "covariance has them; copy them again from the processing report (order "
            "XY, XZ, YZ)"
        )
    return rxy, rxz, ryz


def correlation_determinant(rxy: float, rxz: float, ryz: float) -> float:
    """det R of the 3×3 correlation matrix with unit diagonal."""
    return 1.0 - rxy * rxy - rxz * rxz - ryz * ryz + 2.0 * rxy * rxz * ryz


def read_baseline_scale(text: str) -> float:
    """``scale baseline=F``: the factor on the baselines' standard deviations."""
    value = parse_number(text)
    low, high = BASELINE_SCALE_LIMITS
    if not low <= value <= high:
        raise UnitError(
            f"'{show(text)}': scale baseline= multiplies the baselines' standard deviations "
            f"by a factor above zero, usually 1 to 10; {low:g} to {high:g} is accepted"
        )
    return value


def baseline_vector(
    components: tuple[float, float, float],
    sd: tuple[float, float, float],
    correlations: tuple[float, float, float],
    sd_scale: float,
) -> BaselineVector:
    """The components with their covariance C = S·R·S (m²), S = diag(sd_scale·sd)."""
    scaled = tuple(sd_scale * s for s in sd)
    rxy, rxz, ryz = correlations
    r = ((1.0, rxy, rxz), (rxy, 1.0, ryz), (rxz, ryz, 1.0))
    covariance = tuple(tuple(scaled[i] * scaled[j] * r[i][j] for j in range(3)) for i in range(3))
    return BaselineVector(components, sd, correlations, sd_scale, covariance)  # type: ignore[arg-type]
