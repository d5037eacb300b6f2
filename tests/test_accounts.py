"""Accounts of the office service: sessions and their expiry, the cookie's flags, the
sign-in limit, forms from another site, the password rules, the ``users`` command, the
workstation mode without accounts and ``serve`` refusing to be reachable without them."""

from __future__ import annotations

import io
import re
import sqlite3
import warnings

import pytest

from server import cli
from server.store.accounts import AccountError, Accounts, password_problem
from server.store.sqlite import Store
from server.web import create_app
from server.web.access import SESSION_COOKIE
from server.web.app import DATABASE_NAME, needs_accounts
from server.web.sign_in import ACCOUNT_FAILURES, ADDRESS_FAILURES, WINDOW_SECONDS
from tests.postgres import app_on

with warnings.catch_warnings():  # starlette's notice about httpx, as tests/test_web.py
    warnings.simplefilter("ignore")
    from fastapi.testclient import TestClient

PASSWORD = "three words of moss"
BOOK = b"defaults level=1.0mm\npoint A height=10.0 fix\nlevel A B +1.2345\nlevel B A -1.2340\n"


class Clock:
    """A clock the test moves forward."""

    def __init__(self) -> None:
        self.now = 1_800_000_000.0

    def __call__(self) -> float:
        return self.now


@pytest.fixture
def office(tmp_path, store_location):
    """Three accounts on either back end (tests/conftest.py's ``store_location``)."""
    app = app_on(store_location, tmp_path, session_hours=12)
    app.state.access.clock = Clock()
    for name, role in (("sam", "surveyor"), ("tom", "technician"), ("vera", "viewer")):
        app.state.accounts.add(name, role, PASSWORD)
    with TestClient(app, base_url="http://127.0.0.1:8000") as client:
        yield app, client


def _sign_in(client, name="sam", password=PASSWORD, **extra):
    return client.post(
        "/sign-in",
        data={"name": name, "password": password, **extra},
        follow_redirects=False,
    )


# --------------------------------------------------------------------------------------
# sessions


def test_a_session_expires_after_its_hours_and_says_so(office):
    app, client = office
    assert _sign_in(client).status_code == 303
    assert client.get("/projects").status_code == 200
    app.state.access.clock.now += 12 * 3600 - 1  # one second before the end
    assert client.get("/projects").status_code == 200
    app.state.access.clock.now += 2
    page = client.get("/projects", follow_redirects=False)
    assert page.status_code == 303
    assert page.headers["location"] == "/sign-in?next=%2Fprojects&why=expired"
    assert "Your session has expired" in client.get(page.headers["location"]).text
    assert client.get("/api/projects").status_code == 401
    assert "expired" in client.get("/api/projects").json()["error"]


def test_the_cookie_is_httponly_samesite_lax_with_an_expiry_and_secure_behind_https(tmp_path):
    for secure in (False, True):
        app = create_app(tmp_path / str(secure), session_hours=8, secure_cookies=secure)
        app.state.accounts.add("sam", "surveyor", PASSWORD)
        with TestClient(app, base_url="http://127.0.0.1:8000") as client:
            header = _sign_in(client).headers["set-cookie"]
        attributes = {part.strip().split("=")[0].lower() for part in header.split(";")}
        assert header.startswith(SESSION_COOKIE + "=")
        assert {"httponly", "max-age", "path", "samesite"} <= attributes
        assert "Max-Age=28800" in header and "SameSite=lax" in header
        assert ("secure" in attributes) is secure


def test_a_password_role_or_status_change_ends_the_sessions(office):
    app, client = office
    accounts: Accounts = app.state.accounts
    new = "a brand new passphrase"
    for password, change in (
        (PASSWORD, lambda: accounts.set_password("tom", new)),
        (new, lambda: accounts.set_role("tom", "viewer")),
        (new, lambda: accounts.set_disabled("tom", True)),
    ):
        assert _sign_in(client, "tom", password).status_code == 303
        assert client.get("/projects").status_code == 200
        change()
        ended = client.get("/projects", follow_redirects=False)
        assert ended.headers["location"].endswith("why=ended")
    assert _sign_in(client, "tom", new).status_code == 401  # disabled
    accounts.set_disabled("tom", False)
    assert _sign_in(client, "tom", new).status_code == 303


