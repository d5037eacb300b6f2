"""The web service: uploads, results pages, downloads, the JSON API, limits and security headers."""

from __future__ import annotations

import asyncio
import base64
import csv
import hashlib
import io
import re
import warnings
from pathlib import Path

import pytest
from fastapi import FastAPI

from server.results.result import CAUTION
from server.web import create_app

with warnings.catch_warnings():
    # starlette's test client prefers httpx2 and warns when it finds only httpx
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

DEMOS = Path(__file__).resolve().parents[1] / "demo_projects"
BLUNDER = DEMOS / "leveling_blunder.fieldbook"
BLUNDER_LINE = 38  # tools/DEMOS.md: +10 mm on level KR-106 KR-107

CONTRACT_KEYS = {
    "format",
    "units",
    "summary",
    "points",
    "observations",
    "misclosures",
    "relative",
    "warnings",
    "caution",
}
OBSERVATION_KEYS = {
    "line",
    "kind",
    "from",
    "at",
    "to",
    "observed",
    "adjusted",
    "residual",
    "sd",
    "redundancy",
    "w",
    "mdb",
    "flagged",
    "ignored",
}

# Point names a spreadsheet would run, and one a browser would run; all valid field book names.
HOSTILE = """fieldbook 1
title "Hostile names"
defaults level=1mm
point <script>alert(1)</script> height=10.0000 fix
point +1 height=5.0000 fix
level <script>alert(1)</script> @A1 +1.0000
level +1 @A1 +6.0010
level -X @A1 +1.0000
level +1 -X +5.0000
"""
SCRIPT_NAME = "<script>alert(1)</script>"


@pytest.fixture
def app(tmp_path: Path) -> FastAPI:
    return create_app(tmp_path / "data")


@pytest.fixture
def client(app: FastAPI) -> TestClient:
    with TestClient(app) as c:
        yield c


def _upload(client: TestClient, data: bytes, filename: str = "upload.fieldbook", **form: str):
    return client.post(
        "/projects",
        files={"fieldbook": (filename, data, "text/plain")},
        data=form,
        follow_redirects=False,
    )


def _project_url(response) -> str:
    assert response.status_code == 303, response.text
    location = response.headers["location"]
    assert re.fullmatch(r"/projects/[0-9a-f]{32}", location)
    return location


def _row_of_line(html: str, line: int) -> str:
    match = re.search(rf'<tr[^>]*data-line="{line}"[^>]*>.*?</tr>', html, re.DOTALL)
    assert match, f"no observation row for line {line}"
    return match.group(0)


# ---------------------------------------------------------------------------------------
# the surveyor's path: upload, read the verdict, find the blunder, download


def test_upload_shows_verdict_caution_and_the_flagged_observation(client):
    url = _project_url(_upload(client, BLUNDER.read_bytes(), "leveling_blunder.fieldbook"))
    page = client.get(url)
    assert page.status_code == 200
    html = page.text
    assert "Fails: residuals too large — look for blunders" in html
    # the caution near the summary and in the footer
    assert html.count(CAUTION) == 2
    flagged = _row_of_line(html, BLUNDER_LINE)
    assert "is-flagged" in flagged
    assert "⚑ Flagged" in flagged  # a symbol and a word, not colour alone
    assert "KR-106 → KR-107" in re.sub(r"<[^>]+>", "", flagged)
    assert "-6.19" in flagged  # tools/DEMOS.md: w = -6.19
    assert html.count('class="is-flagged"') >= 1
    assert len(re.findall(r'<tr class="is-flagged" data-line=', html)) == 1
    assert "✕ Exceeds" in html  # loops over the 5 mm/√km allowance
    for link in ("report.html", "points.csv", "result.json"):
        assert f'href="{url}/{link}"' in html


