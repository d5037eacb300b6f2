"""Field book text → ``Fieldbook``: every statement checked, every problem reported at once.

What is accepted, and every decision the format leaves open, is written down
for users in ``docs/fieldbook.md`` (``tests/test_manual.py`` holds the two
together).  Tokens, grammars and single values are read in
``fieldbook_lexer.py``; this module gives statements their meaning: one
small handler per statement, found through the ``_HANDLERS`` table, and a
parser object holding what is in force (units, defaults, scale, an open
directions round).

Everything produced is SI (metres, radians).  Problems are collected as
``Issue`` objects and raised together in one ``FieldbookError``.
"""

from __future__ import annotations

import difflib
import hashlib
import math
import operator
import re
from collections.abc import Callable, Iterator, Sequence
from dataclasses import dataclass, field
from datetime import date, datetime
from itertools import islice, takewhile
from operator import itemgetter
from typing import Any, TypeVar, cast

import numpy as np

from server.errors import FieldbookError
from server.fieldbook.baselines import (
    baseline_component,
    baseline_length,
    baseline_vector,
    read_baseline_scale,
    read_correlations,
    read_sd_triple,
)
from server.fieldbook.geodetic_header import (
    read_epoch,
    read_epsg,
    read_latitude,
    read_longitude,
    read_refraction,
    read_undulation,
)
from server.fieldbook.lexer import (
    CONTROL_RULE,
    DIRECTION_ENTRY,
    GRAMMARS,
    KEYWORDS,
    MAX_LENGTH_M,
    MIN_DISTANCE_M,
    MISCLOSURE_RULE,
    RELATIVE_RULE,
    SD_RULES,
    Binder,
    Grammar,
    IssueLog,
    LexError,
    Statement,
    Token,
    bounded_length,
    decode_lines,
    file_number,
    observed_angle,
    option_length,
    point_name,
    read_quantity,
    show,
    sniff_foreign,
    suggest,
    to_bytes,
    tokenize,
)
from server.fieldbook.model import (
    DEFAULT_REFRACTION,
    PRECISION_METHODS,
    SPATIAL_KINDS,
    Crs,
    DirectionRound,
    Fieldbook,
    Observation,
    PointStatement,
    RelativePair,
    TestLevels,
    TraverseTolerance,
)
from server.fieldbook.point_names import near_miss_warnings
from server.fieldbook.table import (
    FIELDS,
    NONE,
    Columns,
    ObservationRows,
    ObservationTable,
    Row,
    columns_of,
    row_of,
)
from server.units import (
    FILE_ANGLE_UNITS,
    FILE_LENGTH_UNITS,
    LENGTH_FACTORS,
    RAD_PER_DEG,
    Quantity,
    UnitError,
    parse_angular_allowance,
    parse_number,
    parse_ratio,
    plain_dms,
    wrap_2pi,
    wrap_2pi_array,
)

#: A combined grid scale factor outside this range is a unit mix-up or a typo, not a projection.
SCALE_LIMITS = (0.9, 1.1)
#: Outside this range the factor is accepted with a warning.
SCALE_USUAL = (0.995, 1.005)
#: Kinds whose centering error the model adds (not azimuths, zenith angles or leveling).
CENTERED_KINDS = frozenset({"distance", "angle", "direction", "slope", "baseline"})
#: What an observed value of ``?`` means: a planned observation, with no value yet.
PLANNED = "?"
# Exactly 180° written in gon or deg can land a rounding error past π.
_ZENITH_SLACK = 1e-12
#: Smallest significance level (alpha, snooping) whose critical values are still computable.
MIN_SIGNIFICANCE = 1e-9

T = TypeVar("T")


def parse_fieldbook(text: str | bytes, *, source: str = "") -> Fieldbook:
    """Read a field book into frozen statements with SI values.

    Parameters
    ----------
    text : str or bytes
        The whole file.  Bytes are decoded as UTF-8 line by line, so a line
        with other bytes is reported and the rest is still read.  A byte-order
        mark and LF, CRLF or CR line ends are accepted.
    source : str, optional
        File name used in error messages (``FILE:LINE: message``).

    Returns
    -------
    Fieldbook
        Header settings, points, observations (one per direction of a round)
        and rounds, in file order, with non-fatal ``warnings`` and the SHA-256
        of the raw input bytes (of its UTF-8 encoding when given a ``str``).

    Raises
    ------
    FieldbookError
        If anything is wrong.  ``issues`` lists every problem found (the first
        50, then a count of the rest), each with its line number, the offending
        token and a sentence a surveyor can act on.

    Notes
    -----
    Lengths are metres (file values times the unit factor; horizontal
    distances also times the ``scale`` in force); angles are radians, with
    horizontal angles, directions and azimuths reduced to [0, 2π).  The time
    taken grows linearly with the length of the file.

    Examples
    --------
    >>> book = parse_fieldbook("defaults level=1mm/sqrtkm\\nlevel A B +0.5 len=0.4km\\n")
    >>> book.observations[0].value, book.observations[0].length_km
    (0.5, 0.4)
    """
    raw = to_bytes(text)
    digest = hashlib.sha256(raw).hexdigest()
    lines, bad_lines = decode_lines(raw)
    foreign = sniff_foreign(raw, lines, KEYWORDS)
    if foreign is not None:
        raise FieldbookError([foreign], source)
    parser = _Parser(fast=_FAST_LINES)
    parser.run(lines, bad_lines)
    if parser.errors.count:
        raise FieldbookError(parser.errors.result(), source, count=parser.errors.count)
    table = parser.table()
    for issue in near_miss_warnings(parser.points, table):
        parser.warnings.add(issue.line, issue.token, issue.message)
    return parser.fieldbook(source, digest, table)


@dataclass(frozen=True, slots=True)
class _Default:
    """A standard deviation in force: as parsed, as written, and where."""

    sigma: Quantity | None  # None: the statement was wrong and has been reported
    text: str
    line: int


@dataclass(slots=True)
class _Round:
    """A ``directions`` round still open."""

    line: int
    at: str | None
    sigma: _Default | None
    note: str = ""
    ignored: bool = False
    flawed: bool = False
    lines: list[int] = field(default_factory=list)
    sd_missing_reported: bool = False


