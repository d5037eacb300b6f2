"""Syntax of a field book: bytes → lines → tokens → statements, and single-token values.

Nothing here remembers anything from one line to the next; ``fieldbook.py``
gives statements their meaning.  This module agrees with the contract on what
a line, a token, a comment, a quoted string, an option and a flag are, and
reads single tokens (point names, numbers, angles, quantities).  Readers raise
``UnitError`` carrying a sentence for the user.
"""

from __future__ import annotations

import difflib
import functools
import re
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import Any

from server.errors import Issue
from server.units import (
    RAD_PER_ARCSEC,
    Quantity,
    UnitError,
    angle_in_sec,
    parse_angle,
    parse_length,
    parse_number,
    parse_quantity,
)

BOM = b"\xef\xbb\xbf"
#: Longest token shown in a message; a whole binary line helps nobody.
SHOW_MAX = 40
#: Issues listed before the rest are only counted.
MAX_ISSUES = 50
MAX_NAME_LENGTH = 64
#: How many non-blank lines to look at before deciding a file is not a field book.
SNIFF_LINES = 10

# --------------------------------------------------------------------------- lines


def to_bytes(text: str | bytes) -> bytes:
    """The raw bytes of the input: a ``str`` is encoded as UTF-8.

    Lone surrogates (a file read with ``errors="surrogateescape"``) become the
    bytes they stand for, so they are reported as non-UTF-8 lines instead of
    crashing the hash.
    """
    if not isinstance(text, str):
        return bytes(text)
    try:
        return text.encode("utf-8")
    except UnicodeEncodeError:
        try:
            return text.encode("utf-8", "surrogateescape")
        except UnicodeEncodeError:
            return text.encode("utf-8", "surrogatepass")


def decode_lines(raw: bytes) -> tuple[list[str], dict[int, tuple[str, str]]]:
    """Split into lines (LF, CRLF or CR) and decode each as UTF-8.

    Returns the lines (undecodable ones with U+FFFD, so they can still be
    sniffed) and, by 0-based line index, ``(token, message)`` for each line
    holding bytes that are not UTF-8.
    """
    raw = raw.removeprefix(BOM)
    try:
        # The common case: one C-level decode for the whole file.
        text = raw.decode("utf-8")
        return text.replace("\r\n", "\n").replace("\r", "\n").split("\n"), {}
    except UnicodeDecodeError:
        pass
    lines: list[str] = []
    bad: dict[int, tuple[str, str]] = {}
    chunks = raw.replace(b"\r\n", b"\n").replace(b"\r", b"\n").split(b"\n")
    for index, chunk in enumerate(chunks):
        # UTF-8 never uses the byte 0x0A inside a character, so lines decode independently.
        try:
            lines.append(chunk.decode("utf-8"))
        except UnicodeDecodeError as exc:
            lines.append(chunk.decode("utf-8", "replace"))
            byte = chunk[exc.start]
            message = (
                f"byte 0x{byte:02X} at position {exc.start + 1} is not UTF-8 text; "
                "save the file with UTF-8 encoding"
            )
            bad[index] = (f"\\x{byte:02x}", message)
    return lines, bad


# --------------------------------------------------------------------------- tokens


class LexError(ValueError):
    """A line that cannot be split into tokens; ``token`` is the bad part as written."""

    def __init__(self, token: str, message: str) -> None:
        super().__init__(message)
        self.token = token
        self.message = message


class Token:
    """One token: ``raw`` as written (for messages), ``key`` in lower case if ``key=value``.

    ``value`` is the text after ``=`` (or the whole token), with quotes and
    escapes removed when ``quoted``.
    """

    __slots__ = ("key", "quoted", "raw", "value")

    def __init__(self, raw: str, key: str | None, value: str, quoted: bool) -> None:
        self.raw = raw
        self.key = key
        self.value = value
        self.quoted = quoted

    def __repr__(self) -> str:
        return f"Token({self.raw!r})"


# At a token start: an optional ``key=`` then a quoted string with \" and \\ escapes.
_QUOTED = re.compile(r'([^ \t#"=]*=)?"((?:[^"\\]|\\.)*)"')
_PLAIN = re.compile(r'[^ \t#"]+')
_SPACE = re.compile(r"[ \t]*")
_ESCAPE = re.compile(r'\\(["\\])')