def test_downloads_are_attachments_with_safe_names(client):
    url = _project_url(_upload(client, BLUNDER.read_bytes(), 'C:\\tmp\\../"evil"; name.fieldbook'))
    for suffix, kind in (
        ("report.html", "text/html"),
        ("points.csv", "text/csv"),
        ("result.json", "application/json"),
    ):
        response = client.get(f"{url}/{suffix}")
        assert response.status_code == 200
        assert response.headers["content-type"].startswith(kind)
        disposition = response.headers["content-disposition"]
        match = re.fullmatch(r'attachment; filename="([A-Za-z0-9._-]+)"', disposition)
        assert match, disposition
        assert ".." not in match.group(1)
    rows = list(csv.DictReader(io.StringIO(client.get(f"{url}/points.csv").text)))
    assert {"BM-TANNERY", "KR-106", "KR-107"} <= {r["name"] for r in rows}
    result = client.get(f"{url}/result.json").json()
    assert [o["line"] for o in result["observations"] if o["flagged"]] == [BLUNDER_LINE]


def test_report_download_carries_a_csp_that_allows_only_its_own_style(client):
    url = _project_url(_upload(client, BLUNDER.read_bytes(), "leveling_blunder.fieldbook"))
    response = client.get(f"{url}/report.html")
    style = re.search(r"<style>(.*?)</style>", response.text, re.DOTALL).group(1)
    digest = base64.b64encode(hashlib.sha256(style.encode()).digest()).decode()
    csp = response.headers["content-security-policy"]
    assert f"style-src 'sha256-{digest}'" in csp
    assert "script-src" not in csp  # default-src 'none' forbids scripts
    assert "frame-ancestors 'none'" in csp
    assert CAUTION in response.text


def test_original_field_book_is_kept_byte_for_byte(client):
    raw = BLUNDER.read_bytes().replace(b"\n", b"\r\n")
    url = _project_url(_upload(client, raw, "crlf.fieldbook"))
    assert client.get(f"{url}/fieldbook").content == raw
    page = client.get(url).text
    assert hashlib.sha256(raw).hexdigest() in page


def test_pasted_text_is_adjusted_like_a_file(client):
    response = client.post(
        "/projects",
        data={"text": BLUNDER.read_text(), "name": "Pasted run"},
        follow_redirects=False,
    )
    html = client.get(_project_url(response)).text
    assert "Pasted run" in html
    assert "is-flagged" in _row_of_line(html, BLUNDER_LINE)


def test_empty_form_asks_for_a_field_book(client):
    response = client.post("/projects", data={"text": "  "}, files={"fieldbook": ("", b"")})
    assert response.status_code == 400
    assert "Choose a field book file or paste its text" in response.text
    assert client.get("/api/projects").json()["projects"] == []


def test_field_book_errors_are_listed_with_line_numbers_and_the_upload_is_kept(client):
    raw = b"fieldbook 1\ndefaults level=1mm\nlevle A B 1.0\npoint A height=1 fix\nlevel A B\n"
    url = _project_url(_upload(client, raw, "typo.fieldbook"))
    page = client.get(url)
    assert page.status_code == 200
    html = page.text
    assert "The field book has errors" in html
    assert "Line 3" in html and "Line 5" in html
    assert "levle A B 1.0" in html  # the offending line is shown
    assert "Traceback" not in html
    assert client.get(f"{url}/fieldbook").content == raw
    assert client.get(f"{url}/report.html").status_code == 404  # nothing to report
    listed = client.get("/projects").text
    assert "Upload failed: field book errors" in listed


def test_non_utf8_upload_gets_the_line_numbered_message(client):
    raw = b'defaults level=1mm\npoint A height=1 fix\nlevel A B 1.0 note="caf\xe9"\n'
    url = _project_url(_upload(client, raw, "latin1.fieldbook"))
    html = client.get(url).text
    assert "Line 3" in html and "UTF-8" in html
    response = client.post("/api/adjust", files={"fieldbook": ("latin1.fieldbook", raw)})
    assert response.status_code == 422
    (error,) = response.json()["errors"]
    assert error["line"] == 3 and "UTF-8" in error["message"]


def test_network_errors_name_the_points(client):
    url = _project_url(_upload(client, b"defaults level=1mm\nlevel A B 1.0\n", "nodatum.fieldbook"))
    html = client.get(url).text
    assert "The network cannot be adjusted" in html
    assert '<code class="mark">A</code>' in html and '<code class="mark">B</code>' in html


