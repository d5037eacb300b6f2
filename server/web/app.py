"""The web application: app factory, security headers, upload limit and error pages."""

from __future__ import annotations

import ipaddress
import logging
import os
from collections.abc import Collection
from datetime import datetime
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

import jinja2
from fastapi import FastAPI, Request
from fastapi.exceptions import RequestValidationError
from fastapi.responses import HTMLResponse, JSONResponse, Response
from fastapi.staticfiles import StaticFiles
from fastapi.templating import Jinja2Templates
from starlette.datastructures import Headers, MutableHeaders
from starlette.exceptions import HTTPException as StarletteHTTPException
from starlette.middleware.gzip import DEFAULT_EXCLUDED_CONTENT_TYPES, GZipMiddleware
from starlette.middleware.trustedhost import TrustedHostMiddleware
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from server import __version__
from server.errors import SurveyError
from server.report.plot import script_data
from server.resources import DEMO_DIR, STATIC_DIR, TEMPLATE_DIR
from server.results.result import CAUTION
from server.settings import (
    DEFAULT_MAX_UPLOAD_BYTES,
    WorkLimits,
    env_int,
    service_limits,
    service_queue,
)
from server.store.accounts import Accounts
from server.store.backends import storage_errors
from server.store.projects import ProposalCache, StoreFull, purge_deleted
from server.store.sqlite import SCHEMA_VERSION, RunGone, Store
from server.web import (
    access,
    api,
    approval,
    design,
    interrupted,
    monitoring,
    pages,
    relative,
    review,
    run_reports,
    sign_in,
)
from server.web.dependencies import busy, survey_error_payload
from server.web.jobs import AdjustmentQueue, BackgroundAdjustments, Jobs, QueueFull
from server.web.run_parts import parts_cache
from server.web.workers import RemoteJobs

logger = logging.getLogger("stationfit.web")

DATABASE_NAME = "stationfit.sqlite3"

CONTENT_SECURITY_POLICY = (
    "default-src 'none'; script-src 'self'; style-src 'self'; img-src 'self' data:; "
    "font-src 'self'; connect-src 'self'; form-action 'self'; base-uri 'none'; "
    "frame-ancestors 'none'"
)
SECURITY_HEADERS = {
    "Content-Security-Policy": CONTENT_SECURITY_POLICY,
    "X-Content-Type-Options": "nosniff",
    "Referrer-Policy": "no-referrer",
    "X-Frame-Options": "DENY",
    "Cross-Origin-Opener-Policy": "same-origin",
    "Permissions-Policy": "camera=(), microphone=(), geolocation=()",
}


def is_api(path: str) -> bool:
    """True for the JSON API, whose errors are JSON rather than pages."""
    return path == "/api" or path.startswith("/api/")


def _when(value: str) -> str:
    """An ISO timestamp as 'YYYY-MM-DD HH:MM UTC'."""
    try:
        return datetime.fromisoformat(value).strftime("%Y-%m-%d %H:%M UTC")
    except ValueError:
        return value


def _sentence(value: str) -> str:
    """Capitalise the first letter and end with a full stop."""
    text = value.strip()
    if not text:
        return text
    text = text[0].upper() + text[1:]
    return text if text.endswith((".", "!", "?")) else text + "."


def make_templates() -> Jinja2Templates:
    """Jinja2 templates over ``templates/`` with autoescape on and strict undefined names."""
    env = jinja2.Environment(
        loader=jinja2.FileSystemLoader(TEMPLATE_DIR),
        autoescape=True,
        undefined=jinja2.StrictUndefined,
        trim_blocks=True,
        lstrip_blocks=True,
    )
    env.globals.update(caution=CAUTION, version=__version__, signed_in=access.signed_in)
    env.filters["when"] = _when
    env.filters["sentence"] = _sentence
    env.filters["plot_script"] = script_data
    return Jinja2Templates(env=env)


# --------------------------------------------------------------------------------------
# middleware