def tokenize(text: str) -> list[Token]:
    """Split one line into tokens; a ``#`` outside quotes ends the line.

    Raises ``LexError`` for an unterminated or misplaced quote.
    """
    quote = text.find('"')
    hash_at = text.find("#")
    if quote < 0 or 0 <= hash_at < quote:
        # No quoted text: the fast path taken by nearly every line.
        return _split_plain(text if hash_at < 0 else text[:hash_at])
    # Plain tokens up to the one holding the first quote, then the careful scan.
    start = max(text.rfind(" ", 0, quote), text.rfind("\t", 0, quote)) + 1
    return _split_plain(text[:start]) + _tokenize_quoted(text, start)


def _split_plain(text: str) -> list[Token]:
    tokens = []
    for word in text.replace("\t", " ").split(" "):
        if not word:
            continue
        if "=" in word:
            key, _, value = word.partition("=")
            tokens.append(Token(word, key.lower(), value, False))
        else:
            tokens.append(Token(word, None, word, False))
    return tokens


def _tokenize_quoted(text: str, position: int) -> list[Token]:
    tokens: list[Token] = []
    end = len(text)
    while position < end and text[position] != "#":
        quoted = _QUOTED.match(text, position)
        if quoted:
            position = quoted.end()
            if position < end and text[position] not in " \t#":
                raise LexError(
                    _word_at(text, quoted.start()), "put a space after the closing quote"
                )
            key = quoted.group(1)
            value = _ESCAPE.sub(r"\1", quoted.group(2))
            tokens.append(Token(quoted.group(0), key[:-1].lower() if key else None, value, True))
        else:
            plain = _PLAIN.match(text, position)
            word = plain.group() if plain else ""
            after = position + len(word) + 1  # just past a quote that follows the word
            if (
                after <= end
                and text[after - 1] == '"'
                and _SECONDS_MARK.match(word)
                and (after == end or text[after] in " \t#")
            ):
                # 'angle=5"': seconds marked as on a field sheet.  Read it as a value so that
                # its reader can say to write 5sec, and the rest of the line still counts.
                tokens.extend(_split_plain(word + '"'))
                position = after
            elif position + len(word) < end and text[position + len(word)] == '"':
                if (dms := _marked_dms(word + '"')) is not None:
                    raise LexError(word + '"', f"write angles as D:M:S, e.g. {dms}")
                if word and not (word.endswith("=") and word.count("=") == 1):
                    raise LexError(
                        _word_at(text, position),
                        'a double quote can only start a text value, as in note="..."',
                    )
                raise LexError(text[position:], 'this quote is never closed; end the text with "')
            else:
                tokens.extend(_split_plain(word))
                position += len(word)
        position = _SPACE.match(text, position).end()  # type: ignore[union-attr]
    return tokens


# An option value ending in a digit, just before a '"' (seconds of arc on a field sheet).
_SECONDS_MARK = re.compile(r"[^ \t#\"=]+=[0-9.eE+-]*[0-9.]\Z")
_MARKED_DMS = re.compile(r"([+-]?[0-9]{1,3})°([0-9]{1,2})['′]([0-9]{1,2}(?:\.[0-9]*)?)[\"″]\Z")


def _marked_dms(word: str) -> str | None:
    """``12:34:56`` for ``12°34'56"``; None for anything else."""
    match = _MARKED_DMS.match(word)
    if match is None:
        return None
    degrees, minutes, seconds = match.groups()
    whole, point, fraction = seconds.partition(".")
    return f"{degrees}:{minutes.zfill(2)}:{whole.zfill(2)}{point}{fraction}"


def _word_at(text: str, start: int) -> str:
    end = start
    while end < len(text) and text[end] not in " \t":
        end += 1
    return text[start:end]


# --------------------------------------------------------------------------- statements