def test_an_accounts_pages_are_never_kept_by_a_cache(office):
    _, client = office
    _sign_in(client)
    for path in ("/projects", "/api/projects", "/"):
        response = client.get(path)
        assert response.headers["cache-control"] == "no-store", path
        assert "Cookie" in response.headers["vary"]
    assert "no-store" not in client.get("/static/app.css").headers.get("cache-control", "")


def test_a_forged_or_altered_cookie_is_not_a_session(office):
    _, client = office
    good = _sign_in(client).cookies[SESSION_COOKIE]
    body, signature = good.split(".")
    for forged in (
        body + "." + signature[:-2] + "AA",
        "eyJ1IjoxLCJlIjowLCJ0IjoxODAwMDAwMDAwLCJuIjoiMCJ9." + signature,
        "garbage",
        "",
    ):
        client.cookies.clear()
        response = client.get(
            "/projects", headers={"Cookie": f"{SESSION_COOKIE}={forged}"}, follow_redirects=False
        )
        assert response.status_code == 303 and response.headers["location"].startswith("/sign-in")


def test_sign_out_ends_the_session_in_this_browser_only_with_its_token(office):
    _, client = office
    _sign_in(client)
    page = client.get("/projects").text
    assert "sam" in page and "surveyor in responsible charge" in page
    token = page.split('name="token" value="')[1].split('"')[0]
    client.post("/sign-out", data={"token": "forged"}, follow_redirects=False)
    assert client.get("/projects", follow_redirects=False).status_code == 200
    out = client.post("/sign-out", data={"token": token}, follow_redirects=False)
    assert out.headers["location"] == "/sign-in"
    assert client.get("/projects", follow_redirects=False).status_code == 303
    signed_out = client.get("/sign-in").text  # no user menu for no one
    assert "Sign out" not in signed_out and "user-menu" not in signed_out


def test_sign_in_goes_back_only_to_a_page_of_this_service(office):
    _, client = office
    assert _sign_in(client, next="/projects?x=1").headers["location"] == "/projects?x=1"
    for elsewhere in ("https://evil.example/", "//evil.example/", "/\\evil.example"):
        assert _sign_in(client, next=elsewhere).headers["location"] == "/"


def test_a_name_typed_on_the_sign_in_page_is_escaped(office):
    _, client = office
    page = _sign_in(client, name='<script>alert("x")</script>', password="wrong password")
    assert page.status_code == 401
    assert "<script>alert" not in page.text and "&lt;script&gt;" in page.text


# --------------------------------------------------------------------------------------
# the sign-in limit


def test_five_failures_lock_the_account_for_fifteen_minutes(office):
    app, client = office
    for _ in range(ACCOUNT_FAILURES):
        assert _sign_in(client, "sam", "not the password").status_code == 401
    locked = _sign_in(client, "sam", PASSWORD)  # even the right password waits
    assert locked.status_code == 429
    assert "Too many failed sign-ins for this account" in locked.text
    assert "Wait 15 minutes" in locked.text
    assert int(locked.headers["retry-after"]) == WINDOW_SECONDS
    assert _sign_in(client, "tom").status_code == 303  # another account is not locked
    app.state.access.clock.now += WINDOW_SECONDS
    assert _sign_in(client, "sam").status_code == 303


def test_many_failures_from_one_address_lock_that_address(office):
    _, client = office
    for k in range(ADDRESS_FAILURES):
        assert _sign_in(client, f"guess{k}", "not the password").status_code == 401
    locked = _sign_in(client, "vera")
    assert locked.status_code == 429 and "for this computer" in locked.text


# --------------------------------------------------------------------------------------
# forms from another site


