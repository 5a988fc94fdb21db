"""Withdrawal: destroy everything the device holds and leave a signed certificate.

Order matters, because the certificate must be signed by the device key before
that key is destroyed:

1. stop: take the agent lock (a running agent must be stopped first);
2. count what will be destroyed (vault records per table, inbox files, outbox
   bundles, ledger entries);
3. append ``withdrawn`` to the ledger and take its head;
4. sign the withdrawal certificate (pseudonym, time, ledger head, counts) with
   the device key and write it to ``HOME/withdrawal-certificate.json``;
5. destroy the vault, the keys (vault key first: without it, any ciphertext the
   filesystem keeps is unreadable), the ledger, the outbox, the inbox, the
   logs and every other file in the home, overwriting before unlinking;
6. afterwards the home holds the certificate and nothing else.

The researcher checks the certificate with ``lethe study verify-withdrawal``
against the device key registered at enrolment.  Deletion caveats apply (NIST
SP 800-88): overwriting is not guaranteed erasure on SSDs, journaling or
copy-on-write filesystems, backups and cloud sync.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

from ..home import Home

CERT_NAME = "withdrawal-certificate.json"


def withdraw(home, now: float | None = None, passphrase=None) -> dict:
    from ..keystore import Keystore
    from ..ledger import Ledger
    from ..study.withdrawal import make_withdrawal_certificate, write_withdrawal_certificate

    home = home if isinstance(home, Home) else Home(home)
    home.require()
    now = time.time() if now is None else float(now)
    cfg = home.read_config()
    with home.lock("withdraw"):
        counts = _count(home, passphrase)
        ks = Keystore(home, passphrase=passphrase)
        device = ks.device_key()
        ledger = Ledger(home, signing_key=device)
        ledger.append("withdrawn", scope="all")
        head = ledger.head()
        cert = make_withdrawal_certificate(cfg.get("study_id", "?"), cfg.get("pseudonym", "?"), device,
                                           {"seq": head["seq"], "hash": head["hash"]}, counts, now=now)
        cert_path = home.root / CERT_NAME
        write_withdrawal_certificate(cert_path, cert)
        try:
            from ..vault import Vault

            if home.vault_path.exists():
                Vault.open(home, passphrase=passphrase).destroy()
        finally:
            ks.destroy()
    # the lock file is gone with the rest; nothing but the certificate remains
    home.destroy_everything(keep=[cert_path])
    return {"certificate": str(cert_path), "counts_destroyed": counts, "ledger_head": head}


def _count(home: Home, passphrase) -> dict:
    counts: dict[str, int] = {}
    if home.vault_path.exists():
        from ..vault import Vault

        with Vault.open(home, passphrase=passphrase) as v:
            for table, n in v.tables().items():
                counts[table] = int(n)
    for sub in ("inbox", "outbox"):
        d = Path(home.root, sub)
        counts[f"{sub}_files"] = sum(1 for _ in os.scandir(d)) if d.exists() else 0
    if home.ledger_path.exists():
        with open(home.ledger_path, "rb") as f:
            counts["ledger_entries"] = sum(1 for _ in f)
    return counts