class IssueLog:
    """Issues in line order: the first ``MAX_ISSUES`` kept, the rest only counted."""

    def __init__(self, noun: str) -> None:
        self.noun = noun
        self.items: list[Issue] = []
        self.count = 0
        self._first_dropped_line = 0

    @property
    def full(self) -> bool:
        """True once further issues are only counted: skip building their messages."""
        return len(self.items) >= MAX_ISSUES

    def add(self, line: int, token: str, message: str) -> None:
        self.count += 1
        if len(self.items) < MAX_ISSUES:
            if not message.isprintable():
                # A message quoting a token must not carry its control characters to a terminal.
                message = "".join(c if c.isprintable() else f"\\u{ord(c):04x}" for c in message)
            self.items.append(Issue(line, show(token), message))
        elif self.count == MAX_ISSUES + 1:
            self._first_dropped_line = line

    def result(self) -> tuple[Issue, ...]:
        items = sorted(self.items, key=lambda issue: issue.line)
        dropped = self.count - len(self.items)
        if dropped:
            noun = self.noun if dropped > 1 else self.noun.rstrip("s")
            message = (
                f"{dropped} more {noun} from this line on are not listed; "
                "correct the ones above and read the file again"
            )
            items.append(Issue(self._first_dropped_line, "", message))
        return tuple(items)


@dataclass(frozen=True, slots=True)
class Grammar:
    """What a statement may hold; ``name`` is how messages refer to it."""

    name: str
    section: str  # "header" (once, before the body), "setting", "body", "end" or "entry"
    positionals: tuple[str, ...] = ()
    options: frozenset[str] = frozenset()
    flags: frozenset[str] = frozenset()
    text_options: frozenset[str] = frozenset({"note"})
    text_positional: bool = False
    hint: str = ""  # what an option-only statement takes
    stray: str = ""  # what to say about a value too many, when the usage is not enough
    why_not: Mapping[str, str] = field(default_factory=dict)  # why an option of others is not

    def takes(self) -> str:
        return join_words(self.positionals) if self.positionals else self.hint


@dataclass(slots=True)
class Statement:
    """One line matched against its grammar."""

    line: int
    word: str  # the keyword (or first token) as written
    values: list[Token]
    options: dict[str, Token]
    flags: frozenset[str]
    flawed: bool  # an option or flag was rejected: skip follow-on complaints

    def text(self, key: str) -> str:
        token = self.options.get(key)
        return token.value if token is not None else ""


