"""Access control of the office service: every route, every role, from one table.

``EXPECTED`` below is this test's own statement of who may use each route (docs/security.md
has the same table for people).  ``test_every_route_has_a_rule`` enumerates the routes the
app really answers and fails when one is missing here or in ``server.web.access.ROUTE_RULES``,
so a route cannot be added without deciding who may use it.  The table-driven test then
sends every route as every role (and signed out) and checks that the allowed get through
and the others are refused; a project not shared with an account answers exactly like a
project that does not exist (404), so ids do not leak.
"""

from __future__ import annotations

import re
import uuid
import warnings
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

with warnings.catch_warnings():  # starlette's notice about httpx, as tests/test_web.py
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

from server.web import create_app
from server.web.access import (
    ANONYMOUS_PRINCIPAL,
    PUBLIC,
    READ,
    ROUTE_RULES,
    SESSION_COOKIE,
    WORKSTATION_PRINCIPAL,
    flat_routes,
)
from tests.test_review import TWO_BLUNDERS, leveling_with_blunders

PASSWORD = "level loops close nicely"
BOOK = leveling_with_blunders(TWO_BLUNDERS).encode()
#: One account per role: (name, role).
ACCOUNTS = {
    "viewer": "vera",
    "technician": "tom",
    "surveyor": "sam",
    "administrator": "ada",
}
ANONYMOUS = "signed out"

EVERYONE = frozenset({ANONYMOUS, *ACCOUNTS})
READERS = frozenset(ACCOUNTS)
WORKERS = frozenset({"technician", "surveyor"})  # upload, propose, re-run
SURVEYOR = frozenset({"surveyor"})  # approve
#: Delete, restore and share: the owner (here the technician who uploaded) and the surveyor.
OWNER_OR_SURVEYOR = frozenset({"technician", "surveyor"})

#: Who may use each route: (method, path template) -> the roles allowed.
EXPECTED: dict[tuple[str, str], frozenset[str]] = {
    ("GET", "/sign-in"): EVERYONE,
    ("POST", "/sign-in"): EVERYONE,
    ("POST", "/sign-out"): EVERYONE,
    ("GET", "/users"): frozenset({"administrator"}),
    ("GET", "/"): READERS,
    ("POST", "/projects"): WORKERS,
    ("GET", "/projects"): READERS,
    ("GET", "/projects/{project_id}"): READERS,
    ("GET", "/projects/{project_id}/import"): READERS,
    ("POST", "/projects/{project_id}/adjust"): WORKERS,
    ("POST", "/projects/{project_id}/discard"): OWNER_OR_SURVEYOR,
    ("GET", "/projects/{project_id}/report.html"): READERS,
    ("GET", "/projects/{project_id}/report.pdf"): READERS,
    ("GET", "/projects/{project_id}/report.txt"): READERS,
    ("GET", "/projects/{project_id}/points.csv"): READERS,
    ("GET", "/projects/{project_id}/points.geojson"): READERS,
    ("GET", "/projects/{project_id}/result.json"): READERS,
    ("GET", "/projects/{project_id}/fieldbook"): READERS,
    ("GET", "/projects/{project_id}/source"): READERS,
    ("GET", "/demos/{name}"): READERS,
    ("POST", "/demos/{name}"): WORKERS,
    ("GET", "/api/openapi.json"): READERS,
    ("POST", "/api/adjust"): WORKERS,
    ("POST", "/api/projects"): WORKERS,
    ("GET", "/api/projects"): READERS,
    ("GET", "/api/projects/{project_id}"): READERS,
    ("GET", "/api/projects/{project_id}/runs/{run_id}"): READERS,
    ("GET", "/projects/{project_id}/review"): READERS,
    ("POST", "/projects/{project_id}/edits"): WORKERS,
    ("POST", "/projects/{project_id}/edits/{edit_id}/undo"): WORKERS,
    ("POST", "/projects/{project_id}/relative-pairs"): WORKERS,
    ("POST", "/projects/{project_id}/runs"): WORKERS,
    ("POST", "/projects/{project_id}/runs/{run_id}/retry"): WORKERS,
    ("GET", "/projects/{project_id}/compare"): READERS,
    ("GET", "/projects/{project_id}/fieldbook/edited"): READERS,
    ("POST", "/projects/{project_id}/confirm-delete"): OWNER_OR_SURVEYOR,
    ("POST", "/projects/{project_id}/delete"): OWNER_OR_SURVEYOR,
    ("GET", "/deleted-projects"): READERS,
    ("POST", "/deleted-projects/{project_id}/restore"): OWNER_OR_SURVEYOR,
    ("POST", "/projects/{project_id}/runs/{run_id}/approve"): SURVEYOR,
    ("POST", "/projects/{project_id}/sharing"): OWNER_OR_SURVEYOR,
    ("GET", "/projects/{project_id}/runs/{run_id}/report.html"): READERS,
    ("GET", "/projects/{project_id}/runs/{run_id}/report.pdf"): READERS,
    ("GET", "/projects/{project_id}/runs/{run_id}/report.txt"): READERS,
    ("GET", "/projects/{project_id}/design"): READERS,
    ("GET", "/projects/{project_id}/design.json"): READERS,
    ("GET", "/projects/{project_id}/design.html"): READERS,
    ("GET", "/projects/{project_id}/design.pdf"): READERS,
    ("GET", "/monitoring"): READERS,
}

