"""The study server's database, through SQLAlchemy Core.

SQLite (WAL journal, ``synchronous=FULL``) embedded by default at
``STUDYDIR/server/study.db``; PostgreSQL with a ``postgresql://`` URL.  Every
change is one transaction: a bundle row and its sequence number are stored
together or not at all, so a server killed mid-upload has either committed
the upload (the client's retry is answered "already have") or not (the retry
stores it).

Tables: ``meta`` (study id, schema version), ``invitations`` (SHA-256 of each
one-time code, when used and by whom), ``devices`` (enrolled devices),
``bundles`` (one row per opened bundle, unique per pseudonym and sequence
number and per SHA-256), ``withdrawals`` (the certificates, kept on record).
Nothing in it is raw personal data: bundles hold only what the policy lets
leave a device, and they are stored opened (the study key is needed at upload
time, not to read the database).
"""

from __future__ import annotations

import datetime as _dt
import hashlib
import json
import secrets
import threading
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import sqlalchemy as sa

from ...errors import DataError, StateError

SCHEMA_VERSION = 1

metadata = sa.MetaData()
meta_t = sa.Table("meta", metadata, sa.Column("key", sa.String(64), primary_key=True),
                  sa.Column("value", sa.Text, nullable=False))
invitations_t = sa.Table(
    "invitations", metadata,
    sa.Column("code_sha256", sa.String(64), primary_key=True),
    sa.Column("created", sa.String(32), nullable=False),
    sa.Column("note", sa.String(200), nullable=False, default=""),
    sa.Column("used_at", sa.String(32)),
    sa.Column("used_by", sa.String(64)),
)
devices_t = sa.Table(
    "devices", metadata,
    sa.Column("pseudonym", sa.String(64), primary_key=True),
    sa.Column("device_key_id", sa.String(16), nullable=False, unique=True),
    sa.Column("public_key", sa.LargeBinary(32), nullable=False),
    sa.Column("policy_fingerprint", sa.String(64), nullable=False),
    sa.Column("enrolled", sa.String(10), nullable=False),
    sa.Column("enrolled_at", sa.String(32), nullable=False),
    sa.Column("withdrawn", sa.String(32)),
    sa.Column("log_origin", sa.String(64)),  # the device ledger's first entry hash, from the enrolment
)
bundles_t = sa.Table(
    "bundles", metadata,
    sa.Column("pseudonym", sa.String(64), sa.ForeignKey("devices.pseudonym"), primary_key=True),
    sa.Column("seq", sa.BigInteger, primary_key=True),
    sa.Column("sha256", sa.String(64), nullable=False, unique=True),
    sa.Column("created", sa.String(10), nullable=False),
    sa.Column("received_at", sa.String(32), nullable=False),
    sa.Column("header", sa.Text, nullable=False),
    sa.Column("payload", sa.Text, nullable=False),
)
withdrawals_t = sa.Table(
    "withdrawals", metadata,
    sa.Column("pseudonym", sa.String(64), sa.ForeignKey("devices.pseudonym"), primary_key=True),
    sa.Column("time", sa.String(32), nullable=False),
    sa.Column("received_at", sa.String(32), nullable=False),
    sa.Column("certificate", sa.Text, nullable=False),
)


def now_utc() -> str:
    return _dt.datetime.now(_dt.UTC).strftime("%Y-%m-%dT%H:%M:%SZ")


def default_url(study_dir) -> str:
    return f"sqlite:///{Path(study_dir).absolute() / 'server' / 'study.db'}"


def _engine(url: str) -> sa.Engine:
    if url.startswith("postgresql://"):
        url = "postgresql+psycopg://" + url[len("postgresql://"):]
    if url.startswith("sqlite:///"):
        Path(url[len("sqlite:///"):]).parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        eng = sa.create_engine(url, connect_args={"check_same_thread": False, "timeout": 30})

        @sa.event.listens_for(eng, "connect")
        def _pragmas(conn, _rec):
            cur = conn.cursor()
            cur.execute("PRAGMA journal_mode=WAL")
            cur.execute("PRAGMA synchronous=FULL")
            cur.execute("PRAGMA foreign_keys=ON")
            cur.close()
        return eng
    if url.startswith("postgresql+psycopg://"):
        return sa.create_engine(url, pool_size=10, max_overflow=20, pool_pre_ping=True)
    raise DataError(f"--database {url!r}: expected sqlite:///PATH or postgresql://...")


