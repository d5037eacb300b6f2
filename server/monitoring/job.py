"""A monitoring job: field books of one set of marks at several epochs, compared.

Epochs are ordered by their ``epoch`` line (books without one keep the order given, which is
allowed for two epochs only).  The first epoch is compared with every later one by the
congruence test (``congruence.py``); the marks stable in every comparison define the datum on
which all epochs are laid for the time series (``timeseries.py``, three or more epochs).
Everything is in the first book's length unit.
"""

from __future__ import annotations

import math
from dataclasses import dataclass
from datetime import datetime

import numpy as np

from server.errors import FieldbookError, Issue, NetworkError
from server.fieldbook.model import Fieldbook
from server.monitoring import congruence as cg
from server.monitoring.epochs import COMPONENTS, CannotCompare, Epoch, adjust_epoch
from server.monitoring.timeseries import SeriesFit, fit_series
from server.pipeline import UNLIMITED
from server.settings import WorkLimits
from server.units import LENGTH_FACTORS


@dataclass(frozen=True, slots=True, kw_only=True)
class MonitoringOptions:
    confidence: float = 0.95
    period_days: float | None = None
    threshold: float | None = None
    predict: datetime | None = None


@dataclass(frozen=True, slots=True, kw_only=True)
class Monitoring:
    """Everything a monitoring report shows."""

    epochs: tuple[Epoch, ...]
    length_unit: str
    dimension: int
    marks: tuple[str, ...]
    #: marks left out because some epoch lacks them
    left_out: tuple[str, ...]
    #: the first epoch against each later one
    comparisons: tuple[cg.Congruence, ...]
    #: marks stable in every comparison: the datum of the time series
    datum: tuple[str, ...]
    series: tuple[SeriesFit, ...]
    options: MonitoringOptions
    notes: tuple[str, ...]


def monitor(
    fieldbooks: list[Fieldbook], options: MonitoringOptions, limits: WorkLimits = UNLIMITED
) -> Monitoring:
    """Adjust and compare; raises ``FieldbookError``, ``NetworkError`` or ``CannotCompare``."""
    books = _ordered(fieldbooks)
    first = _adjust(books[0], None, limits)
    epochs = [first] + [_adjust(book, first, limits) for book in books[1:]]
    dims = {e.dimension for e in epochs}
    if len(dims) > 1:
        kinds = ", ".join(f"{e.source}: {'/'.join(COMPONENTS[e.dimension])}" for e in epochs)
        raise CannotCompare(f"the epochs do not measure the same components ({kinds})")
    dimension = dims.pop()
    common = [m for m in first.marks if all(m in e.marks for e in epochs[1:])]
    everywhere = {m for e in epochs for m in e.marks}
    left_out = tuple(sorted(everywhere - set(common)))
    if len(common) < cg.minimum_stable(dimension):
        raise CannotCompare(
            "the epochs share fewer than two marks "
            f"({', '.join(common) or 'none'}); marks seen in only some epochs: "
            f"{', '.join(left_out) or 'none'}",
            left_out,
        )
    unit = first.length_unit
    per_unit = 1.0 / LENGTH_FACTORS[unit]
    alpha = 1.0 - options.confidence
    threshold = options.threshold
    comparisons = tuple(
        cg.congruence_test(
            _pair(first, later, common, per_unit),
            alpha=alpha,
            threshold=threshold,
            confidence=options.confidence,
        )
        for later in epochs[1:]
    )
    notes: list[str] = []
    datum = tuple(m for m in common if all(m in c.stable for c in comparisons))
    if len(datum) < cg.minimum_stable(dimension):
        notes.append(
            "fewer than two marks are stable in every comparison: the time series are laid on "
            "the datum of all common marks"
        )
        datum = tuple(common)
    series: tuple[SeriesFit, ...] = ()
    if len(epochs) >= 3:
        series = _series(epochs, common, datum, dimension, per_unit, options, notes)
    partial = sorted({m for e in epochs for m in e.partial})
    if partial:
        notes.append(
            f"not compared, without every component ({'/'.join(COMPONENTS[dimension])}): "
            f"{', '.join(partial)}"
        )
    if left_out:
        notes.append(f"left out, not in every epoch: {', '.join(left_out)}")
    return Monitoring(
        epochs=tuple(epochs),
        length_unit=unit,
        dimension=dimension,
        marks=tuple(common),
        left_out=left_out,
        comparisons=comparisons,
        datum=datum,
        series=series,
        options=options,
        notes=tuple(notes),
    )


