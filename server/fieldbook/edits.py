"""A surveyor's decisions written back into the field book text.

Leaving an observation out, bringing it back, changing its standard
deviation or correcting a misbooked value edits only that observation's own
line, so every line keeps its number: the flag ``ignore`` is added or
removed, ``sd=`` is set, or the value is replaced, and the reason with its
date is appended to the line's comment (a correction keeps the value it
replaced there: ``# corrected from 291:16:40 on 2026-12-03: reason``).  Asking
for the relative precision of point pairs adds ``relative A B`` lines at the
end of the file (after every numbered line, so no number moves).  The original text
is never changed in place; ``apply_edits`` returns a new text that parses to
the field book the surveyor decided on.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass, replace

from server.errors import FieldbookError, SurveyError
from server.fieldbook.parser import parse_fieldbook
from server.units import UnitError, parse_quantity

ACTIONS = ("exclude", "include", "sd", "correct", "relative")
#: Longest corrected value accepted (characters); no booked value is longer.
MAX_VALUE_CHARS = 40
#: Characters a value cannot contain: they would end it, start a comment or make an option.
_NOT_IN_VALUE = re.compile(r'[\s#"=]')
#: Most pairs one "relative" decision may ask for (every pair costs a few solves).
MAX_PAIRS = 200
#: A name the format accepts that can be written back on a line: no white space, '#', '"', '='.
_PAIR_NAME = re.compile(r'[^\s#"=]{1,64}\Z')
_REASON_LIMIT = 300
_CONTROL = re.compile(r"[\x00-\x1f\x7f\u2028\u2029]+")
_DATE = re.compile(r"^\d{4}-\d{2}-\d{2}$")
#: A line with its ending, split as the parser splits (LF, CRLF or CR; not str.splitlines,
#: which also breaks at form feeds and U+2028 and would shift every later line number).
_LINE = re.compile(r"[^\r\n]*(?:\r\n|\r|\n)|[^\r\n]+\Z")
_ENDING = re.compile(r"\r\n|\r|\n")
#: Tokens before the first option or flag: the keyword and its positional values;
#: a direction inside a round is written ``TO VALUE`` with no keyword.
_LEADING_TOKENS = {
    "level": 4,
    "distance": 4,
    "angle": 5,
    "azimuth": 4,
    "slope": 4,
    "zenith": 4,
    "direction": 2,
    "baseline": 6,
}
#: Value tokens just before the first option: a baseline's DX DY DZ, one for the others.
#: A baseline's value is written and corrected as ``DX,DY,DZ``, and its sd as ``SX,SY,SZ``
#: (or one length for all three).
_VALUE_COUNTS = {"baseline": 3}


class EditError(SurveyError):
    """An edit cannot be applied; the message says which line and why."""


@dataclass(frozen=True, slots=True)
class ObservationEdit:
    """One decision about the observation on ``line``.

    ``action`` is "exclude" (leave out), "include" (bring back), "sd"
    (use ``sd``, a quantity with units such as ``3mm`` or ``2.5sec``) or
    "correct" (replace the booked value by ``value``, written as the field
    book writes it; ``previous`` is the value it replaces, recorded when the
    decision is made so the review trail can show both) or "relative" (report
    the relative precision of ``pairs``; ``line`` is 0, the lines are added at
    the end of the file).
    """

    line: int
    action: str
    reason: str
    date: str
    sd: str | None = None
    value: str | None = None
    previous: str | None = None
    pairs: tuple[tuple[str, str], ...] = ()

    def describe(self) -> str:
        """The decision in words, as written into the field book comment."""
        if self.action == "exclude":
            return "left out"
        if self.action == "include":
            return "brought back"
        if self.action == "correct":
            return f"value corrected to {self.value}"
        if self.action == "relative":
            return "relative precision asked for"
        return f"sd set to {self.sd}"


def clean_reason(reason: str) -> str:
    """One line of plain text: control characters and line breaks become spaces."""
    return _CONTROL.sub(" ", reason).strip()[:_REASON_LIMIT]


def validate_edit(edit: ObservationEdit) -> None:
    """Refuse an edit that is incomplete or malformed, naming the problem."""
    if edit.action not in ACTIONS:
        raise EditError(f"line {edit.line}: unknown decision {edit.action!r}")
    if not clean_reason(edit.reason):
        raise EditError(f"line {edit.line}: every decision needs a reason")
    if not _DATE.match(edit.date):
        raise EditError(f"line {edit.line}: the date must be written YYYY-MM-DD")
    if edit.action == "relative":
        _validate_pairs(edit.pairs)
    if edit.action == "sd":
        text = (edit.sd or "").strip()
        if not text or any(c.isspace() for c in text):
            raise EditError(
                f"line {edit.line}: give the standard deviation with its unit, e.g. 3mm"
            )
        for part in text.split(",") if text.count(",") == 2 else [text]:
            try:
                quantity = parse_quantity(part)
            except UnitError as exc:
                raise EditError(f"line {edit.line}: {exc}") from None
            parts = (quantity.constant, quantity.ppm, quantity.per_sqrtkm, quantity.per_setup)
            if min(parts) < 0 or not any(parts):
                raise EditError(f"line {edit.line}: a standard deviation must be positive")
    if edit.action == "correct":
        text = (edit.value or "").strip()
        if not text:
            raise EditError(
                f"line {edit.line}: type the corrected value as the field book "
                "writes it (D:M:S such as 291:16:50 for angles in a dms file)"
            )
        if len(text) > MAX_VALUE_CHARS * (1 + text.count(",")):
            raise EditError(f"line {edit.line}: the corrected value is too long")
        if _NOT_IN_VALUE.search(text):
            raise EditError(
                f"line {edit.line}: the corrected value must be one number or angle, "
                "without spaces, quotes, '#' or '='"
            )


def apply_edits(text: str, edits: Sequence[ObservationEdit], *, source: str = "") -> str:
    """The field book text with ``edits`` written into their lines (in order).

    Raises ``EditError`` when an edit names a line that holds no
    observation, or when the edited file no longer reads (e.g. an angular
    standard deviation given to a distance).
    """
    fieldbook = parse_fieldbook(text, source=source)
    observation_lines = {o.line: o for o in fieldbook.observations}
    lines = _LINE.findall(text)
    asked = {frozenset((p.first, p.second)) for p in fieldbook.relative_pairs}
    added: list[str] = []
    for edit in edits:
        validate_edit(edit)
        if edit.action == "relative":
            added += _relative_lines(edit, asked)
            continue
        obs = observation_lines.get(edit.line)
        if obs is None or not 1 <= edit.line <= len(lines):
            raise EditError(f"line {edit.line} holds no observation that can be edited")
        as_written = _for_kind(edit, obs.kind)
        lines[edit.line - 1] = _edit_line(lines[edit.line - 1], as_written, obs.kind)
    edited = "".join(lines)
    if added:
        ending = _ENDING.search(text)
        newline = ending.group() if ending else "\n"
        if edited and not edited.endswith(("\n", "\r")):
            edited += newline
        edited += "".join(line + newline for line in added)
    try:
        parse_fieldbook(edited, source=source)
    except FieldbookError as exc:
        corrected = {e.line for e in edits if e.action == "correct"}
        for issue in exc.issues:
            if issue.line in corrected:  # the corrected value itself: say so, plainly
                raise EditError(
                    f"line {issue.line}: the corrected value does not read: {issue.message}"
                ) from None
        raise EditError("the edited field book no longer reads: " + str(exc)) from None
    return edited


def booked_value(text: str, line: int, *, source: str = "") -> str:
    """The value token of the observation on ``line``, as written (for the review trail)."""
    fieldbook = parse_fieldbook(text, source=source)
    obs = next((o for o in fieldbook.observations if o.line == line), None)
    lines = _LINE.findall(text)
    if obs is None or not 1 <= line <= len(lines):
        raise EditError(f"line {line} holds no observation that can be edited")
    value = value_token(lines[line - 1], obs.kind)
    if not value:
        raise EditError(f"line {line}: its value could not be found")
    return value


def value_token(line_text: str, kind: str) -> str:
    """The value as written on an observation's line of kind ``kind``; "" if there is none."""
    code, _ = _split_comment(line_text.rstrip("\r\n"))
    spans = _token_spans(code)
    last = _LEADING_TOKENS.get(kind, 0)
    first = last - _VALUE_COUNTS.get(kind, 1)
    if not 0 <= first < last <= len(spans):
        return ""
    return ",".join(code[start:end] for start, end in spans[first:last])


