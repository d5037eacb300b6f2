"""Who may do what: the signed-in account (from its session cookie), what each role may do,
and one rule for every route, enforced in front of every route by ``AccessMiddleware``.

With no accounts in the store the service is a single-user workstation: no sign-in, and
everything the pages offered before accounts existed (not approval, which names the
surveyor who approves).  With accounts, every route but the sign-in page and the static
files needs a signed-in account whose role has the route's capability; a route with no
rule is refused (fail closed), and ``tests/test_access_control.py`` fails when a route is
added without one.  A project the account may not see is "not found" (404, never 403),
so project ids do not leak: ``dependencies.project_or_404`` asks the store with the
account.

Sessions are stateless signed cookies (HMAC-SHA-256 with the data folder's own key):
the account's id, its ``session_epoch`` (raised when its password, role or status
changes, which ends its older sessions), the time of sign-in and a random nonce.  They
expire ``session_seconds`` after sign-in.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import json
import logging
import secrets
import time
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any
from urllib.parse import quote

from fastapi import Request
from fastapi.responses import JSONResponse, RedirectResponse, Response
from starlette.concurrency import run_in_threadpool
from starlette.datastructures import Headers, MutableHeaders
from starlette.routing import Match, Mount
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from server.store.accounts import Accounts, User
from server.store.backends import storage_errors
from server.store.roles import ROLE_TITLES
from server.store.sqlite import WORKSTATION, Actor, Project

logger = logging.getLogger("stationfit.web")

SESSION_COOKIE = "stationfit_session"
#: A session lasts a working day from sign-in.
DEFAULT_SESSION_HOURS = 12

# -- capabilities ---------------------------------------------------------------------

PUBLIC = "public"
READ, UPLOAD, PROPOSE, RERUN, DECIDE, APPROVE = (
    "read",
    "upload",
    "propose",
    "rerun",
    "decide",
    "approve",
)
MANAGE, USERS = "manage", "users"
#: What each capability lets one do, as the refusal and docs/security.md say it.
CAPABILITY_WORDS = {
    READ: "read projects",
    UPLOAD: "upload or import field books",
    PROPOSE: "propose decisions",
    RERUN: "re-run adjustments",
    DECIDE: "decide on others' proposals",
    APPROVE: "approve runs for issue",
    MANAGE: "delete, restore or share projects",
    USERS: "manage accounts",
}
#: Each role's capabilities.  MANAGE is further limited to the owner's own projects for a
#: technician (``may_manage``).  The administrator manages accounts and reads; approving
#: is the surveyor's professional act, never an administrator's by office.
ROLE_CAPABILITIES: dict[str, frozenset[str]] = {
    "viewer": frozenset({READ}),
    "technician": frozenset({READ, UPLOAD, PROPOSE, RERUN, MANAGE}),
    "surveyor": frozenset({READ, UPLOAD, PROPOSE, RERUN, DECIDE, APPROVE, MANAGE}),
    "administrator": frozenset({READ, USERS}),
}
#: The workstation's one user may do everything the service did before accounts.
WORKSTATION_CAPABILITIES = frozenset({READ, UPLOAD, PROPOSE, RERUN, DECIDE, MANAGE})

#: The capability every route needs, by (method, path template).  A route missing here is
#: refused for everyone but the workstation user, and fails the access-control test.
ROUTE_RULES: dict[tuple[str, str], str] = {
    # signing in and out
    ("GET", "/sign-in"): PUBLIC,
    ("POST", "/sign-in"): PUBLIC,
    ("POST", "/sign-out"): PUBLIC,
    ("GET", "/users"): USERS,
    # pages and downloads (server/web/pages.py)
    ("GET", "/"): READ,
    ("POST", "/projects"): UPLOAD,
    ("GET", "/projects"): READ,
    ("GET", "/projects/{project_id}"): READ,
    ("GET", "/projects/{project_id}/import"): READ,
    ("POST", "/projects/{project_id}/adjust"): UPLOAD,
    ("POST", "/projects/{project_id}/discard"): MANAGE,
    ("GET", "/projects/{project_id}/report.html"): READ,
    ("GET", "/projects/{project_id}/report.pdf"): READ,
    ("GET", "/projects/{project_id}/report.txt"): READ,
    ("GET", "/projects/{project_id}/points.csv"): READ,
    ("GET", "/projects/{project_id}/points.geojson"): READ,
    ("GET", "/projects/{project_id}/result.json"): READ,
    ("GET", "/projects/{project_id}/fieldbook"): READ,
    ("GET", "/projects/{project_id}/source"): READ,
    ("GET", "/demos/{name}"): READ,
    ("POST", "/demos/{name}"): UPLOAD,
    # the JSON API (server/web/api.py)
    ("GET", "/api/openapi.json"): READ,
    ("POST", "/api/adjust"): UPLOAD,
    ("POST", "/api/projects"): UPLOAD,
    ("GET", "/api/projects"): READ,
    ("GET", "/api/projects/{project_id}"): READ,
    ("GET", "/api/projects/{project_id}/runs/{run_id}"): READ,
    # the review (server/web/review.py, relative.py, interrupted.py)
    ("GET", "/projects/{project_id}/review"): READ,
    ("POST", "/projects/{project_id}/edits"): PROPOSE,
    ("POST", "/projects/{project_id}/edits/{edit_id}/undo"): PROPOSE,
    ("POST", "/projects/{project_id}/relative-pairs"): PROPOSE,
    ("POST", "/projects/{project_id}/runs"): RERUN,
    ("POST", "/projects/{project_id}/runs/{run_id}/retry"): RERUN,
    ("GET", "/projects/{project_id}/compare"): READ,
    ("GET", "/projects/{project_id}/fieldbook/edited"): READ,
    ("POST", "/projects/{project_id}/confirm-delete"): MANAGE,
    ("POST", "/projects/{project_id}/delete"): MANAGE,
    ("GET", "/deleted-projects"): READ,
    ("POST", "/deleted-projects/{project_id}/restore"): MANAGE,
    # approval and sharing (server/web/approval.py)
    ("POST", "/projects/{project_id}/runs/{run_id}/approve"): APPROVE,
    ("POST", "/projects/{project_id}/sharing"): MANAGE,
    # one run's reports (server/web/run_reports.py)
    ("GET", "/projects/{project_id}/runs/{run_id}/report.html"): READ,
    ("GET", "/projects/{project_id}/runs/{run_id}/report.pdf"): READ,
    ("GET", "/projects/{project_id}/runs/{run_id}/report.txt"): READ,
    # design and monitoring
    ("GET", "/projects/{project_id}/design"): READ,
    ("GET", "/projects/{project_id}/design.json"): READ,
    ("GET", "/projects/{project_id}/design.html"): READ,
    ("GET", "/projects/{project_id}/design.pdf"): READ,
    ("GET", "/monitoring"): READ,
}

#: The database errors of the installed back ends (SQLite, and psycopg's when present).
STORAGE_ERRORS = storage_errors()


@dataclass(frozen=True, slots=True)
class Principal:
    """Who sent a request: a signed-in account, or the workstation's one user."""

    actor: Actor
    capabilities: frozenset[str]
    #: The session's nonce: forms that are not a project's (sign-out) carry a token from it.
    nonce: str = ""
    form_token: str = ""

    @property
    def workstation(self) -> bool:
        return self.actor.user_id is None and self.actor.role == WORKSTATION.role

    @property
    def name(self) -> str:
        return self.actor.name

    @property
    def title(self) -> str:
        """The role as the pages name it."""
        return ROLE_TITLES.get(self.actor.role, self.actor.role)

    def may(self, capability: str) -> bool:
        return capability == PUBLIC or capability in self.capabilities

    def may_manage(self, project: Project) -> bool:
        """Delete, restore or share this project: the surveyor any they see, a technician
        only their own (a project from before accounts has no owner: the surveyor's)."""
        if not self.may(MANAGE):
            return False
        if self.workstation or self.actor.role == "surveyor":
            return True
        return project.owner_id is not None and project.owner_id == self.actor.user_id

    @property
    def viewer(self) -> Actor | None:
        """The account whose view of the store to give (None: the workstation sees all)."""
        return None if self.workstation else self.actor


