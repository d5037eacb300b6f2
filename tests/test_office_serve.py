"""The real ``serve`` process for an office: it refuses to answer a public host name without
accounts (exit 78, one line), and with an account added by ``users add`` on the same data
folder it starts and asks everyone to sign in."""

from __future__ import annotations

import http.client
import subprocess
import sys
import urllib.parse

from tests.service_process import REPO, ServiceProcess

PASSWORD = "three words of moss"
OFFICE = {"STATIONFIT_ALLOWED_HOSTS": "survey.office.example,127.0.0.1"}


def _users_add(data, name: str, role: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [sys.executable, "-m", "server", "users", "add", name, "--role", role, "--data", str(data)],
        cwd=REPO,
        input=PASSWORD + "\n",
        capture_output=True,
        text=True,
        timeout=60,
    )


def test_serve_for_an_office_needs_an_account_then_asks_everyone_to_sign_in(tmp_path):
    data = tmp_path / "data"
    refused = subprocess.run(
        [sys.executable, "-m", "server", "serve", "--data", str(data), "--port", "1"],
        cwd=REPO,
        capture_output=True,
        text=True,
        timeout=60,
        env={**ServiceProcess(data, tmp_path / "x.log").env, **OFFICE},
    )
    assert refused.returncode == 78
    (line,) = refused.stderr.strip().splitlines()
    assert "survey.office.example" in line and "users add NAME --role surveyor" in line

    assert _users_add(data, "ines", "surveyor").returncode == 0
    with ServiceProcess(data, tmp_path / "serve.log", env=OFFICE) as service:
        connection = http.client.HTTPConnection("127.0.0.1", service.port, timeout=30)
        _signs_in(connection)
    assert "accounts: sign-in required" in (tmp_path / "serve.log").read_text()


def _signs_in(connection: http.client.HTTPConnection) -> None:
    """Sent away to sign in, signed in, then shown the projects (the connection closed)."""
    try:
        connection.request("GET", "/projects")
        response = connection.getresponse()
        response.read()
        assert response.status == 303
        assert response.getheader("location").startswith("/sign-in?next=")
        body = urllib.parse.urlencode({"name": "ines", "password": PASSWORD})
        connection.request(
            "POST",
            "/sign-in",
            body,
            {"Content-Type": "application/x-www-form-urlencoded"},
        )
        signed = connection.getresponse()
        signed.read()
        assert signed.status == 303
        cookie = signed.getheader("set-cookie").split(";")[0]
        connection.request("GET", "/projects", headers={"Cookie": cookie})
        page = connection.getresponse()
        assert page.status == 200 and "ines" in page.read().decode()
    finally:
        connection.close()