def _for_kind(edit: ObservationEdit, kind: str) -> ObservationEdit:
    """The edit as the line of ``kind`` takes it; three values only for a baseline."""
    count = _VALUE_COUNTS.get(kind, 1)
    if edit.action == "sd" and edit.sd is not None:
        parts = edit.sd.strip().split(",")
        if count == 3 and len(parts) == 1:
            # one standard deviation for each of DX, DY and DZ, as 'defaults baseline=' does
            return replace(edit, sd=",".join(parts * 3))
        if len(parts) != (3 if count == 3 else 1):
            what = (
                "a baseline takes one standard deviation or three (SX,SY,SZ)"
                if count == 3
                else f"a {kind} takes one standard deviation"
            )
            raise EditError(f"line {edit.line}: {what}")
    if edit.action == "correct" and len((edit.value or "").split(",")) != count:
        what = (
            "type a baseline's three components as DX,DY,DZ"
            if count == 3
            else "the corrected value must be one number or angle"
        )
        raise EditError(f"line {edit.line}: {what}")
    return edit


def _validate_pairs(pairs: Sequence[tuple[str, str]]) -> None:
    if not pairs:
        raise EditError("choose at least one pair of points")
    if len(pairs) > MAX_PAIRS:
        raise EditError(f"{len(pairs)} pairs at once is too many; ask for at most {MAX_PAIRS}")
    for pair in pairs:
        if len(pair) != 2 or not all(
            isinstance(n, str) and _PAIR_NAME.match(n) and n.isprintable() for n in pair
        ):
            raise EditError("a pair names a point that cannot be written in a field book")
        if pair[0] == pair[1]:
            raise EditError(f"the pair {pair[0]}–{pair[1]} names the same point twice")


