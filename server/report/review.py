"""The blunder review laid out: observations in the order to look at them, and two runs compared.

Nothing here adjusts.  The rows are built from frozen results (and from the
tau test, the robust reweighting and the snooping proposal computed on
them) and formatted with the report's helpers, so the review shows every
figure exactly as the results page and the report do.

A decision (``server.fieldbook.edits.ObservationEdit``) is stored as a small JSON
object; ``edit_to_json`` and ``edit_from_json`` convert both ways.
"""

from __future__ import annotations

import math
import re
from collections.abc import Iterable, Sequence
from dataclasses import dataclass
from typing import Any

from server.fieldbook.edits import ACTIONS, EditError, ObservationEdit, value_token
from server.report.tables import (
    NOT_APPLICABLE,
    ObservationRow,
    Verdict,
    fmt_length,
    fmt_ratio,
    fmt_w,
    length_label,
    observation_rows,
    observation_rows_of,
    stations,
    verdict,
)
from server.results.result import AdjustmentResult, ObservationResult
from server.review.robust import RobustResult
from server.review.snooping import SnoopingPlan
from server.review.tau import TauTest
from server.units import LENGTH_FACTORS

#: Lines split as the field book parser splits them (LF, CRLF or CR).
_LINE_BREAK = re.compile(r"\r\n|\r|\n")
#: Longest field book line shown on the review page (characters).
MAX_SOURCE_CHARS = 300
#: Longest standard deviation text accepted in a decision (characters).
MAX_SD_CHARS = 40
#: The components the adjustment estimates, by network dimension (a 2D network passes
#: heights through unchanged, so they cannot shift).
_DATUM_COMPONENTS = {1: "h", 2: "en", 3: "enh"}

# --------------------------------------------------------------------------------------
# decisions as JSON


def edit_to_json(edit: ObservationEdit) -> dict[str, Any]:
    """A decision as the JSON object stored with a run."""
    data: dict[str, Any] = {
        "line": edit.line,
        "action": edit.action,
        "reason": edit.reason,
        "date": edit.date,
    }
    if edit.sd is not None:
        data["sd"] = edit.sd
    if edit.value is not None:
        data["value"] = edit.value
    if edit.previous is not None:
        data["previous"] = edit.previous
    if edit.pairs:
        data["pairs"] = [list(pair) for pair in edit.pairs]
    return data


def edit_from_json(data: Any) -> ObservationEdit:
    """A stored decision back as an ``ObservationEdit``; ``EditError`` if it is malformed."""
    if not isinstance(data, dict):
        raise EditError("a stored decision is not readable")
    line, action = data.get("line"), data.get("action")
    reason, date, sd = data.get("reason"), data.get("date"), data.get("sd")
    value, previous = data.get("value"), data.get("previous")
    if not isinstance(line, int) or isinstance(line, bool) or action not in ACTIONS:
        raise EditError("a stored decision is not readable")
    if not isinstance(reason, str) or not isinstance(date, str):
        raise EditError(f"line {line}: a stored decision is not readable")
    if any(v is not None and not isinstance(v, str) for v in (sd, value, previous)):
        raise EditError(f"line {line}: a stored decision is not readable")
    pairs = data.get("pairs", [])
    if not isinstance(pairs, list) or not all(
        isinstance(p, list) and len(p) == 2 and all(isinstance(n, str) for n in p) for p in pairs
    ):
        raise EditError("a stored decision on relative precision is not readable")
    return ObservationEdit(
        line=line,
        action=action,
        reason=reason,
        date=date,
        sd=sd,
        value=value,
        previous=previous,
        pairs=tuple((a, b) for a, b in pairs),
    )


def edits_from_json(items: Iterable[Any]) -> list[ObservationEdit]:
    """Every stored decision, in order."""
    return [edit_from_json(item) for item in items]


@dataclass(frozen=True, slots=True)
class DecisionRow:
    """A decision in words, with the marks of its observation when known."""

    line: int
    action: str
    words: str
    reason: str
    date: str
    stations: str
    edit_id: int | None = None


def decision_rows(
    edits: Sequence[ObservationEdit],
    result: AdjustmentResult | None,
    ids: Sequence[int | None] | None = None,
) -> list[DecisionRow]:
    """Decisions for display; ``ids`` are the pending decisions' ids (for Undo)."""
    by_line = {o.line: o for o in result.observations} if result is not None else {}
    out = []
    for k, edit in enumerate(edits):
        obs = by_line.get(edit.line)
        out.append(
            DecisionRow(
                line=edit.line,
                action=edit.action,
                words=decision_words(edit),
                reason=edit.reason,
                date=edit.date,
                stations=_pairs_text(edit.pairs)
                if edit.action == "relative"
                else f"{obs.kind} {stations(obs)}"
                if obs is not None
                else "",
                edit_id=ids[k] if ids is not None else None,
            )
        )
    return out