class _Parser:
    """What is in force while reading (units, defaults, scale, a round) and what was read."""

    def __init__(self, fast: bool = False) -> None:
        self.fast = fast
        self.errors = IssueLog("errors")
        self.warnings = IssueLog("warnings")
        self.binder = Binder(GRAMMARS, self.errors)
        self.title = ""
        self.length_unit, self.length_factor = "m", 1.0
        self.angle_unit, self.angle_unit_known = "dms", True
        self.tests = TestLevels()
        self.misclosure: Quantity | None = None
        self.relative: Quantity | None = None
        self.traverse = TraverseTolerance()
        self.defaults: dict[str, _Default] = {}
        self.centering = 0.0
        self.scale = 1.0
        self.header_lines: dict[str, int] = {}
        self.body_line: int | None = None
        self.statements = 0
        self.points: list[PointStatement] = []
        self.point_lines: dict[str, int] = {}
        #: the observations read: blocks of columns in file order (``table.FIELDS``), and
        #: after them the rows read one at a time, each the tuple of its fields
        self.blocks: list[Columns] = []
        self.rows: list[Row] = []
        self.no_run_before = 0  # lines up to here are known not to start a long run
        self.no_block_before = 0  # ... nor a long stretch of plain lines and rounds
        self.not_plain = -1  # a line known not to be a plain level or distance line (index)
        self.block_wait = _CHUNK_MIN  # lines to wait after a short stretch (doubles each time)
        self.rounds: list[DirectionRound] = []
        self.round: _Round | None = None
        self.relative_pairs: list[RelativePair] = []
        self.crs: Crs | None = None
        self.crs_written = False  # a crs line was seen, even a wrong or misplaced one
        self.geoid_undulation: float | None = None
        self.refraction = DEFAULT_REFRACTION
        self.epoch: date | datetime | None = None
        self.baseline_scale = 1.0
        self.first_spatial: tuple[int, str] | None = None  # line and keyword as written

    # ---- driving

    def run(self, lines: list[str], bad_lines: dict[int, tuple[str, str]]) -> None:
        fast = self.fast_line if self.fast else None
        runs = self.fast and not bad_lines
        index, count = 0, len(lines)
        while index < count:
            if runs and self.round is None and self.body_line is not None:
                # (the two tests save a call on each line known not to start a run)
                taken = self.fast_run(lines, index) if index >= self.no_run_before else 0
                if taken:
                    index += taken
                    self.statements += taken
                    continue
                taken = self.fast_block(lines, index) if index >= self.no_block_before else 0
                if taken:
                    index += taken
                    continue
            number = index + 1
            if index in bad_lines:
                self.error(number, *bad_lines[index])
            elif (fast is None or not fast(number, lines[index])) and not self.careful_line(
                number, lines[index]
            ):
                index += 1
                continue  # a blank line or a comment is no statement
            self.statements += 1
            index += 1
        if self.round is not None:
            at, line = self.round.at or "?", self.round.line
            self.error(
                line,
                at,
                f"the directions round at {at} on line {line} is never closed; "
                "add 'end' after its last direction",
            )
            self.close_round()
        if self.relative_pairs:
            self.check_relative_names()
        if self.first_spatial is not None and not self.crs_written:
            line, word = self.first_spatial
            self.error(
                line,
                word,
                f"'{show(word)}' is a 3D observation, and the geodetic 3D model needs a 'crs' "
                "line in the header (before the first point or observation): "
                "'crs EPSG:CODE' for the projected CRS of the coordinates (e.g. crs EPSG:32633), "
                "or 'crs local lat=LAT lon=LON' for a site grid centred near the survey",
            )

    def careful_line(self, number: int, text: str) -> bool:
        """Read one line token by token; False for a line with no statement (blank, comment)."""
        try:
            tokens = tokenize(text)
        except LexError as exc:
            self.error(number, exc.token, f"'{show(exc.token)}': {exc.message}")
            if _DEFAULTS_LINE.match(text):
                self.defaults_unread(number, _KEY_WORDS.findall(text))
            return True
        if not tokens:
            return False
        self.statement(number, tokens)
        return True

    def table(self) -> ObservationTable:
        """The observations read, as one table (the parser keeps none of them after)."""
        self.flush()
        table = ObservationTable.from_blocks(self.blocks)
        self.blocks = []
        return table

    def flush(self) -> None:
        """The rows read one at a time, as a block of columns after the blocks before."""
        if self.rows:
            self.blocks.append(columns_of(self.rows))
            self.rows = []

    def fieldbook(self, source: str, digest: str, table: ObservationTable) -> Fieldbook:
        return Fieldbook(
            source=source,
            version=1,
            title=self.title,
            length_unit=self.length_unit,
            angle_unit=self.angle_unit,
            tests=self.tests,
            misclosure_tolerance=self.misclosure,
            relative_tolerance=self.relative,
            traverse_tolerance=self.traverse,
            points=tuple(self.points),
            observations=ObservationRows(table),
            rounds=tuple(self.rounds),
            relative_pairs=tuple(self.relative_pairs),
            warnings=self.warnings.result(),
            text_sha256=digest,
            crs=self.crs,
            geoid_undulation=self.geoid_undulation,
            refraction=self.refraction,
            epoch=self.epoch,
        )

    def add(self, obs: Observation) -> None:
        """Keep an observation read by the careful path (as its row of fields)."""
        self.rows.append(row_of(obs))

    def error(self, line: int, token: str, message: str) -> None:
        self.errors.add(line, token, message)

    # ---- the fast path: the common well-formed observation lines

    def fast_line(self, line: int, text: str) -> bool:
        """Read a plain observation line or a direction of a round, if it is one.

        Plain lines: ``level``/``distance`` (``len=`` on a level), ``slope``/``zenith``
        (``hi=``/``ht=``), and ``TO VALUE`` inside a round.  True when the line was
        taken (its row appended); False, with nothing changed, whenever anything
        is unusual, so that the careful path reads the line and reports exactly
        what it always reports.  Only lines the careful path would accept without
        a word are taken here, and they give the same ``Observation``
        (``tests/test_fast_paths.py`` compares both paths field by field).
        """
        if self.round is not None:
            match = _FAST_DIRECTION.match(text)
            return match is not None and self.fast_direction(line, *match.groups())
        if self.body_line is None:
            return False
        # (fast_run may just have found that the line is not a plain one)
        match = None if line == self.not_plain + 1 else _FAST_OBSERVATION.match(text)
        if match is None:
            match = _FAST_SPATIAL.match(text)
            return match is not None and self.fast_spatial(line, *match.groups())
        kind, from_point, to, value_text, length_text, length_unit = match.groups()
        if from_point == to:
            return False
        default = self.defaults.get(kind)
        if default is None or default.sigma is None:
            return False
        sigma = default.sigma
        # as units.parse_number, file_number and bounded_length read them (the pattern
        # has checked the spelling of the numbers; an overflow to inf fails the bound)
        value = float(value_text) * self.length_factor
        if not abs(value) <= MAX_LENGTH_M:
            return False
        length_km = None
        if kind == "level":
            if sigma.per_setup:
                return False  # needs setups=
            if length_text is None:
                if sigma.per_sqrtkm:
                    return False
            else:
                factor = LENGTH_FACTORS.get(length_unit.lower())
                if factor is None:
                    return False
                length_m = float(length_text) * factor  # as parse_length and option_length
                if not MIN_DISTANCE_M <= length_m <= MAX_LENGTH_M:
                    return False
                length_km = length_m / 1000.0
            scale = 1.0
            centering = 0.0
        else:
            if length_text is not None or not value >= MIN_DISTANCE_M:
                return False
            scale = self.scale
            centering = self.centering
        self.rows.append(
            (
                line,
                kind,
                from_point,
                None,
                to,
                value * scale,
                sigma,
                centering,
                scale,
                length_km,
                None,
                None,
                None,
                None,
                False,
                "",
                value,
                False,
                None,
            )
        )
        self.statements += 1
        return True

    def fast_run(self, lines: list[str], start: int) -> int:
        """Read a long run of plain ``level``/``distance`` lines at once, from ``start``.

        The lines ``fast_line`` takes one by one, taken here a chunk at a time with
        the checks done on arrays: nothing else is read between them, so what is in
        force stays the same.  Returns how many lines were taken; the first line not
        taken (it fails a check, or is no such line) is left to ``fast_line`` and the
        careful path.  A run shorter than ``_RUN_MIN`` lines is left to ``fast_line``
        too (arrays cost more than they save there).
        """
        if start < self.no_run_before:
            return 0
        if _FAST_OBSERVATION.match(lines[start]) is None:
            # most often the case (a slope or zenith line, a point): no chunk is worth making
            self.no_run_before = start + 1
            self.not_plain = start
            return 0
        taken, size = 0, _RUN_MIN
        while True:
            found = _plain_groups(lines[start : start + size])
            if taken == 0 and len(found) < _RUN_MIN:
                self.no_run_before = start + len(found) + 1
                return 0
            count = self.take_run(start, found) if found else 0
            taken += count
            if count < size:
                return taken
            start += count
            size = min(4 * size, _RUN_MAX)

    def take_run(self, start: int, groups: list[tuple[str, ...]]) -> int:
        """The rows of the matched lines (their groups) from line ``start + 1`` up to the
        first that fails one of ``fast_line``'s checks; how many were taken."""
        n = len(groups)
        kind, frm, to, value_text, length_text, length_unit = (
            list(map(itemgetter(k), groups)) for k in range(6)
        )
        bad, level, value, length_km, sigmas = self.plain_checks(
            kind, frm, to, value_text, length_text, length_unit
        )
        taken = int(np.argmax(bad)) if bad.any() else n
        if not taken:
            return 0
        level, value, length_km = level[:taken], value[:taken], length_km[:taken]
        scale = np.where(level, 1.0, self.scale)
        none = [None] * taken
        self.flush()
        self.blocks.append(
            [
                np.arange(start + 1, start + 1 + taken, dtype=np.int64),
                kind[:taken],
                frm[:taken],
                none,
                to[:taken],
                value * scale,
                list(map(sigmas.__getitem__, kind[:taken])),
                np.where(level, 0.0, self.centering),
                scale,
                length_km,  # NaN where there is none, as the table has it
                *_absent_numbers(taken),
                np.zeros(taken, bool),
                [""] * taken,
                value,
                np.zeros(taken, bool),
                none,
            ]
        )
        return taken

    def fast_block(self, lines: list[str], start: int) -> int:
        """Read a long stretch of plain lines at once, from ``start``: ``level``/``distance``
        lines and whole directions rounds (``directions AT``, ``TO D:M:S`` lines, ``end``),
        with blank and comment lines among them.

        The lines ``fast_line`` and the careful path read one by one, taken here a chunk
        at a time with the checks done on arrays: nothing between them changes what is in
        force.  Returns how many lines were taken; the stretch ends before the first line
        that fails a check (or before the round holding it), which is left to ``fast_line``
        and the careful path.  After a stretch shorter than ``_RUN_MIN`` lines, the next try
        waits for a 'directions' or plain line after the failing one, and ``block_wait``
        lines at least, twice as many after each short stretch in a row (arrays cost more
        than they save on a few lines).
        """
        if start < self.no_block_before:
            return 0
        first, taken, size = start, 0, _CHUNK_MIN
        while True:
            chunk = lines[start : start + size]
            count, resume = self.take_block(chunk, start)
            taken += count
            if resume is not None or start + len(chunk) >= len(lines):
                break
            start += count
            size = min(4 * size, _RUN_MAX)
            rest = len(lines) - start
            if rest < 2 * size:  # one chunk to the end rather than two (each has a fixed cost)
                size = min(rest, _RUN_MAX)
        if taken < _RUN_MIN:
            # wait ever longer after each short stretch: where rounds alternate with lines
            # read otherwise, chunks would cost more than they save
            self.no_block_before = max(start + (resume or 0), first + self.block_wait)
            self.block_wait = min(2 * self.block_wait, _RUN_MAX)
        else:
            self.block_wait = _CHUNK_MIN
        return taken

    def take_block(self, chunk: list[str], start: int) -> tuple[int, int | None]:
        """How many of the ``chunk`` lines (the first is line ``start + 1``) are read at once,
        their observations and rounds kept; and, if a line failed a check, where in the
        chunk the next stretch might start (the next 'directions' or plain line after it;
        None: the chunk ended, perhaps inside a round, which is left to the next chunk)."""
        n = len(chunk)
        found = _BLOCK_LINE.findall("\n".join(chunk))
        if len(found) != n:  # every line matches one alternative; this is a safeguard
            return 0, n
        others = list(map(bool, map(_OTHER, found)))
        if True in others[:_RUN_MIN]:  # a line read otherwise comes soon: not worth arrays
            return 0, others.index(True) + 1
        found, others = _up_to_other(found, others)
        n = len(found)
        (
            opens,
            round_at,
            ends,
            kind,
            frm,
            to,
            value_text,
            length_text,
            length_unit,
            target,
            sign,
            degrees,
            minutes,
            seconds,
            _other,
        ) = zip(*found)
        is_d = np.fromiter(map(bool, opens), bool, n)
        is_e = np.fromiter(map(bool, ends), bool, n)
        is_o = np.fromiter(map(bool, kind), bool, n)
        is_n = np.fromiter(map(bool, target), bool, n)
        # inside a round after the line: 1, else 0 (anything else: 'directions' or 'end'
        # out of place)
        step = is_d.astype(np.int64) - is_e
        depth = np.cumsum(step)
        bad = np.array(others, dtype=bool)
        bad |= (depth < 0) | (depth > 1) | (is_n & (depth != 1)) | (is_o & (depth != 0))
        d_rows = np.flatnonzero(is_d)
        n_rows = np.flatnonzero(is_n)
        o_rows = np.flatnonzero(is_o)
        # the directions of the rounds
        round_of = np.cumsum(is_d)[n_rows] - 1  # index among the chunk's rounds; −1: none
        ats = _picked(round_at, d_rows)
        sigma = self.defaults.get("direction")
        if n_rows.size:
            to_n = _picked(target, n_rows)
            at_n = _picked(ats, np.maximum(round_of, 0)) if ats else [""] * n_rows.size
            bad_n = round_of < 0
            if sigma is None or sigma.sigma is None or not self.dms_known:
                bad_n[:] = True
            bad_n |= np.fromiter(map(operator.eq, to_n, at_n), bool, n_rows.size)
            bad_n |= np.fromiter(map(_KEYWORD, map(str.lower, to_n)), bool, n_rows.size)
            # as units.parse_dms reads them
            deg = np.array(list(map(float, _picked(degrees, n_rows))), dtype=float)
            mins = np.array(list(map(float, _picked(minutes, n_rows))), dtype=float)
            secs = np.array(list(map(float, _picked(seconds, n_rows))), dtype=float)
            bad_n |= ~((mins < 60.0) & (secs < 60.0))
            booked = (deg + mins / 60.0 + secs / 3600.0) * RAD_PER_DEG
            negative = np.fromiter(map(bool, _picked(sign, n_rows)), bool, n_rows.size)
            booked = np.where(negative, -booked, booked)
            bad[n_rows] |= bad_n
            # a round with no direction or only one is reported: the careful path does that
            inside = round_of[(round_of >= 0) & (depth[n_rows] == 1)]
            entries = np.bincount(inside, minlength=d_rows.size)
        else:
            entries = np.zeros(d_rows.size, np.int64)
        short = entries < 2
        if short.size and depth[-1] == 1:
            short[-1] = False  # the chunk ends inside this round: its count is not known yet
        bad[d_rows[short]] = True
        # the plain level and distance lines
        if o_rows.size:
            plain = _picked(kind, o_rows), _picked(frm, o_rows), _picked(to, o_rows)
            lengths = _picked(length_text, o_rows), _picked(length_unit, o_rows)
            checked = self.plain_checks(*plain, _picked(value_text, o_rows), *lengths)
            bad[o_rows] |= checked[0]
        # the first line failing a check ends the stretch, before its round if it is in one
        first = int(np.argmax(bad)) if bad.any() else n
        within = (depth[first] - step[first]) if first < n else depth[-1]
        end = first if not within else int(d_rows[np.searchsorted(d_rows, first) - 1])
        resume = None
        if first < n:
            after = np.flatnonzero((is_d | is_o)[first + 1 :])
            resume = first + 1 + int(after[0]) if after.size else n
        if end == 0:
            return 0, resume
        rows_n, rows_o = n_rows < end, o_rows < end
        kept_n, kept_o = n_rows[rows_n], o_rows[rows_o]
        rows = np.sort(np.concatenate((kept_n, kept_o)))
        m = rows.size
        if m:
            pos_n, pos_o = np.searchsorted(rows, kept_n), np.searchsorted(rows, kept_o)
            k_n, k_o = kept_n.size, kept_o.size

            def merged(for_n: object, for_o: object) -> list[Any]:
                column: np.ndarray = np.empty(m, object)
                column[pos_n], column[pos_o] = for_n, for_o
                return column.tolist()

            def numbers(for_n: object, for_o: object) -> np.ndarray:
                column: np.ndarray = np.empty(m)
                column[pos_n], column[pos_o] = for_n, for_o
                return column

            if k_n:
                at_n, to_n = at_n[:k_n], to_n[:k_n]
                booked = booked[:k_n]
                value_n = wrap_2pi_array(booked)
                round_lines = (d_rows[round_of[:k_n]] + start + 1).tolist()
            else:
                at_n = to_n = round_lines = []
                booked = value_n = np.zeros(0)
            if k_o:
                level, value, length_km, sigmas = checked[1:]
                kind_o, frm_o, to_o = (names[:k_o] for names in plain)
                level, value, length_km = level[:k_o], value[:k_o], length_km[:k_o]
                scale = np.where(level, 1.0, self.scale)
                sigma_o = list(map(sigmas.__getitem__, kind_o))
            else:
                kind_o = frm_o = to_o = sigma_o = []
                level = np.zeros(0, bool)
                value = length_km = scale = np.zeros(0)
            none = [None] * m
            self.flush()
            self.blocks.append(
                [
                    rows + (start + 1),
                    merged(_DIRECTION, kind_o),
                    merged(at_n, frm_o),
                    merged(at_n, None),
                    merged(to_n, to_o),
                    numbers(value_n, value * scale),
                    merged(sigma.sigma if k_n else None, sigma_o),  # type: ignore[union-attr]
                    numbers(self.centering, np.where(level, 0.0, self.centering)),
                    numbers(1.0, scale),
                    numbers(math.nan, length_km),  # NaN where there is none
                    *_absent_numbers(m)[:3],
                    _round_lines(m, pos_n, round_lines),
                    np.zeros(m, bool),
                    [""] * m,
                    numbers(booked, value),
                    np.zeros(m, bool),
                    none,
                ]
            )
        kept_d = d_rows[d_rows < end]
        if kept_d.size:
            lines = iter((kept_n + (start + 1)).tolist())
            self.rounds.extend(
                map(
                    DirectionRound,
                    (kept_d + (start + 1)).tolist(),
                    ats[: kept_d.size],
                    [tuple(islice(lines, count)) for count in entries[: kept_d.size].tolist()],
                )
            )
        self.statements += m + 2 * kept_d.size
        return end, resume

    @property
    def dms_known(self) -> bool:
        return self.angle_unit == "dms" and self.angle_unit_known

    def plain_checks(
        self,
        kind: list[str],
        frm: list[str],
        to: list[str],
        value_text: list[str],
        length_text: list[str],
        length_unit: list[str],
    ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray, dict[str, Quantity]]:
        """``fast_line``'s checks on plain ``level``/``distance`` lines, done on arrays: the
        lines failing one, which are level lines, the values (file unit times its factor),
        ``len=`` in km (NaN where not given), and the standard deviation of each kind.
        An empty or None ``length_text`` means no ``len=``."""
        n = len(kind)
        bad = np.fromiter(map(operator.eq, frm, to), bool, n)
        level = np.fromiter(map(_LEVEL.__eq__, kind), bool, n)
        has_length = np.fromiter(map(bool, length_text), bool, n)
        # as units.parse_number, file_number and bounded_length read them (an overflow to
        # inf fails the bound)
        value = np.array(list(map(float, value_text)), dtype=float) * self.length_factor
        bad |= ~(np.abs(value) <= MAX_LENGTH_M)
        sigmas: dict[str, Quantity] = {}
        for name, rows in ((_LEVEL, level), ("distance", ~level)):
            default = self.defaults.get(name)
            if default is None or default.sigma is None:
                bad |= rows
            else:
                sigmas[name] = default.sigma
        level_sigma = sigmas.get(_LEVEL)
        if level_sigma is not None and level_sigma.per_setup:
            bad |= level  # needs setups=
        elif level_sigma is not None and level_sigma.per_sqrtkm:
            bad |= level & ~has_length
        bad |= ~level & (has_length | ~(value >= MIN_DISTANCE_M))
        length_km = np.full(n, np.nan)
        rows = np.flatnonzero(level & has_length)
        if rows.size:
            units, texts = _picked(length_unit, rows), _picked(length_text, rows)
            # an unknown unit's factor is None, NaN in the array: it fails the bounds
            factors = np.array(list(map(LENGTH_FACTORS.get, map(str.lower, units))), dtype=float)
            numbers = np.array(list(map(float, texts)), dtype=float)
            length_m = numbers * factors  # as parse_length and option_length
            bad[rows] |= ~((length_m >= MIN_DISTANCE_M) & (length_m <= MAX_LENGTH_M))
            length_km[rows] = length_m / 1000.0
        return bad, level, value, length_km, sigmas

    def fast_spatial(
        self,
        line: int,
        kind: str,
        from_point: str,
        to: str,
        value_text: str,
        *heights: str | None,
    ) -> bool:
        """``slope``/``zenith FROM TO VALUE [hi=H] [ht=H]`` after the first 3D line (see
        ``fast_line``; the first one goes the careful way, which notes it for the crs check)."""
        if from_point == to or self.first_spatial is None:
            return False
        default = self.defaults.get(kind)
        if default is None or default.sigma is None:
            return False
        options: dict[str, float] = {}
        for key, number, unit in (heights[0:3], heights[3:6]):
            if key is None:
                continue
            factor = LENGTH_FACTORS.get(unit.lower())  # type: ignore[union-attr]
            if factor is None or key in options:
                return False  # a wrong unit, or an option given twice
            height = float(number) * factor  # type: ignore[arg-type]  # as option_length
            if not abs(height) <= MAX_LENGTH_M:
                return False
            options[key] = height
        if kind == "slope":
            if _FAST_NUMBER.match(value_text) is None:
                return False
            value = float(value_text) * self.length_factor  # as read_distance
            if not MIN_DISTANCE_M <= value <= MAX_LENGTH_M:
                return False
            centering = self.centering
        else:
            if not self.angle_unit_known:
                return False
            angle = self.fast_angle(value_text)
            if angle is None or not -_ZENITH_SLACK <= angle <= math.pi + _ZENITH_SLACK:
                return False
            value = min(max(angle, 0.0), math.pi)  # as read_zenith
            centering = 0.0
        self.rows.append(
            (
                line,
                kind,
                from_point,
                None,
                to,
                value,
                default.sigma,
                centering,
                1.0,
                None,
                None,
                options.get("hi"),
                options.get("ht"),
                None,
                False,
                "",
                value,
                False,
                None,
            )
        )
        self.statements += 1
        return True

    def fast_angle(self, text: str) -> float | None:
        """An observed angle as ``observed_angle`` reads it; None where it refuses it."""
        if self.angle_unit == "dms" and len(text) <= _LONGEST_ANGLE:
            value = plain_dms(text)  # the common case, without the suffix and overflow tests
            if value is not None:
                return value
        try:
            return observed_angle(text, self.angle_unit)
        except UnitError:
            return None

    def fast_direction(self, line: int, to: str, value_text: str) -> bool:
        """``TO D:M:S`` inside a round with its standard deviation in force (see ``fast_line``)."""
        round_ = self.round
        assert round_ is not None
        at = round_.at
        if at is None or to == at or to.lower() in GRAMMARS or not self.angle_unit_known:
            return False
        sigma = round_.sigma or self.defaults.get("direction")
        if sigma is None or sigma.sigma is None:
            return False
        booked = self.fast_angle(value_text)
        if booked is None:
            return False
        round_.lines.append(line)
        self.rows.append(
            (
                line,
                "direction",
                at,
                at,
                to,
                wrap_2pi(booked),
                sigma.sigma,
                self.centering,
                1.0,
                None,
                None,
                None,
                None,
                round_.line,
                round_.ignored,
                round_.note,
                booked,
                False,
                None,
            )
        )
        self.statements += 1
        return True

    def statement(self, line: int, tokens: list[Token]) -> None:
        first = tokens[0]
        word = first.value.lower() if first.key is None and not first.quoted else ""
        if self.round is not None:
            if word == "end":
                self.binder.bind(line, first.raw, GRAMMARS["end"], tokens[1:])
                self.close_round()
                return
            if word not in GRAMMARS:
                self.direction(line, tokens)
                return
            self.error(
                line,
                first.raw,
                f"'{show(first.raw)}' is a statement, but the directions round at "
                f"{self.round.at or '?'} on line {self.round.line} is not closed; "
                "put 'end' on the line before this one",
            )
            self.close_round()
        grammar = GRAMMARS.get(word)
        if grammar is None:
            name = first.key if first.key is not None else first.value
            hint = "" if self.errors.full else suggest(name, KEYWORDS)
            hint = hint or (
                "; a line starts with a keyword such as point, level, distance or directions"
            )
            self.error(line, first.raw, f"'{show(first.raw)}' is not a statement{hint}")
            return
        if word == "crs":
            self.crs_written = True
        elif word in SPATIAL_KINDS and self.first_spatial is None:
            self.first_spatial = (line, first.raw)
        # Body lines after the first need no placement check; skipping the call saves time.
        needs_check = grammar.section != "body" or self.body_line is None
        if needs_check and not self.placement_allows(line, word, first.raw, grammar):
            return
        st = self.binder.bind(line, first.raw, grammar, tokens[1:])
        if st is not None:
            _HANDLERS[word](self, st)
        elif word == "directions":
            # Still swallow the round's lines, so they are not read as unknown statements.
            self.round = _Round(line, None, None, flawed=True)
        if word == "defaults" and (st is None or st.flawed):
            self.defaults_unread(line, [t.key or t.value for t in tokens[1:]])

    def placement_allows(self, line: int, word: str, raw: str, grammar: Grammar) -> bool:
        """Header statements once and before the body; ``fieldbook`` first of all."""
        if grammar.section == "body":
            self.body_line = self.body_line or line
            return True
        if grammar.section != "header":
            return True
        earlier = self.header_lines.setdefault(word, line)
        if earlier != line:
            self.error(
                line, raw, f"'{word}' is already given on line {earlier}; it may appear once"
            )
        elif self.body_line is not None:
            self.error(
                line,
                raw,
                f"'{word}' must come before the first point or observation (line {self.body_line})",
            )
        elif word == "fieldbook" and self.statements:
            self.error(line, raw, "'fieldbook' must be the first statement of the file")
        else:
            return True
        return False

    def read(
        self, st: Statement, token: Token, reader: Callable[..., T], *args: object
    ) -> T | None:
        """``reader(token.value, *args)``, or None after reporting its ``UnitError``."""
        try:
            return reader(token.value, *args)
        except UnitError as exc:
            self.error(st.line, token.raw, str(exc))
            return None

    def option(self, st: Statement, key: str, reader: Callable[..., T], *args: object) -> T | None:
        token = st.options.get(key)
        return None if token is None else self.read(st, token, reader, *args)

    def length(self, st: Statement, token: Token, what: str) -> float | None:
        """A coordinate or observed length in the file's unit, in metres."""
        value = self.read(st, token, file_number, what, self.length_unit)
        if value is None:
            return None
        return self.read(st, token, bounded_length, value * self.length_factor)

    def angle(self, st: Statement, token: Token) -> float | None:
        if not self.angle_unit_known:
            return None  # the 'units' line is wrong; one error there is enough
        return self.read(st, token, observed_angle, self.angle_unit)

    def report_empty(self, st: Statement) -> None:
        if not st.flawed:
            grammar = GRAMMARS[st.word.lower()]
            self.error(st.line, st.word, f"{grammar.name} needs {grammar.hint}")

    # ---- header and settings

    def version(self, st: Statement) -> None:
        version = _whole_number(st.values[0].value)
        if version == 1:
            return
        if version is not None:
            message = (
                f"field book format version {version} is not supported; "
                "this program reads version 1"
            )
        else:
            message = f"'{show(st.values[0].value)}' is not a format version; write 'fieldbook 1'"
        self.error(st.line, st.values[0].raw, message)

    def set_title(self, st: Statement) -> None:
        self.title = st.values[0].value

    def units(self, st: Statement) -> None:
        if not st.options:
            self.report_empty(st)
        if (token := st.options.get("length")) is not None:
            if (unit := token.value.lower()) in FILE_LENGTH_UNITS:
                self.length_unit, self.length_factor = unit, LENGTH_FACTORS[unit]
            else:
                self.error(
                    st.line,
                    token.raw,
                    f"'{show(token.value)}' is not a length unit of a field book; use m, "
                    "ft (international foot, 0.3048 m) or usft (US survey foot, 1200/3937 m)",
                )
        if (token := st.options.get("angle")) is not None:
            if (unit := token.value.lower()) in FILE_ANGLE_UNITS:
                self.angle_unit = unit
            else:
                self.angle_unit_known = False
                self.error(
                    st.line,
                    token.raw,
                    f"'{show(token.value)}' is not an angle unit of a field book; use dms "
                    "(degrees:minutes:seconds), deg (decimal degrees) or gon",
                )

    def set_tests(self, st: Statement) -> None:
        if not st.options:
            self.report_empty(st)
        levels: dict[str, float | str] = {}
        for key, token in st.options.items():
            if key == "precision":
                if (method := self.precision_method(st, token)) is not None:
                    levels[key] = method
                continue
            value = self.read(st, token, parse_number)
            if value is not None and not 0.0 < value < 1.0:
                self.error(
                    st.line,
                    token.raw,
                    f"'{show(token.raw)}': {key} is a probability, strictly between 0 and 1",
                )
            elif value is not None and key in ("alpha", "snooping") and value < MIN_SIGNIFICANCE:
                self.error(
                    st.line,
                    token.raw,
                    f"'{show(token.raw)}': a significance level below {MIN_SIGNIFICANCE:g} "
                    "cannot be tested; the usual values are 0.05 (alpha) and 0.001 (snooping)",
                )
            elif value is not None:
                levels[key] = value
        self.tests = TestLevels(**levels)  # type: ignore[arg-type]

    def precision_method(self, st: Statement, token: Token) -> str | None:
        """``precision=`` names how precisions are scaled; any case is accepted."""
        method = token.value.lower()
        if method in PRECISION_METHODS:
            return method
        self.error(
            st.line,
            token.raw,
            f"'{show(token.value)}' is not a precision scaling{suggest(method, PRECISION_METHODS)} "
            "(precision= takes posterior: by the a posteriori variance factor, prior: by the "
            "a priori one, or larger: by the larger of the two)",
        )
        return None

    def tolerance(self, st: Statement) -> None:
        if not st.options:
            self.report_empty(st)
        self.misclosure = self.option(st, "misclosure", read_quantity, MISCLOSURE_RULE)
        self.relative = self.option(st, "relative", read_quantity, RELATIVE_RULE)
        self.traverse = TraverseTolerance(
            self.option(st, "angular", parse_angular_allowance),
            self.option(st, "ratio", parse_ratio),
        )

    def set_crs(self, st: Statement) -> None:
        """``crs EPSG:CODE`` or ``crs local lat=LAT lon=LON [east=E0] [north=N0]``."""
        before = self.errors.count
        token = st.values[0]
        if token.value.lower() != "local":
            code = self.read(st, token, read_epsg)
            for key, option in st.options.items():
                self.error(
                    st.line,
                    option.raw,
                    f"'{key}=' belongs to a site grid (crs local lat=LAT lon=LON); "
                    f"crs EPSG:CODE takes nothing after the code",
                )
            if code is not None and self.errors.count == before:
                self.crs = Crs(st.line, f"EPSG:{code}", epsg=code)
            return
        missing = [key for key in ("lat", "lon") if key not in st.options]
        if missing:
            self.error(
                st.line,
                token.raw,
                f"crs local needs {' and '.join(k + '=' for k in missing)}: the latitude and "
                "longitude of the grid's origin in the file's angle unit, south and west "
                "negative, e.g. crs local lat=47:03:12.5 lon=-122:54:08.1",
            )
        latitude = longitude = None
        if self.angle_unit_known:
            latitude = self.option(st, "lat", read_latitude, self.angle_unit)
            longitude = self.option(st, "lon", read_longitude, self.angle_unit)
        east = self.option(st, "east", option_length)
        north = self.option(st, "north", option_length)
        if self.errors.count != before or latitude is None or longitude is None:
            return
        words = " ".join(
            f"{key}={st.options[key].value}"
            for key in ("lat", "lon", "east", "north")
            if key in st.options
        )
        self.crs = Crs(
            st.line, f"local {words}", None, latitude, longitude, east or 0.0, north or 0.0
        )

    def set_geoid(self, st: Statement) -> None:
        if (token := st.options.get("undulation")) is None:
            self.report_empty(st)
            return
        self.geoid_undulation = self.read(st, token, read_undulation)

    def set_refraction(self, st: Statement) -> None:
        if (token := st.options.get("k")) is None:
            self.report_empty(st)
            return
        k = self.read(st, token, read_refraction)
        self.refraction = self.refraction if k is None else k

    def set_epoch(self, st: Statement) -> None:
        self.epoch = self.read(st, st.values[0], read_epoch)

    def set_defaults(self, st: Statement) -> None:
        """Change the defaults of the kinds named; the others stay in force."""
        if not st.options:
            self.report_empty(st)
        for key, token in st.options.items():
            if key == "baseline" and "," in token.value:
                self.error(
                    st.line,
                    token.raw,
                    f"'{show(token.raw)}': defaults baseline= takes one length, used for each "
                    "of DX, DY and DZ; three different ones go on the baseline line as "
                    "sd=SX,SY,SZ",
                )
                self.defaults[key] = _Default(None, token.value, st.line)
                continue
            sigma = self.read(st, token, read_quantity, SD_RULES[key])
            if key == "centering":
                self.centering = sigma.constant if sigma is not None else self.centering
            else:
                # A wrong default stays as None so its observations do not repeat the error.
                self.defaults[key] = _Default(sigma, token.value, st.line)

    def defaults_unread(self, line: int, words: list[str]) -> None:
        """Kinds a wrong ``defaults`` line meant to set, marked as reported (see ``set_defaults``).

        The line's own error is the root cause; the observations after it would otherwise
        each say that they have no standard deviation.  A misspelt kind counts as the kind
        it is closest to.
        """
        for written in words:
            word = written.lower()
            kind = (
                word
                if word in _SD_KINDS
                else next(iter(difflib.get_close_matches(word, _SD_KINDS, n=1, cutoff=0.75)), None)
            )
            default = self.defaults.get(kind) if kind else None
            if kind and (default is None or default.line != line):
                self.defaults[kind] = _Default(None, word, line)

    def set_scale(self, st: Statement) -> None:
        if not st.options:
            self.report_empty(st)
            return
        if (token := st.options.get("baseline")) is not None:
            factor = self.read(st, token, read_baseline_scale)
            self.baseline_scale = self.baseline_scale if factor is None else factor
        token = st.options.get("factor")
        if token is None:
            return
        factor = self.read(st, token, parse_number)
        if factor is None:
            return
        (low, high), (usual_low, usual_high) = SCALE_LIMITS, SCALE_USUAL
        if not low <= factor <= high:
            self.error(
                st.line,
                token.raw,
                f"'{show(token.raw)}': a combined grid scale factor must lie between {low} and "
                f"{high} (real ones differ from 1 by a few hundred ppm); "
                "is this a unit conversion?",
            )
            return
        if not usual_low <= factor <= usual_high:
            self.warnings.add(
                st.line,
                token.raw,
                f"scale factor {factor} differs from 1 by more than 0.5%; check that it is "
                "the combined grid scale factor",
            )
        self.scale = factor

    # ---- points

    def point(self, st: Statement) -> None:
        before = self.errors.count
        token = st.values[0]
        name = self.read(st, token, point_name)
        if name is not None:
            earlier = self.point_lines.setdefault(name, st.line)
            if earlier != st.line:
                self.error(
                    st.line, token.raw, f"point {name} is already declared on line {earlier}"
                )
        label = name or show(token.value)
        east, north, height = (
            None if (t := st.options.get(key)) is None else self.length(st, t, "coordinates")
            for key in ("east", "north", "height")
        )
        given = {"h"} if "height" in st.options else set()
        if "east" in st.options and "north" in st.options:
            given.add("en")
        elif "east" in st.options or "north" in st.options:
            has, lacks = ("east", "north") if "east" in st.options else ("north", "east")
            self.error(
                st.line,
                st.options[has].raw,
                f"point {label} has {has}= but no {lacks}=; eastings and northings go together",
            )
        latitude, longitude = self.point_lat_lon(st, label, given)
        geoid = self.option(st, "geoid", read_undulation)
        fixed = self.point_fixed(st, label, given)
        weights = self.point_weights(st, label, given, fixed)
        if self.errors.count != before or name is None:
            return
        self.points.append(
            PointStatement(
                line=st.line,
                name=name,
                east=east,
                north=north,
                height=height,
                fixed=_components(fixed),
                weighted=_components(set(weights)),
                sd_en=weights.get("en"),
                sd_h=weights.get("h"),
                note=st.text("note"),
                latitude=latitude,
                longitude=longitude,
                geoid=geoid,
            )
        )

    def point_lat_lon(
        self, st: Statement, label: str, given: set[str]
    ) -> tuple[float | None, float | None]:
        """``lat=``/``lon=`` in place of ``east=``/``north=``: the horizontal position, radians."""
        lat, lon = st.options.get("lat"), st.options.get("lon")
        if lat is None and lon is None:
            return None, None
        first = lat or lon
        assert first is not None
        given.add("en")  # meant as the horizontal position: no follow-on 'fix' complaints
        if "east" in st.options or "north" in st.options:
            message = (
                f"point {label} has both lat=/lon= and east=/north=; give its position one way only"
            )
            self.error(st.line, first.raw, message)
            return None, None
        if lat is None or lon is None:
            has, lacks = ("lat", "lon") if lat is not None else ("lon", "lat")
            message = (
                f"point {label} has {has}= but no {lacks}=; latitude and longitude go together"
            )
            self.error(st.line, first.raw, message)
            return None, None
        if not self.crs_written:
            self.error(
                st.line,
                first.raw,
                f"point {label} is given by lat= and lon=, which need a 'crs' line in the header "
                "to place it on the grid: crs EPSG:CODE or crs local lat=LAT lon=LON",
            )
            return None, None
        if not self.angle_unit_known:
            return None, None  # the 'units' line is wrong; one error there is enough
        return (
            self.read(st, lat, read_latitude, self.angle_unit),
            self.read(st, lon, read_longitude, self.angle_unit),
        )

    def point_fixed(self, st: Statement, label: str, given: set[str]) -> set[str]:
        """Components held fixed: ``fix`` holds every given one, ``fix=`` names them."""
        token = st.options.get("fix")
        if "fix" in st.flags:
            if token is not None:
                self.error(st.line, token.raw, "give either 'fix' or 'fix=...', not both")
            elif not given:
                message = f"'fix' has nothing to hold: point {label} has no coordinates"
                self.error(st.line, "fix", message)
            return set(given)
        if token is None:
            return set()
        choice = token.value.lower()
        if choice not in ("en", "h", "enh"):
            hint = suggest(choice, ("en", "h", "enh"))
            self.error(st.line, token.raw, f"'{show(token.raw)}': fix= takes en, h or enh{hint}")
            return set()
        wanted = {"en", "h"} if choice == "enh" else {choice}
        for component in sorted(wanted - given):
            message = f"'{show(token.raw)}' needs {_KEYS[component]} on point {label}"
            self.error(st.line, token.raw, message)
        return wanted & given

    def point_weights(
        self, st: Statement, label: str, given: set[str], fixed: set[str]
    ) -> dict[str, float]:
        """Weighted control by component: ``sd=`` for every free given one, or sd_en/sd_h."""
        sd = st.options.get("sd")
        if sd is not None:
            free = given - fixed
            if "sd_en" in st.options or "sd_h" in st.options:
                self.error(st.line, sd.raw, "give either sd= or sd_en=/sd_h=, not both")
            elif not free:
                why = (
                    "it has no coordinates"
                    if not given
                    else "every given component is fixed, and none can be both fixed and weighted"
                )
                message = f"'{show(sd.raw)}' has nothing to weight on point {label}: {why}"
                self.error(st.line, sd.raw, message)
            elif (value := self.read(st, sd, read_quantity, CONTROL_RULE)) is not None:
                return dict.fromkeys(free, value.constant)
            return {}
        weights = {}
        for component, key in (("en", "sd_en"), ("h", "sd_h")):
            if (token := st.options.get(key)) is None:
                continue
            value = self.read(st, token, read_quantity, CONTROL_RULE)
            if component not in given:
                message = f"'{show(token.raw)}' needs {_KEYS[component]} on point {label}"
                self.error(st.line, token.raw, message)
            elif component in fixed:
                message = f"the {_NAMES[component]} of {label} is fixed; it cannot also be weighted"
                self.error(st.line, token.raw, message)
            elif value is not None:
                weights[component] = value.constant
        return weights

    # ---- observations

    def observation(self, st: Statement) -> None:
        """``level``, ``distance``, ``angle``, ``azimuth``, ``slope`` and ``zenith``."""
        before = self.errors.count
        kind = st.word.lower()
        *point_tokens, value_token = st.values
        names = [self.read(st, token, point_name) for token in point_tokens]
        self.check_distinct(st, kind, names)
        planned = _planned(value_token)
        booked: float | None
        value: float | None
        if planned:
            booked = value = math.nan
        else:
            booked = _VALUE_READERS[kind](self, st, value_token)
            # horizontal angles are used in [0, 2π); the booked value keeps what was written
            value = wrap_2pi(booked) if booked is not None and kind in _WRAPPED_KINDS else booked
        sigma = self.sigma(st, kind)
        length_km = setups = None
        if kind == "level":
            length_km, setups = self.level_options(st, sigma)
        hi = self.option(st, "hi", option_length)
        ht = self.option(st, "ht", option_length)
        if sigma is None:
            self.report_missing_sigma(st, kind, "sd=")
        if self.errors.count != before or sigma is None or sigma.sigma is None:
            return
        if value is None or None in names:
            return  # only after an error reported elsewhere (a wrong 'units angle=')
        scale = self.scale if kind == "distance" else 1.0
        if not planned:
            value *= scale
        self.add(
            Observation(
                line=st.line,
                kind=kind,
                from_point=names[0],  # type: ignore[arg-type]  # None ruled out above
                at=names[1] if kind == "angle" else None,
                to=names[-1],  # type: ignore[arg-type]
                value=value,
                sigma=sigma.sigma,
                centering=self.centering if kind in CENTERED_KINDS else 0.0,
                scale=scale,
                length_km=length_km,
                setups=setups,
                instrument_height=hi,
                target_height=ht,
                ignored="ignore" in st.flags,
                note=st.text("note"),
                booked=booked,
                planned=planned,
            )
        )

    def baseline(self, st: Statement) -> None:
        """``baseline FROM TO DX DY DZ [sd=SX,SY,SZ] [corr=RXY,RXZ,RYZ]``: one 3-row observation."""
        before = self.errors.count
        names = [self.read(st, token, point_name) for token in st.values[:2]]
        self.check_distinct(st, "baseline", names)
        components = self.baseline_components(st)
        sd = self.baseline_sd(st)
        correlations = (0.0, 0.0, 0.0)
        if "corr" in st.options:
            correlations = self.option(st, "corr", read_correlations)  # type: ignore[assignment]
        if self.errors.count != before or sd is None or components is None:
            return
        if correlations is None or names[0] is None or names[1] is None:
            return
        vector = baseline_vector(components, sd, correlations, self.baseline_scale)
        planned = math.isnan(components[0])
        rms = math.sqrt(sum(vector.covariance[i][i] for i in range(3)) / 3.0)
        self.add(
            Observation(
                line=st.line,
                kind="baseline",
                from_point=names[0],
                at=None,
                to=names[1],
                value=math.nan if planned else math.sqrt(sum(c * c for c in components)),
                sigma=Quantity(constant=rms),
                centering=self.centering,
                ignored="ignore" in st.flags,
                note=st.text("note"),
                booked=math.nan if planned else None,
                planned=planned,
                baseline=vector,
            )
        )

    def baseline_components(self, st: Statement) -> tuple[float, float, float] | None:
        """DX, DY, DZ in metres; NaN for all three of a planned baseline (``? ? ?``)."""
        tokens = st.values[2:]
        planned = [_planned(token) for token in tokens]
        if all(planned):
            return math.nan, math.nan, math.nan
        if any(planned):
            token = tokens[planned.index(True)]
            message = (
                "a planned baseline has '?' for all three components (DX DY DZ as ? ? ?); "
                "a measured one has three numbers"
            )
            self.error(st.line, token.raw, message)
            return None
        values = [
            self.read(st, token, baseline_component, self.length_unit, self.length_factor)
            for token in tokens
        ]
        if None in values:
            return None
        dx, dy, dz = values
        assert dx is not None and dy is not None and dz is not None
        text = " ".join(token.raw for token in tokens)
        if self.read(st, tokens[0], lambda _: baseline_length((dx, dy, dz), text)) is None:
            return None
        return dx, dy, dz

    def baseline_sd(self, st: Statement) -> tuple[float, float, float] | None:
        """The three standard deviations: own ``sd=``, else ``defaults baseline=`` for each."""
        if (token := st.options.get("sd")) is not None:
            return self.read(st, token, read_sd_triple)
        default = self.defaults.get("baseline")
        if default is None:
            self.report_missing_sigma(st, "baseline", "sd=SX,SY,SZ")
            return None
        if default.sigma is None:
            return None  # the defaults line is wrong and reported there
        sd = default.sigma.constant
        return sd, sd, sd

    def sigma(self, st: Statement, kind: str) -> _Default | None:
        """The standard deviation in force: the observation's own ``sd=`` or the default."""
        token = st.options.get("sd")
        if token is None:
            return self.defaults.get(kind)
        sigma = self.read(st, token, read_quantity, SD_RULES[kind])
        return _Default(sigma, token.value, st.line)

    def report_missing_sigma(self, st: Statement, kind: str, where: str) -> None:
        if not st.flawed:
            self.error(
                st.line,
                st.word,
                f"no standard deviation for this {kind}: give {where} or put a "
                f"'defaults {kind}=...' line before it",
            )

    def check_distinct(self, st: Statement, kind: str, names: list[str | None]) -> None:
        if kind != "angle":
            if names[0] is not None and names[0] == names[1]:
                message = f"{kind} from {names[0]} to itself: FROM and TO must be different points"
                self.error(st.line, st.values[1].raw, message)
            return
        back, at, fore = names
        if back is not None and back == fore:
            message = f"an angle needs two different points: BACK and FORE are both {back}"
            self.error(st.line, st.values[2].raw, message)
        if at is not None and at in (back, fore):
            message = f"angle at {at} to itself: AT must differ from BACK and FORE"
            self.error(st.line, st.values[1].raw, message)

    def level_options(
        self, st: Statement, sigma: _Default | None
    ) -> tuple[float | None, int | None]:
        """``len=`` and ``setups=``, and whether the standard deviation in force needs them."""
        length_m = self.option(st, "len", option_length)
        if length_m is not None and length_m <= 0.0:
            self.error(st.line, st.options["len"].raw, "a section length must be greater than zero")
        elif length_m is not None and length_m < MIN_DISTANCE_M:
            message = "a section length must be at least 1 mm; check the unit (len=0.35km)"
            self.error(st.line, st.options["len"].raw, message)
        setups: int | None = None
        if (token := st.options.get("setups")) is not None:
            setups = _whole_number(token.value)
            if not setups:
                message = f"'{show(token.raw)}': setups must be a whole number, at least 1"
                self.error(st.line, token.raw, message)
        if sigma is not None and sigma.sigma is not None:
            where = "its sd=" if sigma.line == st.line else f"defaults on line {sigma.line}"
            for part, key, what, example in _LEVEL_PARTS:
                if getattr(sigma.sigma, part) and key not in st.options:
                    self.error(
                        st.line,
                        st.word,
                        f"this level has no {key}=, but its standard deviation {sigma.text} "
                        f"({where}) has a {what} part; give {example}",
                    )
        return (None if length_m is None else length_m / 1000.0), setups

    def read_level(self, st: Statement, token: Token) -> float | None:
        return self.length(st, token, "observed values")

    def read_distance(self, st: Statement, token: Token) -> float | None:
        value = self.length(st, token, "observed values")
        if value is not None and value <= 0.0:
            message = f"'{show(token.raw)}': a distance must be greater than zero"
            self.error(st.line, token.raw, message)
        elif value is not None and value < MIN_DISTANCE_M:
            message = (
                f"'{show(token.raw)}': a distance shorter than 1 mm is not a measured "
                "distance; check the number and the file's length unit"
            )
            self.error(st.line, token.raw, message)
            return None
        return value

    def read_zenith(self, st: Statement, token: Token) -> float | None:
        value = self.angle(st, token)
        if value is None or -_ZENITH_SLACK <= value <= math.pi + _ZENITH_SLACK:
            return None if value is None else min(max(value, 0.0), math.pi)
        message = f"'{show(token.raw)}': a zenith angle must lie between 0 and 180°"
        self.error(st.line, token.raw, message)
        return None

    # ---- directions rounds

    def directions(self, st: Statement) -> None:
        at = self.read(st, st.values[0], point_name)
        sigma = self.sigma(st, "direction") if "sd" in st.options else None
        note, ignored = st.text("note"), "ignore" in st.flags
        self.round = _Round(st.line, at, sigma, note, ignored, flawed=st.flawed)

    def direction(self, line: int, tokens: list[Token]) -> None:
        """One ``TO VALUE [options]`` line inside a round."""
        round_ = self.round
        assert round_ is not None  # only called while a round is open
        round_.lines.append(line)
        before = self.errors.count
        st = self.binder.bind(line, tokens[0].raw, DIRECTION_ENTRY, tokens)
        if st is None:
            return
        to = self.read(st, st.values[0], point_name)
        if to is not None and to == round_.at:
            message = f"direction from {to} to itself: TO must differ from AT"
            self.error(line, st.values[0].raw, message)
        planned = _planned(st.values[1])
        booked = math.nan if planned else self.angle(st, st.values[1])
        value = None if booked is None else booked if planned else wrap_2pi(booked)
        own = self.sigma(st, "direction") if "sd" in st.options else None
        sigma = own or round_.sigma or self.defaults.get("direction")
        if sigma is None and not (round_.sd_missing_reported or round_.flawed):
            round_.sd_missing_reported = True
            self.report_missing_sigma(st, "direction", "sd= on the 'directions' line")
        if self.errors.count != before or sigma is None or sigma.sigma is None:
            return
        if round_.at is None or to is None or value is None:
            return
        self.add(
            Observation(
                line=line,
                kind="direction",
                from_point=round_.at,
                at=round_.at,
                to=to,
                value=value,
                sigma=sigma.sigma,
                centering=self.centering,
                round_line=round_.line,
                ignored=round_.ignored or "ignore" in st.flags,
                note=st.text("note") or round_.note,
                booked=booked,
                planned=planned,
            )
        )

    def close_round(self) -> None:
        round_ = self.round
        assert round_ is not None  # only called while a round is open
        self.round = None
        at, line = round_.at or "?", round_.line
        if not round_.lines:
            self.error(
                line,
                at,
                f"the directions round at {at} on line {line} is empty; "
                "list its 'TO DIRECTION' lines before 'end'",
            )
        elif len(round_.lines) == 1:
            self.warnings.add(
                line,
                at,
                f"the directions round at {at} on line {line} has only one direction; "
                "it adds no redundancy",
            )
        if round_.at is not None:
            self.rounds.append(DirectionRound(line, round_.at, tuple(round_.lines)))

    # ---- relative precision asked for

    def relative_pair(self, st: Statement) -> None:
        """``relative A B``: the names are checked once the whole file is read."""
        first, second = (self.read(st, token, point_name) for token in st.values)
        if first is None or second is None:
            return
        if first == second:
            message = f"relative from {first} to itself: name two different points"
            self.error(st.line, st.values[1].raw, message)
            return
        key = frozenset((first, second))
        for earlier in self.relative_pairs:
            if frozenset((earlier.first, earlier.second)) == key:
                self.warnings.add(
                    st.line,
                    st.word,
                    f"the pair {first}–{second} is already asked for on line {earlier.line}; "
                    "it is reported once",
                )
                return
        self.relative_pairs.append(RelativePair(st.line, first, second))

    def check_relative_names(self) -> None:
        """Both points of a pair must be named elsewhere in the file (declared or observed)."""
        known: set[str] = set(self.point_lines)
        self.flush()
        for block in self.blocks:
            for column in block[_NAME_FIELDS]:
                known.update(column)
        known.discard(None)  # an absent AT
        kept = []
        for pair in self.relative_pairs:
            missing = [name for name in (pair.first, pair.second) if name not in known]
            for name in missing:
                self.error(
                    pair.line,
                    name,
                    f"relative: point {name} is not in this field book (no point line or "
                    f"observation names it){_similar_name(name, known)}",
                )
            if not missing:
                kept.append(pair)
        self.relative_pairs = kept

    def end_without_round(self, st: Statement) -> None:
        self.error(st.line, st.word, "'end' closes a directions round, but no round is open")