def _relative_lines(edit: ObservationEdit, asked: set[frozenset[str]]) -> list[str]:
    """``relative A B  # DATE relative precision asked for: REASON`` for each new pair."""
    out = []
    note = f"# {edit.date} {edit.describe()}: {clean_reason(edit.reason)}"
    for a, b in edit.pairs:
        key = frozenset((a, b))
        if key not in asked:
            asked.add(key)
            out.append(f"relative {a} {b}  {note}")
    return out


def _edit_line(line: str, edit: ObservationEdit, kind: str) -> str:
    first_option = _LEADING_TOKENS[kind]
    body = line.rstrip("\r\n")
    ending = line[len(body) :]
    code, comment = _split_comment(body)
    spans = _token_spans(code)
    if edit.action == "correct":
        first_value = first_option - _VALUE_COUNTS.get(kind, 1)
        return _correct_line(code, comment, ending, spans, edit, first_value, first_option)
    tokens = [code[a:b] for a, b in spans]
    keep = list(range(len(tokens)))
    if edit.action in ("exclude", "include"):
        keep = [k for k in keep if k < first_option or tokens[k].lower() != "ignore"]
    if edit.action == "sd":
        keep = [k for k in keep if k < first_option or not tokens[k].lower().startswith("sd=")]
    new_tokens = [tokens[k] for k in keep]
    if edit.action == "exclude":
        new_tokens.append("ignore")
    elif edit.action == "sd":
        new_tokens.append(f"sd={edit.sd}")
    indent = code[: spans[0][0]] if spans else ""
    note = f"{edit.date} {edit.describe()}: {clean_reason(edit.reason)}"
    comment = f"{comment}; {note}" if comment else f"# {note}"
    return f"{indent}{' '.join(new_tokens)}  {comment}{ending}"


def _correct_line(
    code: str,
    comment: str,
    ending: str,
    spans: list[tuple[int, int]],
    edit: ObservationEdit,
    first: int,
    last: int,
) -> str:
    """The value tokens replaced in place (the surveyor's spacing kept), the old ones commented.

    One token for most kinds; a baseline's DX DY DZ are three, given as ``DX,DY,DZ``.
    """
    if len(spans) < last:
        raise EditError(f"line {edit.line}: its value could not be found")
    values = spans[first:last]
    old = ",".join(code[start:end] for start, end in values)
    new = (edit.value or "").strip()
    if new == old:
        raise EditError(f"line {edit.line}: the value is already {old}")
    note = f"corrected from {old} on {edit.date}: {clean_reason(edit.reason)}"
    comment = f"{comment}; {note}" if comment else f"# {note}"
    for (start, end), part in reversed(list(zip(values, new.split(","), strict=True))):
        code = f"{code[:start]}{part}{code[end:]}"
    return f"{code}  {comment}{ending}"


def _split_comment(body: str) -> tuple[str, str]:
    """Split a line at the first ``#`` outside double quotes."""
    quoted = escaped = False
    for k, char in enumerate(body):
        if escaped:
            escaped = False
        elif char == "\\" and quoted:
            escaped = True
        elif char == '"':
            quoted = not quoted
        elif char == "#" and not quoted:
            return body[:k].rstrip(), body[k:].rstrip()
    return body.rstrip(), ""


def _token_spans(code: str) -> list[tuple[int, int]]:
    """Start and end of each white-space separated token; quoted strings stay whole."""
    spans: list[tuple[int, int]] = []
    k, n = 0, len(code)
    while k < n:
        if code[k] in " \t":
            k += 1
            continue
        start, quoted, escaped = k, False, False
        while k < n and (quoted or code[k] not in " \t"):
            char = code[k]
            if escaped:
                escaped = False
            elif char == "\\" and quoted:
                escaped = True
            elif char == '"':
                quoted = not quoted
            k += 1
        spans.append((start, k))
    return spans