def decision_words(edit: ObservationEdit) -> str:
    """A decision as a short phrase for the review trail."""
    if edit.action == "exclude":
        return "Leave out"
    if edit.action == "include":
        return "Bring back"
    if edit.action == "correct":
        before = f"from {edit.previous} " if edit.previous else ""
        return f"Correct the value {before}to {edit.value}"
    if edit.action == "relative":
        count = len(edit.pairs)
        return f"Report the relative precision of {count} pair{'s' if count != 1 else ''}"
    return f"Change sd to {edit.sd}"


def _pairs_text(pairs: Sequence[tuple[str, str]], shown: int = 8) -> str:
    """``K1–K2, K2–K3 and 4 more``: the pairs of a decision, briefly."""
    text = ", ".join(f"{a}–{b}" for a, b in pairs[:shown])
    return text + (f" and {len(pairs) - shown} more" if len(pairs) > shown else "")


def ignored_after(result: AdjustmentResult, edits: Iterable[ObservationEdit]) -> dict[int, bool]:
    """Whether each observation is left out once ``edits`` (applied after ``result``) take
    effect."""
    state = {o.line: o.ignored for o in result.observations}
    for edit in edits:
        if edit.line in state and edit.action in ("exclude", "include"):
            state[edit.line] = edit.action == "exclude"
    return state


# --------------------------------------------------------------------------------------
# the review table


def source_lines(text: str) -> list[str]:
    """The field book's lines, numbered as the parser numbers them (index 0 is line 1)."""
    return _LINE_BREAK.split(text)


@dataclass(frozen=True, slots=True)
class ReviewRow:
    """One observation on the review page: its figures, its tau, and its own field book line."""

    figures: ObservationRow
    tau: str
    tau_flagged: bool
    source: str
    #: The value as the line writes it (what a correction replaces).
    value: str = ""

    @property
    def line(self) -> int:
        """The observation's field book line."""
        return self.figures.line


def review_order(result: AdjustmentResult) -> list[ObservationResult]:
    """Flagged observations first, largest |w| first; then the others in file order."""
    flagged = sorted(
        (o for o in result.observations if o.flagged), key=lambda o: (-abs(o.w or 0.0), o.line)
    )
    return flagged + [o for o in result.observations if not o.flagged]


def review_rows(
    result: AdjustmentResult,
    lines: Sequence[str],
    tau: TauTest | None,
    window: slice = slice(None),
) -> list[ReviewRow]:
    """The rows of ``review_order`` in ``window`` (one page), built only for that page."""
    taus = {o.line: o for o in tau.observations} if tau is not None else {}
    rows = []
    for figures in observation_rows_of(result, review_order(result)[window]):
        t = taus.get(figures.line)
        source = lines[figures.line - 1] if 0 < figures.line <= len(lines) else ""
        rows.append(
            ReviewRow(
                figures=figures,
                tau=fmt_w(t.tau if t is not None else None),
                tau_flagged=bool(t is not None and t.flagged),
                source=source.strip()[:MAX_SOURCE_CHARS],
                value=value_token(source, figures.kind),
            )
        )
    return rows


# --------------------------------------------------------------------------------------
# second opinion


@dataclass(frozen=True, slots=True)
class RobustRow:
    """An observation the robust adjustment gave less than full weight."""

    line: int
    observation: str
    weight: str
    u: str
    suspect: bool


def robust_rows(robust: RobustResult, result: AdjustmentResult) -> list[RobustRow]:
    """Down-weighted observations, lowest weight first."""
    by_line = {o.line: o for o in result.observations}
    out = []
    for o in robust.down_weighted:
        obs = by_line.get(o.line)
        out.append(
            RobustRow(
                line=o.line,
                observation=f"{obs.kind} {stations(obs)}" if obs is not None else "",
                weight=fmt_ratio(o.weight),
                u=fmt_w(o.u),
                suspect=o.suspect,
            )
        )
    return out


@dataclass(frozen=True, slots=True)
class TauRow:
    """An observation Pope's tau test flags."""

    line: int
    observation: str
    tau: str


def tau_rows(tau: TauTest, result: AdjustmentResult) -> list[TauRow]:
    """Observations whose |τ| exceeds the critical value, largest first."""
    by_line = {o.line: o for o in result.observations}
    taus = {o.line: o.tau for o in tau.observations}
    out = []
    for line in tau.flagged_lines:
        obs = by_line.get(line)
        out.append(
            TauRow(
                line=line,
                observation=f"{obs.kind} {stations(obs)}" if obs else "",
                tau=fmt_w(taus[line]),
            )
        )
    return out