def test_demo_opens_as_a_new_project(client):
    index = client.get("/").text
    assert 'action="/demos/leveling_blunder"' in index
    response = client.post("/demos/leveling_blunder", follow_redirects=False)
    html = client.get(_project_url(response)).text
    assert "is-flagged" in _row_of_line(html, BLUNDER_LINE)
    assert client.get("/demos/leveling_blunder").text == BLUNDER.read_text()


@pytest.mark.parametrize(
    "name",
    [
        "..%2F..%2Fetc%2Fpasswd",
        "..%2Fserver%2F__init__",
        "%2Fetc%2Fpasswd",
        "%2e%2e",
        "%2e%2e%2f%2e%2e%2fetc%2fpasswd",
        "leveling_blunder.fieldbook",
        "leveling_blunder%00",
        "LEVELING_BLUNDER",
    ],
)
def test_demo_route_never_opens_a_path_from_the_request(client, name):
    for method in ("GET", "POST"):
        response = client.request(method, f"/demos/{name}", follow_redirects=False)
        assert response.status_code == 404, (method, name)
        assert "root:" not in response.text and "__version__" not in response.text
    assert client.get("/api/projects").json()["projects"] == []


def test_project_list_shows_counts_and_verdicts(client):
    _project_url(_upload(client, BLUNDER.read_bytes(), "leveling_blunder.fieldbook"))
    clean = (DEMOS / "leveling_clean.fieldbook").read_bytes()
    _project_url(_upload(client, clean, "clean.fieldbook"))
    html = client.get("/projects").text
    assert "Kestrel Ridge" in html and "Millbeck Hollow" in html
    assert "✕ Fails, 1 flagged" in html
    assert "✓ Passes" in html
    assert ">39<" in html  # observations of the blunder demo


# ---------------------------------------------------------------------------------------
# escaping and spreadsheet safety


def test_hostile_point_names_are_escaped_on_the_page_and_in_the_report(client):
    url = _project_url(_upload(client, HOSTILE.encode(), "hostile.fieldbook"))
    for path in (url, f"{url}/report.html"):
        html = client.get(path).text
        assert SCRIPT_NAME not in html, path
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in html, path
    assert SCRIPT_NAME not in client.get("/projects").text


def test_csv_download_guards_formula_names_but_not_numbers(client):
    url = _project_url(_upload(client, HOSTILE.encode(), "hostile.fieldbook"))
    rows = {r["name"]: r for r in csv.DictReader(io.StringIO(client.get(f"{url}/points.csv").text))}
    assert {"'+1", "'@A1", "'-X", SCRIPT_NAME} == set(rows)
    assert rows["'+1"]["height"] == "5.0000"
    # the plain-number cells never get an apostrophe
    assert all(not r["height"].startswith("'") for r in rows.values())


def test_csv_keeps_negative_heights_numeric(client):
    text = b"defaults level=1mm\npoint BM height=0.5000 fix\nlevel BM LOW -2.0000\n"
    url = _project_url(_upload(client, text, "low.fieldbook"))
    rows = {r["name"]: r for r in csv.DictReader(io.StringIO(client.get(f"{url}/points.csv").text))}
    assert rows["LOW"]["height"] == "-1.5000"


# ---------------------------------------------------------------------------------------
# JSON API (the result JSON of to_json_dict; keys keep their meaning, new keys may be added)


def test_api_adjust_returns_the_contract(client):
    response = client.post(
        "/api/adjust", files={"fieldbook": ("b.fieldbook", BLUNDER.read_bytes())}
    )
    assert response.status_code == 200
    body = response.json()
    assert set(body) >= CONTRACT_KEYS
    assert body["format"] == 1 and body["units"] == {"length": "m", "angle_residual": "arcsec"}
    assert body["summary"]["global_test"]["passed"] is False
    assert body["summary"]["redundancy"] == 11  # tools/DEMOS.md
    assert all(set(o) >= OBSERVATION_KEYS for o in body["observations"])
    assert [o["line"] for o in body["observations"] if o["flagged"]] == [BLUNDER_LINE]
    assert body["caution"] == CAUTION
    assert client.get("/api/projects").json()["projects"] == []  # not stored


