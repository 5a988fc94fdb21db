"""The agent's upload queue: enrolment, confirmed bundles and the withdrawal certificate to the study server.

When the study card names a server (``server.url`` and the certificate pin
``server.certificate_sha256``, card version 2), what the participant has
prepared is queued here and sent over HTTPS to exactly that certificate.
Without a server on the card nothing is queued and files work as before
(the participant hands them over as agreed with the study).

Layout, all under ``HOME/state/upload/`` (private, written atomically)::

    queue/<id>.json    waiting: {"id", "kind", "name", "file" | "body", "added", "attempts",
                                 "next_try", "last_error"}
    sent/<id>.json     acknowledged by the server: {"id", "kind", "name", "sent_at", "ack": {...}}
    failed/<id>.json   refused by the server for good (a 4xx other than 408/429), with its message
    contact.json       {"last_contact", "last_ok", "last_error"}

A bundle's id is the SHA-256 of its bytes, so a bundle acknowledged once is
never sent again.  The acknowledgement is written before the queue entry is
removed; a kill in between means one resend, which the server answers
"already have" (its uploads are idempotent).  Retries back off exponentially
with full jitter (delay drawn uniformly from 0 to min(cap, base * 2**attempts);
common practice, no source), honouring a server's ``Retry-After``.

Honest wording: a bundle is *prepared* while it waits here and *sent* only
after the server acknowledged it (:func:`queue_status`).
"""

from __future__ import annotations

import hashlib
import json
import random
import ssl
import time
from dataclasses import dataclass
from pathlib import Path
from typing import Any
from urllib.parse import urlsplit

from .errors import DataError, IntegrityError, LetheError, StateError

BACKOFF_BASE_S = 2.0
BACKOFF_CAP_S = 3600.0
TIMEOUT_S = 30.0
KINDS = ("enrolment", "bundle", "withdrawal")
ENDPOINT = {"enrolment": "/v1/enrolments", "bundle": "/v1/bundles", "withdrawal": "/v1/withdrawals"}


# ----------------------------------------------------------------------------- pinned TLS
def pinned_context(url: str, pin_sha256: str, *, timeout_s: float = 10.0) -> ssl.SSLContext:
    """An SSL context that trusts exactly the server certificate whose DER SHA-256 is ``pin_sha256``.

    The certificate is fetched once, its hash compared with the pin, and then
    made the only trust anchor (partial-chain verification), so every later
    handshake succeeds only with a server holding that certificate's key.
    Host names are not checked: the pin is stronger than a name.
    """
    u = urlsplit(url)
    if u.scheme != "https" or not u.hostname:
        raise DataError(f"{url}: the study server's address must be https://HOST[:PORT]")
    try:
        pem = ssl.get_server_certificate((u.hostname, u.port or 443), timeout=timeout_s)
    except (OSError, ssl.SSLError) as e:
        raise ConnectionError(f"{url}: cannot reach the study server ({e})") from None
    der = ssl.PEM_cert_to_DER_cert(pem)
    got = hashlib.sha256(der).hexdigest()
    if got != pin_sha256:
        raise IntegrityError(f"{url}: the server's certificate (SHA-256 {got[:16]}…) is not the one the study "
                             f"card pins ({pin_sha256[:16]}…); nothing was sent")
    ctx = ssl.create_default_context(cadata=pem)
    ctx.check_hostname = False
    ctx.verify_flags |= ssl.VERIFY_X509_PARTIAL_CHAIN
    ctx.minimum_version = ssl.TLSVersion.TLSv1_2
    return ctx


@dataclass
class Reply:
    status: int
    body: dict
    retry_after_s: float | None = None


class Client:
    """A pinned HTTPS client for one study server (httpx)."""

    def __init__(self, url: str, pin: str, *, timeout_s: float = TIMEOUT_S):
        import httpx

        self.url = url.rstrip("/")
        self.http = httpx.Client(base_url=self.url, verify=pinned_context(self.url, pin), timeout=timeout_s,
                                 http2=False, headers={"User-Agent": "lethe-agent"})

    def close(self) -> None:
        self.http.close()

    def post(self, kind: str, data: bytes) -> Reply:
        ctype = "application/octet-stream" if kind == "bundle" else "application/json"
        r = self.http.post(ENDPOINT[kind], content=data, headers={"Content-Type": ctype})
        try:
            body = r.json()
        except ValueError:
            body = {"error": {"status": r.status_code, "code": "not_json", "message": r.text[:300]}}
        ra = r.headers.get("retry-after")
        return Reply(r.status_code, body if isinstance(body, dict) else {"body": body},
                     float(ra) if ra and ra.isdigit() else None)


