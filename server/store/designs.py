"""Design projects: a stored book with planned observations is designed, not adjusted.

The design page re-evaluates the figures each time the surveyor switches an observation on
or off; the book is parsed once per project version and kept (a few, most recent first), so
a re-evaluation is the one linearisation and its statistics only.
"""

from __future__ import annotations

import threading
from collections import OrderedDict
from collections.abc import Collection

from server.design.plan import plan_parsed
from server.fieldbook.model import Fieldbook
from server.fieldbook.parser import parse_fieldbook
from server.results.result import AdjustmentResult
from server.settings import WorkLimits
from server.store.sqlite import Project

#: Parsed design books kept at once.
KEPT_BOOKS = 8


def is_design(book: Fieldbook) -> bool:
    """True for a book with a planned observation ('?' as a value): it is designed."""
    return any(o.planned for o in book.observations)


class ParsedBooks:
    """The parsed books of recent design projects, by project id and text hash (locked)."""

    def __init__(self, size: int = KEPT_BOOKS) -> None:
        self._books: OrderedDict[tuple[str, str], Fieldbook] = OrderedDict()
        self._lock = threading.Lock()
        self._size = size

    def book(self, project: Project) -> Fieldbook:
        """The project's book, parsed once (raises ``FieldbookError`` like the parser)."""
        key = (project.id, project.sha256)
        with self._lock:
            if key in self._books:
                self._books.move_to_end(key)
                return self._books[key]
        book = parse_fieldbook(project.fieldbook, source=project.filename or "pasted.fieldbook")
        with self._lock:
            self._books[key] = book
            while len(self._books) > self._size:
                self._books.popitem(last=False)
        return book


def design_of(
    books: ParsedBooks, project: Project, switched_off: Collection[int], limits: WorkLimits
) -> AdjustmentResult:
    """The design figures with ``switched_off`` lines left out (``SurveyError`` as ``plan``)."""
    return plan_parsed(books.book(project), switched_off=switched_off, limits=limits)


def parse_lines(text: str, limit: int = 100_000) -> frozenset[int]:
    """'12,15,40' → {12, 15, 40}; anything that is not a line number is left out."""
    parts = text.split(",")[:limit]
    return frozenset(int(p) for p in parts if p.strip().isdigit() and len(p.strip()) < 9)