def test_another_sites_form_is_refused_even_with_a_session_and_the_token(office):
    app, client = office
    _sign_in(client)
    created = client.post("/api/projects", files={"fieldbook": ("a.fieldbook", BOOK)})
    project = created.json()["id"]
    token = app.state.store.get_project(project).form_token
    line = {"token": token, "line": "3", "action": "exclude", "reason": "x"}
    for headers in (
        {"Origin": "https://evil.example", "Sec-Fetch-Site": "cross-site"},
        {"Origin": "http://127.0.0.1:9999"},
        {"Sec-Fetch-Site": "same-site"},
    ):
        refused = client.post(
            f"/projects/{project}/edits", data=line, headers=headers, follow_redirects=False
        )
        assert refused.status_code == 403, headers
        assert (
            client.post(
                "/sign-in", data={"name": "sam", "password": PASSWORD}, headers=headers
            ).status_code
            == 403
        )
    no_token = client.post(
        f"/projects/{project}/edits", data={**line, "token": ""}, follow_redirects=False
    )
    assert no_token.status_code == 403
    assert app.state.store.pending_edits(project) == []
    approve = f"/projects/{project}/runs/{app.state.store.runs(project)[0].id}/approve"
    assert client.post(approve, data={"token": "0" * 32}).status_code == 403
    assert app.state.store.approvals(project) == {}


# --------------------------------------------------------------------------------------
# password rules and the users command


@pytest.mark.parametrize(
    ("password", "words"),
    [
        ("short", "at least 10 characters"),
        ("x" * 257, "at most 256"),
        ("sam-is-my-password", "account name"),
        ("aaaaaaaaaaaa", "repeated"),
        ("abababababab", "repeated"),
        ("Password123", "first ones anyone guesses"),
        ("qwertyuiop", "first ones anyone guesses"),
    ],
)
def test_weak_passwords_are_refused_with_the_reason(tmp_path, password, words):
    assert words in password_problem(password, "sam")
    accounts = Accounts(Store(tmp_path / DATABASE_NAME))
    with pytest.raises(AccountError, match=words):
        accounts.add("sam", "surveyor", password)
    assert accounts.all() == []


def test_good_passwords_are_accepted_and_stored_only_as_argon2_hashes(tmp_path):
    accounts = Accounts(Store(tmp_path / DATABASE_NAME))
    for name, password in (("sam", "ten chars!"), ("ann", "Ünïcode pässwörd ⛰")):
        assert password_problem(password, name) == ""
        accounts.add(name, "surveyor", password)
        assert accounts.authenticate(name, password).name == name
        assert accounts.authenticate(name.upper(), password).name == name  # names: any case
        assert accounts.authenticate(name, password + " ") is None
    raw = sqlite3.connect(tmp_path / DATABASE_NAME)
    hashes = [h for (h,) in raw.execute("SELECT password_hash FROM users")]
    raw.close()
    assert all(h.startswith("$argon2id$") for h in hashes)
    assert not any("ten chars" in h for h in hashes)
    with pytest.raises(AccountError, match="already an account"):
        accounts.add("SAM", "viewer", "another good one")


def _users(monkeypatch, capsys, argv, stdin=""):
    monkeypatch.setattr("sys.stdin", io.StringIO(stdin))
    status = cli.main(["users", *argv])
    out, err = capsys.readouterr()
    return status, out, err


def test_the_users_command_adds_lists_and_changes_accounts(tmp_path, monkeypatch, capsys):
    data = ["--data", str(tmp_path)]
    status, out, err = _users(
        monkeypatch, capsys, ["add", "sam", "--role", "surveyor", *data], PASSWORD + "\n"
    )
    assert status == 0 and out == "" and "added sam (surveyor in responsible charge)" in err
    status, out, err = _users(
        monkeypatch, capsys, ["add", "tom", "--role", "technician", "--generate", *data]
    )
    assert status == 0
    generated = out.strip().rsplit(": ", 1)[1]
    assert len(generated) >= 20
    accounts = Accounts(Store(tmp_path / DATABASE_NAME))
    assert accounts.authenticate("tom", generated) is not None
    status, out, err = _users(
        monkeypatch, capsys, ["add", "vic", "--role", "viewer", *data], "short\n"
    )
    assert status == cli.EXIT_USAGE and "at least 10 characters" in err
    status, out, err = _users(monkeypatch, capsys, ["add", "vic", "--role", "viewer", *data], "")
    assert status == cli.EXIT_USAGE and "--generate" in err
    status, out, err = _users(
        monkeypatch, capsys, ["add", "bad name!", "--role", "viewer", *data], PASSWORD
    )
    assert status == cli.EXIT_USAGE and "account name" in err
    assert _users(monkeypatch, capsys, ["set-role", "tom", "viewer", *data])[0] == 0
    assert _users(monkeypatch, capsys, ["disable", "tom", *data])[0] == 0
    status, out, err = _users(monkeypatch, capsys, ["list", *data])
    assert status == 0
    assert out.splitlines()[0].startswith("sam\tsurveyor in responsible charge\tactive")
    assert out.splitlines()[1].startswith("tom\tviewer\tdisabled ")
    assert accounts.authenticate("tom", generated) is None  # disabled
    assert _users(monkeypatch, capsys, ["enable", "tom", *data])[0] == 0
    assert (
        _users(monkeypatch, capsys, ["password", "tom", *data], "moss on the benchmark\n")[0] == 0
    )
    assert accounts.authenticate("tom", "moss on the benchmark") is not None
    status, out, err = _users(monkeypatch, capsys, ["disable", "nobody", *data])
    assert status == cli.EXIT_USAGE and "no account named 'nobody'" in err