def test_api_adjust_reports_field_book_errors_with_line_numbers(client):
    bad = b"defaults level=1mm\npoint A height=1 fix\nlevle A B 1.0\nlevel A B 1.0 len=420\n"
    response = client.post("/api/adjust", files={"fieldbook": ("bad.fieldbook", bad)})
    assert response.status_code == 422
    errors = response.json()["errors"]
    assert [e["line"] for e in errors] == [3, 4]
    assert all(isinstance(e["message"], str) and e["message"] for e in errors)


def test_api_adjust_reports_network_errors_with_points(client):
    text = b"defaults level=1mm\nlevel A B 1.0\n"
    response = client.post("/api/adjust", files={"fieldbook": ("n.fieldbook", text)})
    assert response.status_code == 422
    body = response.json()
    assert body["points"] == ["A", "B"]
    assert "datum" in body["error"]


def test_api_adjust_accepts_the_field_as_plain_text(client):
    response = client.post("/api/adjust", data={"fieldbook": BLUNDER.read_text()})
    assert response.status_code == 200
    assert response.json()["summary"]["observations"] == 39


def test_api_adjust_without_the_field_says_which_field(client):
    response = client.post("/api/adjust", files={"other": ("x", b"level A B 1")})
    assert response.status_code == 422
    assert "'fieldbook'" in response.json()["error"]


def test_api_projects_store_list_and_fetch(client):
    files = {"fieldbook": ("b.fieldbook", BLUNDER.read_bytes())}
    created = client.post("/api/projects", files=files)
    assert created.status_code == 201
    body = created.json()
    assert set(body) == {"id", "result"}
    assert set(body["result"]) >= CONTRACT_KEYS
    project_id = body["id"]
    assert created.headers["location"] == f"/api/projects/{project_id}"

    listed = client.get("/api/projects").json()["projects"]
    assert [p["id"] for p in listed] == [project_id]
    assert listed[0]["summary"]["observations"] == 39 and listed[0]["status"] == "finished"

    fetched = client.get(f"/api/projects/{project_id}").json()
    assert fetched["result"] == body["result"]
    assert fetched["sha256"] == hashlib.sha256(BLUNDER.read_bytes()).hexdigest()
    assert fetched["filename"] == "b.fieldbook"


def test_api_project_that_cannot_adjust_is_stored_with_its_errors(client):
    created = client.post("/api/projects", files={"fieldbook": ("x.fieldbook", b"levle A B 1\n")})
    assert created.status_code == 201
    body = created.json()
    assert body["result"] is None
    assert body["errors"][0]["line"] == 1
    fetched = client.get(f"/api/projects/{body['id']}").json()
    assert fetched["status"] == "failed" and fetched["result"] is None
    assert fetched["errors"][0]["line"] == 1


@pytest.mark.parametrize("project_id", ["0" * 32, "not-an-id", "..%2F..%2Fetc"])
def test_unknown_projects_are_404(client, project_id):
    api = client.get(f"/api/projects/{project_id}")
    assert api.status_code == 404
    assert "error" in api.json()
    for suffix in ("", "/report.html", "/points.csv", "/result.json", "/fieldbook"):
        page = client.get(f"/projects/{project_id}{suffix}")
        assert page.status_code == 404, suffix
    assert "Not found" in client.get(f"/projects/{project_id}").text


# ---------------------------------------------------------------------------------------
# limits, errors and headers


def test_oversize_upload_is_refused_by_content_length(tmp_path):
    app = create_app(tmp_path, max_upload_bytes=2000)
    with TestClient(app) as client:
        big = b"# padding\n" * 400
        page = client.post("/projects", files={"fieldbook": ("big.fieldbook", big)})
        assert page.status_code == 413
        assert "larger than the limit of 2000 bytes" in page.text
        api = client.post("/api/adjust", files={"fieldbook": ("big.fieldbook", big)})
        assert api.status_code == 413
        assert "limit" in api.json()["error"]
        assert client.get("/api/projects").json()["projects"] == []