class Binder:
    """Sorts a line's tokens into positional values, options and flags, reporting misfits."""

    def __init__(self, grammars: Mapping[str, Grammar], log: IssueLog) -> None:
        self.grammars = grammars
        self.log = log
        self.option_owners, self.flag_owners, self.all_options, self.all_flags = _tables(grammars)

    def bind(self, line: int, word: str, grammar: Grammar, tokens: list[Token]) -> Statement | None:
        """The statement, or None (reported) when values are missing or wrongly quoted."""
        wanted = len(grammar.positionals)
        bare: list[Token] = []
        options: dict[str, Token] = {}
        flags: set[str] = set()
        flawed = False
        early: Token | None = None
        index = 0
        while index < len(tokens):
            token = tokens[index]
            index += 1
            if token.key is None:
                bare.append(token)
                continue
            if not token.key or not (token.value or token.quoted):
                token, index = self._respace(line, token, tokens, index, bare, wanted)
            if len(bare) < wanted and early is None:
                early = token
            flawed |= not self._option(line, grammar, token, options)
        if len(bare) > wanted and grammar.flags:
            # A flag among the values ("distance A B ignore 12"): lift it out so the values
            # line up, then say where it belongs.
            misplaced = [t for t in bare[:wanted] if t.value.lower() in grammar.flags]
            for token in misplaced[: len(bare) - wanted]:
                bare.remove(token)
                self._flag(line, grammar, token, flags, stray_reported=True)
                early = early or token
        stray_reported = False
        for token in bare[wanted:]:
            accepted = self._flag(line, grammar, token, flags, stray_reported)
            stray_reported |= not accepted
            flawed |= not accepted
        values = bare[:wanted]
        if len(values) < wanted:
            self.log.add(line, word, f"{grammar.name} needs {grammar.takes()}")
            return None
        for token in values:
            if token.quoted and not grammar.text_positional:
                self.log.add(line, token.raw, _quoted_message(token))
                return None
        if early is not None:
            where = join_words(grammar.positionals)
            self.log.add(line, early.raw, f"'{show(early.raw)}' must come after {where}")
            flawed = True
        return Statement(line, word, values, options, frozenset(flags), flawed)

    def _respace(
        self,
        line: int,
        token: Token,
        tokens: list[Token],
        index: int,
        bare: list[Token],
        wanted: int,
    ) -> tuple[Token, int]:
        """Read ``sd= 2mm``, ``sd =2mm`` and ``sd = 2mm`` as ``sd=2mm``, after one error."""
        key, value = token.key, None
        if key and index < len(tokens) and tokens[index].key is None:
            value = tokens[index]  # "sd= 2mm"
            index += 1
        elif not key and len(bare) > wanted and not bare[-1].quoted:
            if token.value or token.quoted:  # "sd =2mm"
                value = Token(token.raw[1:], None, token.value, token.quoted)
            elif index < len(tokens) and tokens[index].key is None:  # "sd = 2mm"
                value = tokens[index]
                index += 1
            if value is not None:
                key = bare.pop().value.lower()
        if value is None:
            return token, index  # nothing to join; _option says what is missing
        joined = Token(f"{key}={value.raw}", key, value.value, value.quoted)
        message = f"write '{show(joined.raw)}' without spaces around '='"
        self.log.add(line, joined.raw, message)
        return joined, index

    def _option(self, line: int, grammar: Grammar, token: Token, options: dict[str, Token]) -> bool:
        key = token.key or ""
        if key not in grammar.options:
            message = "" if self.log.full else self._foreign_option(grammar, token)
        elif key in options:
            message = f"'{key}=' is given twice on this line"
        elif token.quoted and key not in grammar.text_options:
            message = _quoted_message(token)
        elif not token.quoted and not token.value:
            message = f"'{show(token.raw)}' needs a value, written without spaces"
        else:
            options[key] = token
            return True
        self.log.add(line, token.raw, message)
        return False

    def _flag(
        self, line: int, grammar: Grammar, token: Token, flags: set[str], stray_reported: bool
    ) -> bool:
        word = token.value.lower()
        if not token.quoted and word in grammar.flags:
            if word not in flags:
                flags.add(word)
                return True
            message = f"'{show(token.raw)}' is given twice on this line"
        elif not token.quoted and word in self.all_flags:
            owners = self.flag_owners.get(word)
            where = f"; it is a flag of {owners}" if owners else ""
            message = f"'{show(token.raw)}' does not apply to {grammar.name}{where}"
        elif hint := ("" if self.log.full else suggest(word, grammar.flags)):
            message = f"'{show(token.raw)}' is not a flag of {grammar.name}{hint}"
        elif stray_reported:
            return False  # one "not expected" per line is enough
        else:
            usage = grammar.stray or f"{grammar.name} takes {grammar.takes()}"
            message = f"'{show(token.raw)}' is not expected here: {usage}"
        self.log.add(line, token.raw, message)
        return False

    def _foreign_option(self, grammar: Grammar, token: Token) -> str:
        key = token.key or ""
        if not key:
            return (
                f"'{show(token.raw)}' has no option name before '='; write key=value, e.g. sd=2mm"
            )
        if key in self.all_options:
            owners = self.option_owners.get(key)
            where = f"; it is an option of {owners}" if owners else ""
            if key in grammar.why_not:
                where = f": {grammar.why_not[key]}"
            return f"'{key}=' does not apply to {grammar.name}{where}"
        hint = suggest(key, grammar.options) or (
            f" (it takes {join_words(sorted(grammar.options))})" if grammar.options else ""
        )
        return f"'{show(key)}' is not an option of {grammar.name}{hint}"


#: What ``_tables`` made, by the identity of the grammars (kept alive here, so the id is
#: not reused); each parse makes a Binder, and the grammars of the format never change.
_TABLES: dict[int, tuple[Mapping[str, Grammar], _GrammarTables]] = {}
_GrammarTables = tuple[dict[str, str], dict[str, str], frozenset[str], frozenset[str]]


def _tables(grammars: Mapping[str, Grammar]) -> _GrammarTables:
    """Owners of each option and flag, and every option and flag, of these grammars."""
    kept = _TABLES.get(id(grammars))
    if kept is not None and kept[0] is grammars:
        return kept[1]
    tables = (
        _owners(grammars, "options"),
        _owners(grammars, "flags"),
        frozenset().union(*(g.options for g in grammars.values())),
        frozenset().union(*(g.flags for g in grammars.values())),
    )
    if len(_TABLES) < 8:  # the format's grammars, and the few a test may make
        _TABLES[id(grammars)] = (grammars, tables)
    return tables