_TOKEN = re.compile(r'name="token" value="([0-9a-f]+)"')


@dataclass
class Office:
    """The app, a session cookie per role, and the projects the requests name."""

    app: Any
    client: TestClient
    cookies: dict[str, str]
    shared: str = ""  # the technician's project, shared with the whole office
    private: str = ""  # the surveyor's project, shared with no one
    run_id: int = 0
    edit_id: int = 0
    extra: dict[str, Any] = field(default_factory=dict)

    def token(self, project_id: str) -> str:
        project = self.app.state.store.get_project(project_id, deleted=True)
        if project is None:
            project = self.app.state.store.get_project(project_id)
        return project.form_token

    def send(self, role: str, method: str, url: str, **kwargs: Any):
        self.client.cookies.clear()
        headers = dict(kwargs.pop("headers", {}))
        if role != ANONYMOUS:
            headers["Cookie"] = f"{SESSION_COOKIE}={self.cookies[role]}"
        return self.client.request(method, url, headers=headers, follow_redirects=False, **kwargs)

    def upload_as(self, role: str, *, office: bool = True) -> str:
        response = self.send(role, "POST", "/api/projects", files=_book())
        assert response.status_code == 201, response.text
        project_id = response.json()["id"]
        if office:
            shared = self.send(
                role,
                "POST",
                f"/projects/{project_id}/sharing",
                data={"token": self.token(project_id), "office": "1"},
            )
            assert shared.status_code == 303, shared.text
        return project_id


def _book() -> dict[str, Any]:
    return {"fieldbook": ("net.fieldbook", BOOK, "text/plain")}


def sign_in(client: TestClient, name: str, password: str = PASSWORD):
    client.cookies.clear()
    return client.post(
        "/sign-in", data={"name": name, "password": password}, follow_redirects=False
    )


@pytest.fixture(scope="module")
def office(tmp_path_factory) -> Office:
    app = create_app(tmp_path_factory.mktemp("office"))
    for role, name in ACCOUNTS.items():
        app.state.accounts.add(name, role, PASSWORD)
    client = TestClient(app, base_url="http://127.0.0.1:8000")
    cookies = {}
    for role, name in ACCOUNTS.items():
        response = sign_in(client, name)
        assert response.status_code == 303, response.text
        cookies[role] = response.cookies[SESSION_COOKIE]
    office = Office(app, client, cookies)
    office.shared = office.upload_as("technician")
    office.private = office.upload_as("surveyor", office=False)
    (run,) = app.state.store.runs(office.shared)
    office.run_id = run.id
    line = next(k for k, text in enumerate(BOOK.decode().splitlines(), 1) if "M2 M4" in text)
    office.edit_id = app.state.store.add_pending_edit(
        office.shared,
        {"line": line, "action": "exclude", "reason": "misread", "date": "2026-12-04"},
        by=app.state.accounts.named("tom").actor,
    )
    return office


# --------------------------------------------------------------------------------------
# every route has a rule


def _app_routes(app) -> set[tuple[str, str]]:
    routes = set()
    for route in flat_routes(app.routes):
        for method in getattr(route, "methods", None) or ():
            if method != "HEAD":  # HEAD is answered wherever GET is, by the same rule
                routes.add((method, route.path))
    return routes


def test_every_route_has_a_rule(office):
    answered = _app_routes(office.app)
    assert answered, "no routes found: the enumeration is broken"
    assert answered - set(EXPECTED) == set(), "routes answered with no rule in this test"
    assert answered - set(ROUTE_RULES) == set(), "routes answered with no rule in access.py"
    assert set(EXPECTED) - answered == set(), "rules for routes the app no longer has"