def test_oversize_upload_is_refused_while_reading_without_content_length(tmp_path):
    app = create_app(tmp_path, max_upload_bytes=2000)
    boundary = "sfboundary"
    head = (
        f'--{boundary}\r\nContent-Disposition: form-data; name="fieldbook"; '
        f'filename="big.fieldbook"\r\nContent-Type: text/plain\r\n\r\n'
    ).encode()

    def chunks():
        yield head
        for _ in range(50):
            yield b"# padding padding padding padding padding padding padding padding\n"
        yield f"\r\n--{boundary}--\r\n".encode()

    with TestClient(app) as client:
        response = client.post(
            "/api/projects",
            content=chunks(),
            headers={"content-type": f"multipart/form-data; boundary={boundary}"},
        )
        assert response.status_code == 413
        assert client.get("/api/projects").json()["projects"] == []


def test_upload_just_under_the_limit_is_accepted(tmp_path):
    raw = BLUNDER.read_bytes()
    app = create_app(tmp_path, max_upload_bytes=len(raw) + 1000)
    with TestClient(app) as client:
        response = client.post("/api/adjust", files={"fieldbook": ("b.fieldbook", raw)})
        assert response.status_code == 200


def test_security_headers_on_every_response(client):
    url = _project_url(_upload(client, BLUNDER.read_bytes()))
    for path in (
        "/",
        "/projects",
        url,
        f"{url}/points.csv",
        "/static/app.css",
        "/static/app.js",
        "/projects/" + "0" * 32,
        "/api/projects",
    ):
        response = client.get(path)
        headers = response.headers
        assert headers["x-content-type-options"] == "nosniff", path
        assert headers["referrer-policy"] == "no-referrer", path
        csp = headers["content-security-policy"]
        assert "frame-ancestors 'none'" in csp, path
        assert "unsafe-inline" not in csp, path


def test_pages_have_no_inline_scripts_or_styles(client):
    url = _project_url(_upload(client, BLUNDER.read_bytes()))
    for path in ("/", "/projects", url):
        html = client.get(path).text
        assert re.findall(r"<script(?![^>]*\bsrc=)[^>]*>", html) == [], path
        assert "<style" not in html and " style=" not in html, path
        assert not re.search(r"<[^>]+\son[a-z]+\s*=", html), path  # no event handler attributes
        assert "http://" not in html and "https://" not in html, path  # no external resources


def test_server_error_page_never_shows_a_traceback(app):
    def explode() -> None:
        raise RuntimeError("secret internal detail")

    app.add_api_route("/boom", explode)
    app.add_api_route("/api/boom", explode)
    with TestClient(app, raise_server_exceptions=False) as client:
        page = client.get("/boom")
        assert page.status_code == 500
        assert "secret internal detail" not in page.text and "Traceback" not in page.text
        assert "Something went wrong" in page.text
        assert page.headers["x-content-type-options"] == "nosniff"
        assert "frame-ancestors 'none'" in page.headers["content-security-policy"]
        api = client.get("/api/boom")
        assert api.status_code == 500 and api.json() == {"error": "internal server error"}


def test_adjustment_runs_off_the_event_loop(client, monkeypatch):
    from server.store import projects as routes

    seen: list[bool] = []

    def spying(real):
        def spy(*args, **kwargs):
            try:
                asyncio.get_running_loop()
                seen.append(True)
            except RuntimeError:
                seen.append(False)
            return real(*args, **kwargs)

        return spy

    # /api/adjust adjusts the text; an upload parses first (for the title), then adjusts
    monkeypatch.setattr(routes, "adjust_fieldbook", spying(routes.adjust_fieldbook))
    monkeypatch.setattr(routes, "adjust_parsed", spying(routes.adjust_parsed))
    response = client.post("/api/adjust", files={"fieldbook": ("b", BLUNDER.read_bytes())})
    assert response.status_code == 200
    _project_url(_upload(client, BLUNDER.read_bytes()))
    assert seen == [False, False]  # both ran in a worker thread, not on the loop


def test_projects_persist_across_app_restarts(tmp_path):
    with TestClient(create_app(tmp_path)) as first:
        url = _project_url(_upload(first, BLUNDER.read_bytes(), "leveling_blunder.fieldbook"))
    with TestClient(create_app(tmp_path)) as second:
        html = second.get(url).text
        assert "is-flagged" in _row_of_line(html, BLUNDER_LINE)