def test_the_users_command_and_serve_share_the_data_folder(tmp_path, monkeypatch, capsys):
    """An account added with ``users add --data DIR`` signs in to ``create_app(DIR)``."""
    _users(
        monkeypatch, capsys, ["add", "sam", "--role", "surveyor", "--data", str(tmp_path)], PASSWORD
    )
    app = create_app(tmp_path)
    with TestClient(app, base_url="http://127.0.0.1:8000") as client:
        assert client.get("/", follow_redirects=False).status_code == 303
        assert _sign_in(client).status_code == 303
        assert client.get("/").status_code == 200


# --------------------------------------------------------------------------------------
# the workstation mode, and serve refusing to be reachable without accounts


def test_without_accounts_the_workstation_needs_no_sign_in(tmp_path):
    app = create_app(tmp_path)
    with TestClient(app) as client:
        home = client.get("/")
        assert home.status_code == 200 and "Sign out" not in home.text
        assert client.get("/sign-in", follow_redirects=False).headers["location"] == "/"
        created = client.post("/api/projects", files={"fieldbook": ("a.fieldbook", BOOK)})
        assert created.status_code == 201
        assert client.get("/api/projects").json()["projects"][0]["id"] == created.json()["id"]
        (entry, run) = app.state.store.trail(created.json()["id"])
        assert (entry.actor, entry.role, run.event) == ("", "workstation", "run")


def test_where_the_service_needs_accounts():
    assert needs_accounts("127.0.0.1", ("127.0.0.1", "localhost"), False) == ""
    assert needs_accounts("::1", ("localhost",), False) == ""
    assert "0.0.0.0" in needs_accounts("0.0.0.0", (), False)
    assert "192.168.1.20" in needs_accounts("192.168.1.20", ("192.168.1.20",), False)
    assert "survey.office.example" in needs_accounts(
        "127.0.0.1", ("survey.office.example", "127.0.0.1"), False
    )
    assert "*" in needs_accounts("127.0.0.1", ("*",), False)
    assert "https" in needs_accounts("127.0.0.1", ("127.0.0.1",), True)


@pytest.mark.parametrize(
    ("argv", "env"),
    [
        (["--host", "0.0.0.0"], {}),
        (["--host", "127.0.0.1"], {"STATIONFIT_ALLOWED_HOSTS": "survey.office.example"}),
        (["--host", "127.0.0.1", "--https"], {}),
    ],
)
def test_serve_refuses_to_be_reachable_without_accounts(tmp_path, monkeypatch, capsys, argv, env):
    monkeypatch.delenv("STATIONFIT_ALLOWED_HOSTS", raising=False)
    monkeypatch.delenv("STATIONFIT_HTTPS", raising=False)
    for key, value in env.items():
        monkeypatch.setenv(key, value)
    started = []
    monkeypatch.setattr("uvicorn.run", lambda *a, **k: started.append(a))
    status = cli.main(["serve", *argv, "--data", str(tmp_path)])
    err = capsys.readouterr().err
    assert status == cli.EXIT_CONFIG and started == []
    (line,) = [l for l in err.splitlines() if l.startswith("Stationfit: not starting")]
    assert "no accounts" in line
    assert f"python -m server users add NAME --role surveyor --data {tmp_path}" in line
    # with an account it starts (uvicorn.run replaced: nothing listens)
    Accounts(Store(tmp_path / DATABASE_NAME)).add("sam", "surveyor", PASSWORD)
    assert cli.main(["serve", *argv, "--data", str(tmp_path)]) == 0 and len(started) == 1
    assert "accounts: sign-in required" in capsys.readouterr().err


