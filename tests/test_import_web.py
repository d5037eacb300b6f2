"""Importing survey XML (or a CSV of readings) in the browser's routes: the preview before
adjusting, one press to adjust, both files kept and named with their SHA-256, hostile XML
refused with the line it is on, the form token and origin checks, the stored source file
across a schema upgrade."""

from __future__ import annotations

import hashlib
import io
import re
import sqlite3
import warnings
from contextlib import closing
from pathlib import Path

import pypdf
import pytest
from fastapi import FastAPI

from server.formats.survey_xml import MAX_DEPTH
from server.store.sqlite import SCHEMA_VERSION, Store
from server.web import create_app

with warnings.catch_warnings():
    warnings.simplefilter("ignore")  # starlette's test client prefers httpx2
    from fastapi.testclient import TestClient

ROOT = Path(__file__).resolve().parents[1]
MIXED = ROOT / "demo_projects" / "xml_mixed_job.xml"
ROUNDS = ROOT / "tests" / "data" / "heron_hill_rounds.xml"  # one spread warning, xml line 28
CSV = ROOT / "tests" / "data" / "quarry_lane_readings.csv"
TOKEN = re.compile(r'name="token" value="([0-9a-f]{32})"')


@pytest.fixture
def app(tmp_path: Path) -> FastAPI:
    return create_app(tmp_path / "data")


@pytest.fixture
def client(app: FastAPI):
    with TestClient(app) as c:
        yield c


def _upload(client: TestClient, path: Path, name: str | None = None):
    return client.post(
        "/projects",
        files={"fieldbook": (name or path.name, path.read_bytes(), "application/xml")},
        follow_redirects=False,
    )


def _preview(client: TestClient, path: Path) -> tuple[str, str, str]:
    """Upload, follow to the preview; (project id, token, page)."""
    response = _upload(client, path)
    assert response.status_code == 303
    location = response.headers["location"]
    match = re.fullmatch(r"/projects/([0-9a-f]{32})/import", location)
    assert match, location
    page = client.get(location)
    assert page.status_code == 200
    token = TOKEN.search(page.text)
    assert token
    return match.group(1), token.group(1), page.text


def test_an_xml_upload_is_previewed_not_adjusted(client):
    project_id, _, page = _preview(client, MIXED)
    # the counts of the import (tools/make_xml_demos.py: three setups of three targets in two
    # sets and two faces = 36 readings; 5 vectors; 2 control points), nothing adjusted yet
    counts = dict(re.findall(r"<dt>([A-Za-z ]+)</dt><dd>(\d+)</dd>", page))
    assert counts == {
        "Setups": "3",
        "Observations": "36",
        "GNSS vectors": "5",
        "Points": "2",
        "Reductions": "27",
        "Warnings": "0",
    }
    assert "crs EPSG:25832" in page and "Adjust this field book" in page
    assert client.get(f"/api/projects/{project_id}").json()["runs"] == []


def test_the_warnings_name_their_xml_line(client):
    _, _, page = _preview(client, ROUNDS)
    assert re.search(r'issue-line">XML line 28</span> spread of the direction over 2 sets', page)


def test_a_csv_of_readings_is_previewed_too(client):
    response = client.post(
        "/projects",
        files={"fieldbook": (CSV.name, CSV.read_bytes(), "text/csv")},
        follow_redirects=True,
    )
    assert response.url.path.endswith("/import")
    counts = dict(re.findall(r"<dt>([A-Za-z ]+)</dt><dd>(\d+)</dd>", response.text))
    # tests/data/quarry_lane_readings.csv: one station, four readings
    assert "CSV file" in response.text and counts["Setups"] == "1"
    assert counts["Observations"] == "4"


