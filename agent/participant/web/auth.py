"""Who may use the participant's page: one-time login tokens, sessions, CSRF, the request checks.

How a browser gets in (and nothing else does):

1. ``lethe open`` mints a *login token* (32 random bytes, URL-safe) and stores
   only its SHA-256 with an expiry (2 minutes) in ``HOME/state/page-login.json``
   (0600, inside the 0700 home); the browser is started on
   ``http://127.0.0.1:PORT/login?t=TOKEN``.
2. ``/login`` consumes the token (it works once) and sets a session cookie
   (``HttpOnly``, ``SameSite=Strict``, ``Path=/``) holding a fresh random
   session id known only to the serving process; the token leaves the address
   bar by a redirect.
3. Every other request must carry a live session cookie, a ``Host`` header
   naming the loopback address and the served port (DNS rebinding defence),
   and must not come from another site (``Sec-Fetch-Site``/``Origin``).  Every
   POST must carry the session's CSRF token in its form.

Refusals are plain pages with status 400 (wrong host) or 403, and say to run
``lethe open``.
"""

from __future__ import annotations

import fcntl
import hashlib
import hmac
import json
import os
import secrets
import time
from contextlib import contextmanager
from dataclasses import dataclass, field

from ...fsutil import write_private
from ...home import Home

LOGIN_TTL_S = 120.0
SESSION_TTL_S = 12 * 3600.0
COOKIE = "lethe_page"


def _login_path(home: Home):
    return home.state / "page-login.json"


@contextmanager
def _locked(home: Home):
    home.state.mkdir(parents=True, exist_ok=True, mode=0o700)
    fd = os.open(home.state / "page-login.lock", os.O_RDWR | os.O_CREAT | os.O_NOFOLLOW, 0o600)
    try:
        fcntl.flock(fd, fcntl.LOCK_EX)
        yield
    finally:
        os.close(fd)


def _read_tokens(home: Home, now: float) -> list[dict]:
    try:
        doc = json.loads(_login_path(home).read_text("utf-8"))
    except (FileNotFoundError, ValueError):
        return []
    rows = doc.get("tokens", []) if isinstance(doc, dict) else []
    return [r for r in rows if isinstance(r, dict) and float(r.get("expires", 0)) > now]


def mint_login(home, ttl_s: float = LOGIN_TTL_S, now: float | None = None) -> str:
    """A fresh one-time login token for the page (only its hash is stored)."""
    home = home if isinstance(home, Home) else Home(home)
    now = time.time() if now is None else float(now)
    token = secrets.token_urlsafe(32)
    with _locked(home):
        rows = _read_tokens(home, now)
        rows.append({"sha256": hashlib.sha256(token.encode()).hexdigest(), "expires": now + float(ttl_s)})
        write_private(_login_path(home), json.dumps({"tokens": rows[-20:]}).encode())
    return token


def consume_login(home: Home, token: str, now: float | None = None) -> bool:
    """True (once) for a live token minted by :func:`mint_login`."""
    if not token or len(token) > 200:
        return False
    now = time.time() if now is None else float(now)
    digest = hashlib.sha256(token.encode()).hexdigest()
    with _locked(home):
        rows = _read_tokens(home, now)
        hit = [r for r in rows if hmac.compare_digest(str(r.get("sha256", "")), digest)]
        if not hit:
            return False
        rows = [r for r in rows if r not in hit]
        write_private(_login_path(home), json.dumps({"tokens": rows}).encode())
    return True


@dataclass
class Session:
    sid: str
    csrf: str
    created: float
    shown: dict = field(default_factory=dict)  # trial id -> monotonic time it was shown


class Sessions:
    """In-memory sessions of one serving process (a restart logs everyone out)."""

    def __init__(self, ttl_s: float = SESSION_TTL_S):
        self.ttl_s = float(ttl_s)
        self._by_id: dict[str, Session] = {}

    def new(self) -> Session:
        s = Session(secrets.token_urlsafe(32), secrets.token_urlsafe(32), time.time())
        self._by_id[s.sid] = s
        return s

    def get(self, sid: str | None) -> Session | None:
        if not sid:
            return None
        for known, old in list(self._by_id.items()):
            if time.time() - old.created > self.ttl_s:
                del self._by_id[known]
        s = self._by_id.get(sid)
        return s if s is not None and hmac.compare_digest(s.sid, sid) else None


def host_allowed(host: str | None, port: int) -> bool:
    """Only ``127.0.0.1:PORT`` and ``localhost:PORT`` (the DNS-rebinding check)."""
    return host in (f"127.0.0.1:{port}", f"localhost:{port}")


def origin_allowed(headers, port: int) -> bool:
    """Refuse requests a browser marks as coming from another site or origin."""
    site = headers.get("sec-fetch-site")
    if site is not None and site not in ("same-origin", "none"):
        return False
    origin = headers.get("origin")
    return origin is None or origin in (f"http://127.0.0.1:{port}", f"http://localhost:{port}")


def csrf_ok(session: Session, sent: str | None) -> bool:
    return bool(sent) and hmac.compare_digest(session.csrf, str(sent))


SECURITY_HEADERS = {
    # No script at all; styles and images only from this page; forms only to it.
    "content-security-policy": ("default-src 'none'; style-src 'self'; img-src 'self'; form-action 'self'; "
                                "frame-ancestors 'none'; base-uri 'none'"),
    "x-content-type-options": "nosniff",
    "x-frame-options": "DENY",
    "referrer-policy": "same-origin",
    "cache-control": "no-store",
    "cross-origin-opener-policy": "same-origin",
    "cross-origin-resource-policy": "same-origin",
}