def test_serve_on_loopback_without_accounts_starts_as_a_workstation(tmp_path, monkeypatch, capsys):
    monkeypatch.delenv("STATIONFIT_ALLOWED_HOSTS", raising=False)
    monkeypatch.delenv("STATIONFIT_HTTPS", raising=False)
    started = []
    monkeypatch.setattr("uvicorn.run", lambda *a, **k: started.append(k))
    assert cli.main(["serve", "--data", str(tmp_path)]) == 0 and len(started) == 1
    assert "workstation mode" in capsys.readouterr().err


def test_the_administrator_lists_the_accounts_and_never_sees_a_hash(office):
    app, client = office
    app.state.accounts.add("ada", "administrator", PASSWORD)
    app.state.accounts.set_disabled("vera", True)
    assert _sign_in(client, "ada").status_code == 303
    page = client.get("/users").text
    assert "surveyor in responsible charge" in page and "technician" in page
    assert re.search(r"vera</td><td>viewer</td><td>disabled \d{4}-\d{2}-\d{2}", page)
    assert "$argon2" not in page
    assert 'href="/users"' in client.get("/projects").text  # in the user menu
    assert _sign_in(client, "sam").status_code == 303
    assert client.get("/users").status_code == 403
    assert 'href="/users"' not in client.get("/projects").text


def test_at_most_two_passwords_are_checked_at_once(tmp_path, monkeypatch):
    """argon2 takes 64 MiB a check: a burst of sign-ins queues instead of taking the memory."""
    import threading
    import time

    from server.store import accounts as module

    accounts = Accounts(Store(tmp_path / DATABASE_NAME))
    accounts.add("sam", "surveyor", PASSWORD)
    running, peak, lock = [0], [0], threading.Lock()
    real = module._HASHER

    class Slow:
        def verify(self, digest, password):
            with lock:
                running[0] += 1
                peak[0] = max(peak[0], running[0])
            time.sleep(0.05)
            with lock:
                running[0] -= 1
            return real.verify(digest, password)

        def check_needs_rehash(self, digest):
            return False

    monkeypatch.setattr(module, "_HASHER", Slow())
    threads = [
        threading.Thread(target=accounts.authenticate, args=("sam", PASSWORD)) for _ in range(8)
    ]
    for thread in threads:
        thread.start()
    for thread in threads:
        thread.join()
    assert peak[0] == 2


def test_a_reading_role_is_not_offered_the_forms_it_may_not_use(office):
    _, client = office
    readonly = '<link rel="stylesheet" href="/static/readonly.css'
    for name, offered in (("vera", False), ("tom", True), ("sam", True)):
        assert _sign_in(client, name).status_code == 303
        assert (readonly not in client.get("/").text) is offered, name
    css = client.get("/static/readonly.css").text
    for form in ("form.upload", "details.decide", "form.rerun", "form.decision-undo"):
        assert form in css


@pytest.mark.postgresql
def test_the_users_command_and_serve_share_a_postgresql_database(
    tmp_path, monkeypatch, capsys, postgresql_url
):
    """``users add --database URL`` writes the account where ``serve --database URL`` reads
    it; a name is one account whatever its letter case, as in SQLite."""
    status, _, err = _users(
        monkeypatch,
        capsys,
        ["add", "sam", "--role", "surveyor", "--database", postgresql_url],
        PASSWORD + "\n",
    )
    assert status == 0 and "added sam" in err and "postgresql://" in err
    status, _, err = _users(
        monkeypatch,
        capsys,
        ["add", "SAM", "--role", "viewer", "--database", postgresql_url],
        PASSWORD + "\n",
    )
    assert status == cli.EXIT_USAGE and "already an account" in err
    app = app_on(postgresql_url, tmp_path)
    with TestClient(app, base_url="http://127.0.0.1:8000") as client:
        assert client.get("/", follow_redirects=False).status_code == 303
        assert _sign_in(client, name="Sam").status_code == 303
        assert client.get("/").status_code == 200