def test_a_route_added_without_a_rule_is_refused_and_would_fail_the_test(tmp_path):
    app = create_app(tmp_path)
    app.state.accounts.add("sam", "surveyor", PASSWORD)

    @app.get("/projects/{project_id}/shiny-new-page")
    def shiny(project_id: str) -> dict[str, str]:
        return {"project": project_id}

    assert ("GET", "/projects/{project_id}/shiny-new-page") in _app_routes(app) - set(EXPECTED)
    with TestClient(app, base_url="http://127.0.0.1:8000") as client:
        assert sign_in(client, "sam").status_code == 303
        response = client.get("/projects/" + "a" * 32 + "/shiny-new-page")
        assert response.status_code == 403  # fail closed: no rule, no access


# --------------------------------------------------------------------------------------
# every route as every role


def _url(office: Office, path: str, project_id: str) -> str:
    return (
        path.replace("{project_id}", project_id)
        .replace("{run_id}", str(office.run_id))
        .replace("{edit_id}", str(office.edit_id))
        .replace("{name}", "leveling_clean")
    )


def _request(office: Office, role: str, method: str, path: str, project_id: str | None = None):
    """Send the route as ``role`` with what it needs; destructive ones on a fresh project."""
    if project_id is None:
        project_id = office.shared
        if path.endswith(("/delete", "/restore")):
            project_id = office.upload_as("technician")  # owned by the technician, shared
            if path.endswith("/restore"):
                office.app.state.store.delete_project(project_id)
    url = _url(office, path, project_id)
    token = (
        {"token": office.token(project_id)}
        if office.app.state.store.get_project(project_id, deleted=True)
        or office.app.state.store.get_project(project_id)
        else {"token": "0" * 32}
    )
    if method == "GET":
        return office.send(role, "GET", url)
    if path in ("/projects", "/api/projects", "/api/adjust"):
        return office.send(role, "POST", url, files=_book())
    if path == "/sign-in":
        return office.send(role, "POST", url, data={"name": "vera", "password": PASSWORD})
    if path == "/sign-out":
        return office.send(role, "POST", url, data={"token": "not the session's"})
    if path.endswith("/edits"):
        data = {**token, "line": "3", "action": "sd", "sd": "2mm", "reason": "older level"}
        return office.send(role, "POST", url, data=data)
    if path.endswith("/relative-pairs"):
        data = {**token, "from": "M1", "to": "M5", "reason": "client asks"}
        return office.send(role, "POST", url, data=data)
    if path.endswith("/sharing"):
        return office.send(role, "POST", url, data={**token, "office": "1"})
    return office.send(role, "POST", url, data=token)


def _refused(response) -> bool:
    """Refused by the access check: 401, 403, or sent to sign in first (``next=``)."""
    location = response.headers.get("location", "")
    return response.status_code in (401, 403) or location.startswith("/sign-in?next=")


@pytest.mark.parametrize(("method", "path"), sorted(EXPECTED))
def test_each_role_gets_exactly_what_the_table_allows(office, method, path):
    allowed = EXPECTED[(method, path)]
    assert (ROUTE_RULES[(method, path)] == PUBLIC) == (ANONYMOUS in allowed)
    for role in (ANONYMOUS, *ACCOUNTS):
        response = _request(office, role, method, path)
        assert response.status_code < 500, (role, response.status_code, response.text[:300])
        if role in allowed:
            assert not _refused(response), (role, response.status_code, response.text[:300])
        elif role == ANONYMOUS:
            if path.startswith("/api/"):
                assert response.status_code == 401, response.status_code
            else:
                assert response.status_code == 303
                assert response.headers["location"].startswith("/sign-in?next=")
        else:
            assert response.status_code == 403, (role, response.status_code)
            assert "may not" in response.text or "Only the project" in response.text


PROJECT_ROUTES = sorted(k for k in EXPECTED if "{project_id}" in k[1])


@pytest.mark.parametrize(("method", "path"), PROJECT_ROUTES)
def test_an_unshared_project_answers_like_one_that_does_not_exist(office, method, path):
    """The surveyor's private project, asked for by id by everyone else: the same answer as
    for an id no project has (404 wherever the role may use the route at all)."""
    nowhere = uuid.uuid4().hex
    for role in ("viewer", "technician", "administrator"):
        private = _request(office, role, method, path, office.private)
        absent = _request(office, role, method, path, nowhere)
        assert private.status_code == absent.status_code, (role, private.status_code)
        if role in EXPECTED[(method, path)]:
            assert private.status_code == 404, (role, private.status_code, private.text[:200])
    own = path.endswith(("{project_id}", "/review", "/report.txt", "/fieldbook"))
    if method == "GET" and own and "{run_id}" not in path:  # the run named is the shared one's
        owner = _request(office, "surveyor", method, path, office.private)
        assert owner.status_code == 200, (path, owner.status_code)