class SecurityHeadersMiddleware:
    """Add the security headers to every response (a response may set its own stricter CSP)."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return

        async def send_with_headers(message: Message) -> None:
            if message["type"] == "http.response.start":
                headers = MutableHeaders(scope=message)
                for key, value in SECURITY_HEADERS.items():
                    if key not in headers:
                        headers[key] = value
            await send(message)

        await self.app(scope, receive, send_with_headers)


class HeadAsGetMiddleware:
    """Answer HEAD wherever GET is answered: the GET response's status and headers, no body.

    FastAPI routes declared with GET do not accept HEAD by themselves; one middleware
    covers every page, download and API read instead of a second method on each route.
    """

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] != "HEAD":
            await self.app(scope, receive, send)
            return

        async def send_headers_only(message: Message) -> None:
            if message["type"] == "http.response.body":
                if message.get("more_body", False):
                    return  # the body's parts are dropped; the last one ends the response
                message = {"type": "http.response.body", "body": b"", "more_body": False}
            await send(message)

        await self.app({**scope, "method": "GET"}, receive, send_headers_only)


#: Methods that change what is stored; only these are checked for another site's origin.
UNSAFE_METHODS = frozenset({"POST", "PUT", "PATCH", "DELETE"})
#: ``Sec-Fetch-Site`` values a browser sends for a request its own page (or the user) made.
OWN_FETCH_SITES = frozenset({"same-origin", "none"})
_DEFAULT_PORTS = {"http": "80", "https": "443"}
FOREIGN_ORIGIN_MESSAGE = (
    "This request was sent by a page of another site, so it was refused and nothing was "
    "stored. Open Stationfit's own page and send it from there; scripts can call the API "
    "directly."
)


def _host_and_port(netloc: str, scheme: str) -> str:
    """``host:port`` in lower case, the scheme's default port written out."""
    netloc = netloc.strip().lower()
    if netloc.startswith("["):  # an IPv6 literal: the port follows the bracket
        host, _, rest = netloc.partition("]")
        host, port = host + "]", rest[1:] if rest.startswith(":") else ""
    else:
        host, _, port = netloc.partition(":")
    return f"{host}:{port or _DEFAULT_PORTS.get(scheme, '')}"


def foreign_origin(headers: Headers) -> bool:
    """True when the browser's headers say another origin sent this request.

    ``Sec-Fetch-Site`` other than same-origin or none (typed address, bookmark) means
    another site, or another port or sub-domain of this one (``same-site``, still a
    different origin).  An ``Origin`` naming a site must name this service's own host
    and port.  ``Origin: null`` (a sandboxed frame, a local file) is refused unless
    ``Sec-Fetch-Site`` vouches for the request: the pages' ``Referrer-Policy:
    no-referrer`` makes Chromium send ``null`` for the service's own forms too.  No
    header at all is a script or a very old browser: allowed.  The scheme is not
    compared: behind a proxy that terminates TLS the service sees ``http`` while the
    page was ``https``.
    """
    site = headers.get("sec-fetch-site")
    if site is not None and site.strip().lower() not in OWN_FETCH_SITES:
        return True
    origin = headers.get("origin")
    if origin is None:
        return False
    parts = urlsplit(origin.strip())
    if not parts.scheme or not parts.netloc:
        return site is None  # "null", or something no browser sends for a real page
    own_host = headers.get("host", "")
    return _host_and_port(parts.netloc, parts.scheme) != _host_and_port(own_host, parts.scheme)


class SameOriginMiddleware:
    """Refuse (403) every POST, PUT, PATCH and DELETE that another site's page sent.

    One check in front of every route: an upload, a demo, the API and the review
    forms alike, before anything reads the body or touches the store.  Reading
    requests are never refused.  The review forms keep their per-project tokens too.
    """

    def __init__(self, app: ASGIApp, templates: Jinja2Templates) -> None:
        self.app = app
        self.templates = templates

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if (
            scope["type"] != "http"
            or scope["method"] not in UNSAFE_METHODS
            or not foreign_origin(Headers(scope=scope))
        ):
            await self.app(scope, receive, send)
            return
        headers = Headers(scope=scope)
        logger.warning(
            "refused %s %s from another site (Origin %r, Sec-Fetch-Site %r)",
            scope["method"],
            scope.get("path", ""),
            headers.get("origin"),
            headers.get("sec-fetch-site"),
        )
        response: Response
        if is_api(scope.get("path", "")):
            response = JSONResponse({"error": FOREIGN_ORIGIN_MESSAGE}, status_code=403)
        else:
            response = _error_page(
                self.templates, scope, 403, "Request refused (403)", FOREIGN_ORIGIN_MESSAGE
            )
        await response(scope, receive, send)


class _BodyTooLarge(Exception):
    """Raised inside the app when the request body passes the limit."""