def test_adjusting_names_both_files_with_their_sha256(client):
    project_id, token, _ = _preview(client, MIXED)
    response = client.post(f"/projects/{project_id}/adjust", data={"token": token})
    assert response.status_code == 200 and response.url.path == f"/projects/{project_id}"
    xml_hash = hashlib.sha256(MIXED.read_bytes()).hexdigest()  # reference: hashlib
    book = client.get(f"/projects/{project_id}/fieldbook").content
    book_hash = hashlib.sha256(book).hexdigest()
    assert book.startswith(b"fieldbook 1\n")
    for text in (
        response.text,
        client.get(f"/projects/{project_id}/report.html").text,
        client.get(f"/projects/{project_id}/report.txt").text,
        _pdf_text(client.get(f"/projects/{project_id}/report.pdf").content),
    ):
        assert xml_hash in text and book_hash in text
        assert "xml_mixed_job.xml" in text
    assert client.get(f"/projects/{project_id}/source").content == MIXED.read_bytes()
    assert client.get(f"/api/projects/{project_id}").json()["source"] == {
        "filename": "xml_mixed_job.xml",
        "sha256": xml_hash,
    }
    assert "Passes" in response.text  # the demo's global test (tests/test_import_roundtrip.py)


def _pdf_text(pdf: bytes) -> str:
    reader = pypdf.PdfReader(io.BytesIO(pdf))
    return re.sub(r"\s+", " ", " ".join(page.extract_text() for page in reader.pages))


def test_a_second_press_adjusts_only_once(client):
    project_id, token, _ = _preview(client, MIXED)
    for _ in range(2):
        client.post(f"/projects/{project_id}/adjust", data={"token": token})
    assert len(client.get(f"/api/projects/{project_id}").json()["runs"]) == 1
    # once adjusted, the preview address opens the results
    assert (
        client.get(f"/projects/{project_id}/import", follow_redirects=False).headers["location"]
        == f"/projects/{project_id}"
    )


def test_adjust_needs_the_token_and_the_own_origin(client):
    project_id, token, _ = _preview(client, MIXED)
    assert (
        client.post(f"/projects/{project_id}/adjust", data={"token": "0" * 32}).status_code == 403
    )
    foreign = {"Origin": "https://evil.example", "Sec-Fetch-Site": "cross-site"}
    assert (
        client.post(
            f"/projects/{project_id}/adjust", data={"token": token}, headers=foreign
        ).status_code
        == 403
    )
    assert client.get(f"/api/projects/{project_id}").json()["runs"] == []


def test_going_back_deletes_the_import(client):
    project_id, token, _ = _preview(client, MIXED)
    response = client.post(
        f"/projects/{project_id}/discard", data={"token": token}, follow_redirects=False
    )
    assert response.status_code == 303 and response.headers["location"] == "/"
    assert client.get(f"/projects/{project_id}").status_code == 404


def test_the_project_page_of_an_unadjusted_import_opens_the_preview(client):
    project_id, _, _ = _preview(client, MIXED)
    response = client.get(f"/projects/{project_id}", follow_redirects=False)
    assert response.headers["location"] == f"/projects/{project_id}/import"


def test_xml_demos_are_offered_and_open_as_imports(client):
    page = client.get("/").text
    for name in ("xml_traverse_two_faces", "xml_gnss_network", "xml_mixed_job"):
        assert f'action="/demos/{name}"' in page
    response = client.post("/demos/xml_gnss_network", follow_redirects=False)
    assert re.fullmatch(r"/projects/[0-9a-f]{32}/import", response.headers["location"])


# ---- hostile XML through the web route: a page naming the line, never a 500

HOSTILE = {
    "entity expansion": (
        b'<?xml version="1.0"?>\n<!DOCTYPE lolz [\n <!ENTITY lol "lol">\n'
        b' <!ENTITY lol2 "&lol;&lol;&lol;&lol;&lol;&lol;&lol;&lol;">\n'
        b"]>\n<LandXML>&lol2;</LandXML>\n",
        2,
        "refused for safety",
    ),
    "external entity": (
        b'<?xml version="1.0"?>\n<!DOCTYPE x [<!ENTITY e SYSTEM '
        b'"file:///etc/passwd">]>\n<LandXML>&e;</LandXML>\n',
        2,
        "refused for safety",
    ),
    "deep nesting": (
        b"<LandXML>\n" + b"<a>" * (MAX_DEPTH + 5) + b"</a>" * (MAX_DEPTH + 5) + b"\n</LandXML>\n",
        2,
        f"nest more than {MAX_DEPTH} deep",
    ),
    "10 MB single element": (
        b'<LandXML>\n<Units><Metric linearUnit="meter"/></Units>\n'
        b'<CgPoints>\n<CgPoint name="A">'
        + b"7" * (10 * 1024 * 1024)
        + b" 0 0</CgPoint>\n</CgPoints>\n</LandXML>\n",
        4,
        "",
    ),
    "not well-formed": (b"<LandXML>\n<Units>\n</LandXML>\n", 3, "not well-formed XML"),
}


