"""The ``import`` front door: a file's bytes → field book text, by the file's kind."""

from __future__ import annotations

from dataclasses import dataclass

from server.errors import FieldbookError, Issue
from server.formats.csv_observations import read_csv_observations
from server.formats.fieldbook_writer import Imported, write_fieldbook
from server.formats.rounds import Tolerances
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


def import_file(data: bytes, source: str, options: ImportOptions) -> Imported:
    """Survey XML (by its content) or a CSV of readings → the field book and its warnings."""
    head = data[:512].lstrip(b"\xef\xbb\xbf \t\r\n")
    if head.startswith(b"<") or source.lower().endswith(".xml"):
        survey = read_survey_xml(data, source)
    elif source.lower().endswith((".csv", ".txt")) or b"," in head or b";" in head:
        survey = read_csv_observations(
            data, source, length_unit=options.length_unit, angle_unit=options.angle_unit
        )
    else:
        message = "neither survey XML nor a CSV of readings with a header row"
        raise FieldbookError([Issue(1, "", message)], source)
    return write_fieldbook(survey, options.tolerances)
