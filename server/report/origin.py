"""The file a field book was imported from, as the reports name it beside the field book."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True, slots=True)
class ImportedFrom:
    """The original file (survey XML or CSV) by name and SHA-256, so a report traces both."""

    filename: str
    sha256: str

    @property
    def kind(self) -> str:
        """What the reports call it: "Survey XML" or "CSV of readings"."""
        return "CSV of readings" if self.filename.lower().endswith(".csv") else "Survey XML"