# --------------------------------------------------------------------------- tables

#: Read the common observation lines without tokens (``_Parser.fast_line``); the tests
#: compare both paths, and switching this off gives the careful path alone.
_FAST_LINES = True
# A point name the careful path accepts without a word: printable ASCII, no space, '"', '#'
# or '='; a value or option value: no space, '"' or '#'; then at most a comment.
_NAME = r"(?![eE][nN][dD][ \t])([!$-<>-~]{1,64})"
_VALUE = r'([^ \t#"=]+)'
_TAIL = r"[ \t]*(?:#.*)?\Z"
_NUMBER = r"([+-]?(?:[0-9]+\.?[0-9]*|\.[0-9]+)(?:[eE][+-]?[0-9]+)?)"  # as units._NUMBER
# The same with possessive repeats (a fifth faster): each token is followed by a character
# it cannot hold (a blank, '#' or the end), so giving characters back never made a match.
_NAME_P = r"(?![eE][nN][dD][ \t])([!$-<>-~]{1,64}+)"
_NUMBER_P = r"([+-]?+(?:[0-9]++\.?+[0-9]*+|\.[0-9]++)(?:[eE][+-]?+[0-9]++)?+)"
_PLAIN = (
    rf"[ \t]*+(level|distance)[ \t]++{_NAME_P}[ \t]++{_NAME_P}[ \t]++{_NUMBER_P}"
    rf"(?:[ \t]++len={_NUMBER_P}([a-zA-Z]++))?+[ \t]*+(?:#.*)?"
)
_FAST_OBSERVATION = re.compile(rf"{_PLAIN}\Z", re.DOTALL)
# Every line of a chunk joined by newlines: its _FAST_OBSERVATION groups ('' where absent),
# all empty for any other line (a line holds no newline, so '$' is the line's end)
_PLAIN_LINES = re.compile(rf"^(?:{_PLAIN}$|.*)", re.MULTILINE)
_FAST_DIRECTION = re.compile(rf"[ \t]*{_NAME}[ \t]+{_VALUE}{_TAIL}", re.DOTALL)
_HEIGHT = rf"(?:[ \t]+(hi|ht)={_NUMBER}([a-zA-Z]+))?"
_FAST_SPATIAL = re.compile(
    rf"[ \t]*(slope|zenith)[ \t]+{_NAME}[ \t]+{_NAME}[ \t]+{_VALUE}{_HEIGHT}{_HEIGHT}{_TAIL}",
    re.DOTALL,
)
_FAST_NUMBER = re.compile(rf"{_NUMBER}\Z")
_LONGEST_ANGLE = 64  # as lexer.observed_angle allows
# Any line, as one of: 'directions AT', 'end', a plain level or distance line, 'TO D:M:S' (a
# direction of a round), a blank or comment line, or anything else (``_Parser.take_block``).
# A name is not 'end' here; the seconds' decimals are bounded, so no angle is too long.
# Repeats are possessive, as in _PLAIN.
_ANY_NAME = r"(?![eE][nN][dD](?![!$-<>-~]))([!$-<>-~]{1,64}+)"
_LINE_TAIL = r"[ \t]*+(?:#.*)?"
_DIGITS = r"([0-9]{1,6}+)"
_BLOCK_LINE = re.compile(
    rf"^(?:[ \t]*+(directions)[ \t]++{_ANY_NAME}{_LINE_TAIL}"
    rf"|[ \t]*+(end){_LINE_TAIL}"
    rf"|[ \t]*+(level|distance)[ \t]++{_ANY_NAME}[ \t]++{_ANY_NAME}[ \t]++{_NUMBER_P}"
    rf"(?:[ \t]++len={_NUMBER_P}([a-zA-Z]++))?+{_LINE_TAIL}"
    rf"|[ \t]*+{_ANY_NAME}[ \t]++(-?){_DIGITS}:{_DIGITS}:([0-9]{{1,6}}+(?:\.[0-9]{{0,30}}+)?+)"
    rf"{_LINE_TAIL}"
    rf"|{_LINE_TAIL}"
    r"|(.+))$",
    re.MULTILINE,
)
#: A stretch of at least this many lines is read at once (``_Parser.fast_block``), in chunks
#: of ``_CHUNK_MIN`` lines growing up to ``_RUN_MAX``.
_RUN_MIN, _CHUNK_MIN, _RUN_MAX = 16, 64, 65536
_DIRECTION = "direction"
_OTHER = itemgetter(14)  # the group of _BLOCK_LINE that holds any other line
_KEYWORD = GRAMMARS.__contains__
_LEVEL = "level"
#: FROM, AT and TO of a row of fields
_NAME_FIELDS = slice(FIELDS.index("from_point"), FIELDS.index("to") + 1)

