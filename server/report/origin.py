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


@dataclass(frozen=True, slots=True)
class ApprovalNote:
    """A run approved for issue, as its reports state it: who, when, which run of which book.

    A record of the review by the surveyor in responsible charge, not a certification: the
    reports keep their caution beside it.
    """

    approved_by: str
    approved: str  # ISO 8601, UTC
    run_number: int
    fieldbook_sha256: str

    @property
    def date(self) -> str:
        """The day of the approval, YYYY-MM-DD (UTC)."""
        return self.approved[:10]

    @property
    def sentence(self) -> str:
        """The line every report of the approved run carries."""
        return (
            f"Approved for issue by {self.approved_by} on {self.date}, run #{self.run_number}, "
            f"field book SHA-256 {self.fieldbook_sha256}. A record of review, not a "
            "certification."
        )