# ----------------------------------------------------------------------------- queue
def _dir(home) -> Path:
    root = home.root if hasattr(home, "root") else Path(home)
    return root / "state" / "upload"


def _write(path: Path, doc: dict) -> None:
    from .fsutil import write_private

    write_private(path, (json.dumps(doc, indent=1, sort_keys=True) + "\n").encode())


def _read(path: Path) -> dict | None:
    try:
        return json.loads(path.read_text("utf-8"))
    except (OSError, ValueError):
        return None


def server_of(home) -> tuple[str, str] | None:
    """``(url, pin)`` from the home's study card, or None when the card names no server."""
    from .export import home_card
    from .home import Home

    h = home if isinstance(home, Home) else Home(home)
    try:
        card = home_card(h)
    except StateError:
        return None
    return (card.server_url, card.server_pin) if card.server_url and card.server_pin else None


class Uploader:
    """The upload queue of one home.

    Parameters
    ----------
    home : Home or path-like
    server : (url, pin), optional
        Defaults to the home's study card; None there means files only.
    rng : random.Random, optional
        For the jitter (tests pass a seeded one).
    """

    def __init__(self, home, server: tuple[str, str] | None = None, *, rng: random.Random | None = None,
                 backoff_base_s: float = BACKOFF_BASE_S, backoff_cap_s: float = BACKOFF_CAP_S):
        from .home import Home

        self.home = home if isinstance(home, Home) else Home(home)
        self.server = server if server is not None else server_of(self.home)
        self.rng = rng or random.Random()
        if not (backoff_base_s > 0 and backoff_cap_s >= backoff_base_s):
            raise ValueError("backoff: expected 0 < backoff_base_s <= backoff_cap_s")
        self.base, self.cap = backoff_base_s, backoff_cap_s
        self.dir = _dir(self.home)

    # -- adding -------------------------------------------------------------------
    def _known(self, item_id: str) -> bool:
        return any((self.dir / d / f"{item_id}.json").exists() for d in ("queue", "sent", "failed"))

    def _add(self, item_id: str, kind: str, name: str, **where) -> bool:
        if self.server is None or self._known(item_id):
            return False
        _write(self.dir / "queue" / f"{item_id}.json",
               {"id": item_id, "kind": kind, "name": name, **where, "added": time.time(), "attempts": 0,
                "next_try": 0.0, "last_error": None})
        return True

    def enqueue_outbox(self) -> int:
        """Queue every bundle in ``HOME/outbox`` not queued or sent yet (all of them were confirmed)."""
        from .bundle import SUFFIX

        n = 0
        if not self.home.outbox.is_dir():
            return 0
        for p in sorted(self.home.outbox.iterdir()):
            if p.name.endswith(SUFFIX) and p.is_file() and not p.is_symlink():
                item_id = hashlib.sha256(p.read_bytes()).hexdigest()
                n += self._add(item_id, "bundle", p.name, file=str(p))
        return n

    def enqueue_enrolment(self, invitation: str, enrolment_path=None) -> bool:
        """Queue the enrolment file with the study's one-time invitation code."""
        cfg = self.home.read_config()
        path = Path(enrolment_path or cfg.get("enrolment_file") or self.home.root / "enrolment.json")
        try:
            doc = json.loads(path.read_text("utf-8"))
        except (OSError, ValueError) as e:
            raise DataError(f"{path}: cannot read the enrolment file ({e})") from None
        if not isinstance(invitation, str) or not invitation.strip():
            raise DataError("invitation: expected the code the study gave you")
        body = {"invitation": invitation.strip(), "enrolment": doc}
        item_id = "enrolment-" + hashlib.sha256(json.dumps(doc, sort_keys=True).encode()).hexdigest()[:32]
        return self._add(item_id, "enrolment", path.name, body=body)

    # -- sending ------------------------------------------------------------------
    def backoff_s(self, attempts: int) -> float:
        """Full jitter: uniform in [0, min(cap, base * 2**attempts)]."""
        return self.rng.uniform(0.0, min(self.cap, self.base * 2.0 ** min(attempts, 60)))

    def pending(self) -> list[dict]:
        q = self.dir / "queue"
        items = [_read(p) for p in sorted(q.glob("*.json"))] if q.is_dir() else []
        order = {k: i for i, k in enumerate(KINDS)}
        return sorted((i for i in items if i), key=lambda i: (order.get(i["kind"], 9), i["added"], i["name"]))

    def run_once(self, now: float | None = None, client: Client | None = None) -> dict:
        """Send every due item once; returns ``{"sent", "waiting", "failed", "error"}``.

        The enrolment goes first; bundles wait (prepared, not tried) until an
        enrolment of this device has been acknowledged by the server.
        """
        out: dict[str, Any] = {"sent": 0, "waiting": 0, "failed": 0, "error": None}
        if self.server is None:
            return out
        now = time.time() if now is None else now
        due = [i for i in self.pending() if i["next_try"] <= now]
        out["waiting"] = len(self.pending())
        if not due:
            return out
        own = client is None
        try:
            if own:
                client = Client(*self.server)
        except (ConnectionError, IntegrityError) as e:
            self._contact(False, str(e))
            for item in due:
                self._retry(item, str(e), now)
            out["error"] = str(e)
            return out
        assert client is not None
        try:
            enrolled = self.enrolled()
            for item in due:
                if item["kind"] == "bundle" and not enrolled:
                    self._note(item, "waiting for the enrolment to reach the study server "
                                     "('lethe upload --invitation CODE')")
                    continue
                res = self._send(client, item, now)
                out[res] = out.get(res, 0) + 1
                if item["kind"] == "enrolment" and res == "sent":
                    enrolled = True
                if res == "error":
                    out["error"] = self._read_item(item)["last_error"]
                    break  # the server is unreachable: stop this pass, the rest waits its turn
        finally:
            if own and client is not None:
                client.close()
        out["waiting"] = len(self.pending())
        return out

    def enrolled(self) -> bool:
        """Whether the server acknowledged this device's enrolment."""
        sent = self.dir / "sent"
        return sent.is_dir() and any(sent.glob("enrolment-*.json"))

    def _note(self, item: dict, msg: str) -> None:
        item = dict(self._read_item(item))
        if item.get("last_error") != msg:
            item["last_error"] = msg
            _write(self.dir / "queue" / f"{item['id']}.json", item)

    def _read_item(self, item):
        return _read(self.dir / "queue" / f"{item['id']}.json") or item

    def _send(self, client: Client, item: dict, now: float) -> str:
        import httpx

        try:
            data = (Path(item["file"]).read_bytes() if "file" in item
                    else json.dumps(item["body"], sort_keys=True).encode())
        except OSError as e:
            self._fail(item, {"error": {"status": 0, "code": "unreadable",
                                        "message": f"{item['name']}: cannot be read ({e.strerror})"}})
            return "failed"
        try:
            r = client.post(item["kind"], data)
        except (httpx.HTTPError, OSError, ssl.SSLError) as e:
            self._contact(False, f"{type(e).__name__}: {e}")
            self._retry(item, f"no answer from the server ({type(e).__name__})", now)
            return "error"
        self._contact(True, None)
        if 200 <= r.status < 300:
            _write(self.dir / "sent" / f"{item['id']}.json",
                   {"id": item["id"], "kind": item["kind"], "name": item["name"], "sent_at": time.time(),
                    "ack": r.body})
            (self.dir / "queue" / f"{item['id']}.json").unlink(missing_ok=True)
            return "sent"
        code = r.body.get("error", {}).get("code") if isinstance(r.body.get("error"), dict) else None
        if r.status in (408, 429) or r.status >= 500 or code == "not_enrolled":
            # not_enrolled: the enrolment may still be on its way (or waiting for its code)
            msg = r.body.get("error", {}).get("message", f"HTTP {r.status}")
            self._retry(item, msg, now, at_least=r.retry_after_s)
            return "waiting"
        self._fail(item, r.body)
        return "failed"

    def _retry(self, item: dict, msg: str, now: float, at_least: float | None = None) -> None:
        item = dict(self._read_item(item))
        item["attempts"] += 1
        item["next_try"] = now + max(self.backoff_s(item["attempts"]), at_least or 0.0)
        item["last_error"] = msg
        _write(self.dir / "queue" / f"{item['id']}.json", item)

    def _fail(self, item: dict, body: dict) -> None:
        _write(self.dir / "failed" / f"{item['id']}.json",
               {"id": item["id"], "kind": item["kind"], "name": item["name"], "failed_at": time.time(),
                "reply": body})
        (self.dir / "queue" / f"{item['id']}.json").unlink(missing_ok=True)

    def _contact(self, ok: bool, err: str | None) -> None:
        prev = _read(self.dir / "contact.json") or {}
        doc = {"last_attempt": time.time(), "last_contact": time.time() if ok else prev.get("last_contact"),
               "last_ok": ok, "last_error": err}
        _write(self.dir / "contact.json", doc)


