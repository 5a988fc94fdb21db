"""The Starlette application: the upload API (``/v1/...``) and the researcher's dashboard.

API contract (terms, endpoints, status codes, versioning): ``docs/server.md``.
Every upload is size-limited before its body is read (``Content-Length``
required and checked, then the stream is cut at the limit), rate-limited per
device, verified exactly as ``lethe study open`` verifies, and answered with
JSON; an error body is ``{"error": {"status", "code", "message"}}``.  The
verification and the database run in worker threads, so the event loop keeps
answering while a bundle is checked.
"""

from __future__ import annotations

import hashlib
import hmac
import json
import secrets
import threading
import time
from dataclasses import dataclass
from pathlib import Path

from starlette.applications import Starlette
from starlette.concurrency import run_in_threadpool
from starlette.middleware import Middleware
from starlette.requests import Request
from starlette.responses import JSONResponse, RedirectResponse, Response
from starlette.routing import Route

from ...errors import LetheError
from .intake import StudyContext, UploadError, accept_bundle, accept_enrolment, accept_withdrawal

API_VERSION = 1
MAX_JSON_BYTES = 64 * 1024
SESSION_COOKIE = "lethe_dashboard"
SESSION_SECONDS = 12 * 3600


@dataclass
class ServerSettings:
    """Limits and the dashboard secret, validated (set at ``lethe study serve`` time)."""

    dashboard_password: str
    max_bundle_bytes: int = 8 * 1024 * 1024
    rate_per_minute: float = 30.0
    rate_burst: int = 10
    overdue_days: float = 8.0
    secure_cookies: bool = True

    def __post_init__(self):
        from ...bundle import MAX_BUNDLE_BYTES

        if not isinstance(self.dashboard_password, str) or len(self.dashboard_password) < 8:
            raise LetheError("dashboard password: expected at least 8 characters; the dashboard is never "
                             "served without one")
        if not 1024 <= self.max_bundle_bytes <= MAX_BUNDLE_BYTES:
            raise LetheError(f"max_bundle_bytes: expected 1024..{MAX_BUNDLE_BYTES}, got {self.max_bundle_bytes}")
        if not self.rate_per_minute > 0 or self.rate_burst < 1:
            raise LetheError("rate limits: expected rate_per_minute > 0 and rate_burst >= 1")


class RateLimiter:
    """Token bucket per key (a device): ``burst`` uploads at once, refilled at ``per_minute``."""

    def __init__(self, per_minute: float, burst: int, max_keys: int = 100_000):
        self.rate = per_minute / 60.0
        self.burst = float(burst)
        self.max_keys = max_keys
        self._b: dict[str, tuple[float, float]] = {}
        self._lock = threading.Lock()

    def take(self, key: str) -> float:
        """0 when allowed, else the seconds to wait."""
        now = time.monotonic()
        with self._lock:
            tokens, t = self._b.get(key, (self.burst, now))
            tokens = min(self.burst, tokens + (now - t) * self.rate)
            if tokens >= 1:
                if len(self._b) >= self.max_keys and key not in self._b:
                    self._b.clear()  # bounded memory; a flood of fresh keys only resets buckets
                self._b[key] = (tokens - 1, now)
                return 0.0
            self._b[key] = (tokens, now)
            return (1 - tokens) / self.rate


def error(status: int, code: str, message: str, headers: dict | None = None) -> JSONResponse:
    return JSONResponse({"error": {"status": status, "code": code, "message": message}}, status_code=status,
                        headers=headers)


async def read_limited(request: Request, limit: int, what: str) -> bytes:
    """The body, refused with 411/413 before reading when it is (or says it is) larger than ``limit``."""
    cl = request.headers.get("content-length")
    if cl is None:
        raise UploadError(411, "length_required", f"{what}: Content-Length is required (uploads are "
                                                  f"size-checked before they are read)")
    if not cl.isdigit():
        raise UploadError(400, "invalid", f"{what}: Content-Length {cl[:20]!r} is not a number")
    if int(cl) > limit:
        raise UploadError(413, "too_large", f"{what}: {cl} bytes is more than the limit of {limit} bytes; "
                                            f"nothing was read")
    chunks, n = [], 0
    async for chunk in request.stream():
        n += len(chunk)
        if n > limit:
            raise UploadError(413, "too_large", f"{what}: the body is longer than its Content-Length "
                                                f"and the limit of {limit} bytes")
        chunks.append(chunk)
    body = b"".join(chunks)
    if len(body) != int(cl):
        raise UploadError(400, "incomplete", f"{what}: received {len(body)} of {cl} bytes")
    return body