@dataclass
class DeviceRow:
    """An enrolled device as :func:`agent.bundle.read_bundle` expects it from a registry."""

    pseudonym: str
    public_bytes: bytes
    device_key_id: str
    policy_fingerprint: str
    enrolled: str
    withdrawn: str | None = None
    seen: dict = field(default_factory=dict)
    log_origin: str | None = None

    def public_key(self):
        from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PublicKey

        return Ed25519PublicKey.from_public_bytes(self.public_bytes)


class OneDeviceRegistry:
    """The registry view one upload needs: the device its header names, and that sequence number.

    Only the named device's key is tried, so a bundle naming no enrolled device
    costs one lookup, not one signature check per enrolled device.
    """

    def __init__(self, study_id: str, device: DeviceRow | None):
        self.study_id = study_id
        self.devices = {device.pseudonym: device} if device else {}

    def by_key_id(self, key_id: str):
        return next((d for d in self.devices.values() if d.device_key_id == key_id), None)

    def device(self, pseudonym: str):
        return self.devices.get(pseudonym)


class Store:
    """The study server's database.  ``Store(url, study_id)``; :meth:`create` makes the tables."""

    def __init__(self, url: str, study_id: str | None = None):
        self.url = url
        self.engine = _engine(url)
        self._write_lock = threading.Lock() if self.engine.dialect.name == "sqlite" else None
        metadata.create_all(self.engine)
        with self.engine.begin() as c:
            row = c.execute(sa.select(meta_t.c.value).where(meta_t.c.key == "study_id")).first()
            if row is None:
                if study_id is None:
                    raise StateError(f"{self._safe_url()}: an empty database; the study id is needed to create it")
                c.execute(meta_t.insert(), [{"key": "study_id", "value": study_id},
                                            {"key": "schema_version", "value": str(SCHEMA_VERSION)}])
                self.study_id = study_id
            else:
                self.study_id = row[0]
                ver = c.execute(sa.select(meta_t.c.value).where(meta_t.c.key == "schema_version")).scalar()
                if int(ver or 0) > SCHEMA_VERSION:
                    raise StateError(f"{self._safe_url()}: database schema {ver} is newer than this lethe "
                                     f"reads ({SCHEMA_VERSION}); upgrade lethe")
        if study_id is not None and study_id != self.study_id:
            raise StateError(f"{self._safe_url()}: this database belongs to study {self.study_id!r}, "
                             f"not {study_id!r}")

    def _safe_url(self) -> str:
        return self.engine.url.render_as_string(hide_password=True)

    def close(self) -> None:
        self.engine.dispose()

    def write(self):
        """A write transaction (serialised in-process for SQLite, which has one writer)."""
        store = self

        class _W:
            def __enter__(self):
                if store._write_lock:
                    store._write_lock.acquire()
                self.cm = store.engine.begin()
                return self.cm.__enter__()

            def __exit__(self, *exc):
                try:
                    return self.cm.__exit__(*exc)
                finally:
                    if store._write_lock:
                        store._write_lock.release()
        return _W()

    # -- invitations ------------------------------------------------------------------
    def invite(self, n: int = 1, note: str = "") -> list[str]:
        """Create ``n`` one-time invitation codes; only their SHA-256 is stored (print them once)."""
        if not isinstance(n, int) or not 1 <= n <= 10000:
            raise DataError(f"invite: n must be an integer in 1..10000, got {n!r}")
        codes = ["-".join(secrets.token_hex(2) + secrets.token_hex(2) for _ in range(3)) for _ in range(n)]
        with self.write() as c:
            c.execute(invitations_t.insert(), [{"code_sha256": code_hash(x), "created": now_utc(),
                                                "note": note[:200]} for x in codes])
        return codes

    # -- devices ----------------------------------------------------------------------
    def device_by_key_id(self, key_id: str, seq: int | None = None) -> DeviceRow | None:
        with self.engine.connect() as c:
            r = c.execute(sa.select(devices_t).where(devices_t.c.device_key_id == key_id)).mappings().first()
            if r is None:
                return None
            dev = DeviceRow(r["pseudonym"], bytes(r["public_key"]), r["device_key_id"], r["policy_fingerprint"],
                            r["enrolled"], r["withdrawn"], log_origin=r["log_origin"])
            if seq is not None:
                sha = c.execute(sa.select(bundles_t.c.sha256).where(
                    (bundles_t.c.pseudonym == dev.pseudonym) & (bundles_t.c.seq == seq))).scalar()
                if sha is not None:
                    dev.seen[str(seq)] = sha
        return dev

    def device(self, pseudonym: str) -> DeviceRow | None:
        with self.engine.connect() as c:
            r = c.execute(sa.select(devices_t).where(devices_t.c.pseudonym == pseudonym)).mappings().first()
        if r is None:
            return None
        return DeviceRow(r["pseudonym"], bytes(r["public_key"]), r["device_key_id"], r["policy_fingerprint"],
                         r["enrolled"], r["withdrawn"], log_origin=r["log_origin"])

    def bundle_by_sha(self, sha256: str) -> dict | None:
        with self.engine.connect() as c:
            r = c.execute(sa.select(bundles_t.c.pseudonym, bundles_t.c.seq).where(
                bundles_t.c.sha256 == sha256)).first()
        return {"pseudonym": r[0], "seq": int(r[1])} if r else None

    def previous_payload(self, pseudonym: str, seq: int) -> dict | None:
        """The payload of the device's bundle just before ``seq`` (for ledger continuity)."""
        with self.engine.connect() as c:
            r = c.execute(sa.select(bundles_t.c.payload).where(
                (bundles_t.c.pseudonym == pseudonym) & (bundles_t.c.seq < seq)).order_by(
                bundles_t.c.seq.desc()).limit(1)).first()
        return json.loads(r[0]) if r else None

    # -- cohort source (agent.study.cohort.source.CohortSource) -----------------------
    def participants(self, *, include_withdrawn: bool = False) -> list[dict]:
        q = (sa.select(devices_t.c.pseudonym, devices_t.c.enrolled, devices_t.c.withdrawn,
                       devices_t.c.policy_fingerprint, devices_t.c.enrolled_at,
                       sa.func.count(bundles_t.c.seq).label("bundles"),
                       sa.func.max(bundles_t.c.seq).label("latest_seq"),
                       sa.func.max(bundles_t.c.received_at).label("last_bundle_at"))
             .select_from(devices_t.outerjoin(bundles_t, bundles_t.c.pseudonym == devices_t.c.pseudonym))
             .group_by(devices_t.c.pseudonym).order_by(devices_t.c.pseudonym))
        if not include_withdrawn:
            q = q.where(devices_t.c.withdrawn.is_(None))
        with self.engine.connect() as c:
            return [dict(r, latest_seq=None if r["latest_seq"] is None else int(r["latest_seq"]))
                    for r in c.execute(q).mappings()]

    def records(self, *, latest_only: bool = False,
                include_withdrawn: bool = False) -> Iterator[tuple[str, int, dict]]:
        """Stream ``(pseudonym, seq, {"header", "payload"})`` in pages (constant memory)."""
        q = sa.select(bundles_t.c.pseudonym, bundles_t.c.seq, bundles_t.c.header, bundles_t.c.payload)
        q = q.select_from(bundles_t.join(devices_t, bundles_t.c.pseudonym == devices_t.c.pseudonym))
        if not include_withdrawn:
            q = q.where(devices_t.c.withdrawn.is_(None))
        if latest_only:
            sub = (sa.select(bundles_t.c.pseudonym.label("p"), sa.func.max(bundles_t.c.seq).label("m"))
                   .group_by(bundles_t.c.pseudonym).subquery())
            q = q.join(sub, (sub.c.p == bundles_t.c.pseudonym) & (sub.c.m == bundles_t.c.seq))
        q = q.order_by(bundles_t.c.pseudonym, bundles_t.c.seq)
        last = None
        while True:  # keyset pagination: each page is its own short read
            page = q
            if last is not None:
                page = page.where(sa.tuple_(bundles_t.c.pseudonym, bundles_t.c.seq) > sa.tuple_(*last))
            with self.engine.connect() as c:
                rows = c.execute(page.limit(500)).all()
            if not rows:
                return
            for name, seq, h, p in rows:
                yield name, int(seq), {"header": json.loads(h), "payload": json.loads(p)}
            last = (rows[-1][0], rows[-1][1])

    def counts(self) -> dict:
        with self.engine.connect() as c:
            inv = c.execute(sa.select(sa.func.count()).select_from(invitations_t)).scalar()
            used = c.execute(sa.select(sa.func.count()).select_from(invitations_t).where(
                invitations_t.c.used_at.is_not(None))).scalar()
            dev = c.execute(sa.select(sa.func.count()).select_from(devices_t)).scalar()
            wd = c.execute(sa.select(sa.func.count()).select_from(devices_t).where(
                devices_t.c.withdrawn.is_not(None))).scalar()
            b = c.execute(sa.select(sa.func.count()).select_from(bundles_t)).scalar()
        return {"invited": int(inv or 0), "invitations_used": int(used or 0), "enrolled": int(dev or 0),
                "withdrawn": int(wd or 0), "bundles": int(b or 0)}


def code_hash(code: str) -> str:
    return hashlib.sha256(code.strip().lower().encode()).hexdigest()
