"""The web service against hostile requests: its own OpenAPI contract, paths, escaping, limits.

* schemathesis generates requests from the service's own OpenAPI schema and
  sends them to the app in process; no answer may be a 5xx, every answer
  carries the security headers, and the API answers JSON.
* A property test throws ``../``, absolute paths, encoded slashes and NUL at
  every route parameter while an audit hook records each file the process
  opens: nothing outside the service's own folders is opened, and no opened
  path contains what the request sent.
* Every string a surveyor types (point names, notes, the title, the reason of
  a decision) comes back escaped on every page, in the SVG plots and in the
  downloadable report.
* The project-count limit, the multipart field limits and the Host check.
"""

from __future__ import annotations

import re
import sys
import threading
import warnings
from collections import Counter
from collections.abc import Iterator
from pathlib import Path
from urllib.parse import quote

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from hypothesis.errors import Unsatisfiable

from server.web import create_app
from server.web.app import DATABASE_NAME, SECURITY_HEADERS, serve_allowed_hosts
from tests.hypothesis_profiles import examples
from tests.postgres import app_on

with warnings.catch_warnings():
    # starlette's test client prefers httpx2 and warns when it finds only httpx
    warnings.simplefilter("ignore")
    import schemathesis
    from fastapi.testclient import TestClient
    from schemathesis import GenerationMode

REPO = Path(__file__).resolve().parents[1]
DEMOS = REPO / "demo_projects"
BLUNDER = (DEMOS / "leveling_blunder.fieldbook").read_bytes()
SCRIPT = "<script>alert(1)</script>"
# Every user-typed string of the field book carries markup that would run if not escaped.
HOSTILE_BOOK = f"""fieldbook 1
title "Quotes \\" and ' and </title><script>alert(2)</script>"
defaults level=1mm
point {SCRIPT} height=10.0000 fix note="<img src=x onerror=alert(3)>"
point BM-2 height=12.0000 fix note="</textarea><svg onload=alert(4)>"
level {SCRIPT} <b>NEW</b> +1.0005 note="<iframe src=javascript:alert(5)>"
level <b>NEW</b> BM-2 +0.9990
level BM-2 {SCRIPT} -2.0030
level <b>NEW</b> {SCRIPT} -1.0001
""".encode()
# A horizontal network, so that the names are drawn in the SVG network plot too.
HOSTILE_PLOT = f"""title "Plot </title><script>alert(7)</script>"
defaults direction=1sec distance=2mm centering=0mm
point {SCRIPT} east=1000.000 north=1000.000 fix note="<img src=x onerror=alert(8)>"
point B east=1300.000 north=1000.000 fix
directions {SCRIPT}
  B 0:00:00
  <b>C</b> 45:00:01
  D 90:00:01
end
directions B
  {SCRIPT} 0:00:00
  <b>C</b> 270:00:02
end
distance {SCRIPT} <b>C</b> 424.2655
distance B <b>C</b> 300.0021
distance {SCRIPT} D 300.0020
distance <b>C</b> D 300.0008
""".encode()
EXAMPLES_PER_OPERATION = examples(10)
NUMBERED_EXAMPLES = examples(60)
RAW_MARKUP = [
    SCRIPT,
    "<script>alert(2)</script>",
    "<img src=x",
    "<svg onload",
    "<iframe",
    "<b>",
    "</title><script>",
    "alert(7)</script>",
]


# ---------------------------------------------------------------------------------------
# fixtures


@pytest.fixture
def client(tmp_path: Path) -> Iterator[TestClient]:
    with TestClient(create_app(tmp_path / "data")) as c:
        yield c


def _create(client: TestClient, data: bytes, filename: str = "hostile.fieldbook") -> str:
    response = client.post("/api/projects", files={"fieldbook": (filename, data, "text/plain")})
    assert response.status_code == 201, response.text
    return response.json()["id"]


def _header(response, key: str) -> str:
    """One header of an httpx or a schemathesis response (whose values are lists)."""
    value = {k.lower(): v for k, v in response.headers.items()}.get(key.lower(), "")
    return ", ".join(value) if isinstance(value, list) else value