def _owners(grammars: Mapping[str, Grammar], attribute: str) -> dict[str, str]:
    """Which statements accept each option key (or flag), for "does not apply" messages."""
    owners: dict[str, list[str]] = {}
    for grammar in grammars.values():
        for key in getattr(grammar, attribute):
            owners.setdefault(key, []).append(grammar.name)
    # Naming every statement that takes sd= or note= would only add noise.
    return {key: join_words(names) for key, names in owners.items() if len(names) <= 3}


def _quoted_message(token: Token) -> str:
    return f"'{show(token.raw)}': quotes are only for text, a title or note=\"...\""


# --------------------------------------------------------------------------- the grammar


def _observation(name: str, positionals: tuple[str, ...], *extra: str) -> Grammar:
    options = frozenset({"sd", "note", *extra})
    return Grammar(name, "body", positionals, options, frozenset({"ignore"}))


#: Every statement of the format by keyword; ``fieldbook.py`` gives each its meaning.
GRAMMARS: dict[str, Grammar] = {
    "fieldbook": Grammar("fieldbook", "header", ("the format version (fieldbook 1)",)),
    "title": Grammar("title", "header", ("the title in double quotes",), text_positional=True),
    "units": Grammar(
        "units",
        "header",
        options=frozenset({"length", "angle"}),
        hint="length=m|ft|usft and/or angle=dms|deg|gon",
    ),
    "tests": Grammar(
        "tests",
        "header",
        options=frozenset({"alpha", "snooping", "power", "confidence", "precision"}),
        hint="alpha=, snooping=, power=, confidence= or precision=, e.g. alpha=0.05",
    ),
    "tolerance": Grammar(
        "tolerance",
        "header",
        options=frozenset({"misclosure", "relative", "angular", "ratio"}),
        hint="misclosure=, relative=, angular= or ratio=, e.g. misclosure=4mm/sqrtkm "
        "or angular=10sec/sqrtn ratio=1:10000",
    ),
    "crs": Grammar(
        "crs",
        "header",
        ("EPSG:CODE or local",),
        options=frozenset({"lat", "lon", "east", "north"}),
        stray="crs takes EPSG:CODE (as crs EPSG:32633) or local lat=LAT lon=LON "
        "[east=E0] [north=N0]",
    ),
    "geoid": Grammar(
        "geoid",
        "header",
        options=frozenset({"undulation"}),
        hint="undulation=N, a length such as undulation=-28.41m",
    ),
    "refraction": Grammar(
        "refraction", "header", options=frozenset({"k"}), hint="k=K, e.g. k=0.13"
    ),
    "epoch": Grammar(
        "epoch",
        "header",
        ("the date (2026-03-14) or UTC time (2026-03-14T10:30Z)",),
    ),
    "defaults": Grammar(
        "defaults",
        "setting",
        options=frozenset(
            {
                "level",
                "distance",
                "angle",
                "direction",
                "azimuth",
                "zenith",
                "slope",
                "baseline",
                "centering",
            }
        ),
        hint="KIND=SD, e.g. distance=2mm+2ppm",
    ),
    "scale": Grammar(
        "scale",
        "setting",
        options=frozenset({"factor", "baseline"}),
        hint="factor=F and/or baseline=F, e.g. factor=0.99962",
    ),
    "point": Grammar(
        "point",
        "body",
        ("the point name",),
        options=frozenset(
            {"east", "north", "lat", "lon", "height", "geoid", "fix", "sd", "sd_en", "sd_h", "note"}
        ),
        flags=frozenset({"fix"}),
        stray="coordinates are always named, as in east=E north=N height=H",
    ),
    "level": _observation("level", ("FROM", "TO", "the height difference"), "len", "setups"),
    "distance": _observation("distance", ("FROM", "TO", "the distance")),
    "angle": _observation("angle", ("BACK", "AT", "FORE", "the angle")),
    "azimuth": _observation("azimuth", ("FROM", "TO", "the azimuth")),
    "slope": _observation("slope", ("FROM", "TO", "the slope distance"), "hi", "ht"),
    "zenith": _observation("zenith", ("FROM", "TO", "the zenith angle"), "hi", "ht"),
    "baseline": Grammar(
        "baseline",
        "body",
        ("FROM", "TO", "DX", "DY", "DZ"),
        frozenset({"sd", "corr", "note"}),
        frozenset({"ignore"}),
        why_not=dict.fromkeys(
            ("hi", "ht"),
            "a baseline runs from mark to mark; the antenna heights are applied when the "
            "vector is processed",
        ),
        stray="baseline takes FROM, TO and the three components DX DY DZ; sd= and corr= list "
        "three values with commas and no spaces, as sd=3mm,3mm,6mm",
    ),
    "directions": Grammar(
        "directions",
        "body",
        ("the occupied point AT",),
        options=frozenset({"sd", "note"}),
        flags=frozenset({"ignore"}),
    ),
    "relative": Grammar("relative", "body", ("the first point A", "the second point B")),
    "end": Grammar("end", "end", hint="nothing"),
}
#: A line inside a ``directions`` round.
DIRECTION_ENTRY = Grammar(
    "a direction in a round",
    "entry",
    ("TO", "the direction"),
    options=frozenset({"sd", "note"}),
    flags=frozenset({"ignore"}),
)
#: Every statement keyword, for recognising and suggesting.
KEYWORDS = frozenset(GRAMMARS)


