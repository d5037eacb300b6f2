"""The ``import`` front door: a file's bytes → field book text, by the file's kind."""

from __future__ import annotations

from dataclasses import dataclass

from server.errors import FieldbookError, Issue
from server.formats.csv_observations import read_csv_observations
from server.formats.fieldbook_writer import Imported, write_fieldbook
from server.formats.rounds import Tolerances
from server.formats.survey_records import SurveyData
from server.formats.survey_xml import read_survey_xml
from server.units import UnitError, parse_quantity


@dataclass(frozen=True, slots=True)
class ImportOptions:
    tolerances: Tolerances
    length_unit: str = "m"
    angle_unit: str = "dms"

    @classmethod
    def from_text(
        cls, face: str, spread: str, distance: str, length_unit: str = "m", angle_unit: str = "dms"
    ) -> ImportOptions:
        """Tolerances as the field book writes quantities (``20sec``, ``6mgon``, ``5mm``)."""
        return cls(
            Tolerances(
                _angle(face, "--face-tolerance"),
                _angle(spread, "--set-tolerance"),
                _length(distance, "--distance-tolerance"),
            ),
            length_unit,
            angle_unit,
        )


#: The command's defaults (``stationfit import --help``), which the browser's import uses too.
DEFAULT_TOLERANCE_TEXT = ("20sec", "5sec", "5mm")


def default_options() -> ImportOptions:
    return ImportOptions.from_text(*DEFAULT_TOLERANCE_TEXT)


def _angle(text: str, option: str) -> float:
    quantity = parse_quantity(text)
    if not quantity.angular or quantity.ppm or quantity.constant <= 0.0:
        raise UnitError(f"{option} {text!r}: give an angle such as 20sec or 6mgon")
    return quantity.constant


def _length(text: str, option: str) -> float:
    quantity = parse_quantity(text)
    if quantity.angular or quantity.ppm or quantity.constant <= 0.0:
        raise UnitError(f"{option} {text!r}: give a length such as 5mm")
    return quantity.constant


@dataclass(frozen=True, slots=True)
class ImportSummary:
    """What an import read and wrote, as the browser's preview lists it."""

    kind: str  # "xml" or "csv"
    setups: int
    observations: int
    vectors: int
    points: int
    #: values written as the mean of several readings (face pairs, sets)
    reductions: int
    warnings: tuple[tuple[int, str], ...]


def is_xml(data: bytes, source: str) -> bool:
    """True for survey XML: the content opens with ``<`` or the name ends in ``.xml``."""
    head = data[:512].lstrip(b"\xef\xbb\xbf \t\r\n")
    return head.startswith(b"<") or source.lower().endswith(".xml")


def _read(data: bytes, source: str, options: ImportOptions) -> SurveyData:
    head = data[:512].lstrip(b"\xef\xbb\xbf \t\r\n")
    if is_xml(data, source):
        return read_survey_xml(data, source)
    if source.lower().endswith((".csv", ".txt")) or b"," in head or b";" in head:
        return read_csv_observations(
            data, source, length_unit=options.length_unit, angle_unit=options.angle_unit
        )
    message = "neither survey XML nor a CSV of readings with a header row"
    raise FieldbookError([Issue(1, "", message)], source)


def import_file(data: bytes, source: str, options: ImportOptions) -> Imported:
    """Survey XML (by its content) or a CSV of readings → the field book and its warnings."""
    return write_fieldbook(_read(data, source, options), options.tolerances)


def import_with_summary(
    data: bytes, source: str, options: ImportOptions | None = None
) -> tuple[Imported, ImportSummary]:
    """``import_file`` (default tolerances unless given) and the counts the preview shows."""
    options = options or default_options()
    survey = _read(data, source, options)
    imported = write_fieldbook(survey, options.tolerances)
    used = [r for r in survey.readings if not r.unused]
    # a reduced value's note names every line it was meaned from: "xml lines 16,20: …"
    # (a round's own header lists all its lines, and is no reduction)
    reductions = sum(
        1
        for line in imported.text.splitlines()
        if not line.lstrip().startswith(("#", "directions "))
        and " lines " in line
        and 'note="' in line
    )
    summary = ImportSummary(
        kind="xml" if is_xml(data, source) else "csv",
        setups=len({(r.setup, r.station) for r in used}),
        observations=len(used),
        vectors=len(survey.vectors),
        points=len(survey.points),
        reductions=reductions,
        warnings=tuple(sorted(imported.warnings)),
    )
    return imported, summary
