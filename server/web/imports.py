"""Importing survey XML or a CSV of readings in the browser: stored first, adjusted when the
surveyor says so.  Here, not in ``server.store``, because it joins the store and the readers
of ``server.formats`` (layers that do not import each other)."""

from __future__ import annotations

from server.errors import SurveyError
from server.fieldbook.model import Fieldbook
from server.fieldbook.parser import parse_fieldbook
from server.formats.importing import ImportSummary, import_with_summary, is_xml
from server.pipeline import UNLIMITED, check_observation_limit
from server.settings import WorkLimits
from server.store.projects import Upload, check_room
from server.store.sqlite import NO_EDITS, Actor, Project, Store

#: Upload names that are imported rather than read as a field book.
IMPORTED_SUFFIXES = (".xml", ".csv")


def is_import(upload: Upload) -> bool:
    """True for a survey XML (by name or content) or a CSV of readings (by name)."""
    name = upload.filename.lower()
    if name.endswith(".fieldbook"):
        return False
    return name.endswith(IMPORTED_SUFFIXES) or is_xml(upload.data, "")


def imported_book_name(filename: str) -> str:
    """The produced field book's file name: the source's stem with ``.fieldbook``."""
    stem = filename.rsplit(".", 1)[0] if "." in filename else filename
    return f"{stem or 'imported'}.fieldbook"


def store_import(
    store: Store, upload: Upload, max_projects: int = 0, owner: Actor | None = None
) -> str:
    """Import the upload and store the produced field book beside the original bytes.

    No run is started: the surveyor reads the preview first (``import_preview``).  An
    input error raises ``FieldbookError`` naming the file's line, and nothing is stored.
    """
    check_room(store, max_projects)
    source = upload.filename or "pasted.xml"
    imported, _ = import_with_summary(upload.data, source)
    try:
        title = parse_fieldbook(imported.text, source=imported_book_name(source)).title
    except SurveyError:
        title = ""  # the preview shows the book; adjusting it names what is wrong
    return store.create_project(
        upload.name or title or "",
        imported_book_name(source),
        imported.text,
        source=(source, upload.data),
        owner=owner,
    )


def import_preview(project: Project) -> ImportSummary | None:
    """The import's summary, read again from the stored source (None: not imported)."""
    if project.source is None:
        return None
    try:
        return import_with_summary(project.source.content, project.source.filename)[1]
    except SurveyError:
        return None  # it imported when stored; a later reader may be stricter


def start_imported_run(
    store: Store, project: Project, limits: WorkLimits = UNLIMITED, by: Actor | None = None
) -> tuple[Fieldbook | None, int | None]:
    """Open the first run of an imported project; a book that does not read gets a failed run."""
    source = project.filename or "imported.fieldbook"
    try:
        book = parse_fieldbook(project.fieldbook, source=source)
    except SurveyError as exc:
        store.add_run(project.id, error=exc, by=by)
        return None, None
    check_observation_limit(book, limits)
    return book, store.start_run(project.id, NO_EDITS, by=by)