@pytest.mark.parametrize("case", sorted(HOSTILE))
def test_hostile_xml_is_refused_with_its_line(client, case):
    data, line, words = HOSTILE[case]
    response = client.post("/projects", files={"fieldbook": ("hostile.xml", data, "text/xml")})
    assert response.status_code == 422
    assert "The XML file could not be imported" in response.text
    found = re.search(r'issue-line">XML line (\d+)</span>([^<]*)', response.text)
    assert found and int(found.group(1)) == line, response.text[:2000]
    assert words in found.group(2)
    assert "Traceback" not in response.text and "passwd" not in found.group(2)
    assert client.app.state.store.list_projects() == []  # nothing was stored


def test_a_pasted_xml_text_is_imported(client):
    response = client.post(
        "/projects",
        data={"text": MIXED.read_text("utf-8")},
        files={"fieldbook": ("", b"", "application/octet-stream")},
        follow_redirects=False,
    )
    assert response.headers["location"].endswith("/import")


# ---- the store: the source beside the book, and schema 4 upgraded


def test_the_store_keeps_the_source_byte_for_byte(tmp_path):
    store = Store(tmp_path / "s.sqlite3")
    raw = b"<LandXML>\xff</LandXML>"
    project = store.get_project(
        store.create_project("p", "p.fieldbook", "x", source=("p.xml", raw))
    )
    assert project.source is not None and project.source.content == raw
    assert project.source.sha256 == hashlib.sha256(raw).hexdigest()
    assert store.get_project(store.create_project("q", "q.fieldbook", "x")).source is None


def test_a_schema_4_store_is_upgraded_and_its_projects_have_no_source(tmp_path):
    from tests.test_storage import SCHEMA_3

    path = tmp_path / "old.sqlite3"
    with closing(sqlite3.connect(path)) as raw:  # schema 4: no source_files table
        raw.executescript(SCHEMA_3)
        raw.execute("ALTER TABLE projects ADD COLUMN deleted TEXT")
        raw.execute(
            "INSERT INTO projects (id, name, filename, created, fieldbook, sha256) "
            "VALUES (?, 'old', 'old.fieldbook', '2026-01-01T00:00:00+00:00', x'78', 'h')",
            ("c" * 32,),
        )
        raw.execute("PRAGMA user_version = 4")
        raw.commit()
    store = Store(path)
    with closing(sqlite3.connect(path)) as raw:
        assert raw.execute("PRAGMA user_version").fetchone() == (SCHEMA_VERSION,)
    old = store.get_project("c" * 32)
    assert old is not None and old.fieldbook == b"x" and old.source is None


def test_names_from_the_xml_are_shown_as_text(client):
    xml = (
        b'<LandXML>\n<Units><Metric linearUnit="meter"/></Units>\n'
        b'<Project name="&lt;script&gt;alert(1)&lt;/script&gt;"/>\n<CgPoints>\n'
        b'<CgPoint name="&lt;img src=x onerror=alert(2)&gt;">1 2 3</CgPoint>\n'
        b"</CgPoints>\n</LandXML>\n"
    )
    response = client.post(
        "/projects", files={"fieldbook": ("x<b>.xml", xml, "text/xml")}, follow_redirects=True
    )
    assert response.url.path.endswith("/import")
    assert "<script>alert(1)" not in response.text and "<img src=x" not in response.text
    assert "&lt;script&gt;alert(1)" in response.text
