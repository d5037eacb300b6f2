"""Iterative data snooping, offered as a suggestion and never applied on its own.

The sequence is Baarda's: adjust, take the flagged observation with the
largest |w|, leave it out, adjust again, until no observation is flagged.
Each step is returned for the surveyor to accept or reject; the field book
is not changed.

The sequence stops, without a step, when the worst flagged observation's
w-test is the same test as other observations' (its ``inseparable`` list,
|ρ| ≥ 0.99): sections in series between two benchmarks, the sides of a
single loop.  Their |w| are then equal and leaving out the "largest" one
is a coin toss that hides the blunder instead of finding it (the others
become uncontrolled and stop being flagged).  The plan names the whole group
and says the data cannot tell which is wrong.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass

from server.errors import NetworkError
from server.fieldbook.model import Fieldbook
from server.pipeline import adjust_parsed
from server.results.result import AdjustmentResult

#: Never propose more than this many removals in one sequence.
MAX_STEPS = 10


@dataclass(frozen=True, slots=True)
class SnoopingStep:
    """One proposed removal and the adjustment that follows it."""

    line: int
    kind: str
    from_point: str
    at: str | None
    to: str
    w: float
    variance_factor_after: float | None
    global_test_passed_after: bool | None
    flagged_after: int


@dataclass(frozen=True, slots=True)
class SnoopingPlan:
    """The proposed sequence and why it stopped."""

    steps: tuple[SnoopingStep, ...]
    stopped: str
    #: lines of a group of observations the data cannot tell apart, when that stopped the plan
    inseparable: tuple[int, ...] = ()


def with_ignored(fieldbook: Fieldbook, lines: set[int]) -> Fieldbook:
    """The field book with the observations on ``lines`` marked ignore."""
    observations = tuple(
        dataclasses.replace(o, ignored=True) if o.line in lines else o
        for o in fieldbook.observations
    )
    return dataclasses.replace(fieldbook, observations=observations)


def propose_snooping(fieldbook: Fieldbook, first: AdjustmentResult | None = None) -> SnoopingPlan:
    """Propose removals one at a time, largest |w| first, until nothing is flagged."""
    result = first if first is not None else adjust_parsed(fieldbook)
    removed: set[int] = set()
    steps: list[SnoopingStep] = []
    while True:
        flagged = [o for o in result.observations if o.flagged and o.w is not None]
        if not flagged:
            reason = "no observation is flagged any more" if steps else "no observation is flagged"
            return SnoopingPlan(tuple(steps), reason)
        if len(steps) == MAX_STEPS:
            return SnoopingPlan(
                tuple(steps),
                f"stopped after {MAX_STEPS} removals with observations still flagged: "
                "look for a systematic problem (units, a priori standard deviations, control)",
            )
        worst = max(flagged, key=lambda o: abs(o.w or 0.0))
        if worst.inseparable:
            group = (worst.line, *worst.inseparable)
            return SnoopingPlan(
                tuple(steps), inseparable_message(result, group), tuple(sorted(group))
            )
        try:
            after = adjust_parsed(with_ignored(fieldbook, removed | {worst.line}))
        except NetworkError as exc:
            return SnoopingPlan(
                tuple(steps),
                f"leaving out line {worst.line} would leave the network unadjustable ({exc}); "
                "re-measure it instead",
            )
        removed.add(worst.line)
        steps.append(
            SnoopingStep(
                line=worst.line,
                kind=worst.kind,
                from_point=worst.from_point,
                at=worst.at,
                to=worst.to,
                w=float(worst.w or 0.0),
                variance_factor_after=after.summary.variance_factor,
                global_test_passed_after=None
                if after.summary.global_test is None
                else after.summary.global_test.passed,
                flagged_after=sum(o.flagged for o in after.observations),
            )
        )
        result = after


def describe(result: AdjustmentResult, lines: tuple[int, ...]) -> str:
    """'line 7 (level A → B), line 8 (…) and line 9 (…)', in file order."""
    by_line = {o.line: o for o in result.observations}
    parts = []
    for line in sorted(set(lines)):
        o = by_line.get(line)
        marks = (
            f"{o.from_point} – {o.at} – {o.to}"
            if o and o.kind == "angle" and o.at
            else (f"{o.from_point} → {o.to}" if o else "")
        )
        parts.append(f"line {line} ({o.kind} {marks})" if o else f"line {line}")
    return parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + " and " + parts[-1]


def inseparable_message(result: AdjustmentResult, group: tuple[int, ...]) -> str:
    """Why no single observation of ``group`` is proposed, and what to do instead."""
    return (
        f"{describe(result, group)} are tested by the same check (their w-tests are correlated "
        "at |ρ| ≥ 0.99): the data cannot tell which of them is wrong. Leaving one out would only "
        "hide the blunder and leave the others unchecked. Re-observe these sections, or check "
        "the field notes for a booking error; no removal is proposed"
    )