def queue_status(home) -> dict:
    """What waits to be sent and the last contact, for ``lethe status`` and the participant's page.

    Returns ``{"server": url | None, "prepared": [{"kind", "name", "attempts", "last_error"}],
    "sent": [{"kind", "name", "sent_at"}], "failed": [{"kind", "name", "message"}],
    "last_contact": unix seconds | None, "last_error": str | None}``.  "prepared" means
    waiting here; "sent" means the server acknowledged it.
    """
    d = _dir(home)
    srv = server_of(home)
    prepared = [{"kind": i["kind"], "name": i["name"], "attempts": i["attempts"], "last_error": i["last_error"]}
                for i in Uploader(home, server=srv or ("", "")).pending()] if d.is_dir() else []
    sent = [x for x in (_read(p) for p in sorted((d / "sent").glob("*.json"))) if x] if (d / "sent").is_dir() else []
    failed = [x for x in (_read(p) for p in sorted((d / "failed").glob("*.json"))) if x] \
        if (d / "failed").is_dir() else []
    contact = _read(d / "contact.json") or {}
    return {"server": srv[0] if srv else None, "prepared": prepared,
            "sent": [{"kind": s["kind"], "name": s["name"], "sent_at": s["sent_at"]}
                     for s in sorted(sent, key=lambda s: s["sent_at"])],
            "failed": [{"kind": f["kind"], "name": f["name"],
                        "message": f.get("reply", {}).get("error", {}).get("message", "")} for f in failed],
            "last_contact": contact.get("last_contact"), "last_error": contact.get("last_error")}