WORKSTATION_PRINCIPAL = Principal(WORKSTATION, WORKSTATION_CAPABILITIES)
#: A request with accounts but no session (only public routes let it through): may nothing.
ANONYMOUS_PRINCIPAL = Principal(Actor(None, "", "signed out"), frozenset())


# -- session cookies --------------------------------------------------------------------


def _b64(data: bytes) -> str:
    return base64.urlsafe_b64encode(data).rstrip(b"=").decode("ascii")


def _unb64(text: str) -> bytes:
    return base64.urlsafe_b64decode(text + "=" * (-len(text) % 4))


def _signature(secret: bytes, body: str) -> str:
    return _b64(hmac.new(secret, body.encode("ascii"), hashlib.sha256).digest())


def session_cookie(secret: bytes, user: User, now: float) -> str:
    """A new session's cookie value for ``user``, signed, issued at ``now``."""
    payload = {"u": user.id, "e": user.session_epoch, "t": int(now), "n": secrets.token_hex(8)}
    body = _b64(json.dumps(payload, separators=(",", ":")).encode("utf-8"))
    return f"{body}.{_signature(secret, body)}"


@dataclass(frozen=True, slots=True)
class SessionClaim:
    user_id: int
    epoch: int
    issued: float
    nonce: str


def read_session(secret: bytes, value: str) -> SessionClaim | None:
    """The claim of a cookie whose signature holds, else None (expiry is checked after)."""
    body, dot, signature = value.partition(".")
    if not dot or len(value) > 512:
        return None
    if not hmac.compare_digest(signature, _signature(secret, body)):
        return None
    try:
        payload = json.loads(_unb64(body))
        return SessionClaim(
            int(payload["u"]), int(payload["e"]), float(payload["t"]), str(payload["n"])
        )
    except (ValueError, KeyError, TypeError):
        return None