# ---------------------------------------------------------------------------------------
# a field book that cannot be adjusted: no result wording, marked in the list

BAD_DEFAULTS = b"""fieldbook 1
defaults angle=5" distance=2mm
point A east=0 north=0 fix
point B east=100 north=0 fix
angle A C B 60:00:00
distance A C 94.34
"""


def test_a_failed_upload_says_nothing_was_adjusted_and_shows_no_result_wording(client):
    page = client.get(_project_url(_upload(client, BAD_DEFAULTS, "bad.fieldbook"))).text
    text = re.sub(r"\s+", " ", re.sub(r"<[^>]+>", " ", page))
    assert "nothing was adjusted" in text
    assert "Adjusted" not in text  # no adjustment time: the run never adjusted anything
    assert re.search(r"Checked \d{4}-\d\d-\d\d \d\d:\d\d UTC, not adjusted", text)
    assert CAUTION not in text and "These results" not in text
    # the root cause once, with the value to write
    assert text.count("Line ") == 1 and "write 5sec" in text


def test_failed_uploads_are_marked_in_the_projects_list(client):
    _project_url(_upload(client, BLUNDER.read_bytes(), "good.fieldbook"))
    bad = _project_url(_upload(client, BAD_DEFAULTS, "bad.fieldbook"))
    html = client.get("/projects").text
    rows = re.findall(r"<tr[^>]*>.*?</tr>", html.split("<tbody>")[1], re.DOTALL)
    (failed,) = [r for r in rows if "bad.fieldbook" in r]
    (good,) = [r for r in rows if "good.fieldbook" in r]
    assert "data-failed" in failed and "Upload failed: field book errors" in failed
    assert f'href="{bad}">Errors</a>' in failed and f"{bad}/review" not in failed
    assert "data-failed" not in good and "Upload failed" not in good


def test_an_upload_the_network_cannot_adjust_is_marked_as_failed_too(client):
    text = b"defaults distance=2mm\npoint A east=0 north=0 fix\ndistance A B 10\n"
    url = _project_url(_upload(client, text, "loose.fieldbook"))
    assert "Adjusted" not in client.get(url).text
    assert "Upload failed: the network cannot be adjusted" in client.get("/projects").text


# ---------------------------------------------------------------------------------------
# compression


def test_a_large_page_is_sent_gzip_compressed_when_the_browser_accepts_it(client):
    import gzip

    url = _project_url(_upload(client, BLUNDER.read_bytes()))
    plain = client.get(f"{url}/review", headers={"Accept-Encoding": "identity"})
    packed = client.get(f"{url}/review", headers={"Accept-Encoding": "gzip, deflate"})
    assert plain.status_code == packed.status_code == 200
    assert "content-encoding" not in plain.headers
    assert packed.headers["content-encoding"] == "gzip"
    assert "Accept-Encoding" in packed.headers["vary"]
    assert len(plain.content) > 50_000
    # what went over the wire is gzip of the very page, at a fraction of its size
    assert packed.num_bytes_downloaded < len(plain.content) / 5
    assert packed.content == plain.content
    # the security headers survive the compression
    assert packed.headers["content-security-policy"] == plain.headers["content-security-policy"]
    # the bytes on the wire are a gzip stream of the page
    with client.stream("GET", f"{url}/review", headers={"Accept-Encoding": "gzip"}) as response:
        raw = b"".join(response.iter_raw())
    assert raw[:2] == b"\x1f\x8b" and gzip.decompress(raw) == plain.content


def test_small_responses_and_pdfs_are_sent_as_they_are(client):
    url = _project_url(_upload(client, BLUNDER.read_bytes()))
    small = client.get("/static/favicon.svg", headers={"Accept-Encoding": "gzip"})
    assert small.status_code == 200 and len(small.content) < 1024
    assert "content-encoding" not in small.headers
    pdf = client.get(f"{url}/report.pdf", headers={"Accept-Encoding": "gzip"})
    assert pdf.content.startswith(b"%PDF-") and "content-encoding" not in pdf.headers