def upload_withdrawal(cert_path, url: str, pin: str, *, attempts: int = 6, backoff_base_s: float = 1.0,
                      sleep=time.sleep) -> dict:
    """Send a withdrawal certificate now (the home is being emptied, so there is no queue to keep it).

    Retries with exponential backoff and jitter; returns the server's
    acknowledgement, or raises :class:`LetheError` with the last reason.
    """
    import httpx

    data = Path(cert_path).read_bytes()
    rng = random.Random()
    last = "not tried"
    for n in range(attempts):
        try:
            c = Client(url, pin)
            try:
                r = c.post("withdrawal", data)
            finally:
                c.close()
            if 200 <= r.status < 300:
                return r.body
            last = r.body.get("error", {}).get("message", f"HTTP {r.status}")
            if not (r.status in (408, 429) or r.status >= 500):
                raise StateError(f"{cert_path}: the study server refused the withdrawal certificate: {last}")
        except (ConnectionError, httpx.HTTPError, OSError) as e:
            last = f"{type(e).__name__}: {e}"
        if n + 1 < attempts:
            sleep(rng.uniform(0, min(60.0, backoff_base_s * 2 ** (n + 1))))
    raise LetheError(f"{cert_path}: could not deliver the withdrawal certificate to {url} ({last}); "
                     f"keep the file and send it to the study as agreed")




def start_background(home, stop_event=None, *, interval_s: float = 300.0):
    """Run the upload queue in a daemon thread of the running agent; None when the card names no server.

    Every ``interval_s`` (or sooner, when a retry falls due) the outbox is
    scanned for new confirmed bundles and every due item is sent.  Stops when
    ``stop_event`` is set.  A failure never reaches the agent: it is recorded
    in the queue (``lethe status`` shows it) and retried with back-off.
    """
    import logging
    import threading

    up = Uploader(home)
    if up.server is None:
        return None
    stop = stop_event or threading.Event()
    log = logging.getLogger("lethe")

    def loop():
        while not stop.is_set():
            try:
                up.enqueue_outbox()
                up.run_once()
            except (LetheError, OSError, ValueError) as e:  # recorded; the agent keeps running
                log.warning("upload pass failed: %s", type(e).__name__)
            due = [i["next_try"] for i in up.pending()]
            wait = min([interval_s] + [max(1.0, t - time.time()) for t in due])
            stop.wait(wait)

    t = threading.Thread(target=loop, name="lethe-uploader", daemon=True)
    t.start()
    return t