def _assert_security_headers(response, where: str) -> None:
    for key, value in SECURITY_HEADERS.items():
        if key == "Content-Security-Policy":
            csp = _header(response, key)
            assert "frame-ancestors 'none'" in csp and "default-src 'none'" in csp, where
            assert "unsafe-inline" not in csp and "unsafe-eval" not in csp, where
        else:
            assert _header(response, key) == value, (where, key)


# ---------------------------------------------------------------------------------------
# the OpenAPI contract, fuzzed by schemathesis (in process, no network)


def test_openapi_operations_never_answer_5xx(tmp_path, store_location):
    """Every documented operation, with generated paths, queries and bodies: never a 5xx.

    Valid (positive) and invalid (negative) requests per operation, with the examples fixed
    by the Hypothesis profile (tests/conftest.py).  Half of the cases get the id of a real
    stored project in place of the generated one, so that the other path parameters (run
    numbers) reach the database instead of stopping at "no such project"; the schemathesis
    pytest plugin is not used (it does not load under this pytest).
    """
    app = app_on(store_location, tmp_path, max_upload_bytes=64 * 1024)
    with TestClient(app) as seed:
        real_project = _create(seed, BLUNDER, "leveling_blunder.fieldbook")
    schema = schemathesis.openapi.from_asgi("/api/openapi.json", app)
    operations = [result.ok() for result in schema.get_all_operations()]
    assert len(operations) >= 20
    statuses: Counter[int] = Counter()
    reached: Counter[str] = Counter()
    for operation in operations:
        # a number in the path gets more examples, so that the out-of-range ones come up
        numbered = re.search(r"\{(run|edit)_id\}", operation.path) is not None
        for mode in (GenerationMode.POSITIVE, GenerationMode.NEGATIVE):

            @settings(
                max_examples=NUMBERED_EXAMPLES if numbered else EXAMPLES_PER_OPERATION,
                suppress_health_check=list(HealthCheck),
            )
            @given(case=operation.as_strategy(generation_mode=mode), real=st.booleans())
            def run(case, real) -> None:
                parameters = case.path_parameters or {}
                if real and "project_id" in parameters:
                    parameters["project_id"] = real_project
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore", DeprecationWarning)
                    response = case.call()
                # run() is called at once, inside this iteration of the loop
                where = f"{case.method} {case.formatted_path} ({mode.value})"  # noqa: B023
                statuses[response.status_code] += 1
                if real_project in case.formatted_path:
                    reached[case.path] += 1
                assert response.status_code < 500, (
                    where,
                    response.status_code,
                    response.text[:500],
                )
                _assert_security_headers(response, where)
                if case.path.startswith("/api/"):
                    assert _header(response, "content-type").startswith("application/json"), where

            try:
                run()
            except Unsatisfiable:
                continue  # nothing invalid to send (an operation without parameters)
    assert sum(statuses.values()) >= EXAMPLES_PER_OPERATION * len(operations)
    assert statuses[201] >= 1 and statuses[200] >= 1  # some uploads were valid enough to store
    # the real project was used on the run route, so its run numbers met the database
    assert reached["/api/projects/{project_id}/runs/{run_id}"] >= 1, reached
    assert len(reached) >= 5, reached


def test_ids_beyond_the_database_integer_range_are_not_found(tmp_path, store_location):
    """Run and decision numbers SQLite (or PostgreSQL's bigint) cannot hold name nothing:
    404, never a 500."""
    with TestClient(app_on(store_location, tmp_path)) as client:
        _ids_beyond_range(client)


def _ids_beyond_range(client: TestClient) -> None:
    project_id = _create(client, BLUNDER, "leveling_blunder.fieldbook")
    review = client.get(f"/projects/{project_id}/review").text
    token = re.search(r'name="token" value="([0-9a-f]{32})"', review).group(1)
    huge = ["99999999999999999999999", str(2**63), str(2**64), "0", "-1", "1e3", "not-a-number"]
    for number in huge:
        api = client.get(f"/api/projects/{project_id}/runs/{number}")
        assert api.status_code == 404, (number, api.status_code)
        assert api.headers["content-type"].startswith("application/json")
        assert "error" in api.json()
        undo = client.post(
            f"/projects/{project_id}/edits/{number}/undo",
            data={"token": token},
            follow_redirects=False,
        )
        assert undo.status_code == 404, (number, undo.status_code)
        assert "Not found" in undo.text
    # the largest id SQLite stores is a valid number that names no run
    assert client.get(f"/api/projects/{project_id}/runs/{2**63 - 1}").status_code == 404
    first = client.get(f"/api/projects/{project_id}").json()["runs"][0]["id"]
    assert client.get(f"/api/projects/{project_id}/runs/{first}").json()["status"] == "finished"