class UploadLimitMiddleware:
    """Refuse bodies over the limit with 413: by Content-Length up front, then by counting."""

    def __init__(self, app: ASGIApp, max_bytes: int, templates: Jinja2Templates) -> None:
        self.app = app
        self.max_bytes = max_bytes
        self.templates = templates

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        declared = Headers(scope=scope).get("content-length")
        if declared is not None:
            try:
                too_big = int(declared) > self.max_bytes
            except ValueError:
                too_big = False
            if too_big:
                await self._refuse(scope, receive, send)
                return

        received = 0
        exceeded = False

        async def counting_receive() -> Message:
            nonlocal received, exceeded
            message = await receive()
            if message["type"] == "http.request":
                received += len(message.get("body", b""))
                if received > self.max_bytes:
                    exceeded = True
                    raise _BodyTooLarge
            return message

        async def guarded_send(message: Message) -> None:
            # Once the limit is passed, whatever the app answers is replaced by the 413 below.
            if not exceeded:
                await send(message)

        try:
            await self.app(scope, counting_receive, guarded_send)
        except Exception:
            if not exceeded:
                raise
        if exceeded:
            await self._refuse(scope, receive, send)

    async def _refuse(self, scope: Scope, receive: Receive, send: Send) -> None:
        limit = _megabytes(self.max_bytes)
        message = (
            f"The upload is larger than the limit of {limit}. Split the field book, "
            "or ask the administrator to raise the limit."
        )
        response: Response
        if is_api(scope.get("path", "")):
            response = JSONResponse({"error": message}, status_code=413)
        else:
            response = _error_page(self.templates, scope, 413, "Upload too large", message)
        response.headers["Connection"] = "close"
        await response(scope, receive, send)


def _megabytes(size: int) -> str:
    return f"{size / (1024 * 1024):g} MB" if size >= 1024 * 1024 else f"{size} bytes"


# --------------------------------------------------------------------------------------
# error pages


def _error_page(
    templates: Jinja2Templates,
    scope: Scope,
    status: int,
    heading: str,
    message: str,
    **extra: Any,
) -> HTMLResponse:
    request = Request(scope)
    context = {
        "status": status,
        "heading": heading,
        "message": message,
        "issues": [],
        "points": [],
        **extra,
    }
    return templates.TemplateResponse(request, "error.html", context, status_code=status)


def _install_handlers(app: FastAPI, templates: Jinja2Templates) -> None:
    """Errors as JSON under /api and as friendly pages elsewhere; never a traceback."""
    _install_request_handlers(app, templates)
    _install_failure_handlers(app, templates)


def _install_request_handlers(app: FastAPI, templates: Jinja2Templates) -> None:
    """What the request asked for cannot be done: field book problems, 4xx, a full queue."""

    @app.exception_handler(SurveyError)
    async def survey_error(request: Request, exc: SurveyError) -> Response:
        """A field book or network problem: 422 with what to fix."""
        if is_api(request.url.path):
            return JSONResponse(survey_error_payload(exc), status_code=422)
        payload = survey_error_payload(exc)
        return _error_page(
            templates,
            request.scope,
            422,
            "The field book could not be adjusted",
            payload["error"],
            issues=payload.get("errors", []),
            points=payload.get("points", []),
        )

    @app.exception_handler(RunGone)
    async def run_gone(request: Request, exc: RunGone) -> Response:
        """The project was deleted while this request adjusted it: nothing is left to show."""
        message = "This project was deleted while it was being adjusted."
        if is_api(request.url.path):
            return JSONResponse({"error": message}, status_code=404)
        return _error_page(templates, request.scope, 404, "Not found", message)

    @app.exception_handler(StarletteHTTPException)
    async def http_error(request: Request, exc: StarletteHTTPException) -> Response:
        """404, 405, 400 and friends."""
        detail = str(exc.detail) if exc.detail else "Request refused"
        if is_api(request.url.path):
            return JSONResponse(
                {"error": detail},
                status_code=exc.status_code,
                headers=getattr(exc, "headers", None),
            )
        heading = "Not found" if exc.status_code == 404 else f"Request refused ({exc.status_code})"
        return _error_page(templates, request.scope, exc.status_code, heading, detail)

    @app.exception_handler(RequestValidationError)
    async def validation_error(request: Request, exc: RequestValidationError) -> Response:
        """A malformed request (not a field book problem); a malformed path names nothing: 404."""
        if any(error.get("loc", ("",))[0] == "path" for error in exc.errors()):
            detail = "There is nothing at this address."
            if is_api(request.url.path):
                return JSONResponse({"error": detail}, status_code=404)
            return _error_page(templates, request.scope, 404, "Not found", detail)
        message = "The request is not in the expected form."
        if is_api(request.url.path):
            return JSONResponse({"error": message}, status_code=422)
        return _error_page(templates, request.scope, 400, "Bad request", message)

    @app.exception_handler(QueueFull)
    async def queue_full(request: Request, exc: QueueFull) -> Response:
        """The adjustment queue is full: 503 with Retry-After, nothing stored."""
        return await http_error(request, busy(exc))

    @app.exception_handler(StoreFull)
    async def store_full(request: Request, exc: StoreFull) -> Response:
        """The store holds as many projects as it may: 507, nothing stored."""
        return await http_error(request, StarletteHTTPException(507, str(exc)))