# --------------------------------------------------------------------------- single values

_WITH_UNIT = re.compile(r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?[a-zA-Z]+$")
_NOT_FINITE = frozenset({"nan", "inf", "infinity"})

# Plausibility limits.  Values outside them are typing or unit mistakes, and past them the
# squares and reciprocals of the adjustment overflow; docs/fieldbook.md lists them.
#: Largest coordinate, height or observed length (100 000 km; grid coordinates stay below 1e8 m).
MAX_LENGTH_M = 1.0e8
#: Shortest observed distance and leveling section (1 mm).
MIN_DISTANCE_M = 1.0e-3
#: Range of a length part of a standard deviation or allowance (0.1 nm to 100 km).
SD_LENGTH_RANGE_M = (1.0e-10, 1.0e5)
#: Range of an angular standard deviation (0.000001" to 180°).
SD_ANGLE_RANGE_RAD = (1.0e-6 * RAD_PER_ARCSEC, 648000.0 * RAD_PER_ARCSEC)
#: Range of a ppm part (0.000001 ppm to 1 000 000 ppm).
PPM_RANGE = (1.0e-6, 1.0e6)


def bounded_length(text: str, value_m: float) -> float:
    """``value_m`` (read from ``text``) if its size is plausible for a coordinate or length."""
    if abs(value_m) > MAX_LENGTH_M:
        raise UnitError(
            f"'{show(text)}' is {value_m:.6g} m, which is not a survey value (the limit is "
            "100 000 km); check the number and the file's length unit"
        )
    return value_m


def option_length(text: str) -> float:
    """A length option with its unit (``hi=``, ``ht=``, ``len=``), in metres, within the limits."""
    return bounded_length(text, parse_length(text))


def point_name(text: str) -> str:
    """A point name: 1 to 64 characters, no white space or invisible ones, not ``end``."""
    if len(text) <= MAX_NAME_LENGTH and text.isprintable() and text.lower() != "end":
        return text
    if len(text) > MAX_NAME_LENGTH:
        raise UnitError(f"point name '{show(text)}' is longer than {MAX_NAME_LENGTH} characters")
    if text.lower() == "end":
        raise UnitError("'end' cannot be a point name; it closes a directions round")
    raise UnitError(f"point name '{show(text)}' contains white space or an invisible character")


def file_number(text: str, what: str, unit: str) -> float:
    """A bare number in the file's length unit (a coordinate or observed length)."""
    try:
        return parse_number(text)
    except UnitError:
        if _WITH_UNIT.match(text):
            raise UnitError(
                f"'{show(text)}': {what} are plain numbers in the file's length unit "
                f"({unit}); leave out the unit"
            ) from None
        raise


def observed_angle(text: str, unit: str) -> float:
    """An observed angle in the file's unit (or with its own deg/gon suffix), in radians."""
    if text.lower().lstrip("+-") in _NOT_FINITE:
        parse_number(text)  # raises with the "not a finite number" sentence
    if len(text) > 64:
        # No real angle is this long, and int() refuses more than 4300 digits.
        raise UnitError(f"'{show(text)}' is too long to be an angle")
    try:
        return parse_angle(text, unit)
    except UnitError:
        if unit != "dms" and text.count(":") == 2:
            raise UnitError(
                f"'{show(text)}' is written as D:M:S, but the file's angle unit is {unit}; "
                f"declare 'units angle=dms' or write {unit}"
            ) from None
        raise


@dataclass(frozen=True, slots=True)
class QuantityRule:
    """What a standard deviation or allowance of one kind may contain."""

    subject: str  # e.g. "a distance standard deviation"
    angular: bool
    parts: frozenset[str]  # allowed besides the constant: "ppm", "per_sqrtkm", "per_setup"
    example: str
    allow_zero: bool = False


def read_quantity(text: str, rule: QuantityRule) -> Quantity:
    """A quantity with units, checked against what ``rule`` allows."""
    shown = show(text)
    try:
        value = parse_quantity(text)
    except UnitError:
        if rule.angular and (written := angle_in_sec(text)) is not None:
            raise UnitError(
                f"'{shown}': write {written} for {rule.subject} (sec for seconds of arc, or mgon)"
            ) from None
        raise
    if value.angular != rule.angular:
        written = "an angle" if value.angular else "a length"
        noun = "an angle" if rule.angular else "a length"
        raise UnitError(
            f"'{shown}' is {written}, but {rule.subject} is {noun} such as {rule.example}"
        )
    if value.ppm and "ppm" not in rule.parts:
        raise UnitError(
            f"'{shown}': a ppm part applies to distances only; "
            f"{rule.subject} is like {rule.example}"
        )
    if (value.per_sqrtkm or value.per_setup) and "per_sqrtkm" not in rule.parts:
        raise UnitError(
            f"'{shown}': /sqrtkm and /setup parts apply to leveling only; "
            f"{rule.subject} is like {rule.example}"
        )
    parts = (value.constant, value.ppm, value.per_sqrtkm, value.per_setup)
    if any(part < 0.0 for part in parts):
        raise UnitError(f"'{shown}': {rule.subject} cannot be negative")
    if not rule.allow_zero and not any(parts):
        raise UnitError(f"'{shown}': {rule.subject} must be greater than zero")
    length_range = SD_ANGLE_RANGE_RAD if value.angular else SD_LENGTH_RANGE_M
    for part, (low, high) in (
        (value.constant, length_range),
        (value.ppm, PPM_RANGE),
        (value.per_sqrtkm, SD_LENGTH_RANGE_M),
        (value.per_setup, SD_LENGTH_RANGE_M),
    ):
        if part and not low <= part <= high:
            raise UnitError(
                f"'{shown}': {rule.subject} this {'small' if part < low else 'large'} "
                f"is not plausible; check the number and its unit ({_RANGE_WORDS[value.angular]})"
            )
    return value


_RANGE_WORDS = {
    False: "lengths from 0.0000001 mm to 100 km, ppm from 0.000001 to 1000000",
    True: "angles from 0.000001 sec to 180 degrees",
}


_LEVELING_PARTS = frozenset({"per_sqrtkm", "per_setup"})
#: What the standard deviation of each kind (and ``centering``) may be made of.
SD_RULES = {
    "level": QuantityRule("a level standard deviation", False, _LEVELING_PARTS, "1.0mm/sqrtkm"),
    "distance": QuantityRule(
        "a distance standard deviation", False, frozenset({"ppm"}), "2mm+2ppm"
    ),
    "slope": QuantityRule("a slope standard deviation", False, frozenset({"ppm"}), "2mm+2ppm"),
    "angle": QuantityRule("an angle standard deviation", True, frozenset(), "1sec or 0.3mgon"),
    "direction": QuantityRule("a direction standard deviation", True, frozenset(), "1sec"),
    "azimuth": QuantityRule("an azimuth standard deviation", True, frozenset(), "2sec"),
    "zenith": QuantityRule("a zenith standard deviation", True, frozenset(), "1.5sec"),
    "baseline": QuantityRule(
        "a baseline component's standard deviation", False, frozenset(), "3mm"
    ),
    "centering": QuantityRule(
        "the centering standard deviation", False, frozenset(), "1mm", allow_zero=True
    ),
}
CONTROL_RULE = QuantityRule("a control point's standard deviation", False, frozenset(), "5mm")
MISCLOSURE_RULE = QuantityRule(
    "a leveling misclosure allowance", False, _LEVELING_PARTS, "4mm/sqrtkm"
)
RELATIVE_RULE = QuantityRule(
    "a relative precision allowance", False, frozenset({"ppm"}), "2cm+50ppm"
)


# --------------------------------------------------------------------------- messages


def show(token: str) -> str:
    """A token as it may appear in a message: invisible characters escaped, long ones cut."""
    if not token.isprintable():
        token = "".join(c if c.isprintable() else f"\\u{ord(c):04x}" for c in token)
    if len(token) > SHOW_MAX:
        token = token[: SHOW_MAX - 1] + "…"
    return token


def suggest(word: str, choices: Collection[str]) -> str:
    """``"; did you mean 'x'?"`` for the closest choice, or ``""`` if none is close."""
    # Only a short word with letters can be a typo of a keyword; this spares the
    # matcher on numbers and garbage, so error-laden files stay fast.
    if not word or len(word) > 40 or not any(c.isalpha() for c in word):
        return ""
    return _closest(word.lower(), tuple(sorted(choices)))


@functools.lru_cache(maxsize=1024)
def _closest(word: str, choices: tuple[str, ...]) -> str:
    matches = difflib.get_close_matches(word, choices, n=1, cutoff=0.6)
    return f"; did you mean '{matches[0]}'?" if matches else ""


def join_words(words: Collection[Any]) -> str:
    """``a``, ``a and b``, ``a, b and c``."""
    items = [str(word) for word in words]
    return ", ".join(items[:-1]) + " and " + items[-1] if len(items) > 1 else "".join(items)


# --------------------------------------------------------------------------- sniffing

_EXAMPLE = "'point BM-1 height=100.0 fix' or 'level BM-1 TP-1 +0.7421 len=0.35km'"


def sniff_foreign(raw: bytes, lines: list[str], keywords: Collection[str]) -> Issue | None:
    """One issue if the input is clearly something else (binary, CSV, JSON, empty), else None.

    Saying "this is not a field book" once is kinder than 500 line-by-line
    complaints about a spreadsheet.  A line counts as an attempt at a
    statement if its first word is a keyword or close to one.
    """
    if raw.startswith((b"\xff\xfe", b"\xfe\xff")):
        return _foreign(1, "", "it is saved as UTF-16 text; save it as UTF-8")
    if b"\x00" in raw[:4096]:
        return _foreign(1, "", "it holds binary data, like a spreadsheet, PDF or ZIP file")
    first: tuple[int, str, str] | None = None
    seen = 0
    for index, text in enumerate(lines):
        try:
            tokens = tokenize(text)
        except LexError:
            tokens = _split_plain(text)
        if not tokens:
            continue
        word = tokens[0].key if tokens[0].key is not None else tokens[0].value.lower()
        # Only a plain word can be a mistyped keyword: '{"points":' is not 'point'.
        if word in keywords or (word.isalpha() and suggest(word, keywords)):
            return None
        if first is None:
            first = (index + 1, tokens[0].raw, text.strip())
        seen += 1
        if seen >= SNIFF_LINES:
            break
    if first is None:
        return Issue(
            1, "", f"the file has no statements; a field book has lines such as {_EXAMPLE}"
        )
    line, token, text = first
    if text.startswith(("{", "[")):
        reason = "it looks like JSON"
    elif text.startswith("<"):
        reason = "it looks like XML or HTML"
    elif "\ufffd" in text:
        reason = "it is not UTF-8 text"
    elif "," in text or ";" in text:
        reason = "it looks like a table (CSV)"
    else:
        reason = "none of its first lines starts with a statement such as point, level or distance"
    return _foreign(line, token, reason)


def _foreign(line: int, token: str, reason: str) -> Issue:
    message = (
        f"this does not look like a field book: {reason}. A field book is plain text "
        f"with one statement per line, such as {_EXAMPLE}"
    )
    return Issue(line, show(token), message)