#: Kinds that take a default standard deviation (``centering`` is not one).
_SD_KINDS = tuple(kind for kind in SD_RULES if kind != "centering")
# A line that a 'defaults' statement starts, and the words of it that may name a kind.
_DEFAULTS_LINE = re.compile(r"[ \t]*defaults(?:[ \t]|\Z)", re.IGNORECASE)
_KEY_WORDS = re.compile(r"([A-Za-z]+)=")

_KEYS = {"en": "east= and north=", "h": "height="}
_NAMES = {"en": "horizontal position", "h": "height"}
_LEVEL_PARTS = (
    ("per_sqrtkm", "len", "per-√km", "the section length, e.g. len=0.35km"),
    ("per_setup", "setups", "per-setup", "the number of setups, e.g. setups=4"),
)

#: Kinds whose value the adjustment uses in [0, 2π) (the booked value is kept as written).
_WRAPPED_KINDS = frozenset({"angle", "azimuth"})
_VALUE_READERS: dict[str, Callable[[_Parser, Statement, Token], float | None]] = {
    "level": _Parser.read_level,
    "distance": _Parser.read_distance,
    "slope": _Parser.read_distance,
    "angle": _Parser.angle,
    "azimuth": _Parser.angle,
    "zenith": _Parser.read_zenith,
}
#: What each statement does, by keyword (its syntax is ``GRAMMARS`` in the lexer).
_HANDLERS: dict[str, Callable[[_Parser, Statement], None]] = {
    "fieldbook": _Parser.version,
    "title": _Parser.set_title,
    "units": _Parser.units,
    "tests": _Parser.set_tests,
    "tolerance": _Parser.tolerance,
    "defaults": _Parser.set_defaults,
    "scale": _Parser.set_scale,
    "crs": _Parser.set_crs,
    "geoid": _Parser.set_geoid,
    "refraction": _Parser.set_refraction,
    "epoch": _Parser.set_epoch,
    "point": _Parser.point,
    "baseline": _Parser.baseline,
    **dict.fromkeys(
        ("level", "distance", "angle", "azimuth", "slope", "zenith"), _Parser.observation
    ),
    "directions": _Parser.directions,
    "relative": _Parser.relative_pair,
    "end": _Parser.end_without_round,
}