def storage_failure(templates: Jinja2Templates, scope: Scope, exc: Exception) -> Response:
    """503: the store cannot be read or written (the folder or database and the reason go
    to the log only)."""
    request = Request(scope)
    logger.error(
        "%s %s: %s cannot be used (%s); check that it exists, "
        "that the service's user may write to it and that the disk has room",
        request.method,
        request.url.path,
        request.app.state.store.location,
        exc,
    )
    if request.method in UNSAFE_METHODS:
        message = (
            "Your request could not be stored: the service cannot write to its "
            "data folder. Nothing was saved. Please tell the administrator; the "
            "service's log names the folder and the reason."
        )
    else:
        message = (
            "The stored projects cannot be read right now: the service cannot use "
            "its data folder. Please tell the administrator; the service's log "
            "names the folder and the reason."
        )
    if is_api(request.url.path):
        return JSONResponse({"error": message}, status_code=503)
    return _error_page(templates, scope, 503, "The project store is unavailable", message)


def _install_failure_handlers(app: FastAPI, templates: Jinja2Templates) -> None:
    """The service itself failed: its store is unusable, or an unexpected error (500)."""

    async def storage_error(request: Request, exc: Exception) -> Response:
        """The project store cannot be read or written: say so, and name the folder (or the
        database) in the log."""
        return storage_failure(templates, request.scope, exc)

    for error in storage_errors():  # SQLite's, and psycopg's when it is installed
        app.add_exception_handler(error, storage_error)

    for error in storage_errors():  # SQLite's, and psycopg's when it is installed
        app.add_exception_handler(error, storage_error)

    @app.exception_handler(Exception)
    async def server_error(request: Request, exc: Exception) -> Response:
        """The generic 500: logged on the server, never shown to the user."""
        logger.error("unhandled error on %s %s", request.method, request.url.path, exc_info=exc)
        if request.method in UNSAFE_METHODS:
            message = (
                "Something went wrong on the server before this request was finished. "
                "Check the project list to see whether it was stored, then try again; "
                "report the problem if it persists."
            )
        else:
            message = (
                "Something went wrong on the server. Nothing was changed; please try "
                "again, and report the problem if it persists."
            )
        response: Response
        if is_api(request.url.path):
            response = JSONResponse({"error": "internal server error"}, status_code=500)
        else:
            response = _error_page(templates, request.scope, 500, "Server error", message)
        # This handler runs outside the middleware stack, so add the headers here too.
        for key, value in SECURITY_HEADERS.items():
            response.headers.setdefault(key, value)
        return response


# --------------------------------------------------------------------------------------
# factory


#: Responses smaller than this go out as they are: compressing them saves too little.
GZIP_MINIMUM_BYTES = 1024
#: zlib level 6: nearly the size of level 9 at a fraction of its time on a large review page.
GZIP_LEVEL = 6
#: PDF reports carry their own compressed streams.
GZIP_EXCLUDED = (*DEFAULT_EXCLUDED_CONTENT_TYPES, "application/pdf")

#: Projects one data folder holds before uploads are refused with 507 (0: no limit).
DEFAULT_MAX_PROJECTS = 10_000
#: Days a deleted project stays restorable before it is erased for good.
DEFAULT_KEEP_DELETED_DAYS = 30
#: Host names ``serve`` answers to unless STATIONFIT_ALLOWED_HOSTS says otherwise.  Refusing
#: other Host headers stops a web page from reaching the service through DNS rebinding.
LOOPBACK_HOSTS = ("127.0.0.1", "localhost")


