"""Signing in and out, and the limit on failed sign-ins.

A failed sign-in counts against the account name and against the client's address;
after ``ACCOUNT_FAILURES`` failures for one name, or ``ADDRESS_FAILURES`` from one
address, within ``WINDOW_SECONDS``, sign-in is refused (429, with the minutes to wait)
without checking the password, so guessing costs a guesser a quarter of an hour per five
tries.  The counts live in the service's memory: a restart clears them (the passwords are
argon2 hashes, slow to guess offline too).  Behind a reverse proxy on this machine the
client's address is the one the proxy sends in ``X-Forwarded-For`` (uvicorn trusts it from
127.0.0.1 only).
"""

from __future__ import annotations

import hmac
import logging
import math
import threading
from collections import OrderedDict, deque
from collections.abc import Callable
from typing import Any

from fastapi import APIRouter, Request
from fastapi.responses import HTMLResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool

from server.store.roles import ROLE_TITLES
from server.web import access
from server.web.dependencies import client, form_text, read_form, render

logger = logging.getLogger("stationfit.web")

router = APIRouter()

#: Failures allowed per account name, and per client address, within the window.
ACCOUNT_FAILURES = 5
ADDRESS_FAILURES = 20
WINDOW_SECONDS = 15 * 60
#: Names and addresses remembered at most (the oldest are forgotten first).
_MAX_KEYS = 10_000


class SignInLimiter:
    """Failed sign-ins per account name and per client address, in a sliding window."""

    def __init__(self, clock: Callable[[], float]) -> None:
        self.clock = clock
        self._lock = threading.Lock()
        self._failures: OrderedDict[str, deque[float]] = OrderedDict()

    def _recent(self, key: str, now: float) -> deque[float]:
        times = self._failures.get(key)
        if times is None:
            return deque()
        while times and now - times[0] >= WINDOW_SECONDS:
            times.popleft()
        return times

    def wait(self, name: str, address: str) -> tuple[float, str]:
        """(seconds to wait, what is locked: 'account' or 'address'); (0, '') when free."""
        now = self.clock()
        with self._lock:
            for key, limit, what in (
                ("n:" + name.lower(), ACCOUNT_FAILURES, "account"),
                ("a:" + address, ADDRESS_FAILURES, "address"),
            ):
                times = self._recent(key, now)
                if len(times) >= limit:
                    return WINDOW_SECONDS - (now - times[-limit]), what
        return 0.0, ""

    def failed(self, name: str, address: str) -> None:
        now = self.clock()
        with self._lock:
            for key in ("n:" + name.lower(), "a:" + address):
                times = self._failures.setdefault(key, deque())
                times.append(now)
                self._failures.move_to_end(key)
            while len(self._failures) > _MAX_KEYS:
                self._failures.popitem(last=False)

    def succeeded(self, name: str) -> None:
        with self._lock:
            self._failures.pop("n:" + name.lower(), None)


def limiter(request: Request) -> SignInLimiter:
    return request.app.state.sign_in_limiter  # type: ignore[no-any-return]


def _page(request: Request, context: dict[str, Any], status: int = 200) -> HTMLResponse:
    base = {"message": "", "problem": "", "name": "", "next": "/"}
    return render(request, "sign_in.html", {**base, **context}, status=status)


@router.get("/sign-in", response_class=HTMLResponse)
def sign_in_page(request: Request) -> Response:
    """The sign-in form (on the workstation, with no accounts, there is nothing to sign in to)."""
    settings = access.access_settings(request)
    if not settings.accounts.configured():
        return RedirectResponse("/", status_code=303)
    why = request.query_params.get("why", "")
    message = access.SIGN_IN_MESSAGES.get(why, "") if why else ""
    target = access.local_path(request.query_params.get("next", "/"))
    return _page(request, {"message": message, "next": target})


@router.post("/sign-in")
async def sign_in(request: Request) -> Response:
    """Check the name and password; on success a new session cookie, then back to ``next``."""
    settings = access.access_settings(request)
    if not settings.accounts.configured():
        return RedirectResponse("/", status_code=303)
    form = await read_form(request, max_fields=8)
    name = form_text(form, "name", 64).strip()
    password = form_text(form, "password", 1000)
    target = access.local_path(form_text(form, "next", 2000) or "/")
    address = client(request)
    limits = limiter(request)
    response: Response
    wait, what = limits.wait(name, address)
    if wait > 0:
        minutes = max(1, math.ceil(wait / 60))
        subject = "this account" if what == "account" else "this computer"
        logger.warning("sign-in refused for %r from %s: too many failures", name, address)
        response = _page(
            request,
            {
                "problem": f"Too many failed sign-ins for {subject}. Wait {minutes} minute"
                f"{'s' if minutes != 1 else ''} and try again, or ask the administrator "
                "to set a new password.",
                "name": name,
                "next": target,
            },
            status=429,
        )
        response.headers["Retry-After"] = str(math.ceil(wait))
        return response
    user = await run_in_threadpool(settings.accounts.authenticate, name, password)
    if user is None:
        limits.failed(name, address)
        logger.info("failed sign-in for %r from %s", name, address)
        return _page(
            request,
            {
                "problem": "The name or the password is not right (or the account is disabled).",
                "name": name,
                "next": target,
            },
            status=401,
        )
    limits.succeeded(name)
    logger.info("%s signed in from %s", user.name, address)
    response = RedirectResponse(target, status_code=303)
    response.set_cookie(
        access.SESSION_COOKIE,
        access.session_cookie(settings.secret, user, settings.clock()),
        max_age=settings.session_seconds,
        httponly=True,
        samesite="lax",
        secure=settings.secure_cookies,
        path="/",
    )
    return response


@router.post("/sign-out")
async def sign_out(request: Request) -> Response:
    """End the session in this browser (its token proves the form is the service's own)."""
    who = access.signed_in(request)
    form = await read_form(request, max_fields=4)
    if who is not None and not hmac.compare_digest(form_text(form, "token", 100), who.form_token):
        return RedirectResponse("/", status_code=303)
    response = RedirectResponse("/sign-in", status_code=303)
    response.delete_cookie(
        access.SESSION_COOKIE,
        path="/",
        httponly=True,
        samesite="lax",
        secure=access.access_settings(request).secure_cookies,
    )
    return response


@router.get("/users", response_class=HTMLResponse)
def users_page(request: Request) -> Response:
    """The office's accounts for the administrator: names, roles, status and last sign-in.
    Changes are made on the server's command line (``python -m server users …``), so the
    web offers no way to raise a role."""
    accounts = access.access_settings(request).accounts
    return render(request, "users.html", {"users": accounts.all(), "titles": ROLE_TITLES})