def _adjust(book: Fieldbook, first: Epoch | None, limits: WorkLimits) -> Epoch:
    try:
        return adjust_epoch(book, first, limits)
    except CannotCompare:
        raise
    except NetworkError as exc:
        raise NetworkError(
            f"{book.source}: the network cannot be adjusted: {exc}", exc.points
        ) from exc


def _ordered(fieldbooks: list[Fieldbook]) -> list[Fieldbook]:
    missing = [fb for fb in fieldbooks if fb.epoch is None]
    if missing and len(fieldbooks) > 2:
        raise FieldbookError(
            [
                Issue(
                    1,
                    "",
                    "the book has no 'epoch' line; comparing three or more epochs needs "
                    "the date of each (epoch 2026-03-14, or a UTC time)",
                )
            ],
            source=missing[0].source,
        )
    if missing:
        return list(fieldbooks)
    from server.monitoring.epochs import epoch_time

    times: list[datetime] = []
    for fb in fieldbooks:
        when = epoch_time(fb)
        assert when is not None
        times.append(when)
    order = sorted(range(len(fieldbooks)), key=lambda i: times[i])
    return [fieldbooks[i] for i in order]


def _select(epoch: Epoch, marks: list[str]) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    k = epoch.dimension
    where = [epoch.marks.index(m) for m in marks]
    rows = np.array([i * k + c for i in where for c in range(k)], dtype=np.int64)
    return epoch.values[where], epoch.cofactor[np.ix_(rows, rows)], epoch.plan[where]


def _pair(first: Epoch, later: Epoch, marks: list[str], per_unit: float) -> cg.EpochPair:
    x1, q1, plan = _select(first, marks)
    x2, q2, _ = _select(later, marks)
    return cg.EpochPair(
        marks=tuple(marks),
        dimension=first.dimension,
        first=x1 * per_unit,
        second=x2 * per_unit,
        q_first=q1 * per_unit**2,
        q_second=q2 * per_unit**2,
        plan=plan,
        vtpv=first.vtpv + later.vtpv,
        dof=first.redundancy + later.redundancy,
    )


def days_since(first: datetime, when: datetime) -> float:
    return (when - first).total_seconds() / 86400.0


def _series(
    epochs: list[Epoch],
    common: list[str],
    datum: tuple[str, ...],
    k: int,
    per_unit: float,
    options: MonitoringOptions,
    notes: list[str],
) -> tuple[SeriesFit, ...]:
    start = epochs[0].when
    assert start is not None
    days = np.array([days_since(start, e.when) for e in epochs if e.when is not None])
    plan = _select(epochs[0], common)[2]
    h = cg.datum_directions(k, plan)
    stable_rows = np.repeat(np.array([m in datum for m in common]), k)
    s = cg.s_matrix(h, stable_rows)
    values, sds = [], []
    for e in epochs:
        x, q, _ = _select(e, common)
        values.append((s @ x.ravel()) * per_unit)
        variance = np.diag(s @ q @ s.T) * e.variance_factor
        sds.append(np.sqrt(np.maximum(variance, 0.0)) * per_unit)
    y, sd = np.array(values), np.array(sds)
    if np.any(sd <= 0.0):
        notes.append(
            "a held component has no standard deviation; it is fitted with 1e-6 "
            "of the length unit so that it keeps its weight finite"
        )
        sd = np.where(sd <= 0.0, 1e-6, sd)
    predict = None if options.predict is None else days_since(start, options.predict)
    if predict is None:
        predict = float(days[-1])
    if options.period_days is not None and len(epochs) < 5:
        notes.append("the periodic term needs at least five epochs; it is left out")
    fits = []
    for i, mark in enumerate(common):
        for c, letter in enumerate(COMPONENTS[k]):
            column = i * k + c
            fits.append(
                fit_series(
                    mark,
                    letter,
                    days,
                    y[:, column],
                    sd[:, column],
                    period_days=options.period_days,
                    alpha=1.0 - options.confidence,
                    confidence=options.confidence,
                    predict_days=predict,
                    threshold=options.threshold,
                )
            )
    return tuple(fits)


def finite(value: float | None) -> float | None:
    """JSON has no NaN or infinity: those become null."""
    return value if value is not None and math.isfinite(value) else None