def test_lists_show_only_what_the_account_may_see(office):
    for role in ("viewer", "technician", "administrator"):
        listed = {p["id"] for p in office.send(role, "GET", "/api/projects").json()["projects"]}
        assert office.shared in listed and office.private not in listed
        assert office.private not in office.send(role, "GET", "/projects").text
        assert office.private not in office.send(role, "GET", "/monitoring").text
        compared = office.send(
            role, "GET", f"/monitoring?project={office.shared}&project={office.private}"
        )
        assert compared.status_code == 422 and "no project" in compared.text
    listed = {p["id"] for p in office.send("surveyor", "GET", "/api/projects").json()["projects"]}
    assert {office.shared, office.private} <= listed


def test_a_request_without_a_session_sees_no_project_even_where_it_is_let_through(office):
    """The principal of a signed-out request (public routes only) may read nothing, and the
    store gives it nothing: a public route added later cannot leak a project."""
    store = office.app.state.store
    nobody = ANONYMOUS_PRINCIPAL
    assert not nobody.workstation and not nobody.may(READ) and nobody.viewer is not None
    assert store.list_projects(nobody.viewer) == []
    assert store.get_project(office.shared, visible_to=nobody.viewer) is None
    assert store.list_projects(WORKSTATION_PRINCIPAL.viewer) != []  # the workstation: all


def test_static_files_are_served_to_the_sign_in_page(office):
    assert office.send(ANONYMOUS, "GET", "/static/app.css").status_code == 200
    assert office.send(ANONYMOUS, "HEAD", "/projects").status_code == 303


def test_a_technician_withdraws_only_their_own_proposals(office):
    """Deciding on another's proposal is the surveyor's: the technician may not withdraw the
    surveyor's queued decision, the surveyor may withdraw the technician's."""
    project = office.upload_as("technician")
    token = {"token": office.token(project)}
    for role, line in (("surveyor", "3"), ("technician", "4")):
        data = {**token, "line": line, "action": "exclude", "reason": f"{role} thinks so"}
        assert office.send(role, "POST", f"/projects/{project}/edits", data=data).status_code == 303
    by = {p.proposed_by: p.id for p in office.app.state.store.pending_edits(project)}
    assert set(by) == {"sam", "tom"}
    undo = f"/projects/{project}/edits/{by['sam']}/undo"
    refused = office.send("technician", "POST", undo, data=token)
    assert refused.status_code == 403 and "surveyor in responsible charge" in refused.text
    assert (
        office.send(
            "surveyor", "POST", f"/projects/{project}/edits/{by['tom']}/undo", data=token
        ).status_code
        == 303
    )
    trail = [(t.actor, t.event) for t in office.app.state.store.trail(project)]
    assert ("sam", "proposed") in trail and ("tom", "proposed") in trail
    assert ("sam", "withdrawn") in trail


def test_a_technician_may_not_delete_another_ones_project(office):
    project = office.upload_as("surveyor")  # shared with the office, owned by the surveyor
    response = office.send(
        "technician", "POST", f"/projects/{project}/delete", data={"token": office.token(project)}
    )
    assert response.status_code == 403
    assert office.app.state.store.get_project(project) is not None


def test_the_roles_table_in_the_security_docs_is_this_table():
    """docs/security.md lists every route with a mark per role; it must say what is enforced."""
    docs = (Path(__file__).resolve().parents[1] / "docs" / "security.md").read_text()
    row = re.compile(r"^\| `(GET|POST) ([^`]+)` \| [^|]+ \| (.+) \|$")
    documented = {}
    for line in docs.splitlines():
        found = row.match(line)
        if found:
            marks = [m.strip() for m in found.group(3).split("|")]
            roles = [r for r, m in zip(ACCOUNTS, marks, strict=True) if m in ("✓", "own")]
            documented[(found.group(1), found.group(2))] = frozenset(roles)
    assert set(documented) == set(EXPECTED)
    for key, allowed in EXPECTED.items():
        assert documented[key] == allowed - {ANONYMOUS}, key
