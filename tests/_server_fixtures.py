"""A real study server on loopback for the tests: uvicorn in a thread (or a child process), real httpx clients.

Databases: SQLite in the test's own folder, and PostgreSQL at
``$LETHE_TEST_POSTGRES_URL`` with a fresh database per test (dropped after).
Without that variable the PostgreSQL cases skip, except under
``LETHE_CI_SERVICES=1`` (CI started the server), where they fail.
"""

from __future__ import annotations

import json
import os
import secrets
import socket
import threading
import time
from contextlib import contextmanager

import pytest

from _bundle_fixtures import PASS, Study

PASSWORD = "researcher-pass-1"


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


@contextmanager
def database(backend: str, tmp_path):
    """Yield a database URL that nobody else uses."""
    if backend == "sqlite":
        yield f"sqlite:///{tmp_path / 'server.db'}"
        return
    base = os.environ.get("LETHE_TEST_POSTGRES_URL")
    if not base:
        if os.environ.get("LETHE_CI_SERVICES") == "1":
            pytest.fail("LETHE_TEST_POSTGRES_URL is not set although LETHE_CI_SERVICES=1 (.ci/services)")
        pytest.skip("PostgreSQL: set LETHE_TEST_POSTGRES_URL (. .ci/services starts one)")
    import sqlalchemy as sa

    name = "lethe_t_" + secrets.token_hex(6)
    admin = sa.create_engine(base.replace("postgresql://", "postgresql+psycopg://"), isolation_level="AUTOCOMMIT")
    with admin.connect() as c:
        c.execute(sa.text(f'CREATE DATABASE "{name}"'))
    try:
        yield base.rsplit("/", 1)[0] + "/" + name
    finally:
        with admin.connect() as c:
            c.execute(sa.text(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)'))
        admin.dispose()


class ThreadServer:
    """uvicorn serving the study app over HTTPS on 127.0.0.1 in a background thread."""

    def __init__(self, study_dir, db_url, **settings):
        import uvicorn

        from agent.study.server.app import ServerSettings
        from agent.study.server.run import build
        from agent.study.server.tls import cert_pin, self_signed

        self.cert, key = self_signed(study_dir)
        self.pin = cert_pin(self.cert.read_bytes())
        self.ctx, app = build(study_dir, PASS, ServerSettings(PASSWORD, **settings), db_url)
        self.port = free_port()
        self.url = f"https://127.0.0.1:{self.port}"
        cfg = uvicorn.Config(app, host="127.0.0.1", port=self.port, ssl_certfile=str(self.cert),
                             ssl_keyfile=str(key), log_level="warning", access_log=False)
        self.server = uvicorn.Server(cfg)
        self.thread = threading.Thread(target=self.server.run, daemon=True)
        self.thread.start()
        for _ in range(500):
            if self.server.started:
                break
            time.sleep(0.01)
        assert self.server.started, "uvicorn did not start"

    def client(self):
        import httpx

        from agent.uploader import pinned_context

        return httpx.Client(base_url=self.url, verify=pinned_context(self.url, self.pin), timeout=30)

    def stop(self):
        self.server.should_exit = True
        self.thread.join(10)
        self.ctx.store.close()


class World:
    """A study (keys, card with the server), a server, and helpers to enrol devices over the API."""

    def __init__(self, tmp_path, db_url, **settings):
        self.study = Study(tmp_path)  # its first device is enrolled in the folder registry only
        self.srv = ThreadServer(self.study.dir, db_url, **settings)
        self.store = self.srv.ctx.store
        self.http = self.srv.client()

    def enrol(self, name=None, device=None, code=None):
        from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

        from agent.study.card import make_enrolment

        device = device or Ed25519PrivateKey.generate()
        name = name or "p" + secrets.token_hex(4)
        code = code or self.store.invite(1)[0]
        doc = make_enrolment(self.study.card, self.study.policy, name, device)
        r = self.post_json("/v1/enrolments", {"invitation": code, "enrolment": doc})
        return r, device, name

    def post_json(self, path, doc):
        return self.http.post(path, content=json.dumps(doc).encode(), headers={"Content-Type": "application/json"})

    def post_bundle(self, data):
        return self.http.post("/v1/bundles", content=data, headers={"Content-Type": "application/octet-stream"})

    def close(self):
        self.http.close()
        self.srv.stop()


@pytest.fixture(params=["sqlite", "postgresql"])
def world(request, tmp_path):
    with database(request.param, tmp_path) as url:
        w = World(tmp_path, url)
        try:
            yield w
        finally:
            w.close()
