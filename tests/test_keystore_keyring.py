"""Keys held by a real OS keyring (Secret Service through the ``keyring`` package).

Run under ``bash .ci/with-keyring`` (a private D-Bus session with an unlocked
gnome-keyring; it sets LETHE_SECRET_SERVICE=1).  Skipped only when that is not
set; under CI (LETHE_CI_SERVICES=1) a missing Secret Service is a failure.
"""

from __future__ import annotations

import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

from agent.keystore import Keystore, KeyringUnavailableError, key_storage

from secret_service import in_a_fresh_keyring_session, require_secret_service, use_real_keyring

require_secret_service()

REPO = Path(__file__).resolve().parent.parent


@pytest.fixture
def real_keyring(monkeypatch):
    return use_real_keyring(monkeypatch)


@pytest.fixture
def ks(home, real_keyring):
    ks = Keystore(home).ensure()  # the default storage
    yield ks
    ks.destroy()


def test_default_storage_puts_all_three_keys_in_the_keyring(home, ks, real_keyring):
    assert key_storage(home) == "keyring"
    for name in ("vault.key", "content.key", "device.ed25519"):
        doc = json.loads((home.keys / name).read_text())
        assert doc["store"] == "keyring" and "key" not in doc and "ct" not in doc
        assert real_keyring.get_password(doc["service"], doc["account"]) is not None


def test_keys_read_back_from_the_keyring(home, ks):
    fresh = Keystore(home)
    assert fresh.vault_key() == ks.vault_key() and fresh.content_key() == ks.content_key()
    msg = b"ledger entry"
    fresh.device_public().verify(fresh.device_key().sign(msg), msg)
    assert fresh.device_public().public_bytes_raw() == ks.device_key().public_key().public_bytes_raw()


def test_no_secret_in_the_key_files(home, ks):
    blob = b"".join(p.read_bytes() for p in home.keys.iterdir())
    assert ks.vault_key().hex().encode() not in blob and ks.content_key().hex().encode() not in blob


def _on_another_machine(code: str, root) -> subprocess.CompletedProcess:
    """Run ``code`` in a new D-Bus session with a new, empty keyring (another machine's)."""
    return in_a_fresh_keyring_session([sys.executable, "-c", code, str(root)], timeout_s=120)


def test_a_copied_home_does_not_open_elsewhere(tmp_path, home, ks):
    # Finding 4: copying the home's files to another machine no longer decrypts the vault
    # or forges signatures; the keys stay in this machine's keyring.
    from agent.vault import Vault

    with Vault.open(home) as v:
        v.put("place_names", "P1", {"name": "home"})
    copy = tmp_path / "copied"
    shutil.copytree(home.root, copy)
    r = _on_another_machine(
        "import sys\n"
        "from agent.vault import Vault\n"
        "from agent.keystore import Keystore, KeyringUnavailableError\n"
        "for f in (lambda: Vault.open(sys.argv[1]), lambda: Keystore(sys.argv[1]).device_key()):\n"
        "    try:\n"
        "        f(); print('OPENED')\n"
        "    except KeyringUnavailableError as e:\n"
        "        print('REFUSED', e)\n", copy)
    assert r.returncode == 0, r.stderr
    lines = r.stdout.splitlines()
    assert len(lines) == 2 and all(x.startswith("REFUSED") for x in lines), r.stdout
    assert "does not open without its keyring" in r.stdout


def test_without_the_keyring_the_home_does_not_open(home, ks, monkeypatch):
    monkeypatch.setenv("LETHE_NO_KEYRING", "1")
    with pytest.raises(KeyringUnavailableError, match="not available now"):
        Keystore(home).device_key()


def test_destroy_removes_the_keyring_entries(home, real_keyring):
    ks = Keystore(home).ensure()
    docs = [json.loads((home.keys / n).read_text()) for n in ("vault.key", "content.key", "device.ed25519")]
    ks.destroy()
    assert all(real_keyring.get_password(d["service"], d["account"]) is None for d in docs)