def test_head_is_answered_wherever_get_is(client):
    """HEAD gives GET's status and headers without the body, on pages, downloads and the API."""
    project_id = _create(client, BLUNDER, "leveling_blunder.fieldbook")
    paths = client.get("/api/openapi.json").json()["paths"]
    gets = [p for p, ops in paths.items() if "get" in ops]
    urls = [
        p.replace("{project_id}", project_id)
        .replace("{name}", "leveling_blunder")
        .replace("{run_id}", "1")
        for p in gets
    ]
    urls += ["/static/app.js", "/projects/" + "f" * 32, "/no/such/page"]
    assert len(urls) >= 13
    for url in urls:
        get, head = client.get(url), client.head(url)
        assert head.status_code == get.status_code != 405, (url, head.status_code)
        assert head.content == b"", url
        assert head.headers.get("content-type") == get.headers.get("content-type"), url
        if not url.endswith(".pdf"):  # a PDF carries the time it was drawn
            assert head.headers.get("content-length") == get.headers.get("content-length"), url
        _assert_security_headers(head, "HEAD " + url)
    # a route that only takes POST still refuses HEAD, as it refuses GET
    assert client.head("/api/adjust").status_code == client.get("/api/adjust").status_code == 405


def test_openapi_documents_the_upload_of_the_api(client):
    """The schema tells API clients what to send (and gives schemathesis bodies to fuzz)."""
    paths = client.get("/api/openapi.json").json()["paths"]
    for route in ("/api/adjust", "/api/projects"):
        body = paths[route]["post"]["requestBody"]["content"]["multipart/form-data"]["schema"]
        assert body["required"] == ["fieldbook"], route
        assert {"413", "422"} <= set(paths[route]["post"]["responses"]), route


# ---------------------------------------------------------------------------------------
# no path from a request reaches the file system

_OPENED: list[str] | None = None


def _audit(event: str, args: tuple) -> None:
    if _OPENED is not None and event == "open" and isinstance(args[0], (str, bytes, Path)):
        _OPENED.append(
            str(args[0], "utf-8", "replace") if isinstance(args[0], bytes) else str(args[0])
        )


sys.addaudithook(_audit)  # process-wide and permanent; records only while _OPENED is a list
_AUDIT_LOCK = threading.Lock()

TRAVERSALS = [
    "../",
    "..%2f",
    "..%2F",
    "%2e%2e%2f",
    "%2e%2e/",
    "..\\",
    "..%5c",
    "%252e%252e%252f",
    "....//",
    "/",
    "//",
    "%2f",
    "%00",
    "\x00",
    "%c0%af",
    "．．／",
    "~",
    "$HOME",
    "etc/passwd",
    "server/__init__.py",
    DATABASE_NAME,
    "secret.fieldbook",
    ".",
    "leveling_blunder",
    "static/app.js",
    "C:\\Windows\\win.ini",
    "%0a",
    "?",
    "#",
]
SECRET = "SENTINEL-9c41-not-for-the-web"
ROUTES = [
    "/projects/{p}",
    "/projects/{p}/report.html",
    "/projects/{p}/report.pdf",
    "/projects/{p}/points.csv",
    "/projects/{p}/points.geojson",
    "/projects/{p}/result.json",
    "/projects/{p}/fieldbook",
    "/projects/{p}/review",
    "/projects/{p}/compare",
    "/projects/{p}/fieldbook/edited",
    "/projects/{p}/edits",
    "/projects/{p}/runs",
    "/projects/{p}/edits/{p}/undo",
    "/projects/{p}/delete",
    "/projects/{p}/confirm-delete",
    "/demos/{p}",
    "/api/projects/{p}",
    "/api/projects/{p}/runs/{p}",
    "/static/{p}",
    "/{p}",
]