def form_token(secret: bytes, nonce: str) -> str:
    """The token of a session's own forms (sign-out), tied to that session."""
    return hmac.new(secret, f"form:{nonce}".encode(), hashlib.sha256).hexdigest()[:32]


# -- the settings the middleware and routes share ---------------------------------------


@dataclass
class AccessSettings:
    """The service's accounts, its cookie key, session length and whether cookies are Secure."""

    accounts: Accounts
    session_seconds: int
    secure_cookies: bool
    clock: Callable[[], float] = time.time
    _secret: bytes | None = None

    @property
    def secret(self) -> bytes:
        if self._secret is None:
            self._secret = self.accounts.session_secret()
        return self._secret


def access_settings(request: Request) -> AccessSettings:
    return request.app.state.access  # type: ignore[no-any-return]


class SessionState:
    """Why there is no signed-in account: none ('') or an expired or ended session."""

    EXPIRED = "expired"
    ENDED = "ended"


def resolve(settings: AccessSettings, cookie: str | None) -> tuple[Principal | None, str]:
    """(principal, why not): the workstation's user without accounts, else the cookie's."""
    if not settings.accounts.configured():
        return WORKSTATION_PRINCIPAL, ""
    if not cookie:
        return None, ""
    claim = read_session(settings.secret, cookie)
    if claim is None:
        return None, SessionState.ENDED
    if settings.clock() - claim.issued > settings.session_seconds:
        return None, SessionState.EXPIRED
    user = settings.accounts.get(claim.user_id)
    if user is None or not user.active or user.session_epoch != claim.epoch:
        return None, SessionState.ENDED
    return (
        Principal(
            user.actor,
            ROLE_CAPABILITIES.get(user.role, frozenset()),
            nonce=claim.nonce,
            form_token=form_token(settings.secret, claim.nonce),
        ),
        "",
    )


def principal(request: Request) -> Principal:
    """The request's principal, set by ``AccessMiddleware`` (the workstation's when unset)."""
    found = request.scope.get("state", {}).get("principal")
    return found if isinstance(found, Principal) else WORKSTATION_PRINCIPAL


def viewer(request: Request) -> Actor | None:
    """The account whose view of the projects a request gets (None: all of them)."""
    return principal(request).viewer


def actor(request: Request) -> Actor:
    """Who acts in this request, for the store's records."""
    return principal(request).actor


def signed_in(request: Request) -> Principal | None:
    """The signed-in account for the pages' user menu (None on the workstation, or when
    no one is signed in)."""
    found = principal(request)
    return None if found.actor.user_id is None else found


def flat_routes(routes: list[Any]) -> list[Any]:
    """Every route an app answers, the included routers' routes listed one by one (FastAPI
    keeps an included router as one entry, ``original_router`` holding its routes)."""
    flat: list[Any] = []
    for route in routes:
        included = getattr(route, "original_router", None)
        flat.extend(flat_routes(included.routes) if included is not None else [route])
    return flat