@dataclass(frozen=True, slots=True)
class SnoopingRow:
    """One proposed removal, with the adjustment that would follow it."""

    step: int
    line: int
    observation: str
    w: str
    variance_factor_after: str
    passed_after: bool | None
    flagged_after: int
    reason: str


def snooping_rows(plan: SnoopingPlan) -> list[SnoopingRow]:
    """The proposed sequence, numbered from 1, each with a suggested reason."""
    out = []
    for k, step in enumerate(plan.steps, 1):
        marks = (
            f"{step.from_point} – {step.at} – {step.to}"
            if step.kind == "angle" and step.at
            else f"{step.from_point} → {step.to}"
        )
        out.append(
            SnoopingRow(
                step=k,
                line=step.line,
                observation=f"{step.kind} {marks}",
                w=fmt_w(abs(step.w)),
                variance_factor_after=fmt_ratio(step.variance_factor_after, 3),
                passed_after=step.global_test_passed_after,
                flagged_after=step.flagged_after,
                reason=f"data snooping step {k}: |w| = {abs(step.w):.2f}",
            )
        )
    return out


# --------------------------------------------------------------------------------------
# comparing two runs


@dataclass(frozen=True, slots=True)
class FlagChange:
    """An observation whose flag changed (or stayed) between run A and run B."""

    line: int
    observation: str
    w_a: str
    w_b: str


@dataclass(frozen=True, slots=True)
class CorrectedValue:
    """An observation whose booked value differs between run A and run B (a correction)."""

    line: int
    observation: str
    booked_a: str
    booked_b: str
    residual_a: str
    residual_b: str


@dataclass(frozen=True, slots=True)
class PointShift:
    """How far a point moved from run A to run B (B − A), formatted in the shift unit."""

    name: str
    d_east: str
    d_north: str
    horizontal: str
    d_height: str
    d_height_file_unit: str
    total: str
    total_file_unit: str
    total_raw: float | None


@dataclass(frozen=True, slots=True)
class RunFigures:
    """The headline figures of one run."""

    verdict: Verdict
    test_state: str  # "pass", "fail" or "none", for the badge
    test_words: str
    variance_factor: str
    statistic: str
    region: str
    redundancy: int
    used: int
    flagged: int
    unchecked: int = 0


@dataclass(frozen=True, slots=True)
class Comparison:
    """What changed between two runs of the same field book."""

    a: RunFigures
    b: RunFigures
    cleared: tuple[FlagChange, ...]
    appeared: tuple[FlagChange, ...]
    still: tuple[FlagChange, ...]
    shifts: tuple[PointShift, ...]
    shift_unit: str
    file_unit: str
    positions: bool
    heights: bool
    fixed_points: int
    corrected: tuple[CorrectedValue, ...] = ()
    #: observations checked in A that no test can check in B (redundancy number below 0.001)
    unchecked: tuple[FlagChange, ...] = ()


def _corrected(a: AdjustmentResult, b: AdjustmentResult) -> tuple[CorrectedValue, ...]:
    """Booked values that changed from A to B, each with its residual before and after."""
    rows_a = {r.line: r for r in observation_rows(a)}
    out = []
    for row in observation_rows(b):
        before = rows_a.get(row.line)
        if before is None or before.booked == row.booked:
            continue
        sfx = "″" if row.angular else f" {length_label(b.length_unit)}"
        out.append(
            CorrectedValue(
                line=row.line,
                observation=f"{row.kind} {row.stations}",
                booked_a=before.booked,
                booked_b=row.booked,
                residual_a=before.residual + sfx,
                residual_b=row.residual + sfx,
            )
        )
    return tuple(out)


def shift_unit(length_unit: str) -> tuple[str, float]:
    """The unit shifts are shown in and its factor from the file's unit: mm for metres."""
    if length_unit == "m":
        return "mm", LENGTH_FACTORS["m"] / LENGTH_FACTORS["mm"]
    return length_label(length_unit), 1.0


def _signed(value: float | None, decimals: int) -> str:
    if value is None:
        return NOT_APPLICABLE
    text = f"{value:+.{decimals}f}"
    return text[1:] if not text.strip("+-0.") else text


def _difference(a: float | None, b: float | None) -> float | None:
    return None if a is None or b is None else b - a