class SecurityHeaders:
    """Pure ASGI middleware: a strict Content-Security-Policy and friends on every response."""

    HEADERS = [(b"content-security-policy", b"default-src 'none'; img-src 'self'; style-src 'self'; "
                                            b"form-action 'self'; frame-ancestors 'none'; base-uri 'none'"),
               (b"x-content-type-options", b"nosniff"), (b"referrer-policy", b"no-referrer")]

    def __init__(self, app):
        self.app = app

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)

        async def send_with_headers(message):
            if message["type"] == "http.response.start":
                headers = list(message.get("headers", []))
                names = {k.lower() for k, _ in headers}
                headers.extend(self.HEADERS)
                if b"cache-control" not in names:
                    headers.append((b"cache-control", b"no-store"))
                message = {**message, "headers": headers}
            await send(message)
        return await self.app(scope, receive, send_with_headers)


def create_app(study_dir, ctx: StudyContext, settings: ServerSettings) -> Starlette:
    """The ASGI application for one study."""
    from .dashboard import Dashboard

    limiter = RateLimiter(settings.rate_per_minute, settings.rate_burst)
    sessions: dict[str, float] = {}
    dash = Dashboard(ctx, settings)

    def source_of(request: Request, kind: str) -> str:
        host = request.client.host if request.client else "?"
        return f"{kind} upload from {host}"

    async def guarded(request: Request, kind: str, limit: int, key_of, handler) -> Response:
        src = source_of(request, kind)
        try:
            body = await read_limited(request, limit, src)
            key = key_of(body)
            wait = limiter.take(f"{kind}:{key}")
            if wait > 0:
                return error(429, "rate_limited", f"{src}: too many uploads from device {key}; retry in "
                                                  f"{wait:.0f} s", {"Retry-After": str(max(1, round(wait)))})
            status, out = await run_in_threadpool(handler, body, src)
            return JSONResponse(out, status_code=status)
        except UploadError as e:
            return error(e.status, e.code, str(e))
        except LetheError as e:
            from .intake import classify

            u = classify(e)
            return error(u.status, u.code, str(e))

    def json_body(body: bytes, src: str):
        from ..bounded import loads_bounded

        return loads_bounded(body, src, "request body", max_depth=4)

    async def api_root(request: Request) -> Response:
        return JSONResponse({"api": "lethe-study", "version": API_VERSION, "study_id": ctx.study_id})

    async def post_bundle(request: Request) -> Response:
        from .intake import claimed_sender

        ctype = request.headers.get("content-type", "")
        if ctype.split(";")[0].strip() != "application/octet-stream":
            return error(415, "unsupported_media_type", "bundle upload: Content-Type must be "
                                                        "application/octet-stream")
        return await guarded(request, "bundle", settings.max_bundle_bytes,
                             lambda b: claimed_sender(b)[0] or hashlib.sha256(b).hexdigest()[:16],
                             lambda b, s: accept_bundle(ctx, b, s))

    def _json_key(field_path):
        def key(body: bytes) -> str:
            try:
                d = json.loads(body)
                for k in field_path:
                    d = d[k]
                return str(d)[:64]
            except (ValueError, KeyError, TypeError, RecursionError):
                return "malformed"
        return key

    async def post_enrolment(request: Request) -> Response:
        if request.headers.get("content-type", "").split(";")[0].strip() != "application/json":
            return error(415, "unsupported_media_type", "enrolment upload: Content-Type must be application/json")
        return await guarded(request, "enrolment", MAX_JSON_BYTES, _json_key(("enrolment", "device_key_id")),
                             lambda b, s: accept_enrolment(ctx, json_body(b, s), s))

    async def post_withdrawal(request: Request) -> Response:
        if request.headers.get("content-type", "").split(";")[0].strip() != "application/json":
            return error(415, "unsupported_media_type", "withdrawal upload: Content-Type must be "
                                                        "application/json")
        return await guarded(request, "withdrawal", MAX_JSON_BYTES, _json_key(("device_key_id",)),
                             lambda b, s: accept_withdrawal(ctx, json_body(b, s), s))

    # -- dashboard -----------------------------------------------------------------
    def logged_in(request: Request) -> bool:
        tok = request.cookies.get(SESSION_COOKIE)
        exp = sessions.get(tok or "")
        if exp is None or exp < time.time():
            sessions.pop(tok or "", None)
            return False
        return True

    async def login_page(request: Request) -> Response:
        return dash.page("login.html", {"failed": False})

    async def login(request: Request) -> Response:
        from urllib.parse import parse_qs

        try:
            body = await read_limited(request, 4096, "login")
        except UploadError as e:
            return error(e.status, e.code, str(e))
        form = parse_qs(body.decode("utf-8", "replace"))
        given = (form.get("password") or [""])[0]
        if not hmac.compare_digest(given.encode(), settings.dashboard_password.encode()):
            time.sleep(0.2)  # slows guessing; common practice, no source
            return dash.page("login.html", {"failed": True}, status=401)
        tok = secrets.token_urlsafe(32)
        now = time.time()
        for k in [k for k, v in sessions.items() if v < now]:
            sessions.pop(k, None)
        sessions[tok] = now + SESSION_SECONDS
        resp = RedirectResponse("/dashboard", status_code=303)
        resp.set_cookie(SESSION_COOKIE, tok, max_age=SESSION_SECONDS, httponly=True,
                        secure=settings.secure_cookies, samesite="strict", path="/")
        return resp

    async def logout(request: Request) -> Response:
        sessions.pop(request.cookies.get(SESSION_COOKIE) or "", None)
        resp = RedirectResponse("/login", status_code=303)
        resp.delete_cookie(SESSION_COOKIE, path="/")
        return resp

    async def dashboard(request: Request) -> Response:
        if not logged_in(request):
            return RedirectResponse("/login", status_code=303)
        return await run_in_threadpool(dash.render)

    async def plot(request: Request) -> Response:
        if not logged_in(request):
            return error(401, "login_required", "the dashboard needs the researcher's login")
        png = await run_in_threadpool(dash.plot, request.path_params["name"])
        if png is None:
            return error(404, "not_found", f"no plot {request.path_params['name']!r}")
        return Response(png, media_type="image/png", headers={"Cache-Control": "no-store"})

    async def style(request: Request) -> Response:
        return Response(Dashboard.CSS, media_type="text/css")

    async def root(request: Request) -> Response:
        return RedirectResponse("/dashboard", status_code=303)

    routes = [
        Route("/", root), Route("/v1", api_root), Route("/v1/bundles", post_bundle, methods=["POST"]),
        Route("/v1/enrolments", post_enrolment, methods=["POST"]),
        Route("/v1/withdrawals", post_withdrawal, methods=["POST"]),
        Route("/login", login_page, methods=["GET"]), Route("/login", login, methods=["POST"]),
        Route("/logout", logout, methods=["POST"]), Route("/dashboard", dashboard),
        Route("/dashboard/plot/{name}.png", plot), Route("/dashboard/style.css", style),
    ]

    async def not_found(request: Request, exc) -> Response:
        return error(404, "not_found", f"{request.method} {request.url.path}: no such endpoint (API v{API_VERSION}: "
                                       f"docs/server.md)")

    async def bad_method(request: Request, exc) -> Response:
        return error(405, "method_not_allowed", f"{request.method} {request.url.path}: method not allowed")

    app = Starlette(routes=routes, exception_handlers={404: not_found, 405: bad_method},
                    middleware=[Middleware(SecurityHeaders)])
    app.state.study_dir = Path(study_dir)
    return app