def behind_https() -> bool:
    """True when STATIONFIT_HTTPS says a reverse proxy serves the service over https."""
    return os.environ.get("STATIONFIT_HTTPS", "").strip().lower() in ("1", "true", "yes")


def is_loopback(host: str) -> bool:
    """True for an address only this machine reaches (127.0.0.0/8, ::1, localhost)."""
    name = host.strip().strip("[]").lower()
    if name == "localhost":
        return True
    try:
        return ipaddress.ip_address(name).is_loopback
    except ValueError:
        return False


def needs_accounts(host: str, allowed_hosts: Collection[str], https: bool) -> str:
    """Why serving this way needs accounts ('' for the workstation mode: loopback only).

    Others reach the service when it binds a non-loopback address, when it answers a host
    name that is not this machine's (a reverse proxy passes it on), or behind https.
    """
    if not is_loopback(host):
        return f"it would listen on {host}, which other computers can reach"
    public = [h for h in allowed_hosts if h == "*" or not is_loopback(h)]
    if public:
        return f"it would answer for {public[0]} (STATIONFIT_ALLOWED_HOSTS), through a proxy"
    if https:
        return "it is served behind https (STATIONFIT_HTTPS), for others to reach"
    return ""


def serve_allowed_hosts(host: str) -> tuple[str, ...]:
    """Host names to accept when serving on ``host``: STATIONFIT_ALLOWED_HOSTS, else loopback.

    ``*`` in the variable turns the check off (only behind a proxy that checks Host itself).
    """
    configured = os.environ.get("STATIONFIT_ALLOWED_HOSTS", "").strip()
    if configured:
        return tuple(h.strip() for h in configured.split(",") if h.strip())
    # a wildcard bind address names no host a client could ask for
    extra = () if host in ("", "0.0.0.0", "::") or ":" in host else (host,)  # noqa: S104
    return tuple(dict.fromkeys(LOOPBACK_HOSTS + extra))