def route_rule(app: Any, scope: Scope) -> tuple[str | None, str]:
    """(capability or None when the route has no rule, path template) of a request."""
    for route in flat_routes(app.router.routes):
        match, _ = route.matches(scope)
        if match == Match.FULL:
            if isinstance(route, Mount):  # the static files: the sign-in page needs them
                return PUBLIC, route.path
            method = scope["method"]
            return ROUTE_RULES.get((method, route.path)), route.path
    return PUBLIC, ""  # nothing answers here: the router's own 404 or 405


def _is_api(path: str) -> bool:
    return path == "/api" or path.startswith("/api/")


def local_path(target: str) -> str:
    """``target`` when it is a path on this service, else "/" (no open redirect)."""
    if not target.startswith("/") or target.startswith("//") or "\\" in target:
        return "/"
    return target[:2000]


class AccessMiddleware:
    """Enforce ``ROUTE_RULES`` before any route reads a body or touches a project."""

    def __init__(
        self,
        app: ASGIApp,
        router_app: Any,
        settings: AccessSettings,
        error_page: Callable[[Scope, int, str, str], Response],
        store_failure: Callable[[Scope, Exception], Response],
    ) -> None:
        self.app = app
        self.router_app = router_app
        self.settings = settings
        self.error_page = error_page
        self.store_failure = store_failure

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        cookie = _cookie(Headers(scope=scope).get("cookie", ""), SESSION_COOKIE)
        who: Principal | None
        try:
            if self.settings.accounts.known_workstation():  # no database to ask
                who, why = WORKSTATION_PRINCIPAL, ""
            else:
                who, why = await run_in_threadpool(resolve, self.settings, cookie)
        except STORAGE_ERRORS as exc:  # no store, no knowing who may: refused, with a 503
            await self.store_failure(scope, exc)(scope, receive, send)
            return
        scope.setdefault("state", {})
        scope["state"]["principal"] = who if who is not None else ANONYMOUS_PRINCIPAL
        if who is not None and who.workstation:  # no accounts: everything as before them
            await self.app(scope, receive, send)
            return
        rule, template = route_rule(self.router_app, scope)
        if rule == PUBLIC:
            await self.app(scope, receive, send)
            return
        response: Response | None = None
        if who is None:
            response = _sign_in_first(scope, why)
        elif rule is None:
            logger.error("no access rule for %s %s: refused", scope["method"], template)
            response = self._refused(scope, "This address has no access rule, so it is refused.")
        elif not who.may(rule):
            response = self._refused(
                scope,
                f"Your role ({who.title}) may not {CAPABILITY_WORDS.get(rule, rule)}. "
                "Ask the administrator if you need to.",
            )
        if response is not None:
            await response(scope, receive, send)
            return
        await self.app(scope, receive, _private(send) if rule != PUBLIC else send)

    def _refused(self, scope: Scope, message: str) -> Response:
        if _is_api(scope.get("path", "/")):
            return JSONResponse({"error": message}, status_code=403)
        return self.error_page(scope, 403, "Not allowed for your role", message)


def _private(send: Send) -> Send:
    """Mark an account's pages and downloads as not to be kept by any cache (a shared proxy
    must not serve them to another, nor the browser show them again after signing out)."""

    async def send_private(message: Message) -> None:
        if message["type"] == "http.response.start":
            headers = MutableHeaders(scope=message)
            headers["Cache-Control"] = "no-store"
            headers.append("Vary", "Cookie")
        await send(message)

    return send_private


def _cookie(header: str, name: str) -> str | None:
    for part in header.split(";"):
        key, _, value = part.strip().partition("=")
        if key == name:
            return value
    return None


SIGN_IN_MESSAGES = {
    "": "Sign in to use Stationfit.",
    SessionState.EXPIRED: "Your session has expired. Sign in again.",
    SessionState.ENDED: "Your session has ended (signed out, or the account was changed). "
    "Sign in again.",
}


def _sign_in_first(scope: Scope, why: str) -> Response:
    """401 for the API; the sign-in page, coming back here afterwards, for the pages."""
    path = scope.get("path", "/")
    if _is_api(path):
        return JSONResponse({"error": SIGN_IN_MESSAGES[why]}, status_code=401)
    back = path if scope["method"] == "GET" else "/"
    query = scope.get("query_string", b"").decode("latin-1")
    if query and scope["method"] == "GET":
        back += "?" + query
    target = "/sign-in?next=" + quote(local_path(back), safe="")
    if why:
        target += "&why=" + why
    return RedirectResponse(target, status_code=303)