def _run_figures(result: AdjustmentResult) -> RunFigures:
    s = result.summary
    test = s.global_test
    v = verdict(result)
    if test is None:
        state, words = "none", "Not tested"
    elif test.passed and v.unchecked:
        # a pass with observations nothing checks any more is never shown as a plain pass
        state, words = "warn", f"! Passes, {v.unchecked} unchecked"
    else:
        state, words = ("pass", "✓ Passes") if test.passed else ("fail", "✕ Fails")
    return RunFigures(
        verdict=v,
        test_state=state,
        test_words=words,
        variance_factor=fmt_ratio(s.variance_factor, 3),
        statistic=fmt_ratio(test.statistic) if test else NOT_APPLICABLE,
        region=f"{fmt_ratio(test.lower)} to {fmt_ratio(test.upper)}" if test else NOT_APPLICABLE,
        redundancy=s.redundancy,
        used=s.used_observations,
        flagged=sum(1 for o in result.observations if o.flagged),
        unchecked=v.unchecked,
    )


def _w_text(obs: ObservationResult | None) -> str:
    if obs is None:
        return "not in this run"
    if obs.ignored:
        return "left out"
    if obs.w is None and obs.redundancy is not None:
        return "uncontrolled"
    return fmt_w(obs.w)


def compare(a: AdjustmentResult, b: AdjustmentResult) -> Comparison:
    """Flags cleared, appeared and kept (by line), and point shifts B − A, largest first."""
    obs_a = {o.line: o for o in a.observations}
    obs_b = {o.line: o for o in b.observations}
    flagged_a = {line for line, o in obs_a.items() if o.flagged}
    flagged_b = {line for line, o in obs_b.items() if o.flagged}
    # a flag that went away because nothing checks the observation any more is not cleared
    unchecked_b = {
        line
        for line, o in obs_b.items()
        if not o.ignored
        and o.redundancy is not None
        and o.w is None
        and not (line in obs_a and obs_a[line].w is None)
    }

    def change(line: int) -> FlagChange:
        obs = obs_b.get(line) or obs_a[line]
        return FlagChange(
            line=line,
            observation=f"{obs.kind} {stations(obs)}",
            w_a=_w_text(obs_a.get(line)),
            w_b=_w_text(obs_b.get(line)),
        )

    unit, factor = shift_unit(b.length_unit)
    decimals = 1 if unit == "mm" else 4

    def scaled(value: float | None, signed: bool = True) -> str:
        if value is None:
            return NOT_APPLICABLE
        return _signed(value * factor, decimals) if signed else f"{value * factor:.{decimals}f}"

    held = _DATUM_COMPONENTS.get(b.summary.dimension, "enh")
    points_a = {p.name: p for p in a.points}
    shifts = []
    fixed = 0
    for p in b.points:
        q = points_a.get(p.name)
        if q is None:
            continue
        if all(c in p.fixed for c in held):
            fixed += 1  # held fixed in every adjusted component: it cannot move
            continue
        d_e = _difference(q.east, p.east)
        d_n = _difference(q.north, p.north)
        d_h = _difference(q.height, p.height) if "h" in held else None
        parts = [d for d in (d_e, d_n, d_h) if d is not None]
        total = math.sqrt(sum(d * d for d in parts)) if parts else None
        horizontal = math.hypot(d_e, d_n) if d_e is not None and d_n is not None else None
        shifts.append(
            PointShift(
                name=p.name,
                d_east=scaled(d_e),
                d_north=scaled(d_n),
                horizontal=scaled(horizontal, signed=False),
                d_height=scaled(d_h),
                d_height_file_unit=NOT_APPLICABLE if d_h is None else _signed(d_h, 4),
                total=scaled(total, signed=False),
                total_file_unit=fmt_length(total, b.length_unit),
                total_raw=total,
            )
        )
    shifts.sort(key=lambda s: (s.total_raw is None, -(s.total_raw or 0.0), s.name))
    return Comparison(
        a=_run_figures(a),
        b=_run_figures(b),
        cleared=tuple(change(line) for line in sorted(flagged_a - flagged_b - unchecked_b)),
        appeared=tuple(change(line) for line in sorted(flagged_b - flagged_a)),
        still=tuple(change(line) for line in sorted(flagged_a & flagged_b)),
        shifts=tuple(shifts),
        shift_unit=unit,
        file_unit=length_label(b.length_unit),
        positions="e" in held and any(p.east is not None for p in b.points),
        heights="h" in held and any(p.height is not None for p in b.points),
        fixed_points=fixed,
        corrected=_corrected(a, b),
        unchecked=tuple(change(line) for line in sorted(unchecked_b)),
    )


def decisions_between(
    before: Sequence[ObservationEdit], after: Sequence[ObservationEdit]
) -> tuple[list[ObservationEdit], list[ObservationEdit]]:
    """(made, withdrawn): decisions in force in ``after`` but not ``before``, and the reverse."""
    if list(after[: len(before)]) == list(before):
        return list(after[len(before) :]), []
    return ([e for e in after if e not in before], [e for e in before if e not in after])