def create_app(
    data_dir: Path,
    *,
    max_upload_bytes: int | None = None,
    max_projects: int | None = None,
    allowed_hosts: Collection[str] | None = None,
    demo_dir: Path | None = None,
    limits: WorkLimits | None = None,
    adjustments_at_once: int | None = None,
    max_waiting: int | None = None,
    keep_deleted_days: int | None = None,
    database: str | None = None,
    workers: bool | None = None,
    session_hours: float | None = None,
    secure_cookies: bool | None = None,
) -> FastAPI:
    """Build the web application storing projects under ``data_dir``, or in the PostgreSQL
    database at ``database`` (``postgresql://…``).

    ``workers`` (default: True with PostgreSQL) hands the adjustments of stored runs to
    ``python -m server worker`` processes through the task queue; otherwise they run on
    this process's threads.

    Limits not given come from STATIONFIT_MAX_UPLOAD_BYTES and STATIONFIT_MAX_PROJECTS,
    else the defaults (docs/security.md).  ``allowed_hosts`` (None: any) are the Host
    names answered; ``python -m server serve`` passes ``serve_allowed_hosts``.
    ``limits`` (observations and unknowns per field book) default to ``service_limits()``;
    ``adjustments_at_once`` and ``max_waiting`` (the adjustment queue) to ``service_queue()``.
    ``keep_deleted_days`` (how long a deleted project can be restored; 0: erased at once)
    defaults to STATIONFIT_KEEP_DELETED_DAYS, else 30.  With accounts in the store, a
    session lasts ``session_hours`` (STATIONFIT_SESSION_HOURS, else 12) and its cookie is
    ``Secure`` when ``secure_cookies`` (STATIONFIT_HTTPS=1: served behind https).
    """
    if max_upload_bytes is None:
        max_upload_bytes = env_int("STATIONFIT_MAX_UPLOAD_BYTES", DEFAULT_MAX_UPLOAD_BYTES)
    if max_projects is None:
        max_projects = env_int("STATIONFIT_MAX_PROJECTS", DEFAULT_MAX_PROJECTS)
    if keep_deleted_days is None:
        keep_deleted_days = env_int("STATIONFIT_KEEP_DELETED_DAYS", DEFAULT_KEEP_DELETED_DAYS)
    if session_hours is None:
        session_hours = env_int("STATIONFIT_SESSION_HOURS", access.DEFAULT_SESSION_HOURS)
    if secure_cookies is None:
        secure_cookies = behind_https()

    app = FastAPI(
        title="Stationfit",
        version=__version__,
        docs_url=None,
        redoc_url=None,
        openapi_url="/api/openapi.json",
    )
    templates = make_templates()
    store = Store(database) if database else Store(Path(data_dir) / DATABASE_NAME)
    app.state.store = store
    if 0 < store.upgraded_from < SCHEMA_VERSION:
        logger.warning(
            "%s was upgraded from schema %d to %d",
            store.location,
            store.upgraded_from,
            SCHEMA_VERSION,
        )
    queue = AdjustmentQueue(*service_queue(adjustments_at_once, max_waiting))
    jobs: BackgroundAdjustments
    if workers if workers is not None else store.postgresql:
        if not store.postgresql:
            raise ValueError("adjustment workers need the projects in PostgreSQL (--database)")
        jobs = RemoteJobs(store, str(database), queue, queue.max_waiting)
    else:
        jobs = Jobs(queue)
    app.state.jobs = jobs
    # This process has not started any run yet: one still ``running`` was cut off, unless
    # the task queue still has it (a worker adjusts it, or will).
    keep = jobs.live_runs() if isinstance(jobs, RemoteJobs) else set()
    stopped = store.mark_interrupted(keep)
    if stopped:
        logger.warning(
            "the service stopped before finishing run(s) %s; stored as "
            "interrupted (each can be re-run from its project's page)",
            ", ".join(map(str, stopped)),
        )
    # Deleted projects past their retention are erased at each start (and each deletion).
    purge_deleted(app.state.store, keep_deleted_days)
    app.state.keep_deleted_days = keep_deleted_days
    app.state.templates = templates
    app.state.max_upload_bytes = max_upload_bytes
    app.state.max_projects = max_projects
    app.state.limits = limits if limits is not None else service_limits()
    # the review's second opinions (robust, snooping) of recent runs, shared by worker threads
    app.state.proposals = ProposalCache()
    app.state.run_parts = parts_cache()  # results, rows and plots of recent runs
    app.state.demo_dir = Path(demo_dir) if demo_dir is not None else DEMO_DIR
    # accounts, sessions and the sign-in limit (none in the store: the workstation mode)
    app.state.accounts = Accounts(app.state.store)
    app.state.access = access.AccessSettings(
        app.state.accounts, int(session_hours * 3600), secure_cookies
    )
    # looked up on each call: a test may replace the settings' clock
    app.state.sign_in_limiter = sign_in.SignInLimiter(lambda: app.state.access.clock())  # noqa: PLW0108
    app.mount("/static", StaticFiles(directory=STATIC_DIR), name="static")
    for module in (
        pages,
        api,
        review,
        relative,
        interrupted,
        design,
        monitoring,
        sign_in,
        approval,
        run_reports,
    ):
        app.include_router(module.router)
    _install_handlers(app, templates)
    app.add_middleware(UploadLimitMiddleware, max_bytes=max_upload_bytes, templates=templates)
    # Who is asking, and may they: before any route reads a body or looks a project up.
    app.add_middleware(
        access.AccessMiddleware,
        router_app=app,
        settings=app.state.access,
        error_page=lambda scope, status, heading, message: _error_page(
            templates, scope, status, heading, message
        ),
        store_failure=lambda scope, exc: storage_failure(templates, scope, exc),
    )
    # Before the upload limit, so another site's request is refused without reading its body.
    app.add_middleware(SameOriginMiddleware, templates=templates)
    # Pages, JSON and CSV compress to a tenth or less when the browser accepts gzip.
    app.add_middleware(
        GZipMiddleware,
        minimum_size=GZIP_MINIMUM_BYTES,
        compresslevel=GZIP_LEVEL,
        exclude_content_types=GZIP_EXCLUDED,
    )
    if allowed_hosts is not None and "*" not in allowed_hosts:
        app.add_middleware(
            TrustedHostMiddleware, allowed_hosts=list(allowed_hosts), www_redirect=False
        )
    app.add_middleware(SecurityHeadersMiddleware)
    app.add_middleware(HeadAsGetMiddleware)
    return app
