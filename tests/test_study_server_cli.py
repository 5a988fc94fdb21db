"""The researcher's server commands as thin wrappers: invite, serve's refusals, card with a server."""

from __future__ import annotations

import json

from agent.cli import main
from agent.errors import EXIT_USAGE
from agent.study.card import load_card
from agent.study.server.store import Store, default_url
from agent.study.server.tls import cert_pin, self_signed

from _bundle_fixtures import Study


def test_invite_prints_codes_and_keeps_only_hashes(tmp_path, capsys):
    s = Study(tmp_path)
    assert main(["study", "invite", "--dir", str(s.dir), "--count", "3", "--json"]) == 0
    codes = json.loads(capsys.readouterr().out)["invitations"]
    assert len(set(codes)) == 3
    store = Store(default_url(s.dir))
    assert store.counts()["invited"] == 3
    raw = (s.dir / "server" / "study.db").read_bytes()
    assert not any(c.encode() in raw for c in codes)  # only SHA-256 of each code is stored
    store.close()


def test_serve_refuses_without_a_dashboard_password(tmp_path, capsys, monkeypatch):
    s = Study(tmp_path)
    monkeypatch.delenv("LETHE_DASHBOARD_PASSWORD", raising=False)
    rc = main(["study", "serve", "--dir", str(s.dir), "--self-signed", "--port", "1"])
    assert rc == EXIT_USAGE and "dashboard is never open" in capsys.readouterr().err


def test_serve_refuses_plain_http(tmp_path, capsys, monkeypatch):
    s = Study(tmp_path)
    monkeypatch.setenv("LETHE_DASHBOARD_PASSWORD", "long enough password")
    monkeypatch.setenv("LETHE_STUDY_PASSPHRASE", "correct horse battery")
    rc = main(["study", "serve", "--dir", str(s.dir), "--port", "1"])
    assert rc == EXIT_USAGE and "--self-signed" in capsys.readouterr().err


def test_card_with_server_pins_the_certificate(tmp_path, capsys):
    from agent.policy import bundled_policy_path

    s = Study(tmp_path)
    cert, _ = self_signed(s.dir)
    out = tmp_path / "card3.json"
    assert main(["study", "card", "--dir", str(s.dir), "--policy", str(bundled_policy_path("default")),
                 "--server-url", "https://127.0.0.1:8443", "--out", str(out)]) == 0
    card = load_card(out)
    assert card.server_url == "https://127.0.0.1:8443" and card.server_pin == cert_pin(cert.read_bytes())


def test_card_server_url_without_a_certificate(tmp_path, capsys):
    from agent.policy import bundled_policy_path

    s = Study(tmp_path)
    rc = main(["study", "card", "--dir", str(s.dir), "--policy", str(bundled_policy_path("default")),
               "--server-url", "https://127.0.0.1:8443", "--out", str(tmp_path / "c.json")])
    assert rc == EXIT_USAGE and "no server certificate" in capsys.readouterr().err


def test_pin_is_sha256_of_the_der_certificate(tmp_path):
    # RFC 7469 section 2.4 pins hash the SPKI; lethe pins the whole certificate (DER), computed here
    # independently with the ssl module's PEM-to-DER conversion and hashlib.
    import hashlib
    import ssl

    cert, _ = self_signed(tmp_path)
    der = ssl.PEM_cert_to_DER_cert(cert.read_text())
    assert cert_pin(cert.read_bytes()) == hashlib.sha256(der).hexdigest() == cert_pin(der)