def _absent_numbers(n: int) -> tuple[np.ndarray, ...]:
    """The columns ``setups``, ``instrument_height``, ``target_height``, ``round_line`` of
    ``n`` rows that have none of them (−1 or NaN, as the table has them)."""
    return (
        np.full(n, NONE, np.int64),
        np.full(n, math.nan),
        np.full(n, math.nan),
        np.full(n, NONE, np.int64),
    )


def _up_to_other(found: list[T], others: list[bool]) -> tuple[list[T], list[bool]]:
    """The lines of a chunk up to the first one read otherwise (no line after it is taken,
    and each line in the arrays costs time)."""
    if True not in others:
        return found, others
    n = others.index(True) + 1
    return found[:n], others[:n]


def _round_lines(m: int, rows: np.ndarray, lines: list[int]) -> np.ndarray:
    """The ``round_line`` column of ``m`` rows: ``lines`` at ``rows``, −1 elsewhere."""
    column = np.full(m, NONE, np.int64)
    column[rows] = lines
    return column


def _plain_groups(chunk: list[str]) -> list[tuple[str, ...]]:
    """The ``_FAST_OBSERVATION`` groups ('' where absent) of the leading plain level and
    distance lines of ``chunk``, up to the first line that is not one (one C-level pass)."""
    found = _PLAIN_LINES.findall("\n".join(chunk))
    if len(found) != len(chunk):  # every line matches once; this is a safeguard
        matches = takewhile(bool, map(_FAST_OBSERVATION.match, chunk))
        return [match.groups("") for match in cast(Iterator[re.Match[str]], matches)]
    kinds = list(map(itemgetter(0), found))
    return found[: kinds.index("")] if "" in kinds else found