@pytest.fixture(scope="module")
def walled(tmp_path_factory: pytest.TempPathFactory):
    """An app whose data folder has a secret file beside it, and the roots it may open."""
    top = tmp_path_factory.mktemp("walled")
    (top / "secret.fieldbook").write_text(SECRET)
    data = top / "data"
    app = create_app(data)
    allowed = [
        REPO / "static",
        REPO / "templates",
        REPO / "demo_projects",
        REPO / "server",
        data,
        Path(sys.prefix),
        Path(sys.base_prefix),
        Path(sys.exec_prefix),
    ]
    with TestClient(app) as c:
        project_id = _create(c, BLUNDER, "leveling_blunder.fieldbook")
        yield c, project_id, [a.resolve() for a in allowed], top


def _escape(match: re.Match[str]) -> str:
    return quote(match.group(0))


def _inside(path: str, roots: list[Path]) -> bool:
    resolved = Path(path).resolve()
    return any(resolved == root or root in resolved.parents for root in roots)


@settings(max_examples=examples(120), suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(
    route=st.sampled_from(ROUTES),
    pieces=st.lists(st.sampled_from(TRAVERSALS), min_size=1, max_size=4),
    encode=st.booleans(),
    method=st.sampled_from(["GET", "POST"]),
)
def test_route_parameters_never_reach_the_file_system(walled, route, pieces, encode, method):
    global _OPENED
    client, project_id, roots, top = walled
    value = "".join(pieces)
    if "secret" in value:
        value = value.replace("secret.fieldbook", str(top / "secret.fieldbook").lstrip("/"))
    # raw: as a hand-made request would send it (control bytes must be %-escaped even so)
    shown = quote(value, safe="") if encode else re.sub(r"[\x00-\x20]", _escape, value)
    url = route.replace("{p}", shown)
    with _AUDIT_LOCK:
        _OPENED = []
        try:
            response = client.request(method, url, follow_redirects=False)
        finally:
            opened, _OPENED = _OPENED, None
    assert response.status_code < 500, (method, url, response.status_code)
    body = response.content
    assert SECRET.encode() not in body and b"root:x:0:0" not in body, url
    assert b"SQLite format 3" not in body and b"__version__" not in body, url
    outside = [path for path in opened if not _inside(path, roots)]
    assert outside == [], (url, outside)
    assert not any("secret" in path or "passwd" in path for path in opened), (url, opened)
    del project_id


def test_the_audit_hook_sees_what_the_service_opens(walled):
    """The property above can fail: a demo page opens its file, and the hook records it."""
    global _OPENED
    client, _, roots, _ = walled
    with _AUDIT_LOCK:
        _OPENED = []
        try:
            assert client.get("/demos/leveling_blunder").status_code == 200
        finally:
            opened, _OPENED = _OPENED, None
    assert any(path.endswith("leveling_blunder.fieldbook") for path in opened), opened
    assert all(_inside(path, roots) for path in opened)


# ---------------------------------------------------------------------------------------
# escaping of everything a surveyor types


def _decide(client: TestClient, project_id: str, line: int, reason: str) -> None:
    """Leave one observation out with a reason, and re-run (the review workflow)."""
    token = client.app.state.store.get_project(project_id).form_token
    queued = client.post(
        f"/projects/{project_id}/edits",
        follow_redirects=False,
        data={"token": token, "line": str(line), "action": "exclude", "reason": reason},
    )
    assert queued.status_code == 303, queued.text[:2000]
    rerun = client.post(
        f"/projects/{project_id}/runs", data={"token": token}, follow_redirects=False
    )
    assert rerun.status_code == 303, rerun.text[:2000]


def _no_live_markup(html: str, where: str) -> None:
    for raw in RAW_MARKUP:
        assert raw not in html, (where, raw)
    assert not re.search(r"<[a-z][^>]*\son[a-z]+\s*=", html, re.IGNORECASE), where
    assert "javascript:" not in html.lower().replace("javascript:alert(5)&gt;", ""), where


def test_user_strings_are_escaped_in_every_page_plot_and_report(client):
    project_id = _create(client, HOSTILE_BOOK)
    _decide(client, project_id, 9, '<script>alert(6)</script> said "the chief"')
    pages = [
        "/",
        "/projects",
        f"/projects/{project_id}",
        f"/projects/{project_id}/review",
        f"/projects/{project_id}/compare",
        f"/projects/{project_id}/report.html",
    ]
    for path in pages:
        response = client.get(path)
        assert response.status_code == 200, path
        html = response.text
        _no_live_markup(html, path)
        assert "<script>alert(6)" not in html, path
    page = client.get(f"/projects/{project_id}").text
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in page
    assert "<svg" in page  # the network plot is drawn, with the names escaped inside it
    title = re.search(r"<title>(.*?)</title>", page, re.DOTALL)
    assert title and "<" not in title.group(1), title
    review = client.get(f"/projects/{project_id}/review").text
    assert "&lt;script&gt;alert(6)&lt;/script&gt;" in review  # the reason is shown, as text
    report = client.get(f"/projects/{project_id}/report.html").text
    assert "&lt;/title&gt;&lt;script&gt;alert(2)&lt;/script&gt;" in report
    pdf = client.get(f"/projects/{project_id}/report.pdf")
    assert pdf.status_code == 200 and pdf.content.startswith(b"%PDF")

    plotted = _create(client, HOSTILE_PLOT)
    for path in (f"/projects/{plotted}", f"/projects/{plotted}/report.html"):
        html = client.get(path).text
        _no_live_markup(html, path)
        svg = re.search(r'<svg[^>]*class="np-[^"]*".*?</svg>', html, re.DOTALL)
        assert svg, f"{path}: no network plot"
        assert "&lt;script&gt;alert(1)&lt;/script&gt;" in svg.group(0), path
    data = re.search(
        r'<script type="application/json" id="np-data">(.*?)</script>',
        client.get(f"/projects/{plotted}").text,
        re.DOTALL,
    )
    assert data and "<" not in data.group(1)  # the data block cannot close its element


def test_json_downloads_are_never_sniffed_as_html(client):
    project_id = _create(client, HOSTILE_BOOK)
    for path in (
        f"/projects/{project_id}/result.json",
        f"/api/projects/{project_id}",
        f"/projects/{project_id}/fieldbook",
    ):
        response = client.get(path)
        assert response.status_code == 200, path
        assert response.headers["x-content-type-options"] == "nosniff", path
        assert not response.headers["content-type"].startswith("text/html"), path


# ---------------------------------------------------------------------------------------
# security headers on every page, errors included


def test_security_headers_on_every_route_and_error(client, tmp_path):
    project_id = _create(client, BLUNDER, "leveling_blunder.fieldbook")
    paths = client.get("/api/openapi.json").json()["paths"]
    gets = [p for p, ops in paths.items() if "get" in ops]
    assert len(gets) >= 10
    for template in gets:
        path = template.replace("{project_id}", project_id).replace("{name}", "leveling_blunder")
        path = path.replace("{run_id}", "1")
        response = client.get(path)
        assert response.status_code < 500, path
        _assert_security_headers(response, path)
    errors = [
        client.get("/projects/" + "f" * 32),
        client.get("/no/such/page"),
        client.get("/api/adjust"),
        client.post("/projects", data={"x": "1" * 10}),
        client.get(f"/api/projects/{project_id}/runs/not-a-number"),
    ]
    assert [r.status_code for r in errors] == [404, 404, 405, 400, 404]
    for response in errors:
        _assert_security_headers(response, str(response.url))
    with TestClient(create_app(tmp_path / "small", max_upload_bytes=100)) as small:
        too_big = small.post("/api/adjust", files={"fieldbook": ("b", BLUNDER)})
        assert too_big.status_code == 413
        _assert_security_headers(too_big, "413")


# ---------------------------------------------------------------------------------------
# limits


def test_project_count_limit_refuses_new_projects_but_keeps_the_old(tmp_path):
    with TestClient(create_app(tmp_path, max_projects=2)) as client:
        first, second = _create(client, BLUNDER), _create(client, BLUNDER)
        refused = client.post("/api/projects", files={"fieldbook": ("c", BLUNDER)})
        assert refused.status_code == 507
        assert "full (2 projects)" in refused.json()["error"]
        page = client.post("/projects", files={"fieldbook": ("c", BLUNDER)})
        assert page.status_code == 507 and "STATIONFIT_MAX_PROJECTS" in page.text
        demo = client.post("/demos/leveling_blunder", follow_redirects=False)
        assert demo.status_code == 507
        listed = {p["id"] for p in client.get("/api/projects").json()["projects"]}
        assert listed == {first, second}
        # adjusting without storing is still allowed
        assert client.post("/api/adjust", files={"fieldbook": ("c", BLUNDER)}).status_code == 200


def test_error_headline_counts_every_error_not_only_the_listed(client):
    """100 000 bad lines: 50 are listed, and the headline says 100,000 (not 51)."""
    book = b"defaults level=1mm\n" + b"level A\n" * 100_000
    api = client.post("/api/adjust", files={"fieldbook": ("many.fieldbook", book)})
    assert api.status_code == 422
    body = api.json()
    assert body["error"] == "the field book has 100,000 errors"
    assert body["error_count"] == 100_000 and len(body["errors"]) == 51
    page = client.post("/projects", files={"fieldbook": ("many.fieldbook", book)})
    assert "The field book has 100,000 errors." in page.text, page.text[:2000]
    assert "51 errors" not in page.text
    stored = client.get("/api/projects").json()["projects"][0]
    project = client.get(f"/api/projects/{stored['id']}").json()
    assert project["error"] == "the field book has 100,000 errors"
    assert project["error_count"] == 100_000


def test_limits_come_from_the_environment(tmp_path, monkeypatch):
    monkeypatch.setenv("STATIONFIT_MAX_PROJECTS", "1")
    monkeypatch.setenv("STATIONFIT_MAX_UPLOAD_BYTES", str(len(BLUNDER) - 1))
    with TestClient(create_app(tmp_path)) as client:
        assert client.post("/api/adjust", files={"fieldbook": ("b", BLUNDER)}).status_code == 413
        small = b"defaults level=1mm\npoint A height=1 fix\nlevel A B 1\n"
        assert client.post("/api/projects", files={"fieldbook": ("s", small)}).status_code == 201
        assert client.post("/api/projects", files={"fieldbook": ("s", small)}).status_code == 507
    monkeypatch.setenv("STATIONFIT_MAX_PROJECTS", "ten")
    with pytest.raises(ValueError, match="STATIONFIT_MAX_PROJECTS must be a whole number"):
        create_app(tmp_path)


@pytest.mark.parametrize("fields, files", [(40, 0), (0, 5)])
def test_too_many_form_parts_are_refused_without_storing(client, fields, files):
    data = {f"field{k}": "x" for k in range(fields)}
    parts = [("fieldbook", (f"f{k}.fieldbook", BLUNDER)) for k in range(files)]
    for route in ("/api/projects", "/projects"):
        if parts:
            response = client.post(route, data=data, files=parts)
        else:
            response = client.post(route, data={**data, "fieldbook": BLUNDER.decode()})
        assert response.status_code == 400, (route, response.status_code)
    assert client.get("/api/projects").json()["projects"] == []


def test_serve_answers_only_to_its_own_host_names(tmp_path, monkeypatch):
    """A web page cannot reach the service through DNS rebinding (a foreign Host header)."""
    monkeypatch.delenv("STATIONFIT_ALLOWED_HOSTS", raising=False)
    hosts = serve_allowed_hosts("127.0.0.1")
    assert set(hosts) == {"127.0.0.1", "localhost"}
    app = create_app(tmp_path, allowed_hosts=hosts)
    with TestClient(app, base_url="http://127.0.0.1:8000") as client:
        assert client.get("/").status_code == 200
        assert client.get("/", headers={"host": "localhost:8000"}).status_code == 200
        evil = client.get("/api/projects", headers={"host": "attacker.example"})
        assert evil.status_code == 400
        _assert_security_headers(evil, "foreign host")
    monkeypatch.setenv("STATIONFIT_ALLOWED_HOSTS", "survey.office.example, 127.0.0.1")
    assert serve_allowed_hosts("127.0.0.1") == ("survey.office.example", "127.0.0.1")