def _picked(values: Sequence[T], rows: np.ndarray) -> list[T]:
    """``values[k]`` for each k of ``rows``, as a list (in one C-level pass)."""
    if rows.size > 1:
        return list(itemgetter(*rows.tolist())(values))
    return [values[int(k)] for k in rows]


def _planned(token: Token) -> bool:
    """True for an observed value written ``?``: a planned observation."""
    return not token.quoted and token.value == PLANNED


def _similar_name(name: str, known: set[str]) -> str:
    """``"; did you mean 'X'?"`` for the closest point name of the file, or ``""``.

    Point names are case-sensitive, so a name differing only in case is the
    first guess; otherwise the closest by spelling.
    """
    same_case = [k for k in known if k.lower() == name.lower()]
    if same_case:
        return f"; did you mean '{min(same_case)}'?"
    matches = difflib.get_close_matches(name, sorted(known), n=1, cutoff=0.6)
    return f"; did you mean '{matches[0]}'?" if matches else ""


def _whole_number(text: str) -> int | None:
    """A plain whole number of ASCII digits (``str.isdigit`` alone admits '²', which int()
    refuses)."""
    return int(text) if text.isascii() and text.isdigit() and len(text) < 10 else None


def _components(components: set[str]) -> str:
    """``""``, ``"en"``, ``"h"`` or ``"enh"``: always in that order."""
    return ("en" if "en" in components else "") + ("h" if "h" in components else "")
