"""Withdrawal: destroy everything the device holds and leave a signed certificate.

Order matters, because the certificate must be signed by the device key before
that key is destroyed:

1. stop: take the agent lock (a running agent must be stopped first);
2. count what will be destroyed (vault records per table, inbox files, outbox
   bundles, ledger entries);
3. append ``withdrawn`` to the ledger and take its head;
4. sign the withdrawal certificate (pseudonym, time, ledger head, counts) with
   the device key and write it to ``HOME/withdrawal-certificate.json``
   (atomically: from here on the withdrawal is *committed*);
5. destroy the vault and the keys (vault key first: without it, any ciphertext
   the filesystem keeps is unreadable);
6. destroy every other entry of the home through :mod:`agent.destroy` --
   the inbox first (raw data), then the rest -- walking directory file
   descriptors opened ``O_NOFOLLOW | O_DIRECTORY``, so a folder swapped for a
   link while withdrawal runs is never followed (the link itself is removed);
7. afterwards the home holds the certificate and nothing else;
8. the per-user background service installed for this home (if any) is
   disabled and its unit file removed, so it does not restart on an empty home.

**The right to withdraw does not depend on the keyring.**  When the device
key cannot be had (keys held by the OS keyring, which is gone, locked or does
not hold them any more), everything is destroyed all the same, and instead of
a certificate the home keeps an *unsigned withdrawal record*
(``HOME/withdrawal-unsigned.json``, format ``lethe-withdrawal-unsigned``) that
says why it is unsigned.  The study cannot verify it
(``lethe study verify-withdrawal`` refuses it), so the participant is told to
contact the study.

**Resumable.**  A withdrawal killed at any point after step 4 is finished by
running ``lethe withdraw`` again: the certificate marks the home as withdrawn,
so the second run does not need the (possibly destroyed) keys or the
enrolment file; it destroys whatever is left and returns the certificate's
counts.  Killed before step 4, nothing was destroyed yet and the second run
starts over (the ledger then shows ``withdrawn`` twice).

The researcher checks the certificate with ``lethe study verify-withdrawal``
against the device key registered at enrolment.  Deletion caveats apply (NIST
SP 800-88): overwriting is not guaranteed erasure on SSDs, journaling or
copy-on-write filesystems, backups and cloud sync.
"""

from __future__ import annotations

import contextlib
import errno
import json
import os
import stat
import time
from pathlib import Path

from ..destroy import TreeReport, destroy_tree, open_dir, open_subdir
from ..errors import LetheError, StateError
from ..home import Home

CERT_NAME = "withdrawal-certificate.json"
UNSIGNED_NAME = "withdrawal-unsigned.json"   # kept instead of the certificate when the device key is unavailable
INBOX_MAX_BYTES = 16 << 20       # overwrite bound for the inbox when the policy cannot be read
HOME_MAX_BYTES = 1 << 30         # overwrite bound for the home's own files (vault, ledger)


def withdrawal_record(home) -> Path | None:
    """The withdrawal certificate (or unsigned record) the home holds, or None when it was not withdrawn."""
    home = home if isinstance(home, Home) else Home(home)
    for name in (CERT_NAME, UNSIGNED_NAME):
        try:
            st = os.lstat(home.root / name)
        except OSError:
            continue
        if stat.S_ISREG(st.st_mode):
            return home.root / name
    return None


def withdrawal_pending(home) -> bool:
    """True when a withdrawal was committed (its certificate or record exists) but may not have finished."""
    return withdrawal_record(home) is not None


def _key_unavailable(home: Home, e: Exception) -> str | None:
    """Why the device key cannot be had because of the keyring, or None for any other failure."""
    from ..keystore import KeyringUnavailableError, key_storage

    if isinstance(e, KeyringUnavailableError):
        return str(e)
    if not isinstance(e, LetheError) and key_storage(home) == "keyring":
        # the keyring backends raise their own errors (locked collection, D-Bus gone)
        return f"the OS keyring did not answer ({type(e).__name__}: {e})"
    return None


def withdraw(home, now: float | None = None, passphrase=None) -> dict:
    """Withdraw from the study on this device (see the module docstring); resumable.

    Returns
    -------
    dict
        ``{"certificate": path, "counts_destroyed": {...}, "ledger_head": {...},
        "resumed": bool, "left": int, "signed": bool, "unsigned_reason": str | None,
        "service_removed": path | None}``; ``left`` counts entries that could not
        be removed (a mount point inside the home, an entry that kept changing);
        ``signed`` is False when the device key was unavailable and the home
        keeps an unsigned record instead of a certificate.
    """
    from ..keystore import Keystore
    from ..ledger import Ledger
    from ..study.withdrawal import (make_unsigned_withdrawal, make_withdrawal_certificate,
                                    write_withdrawal_certificate)

    home = home if isinstance(home, Home) else Home(home)
    pending = withdrawal_record(home)
    if pending is not None:
        return _finish(home, pending, passphrase, resumed=True)
    home.require()
    now = time.time() if now is None else float(now)
    cfg = home.read_config()
    with home.lock("withdraw"):
        counts = _count(home, passphrase)
        ks = Keystore(home, passphrase=passphrase)
        try:
            device = ks.device_key()
        except Exception as e:  # noqa: BLE001 - only a keyring failure is let through (see _key_unavailable)
            why = _key_unavailable(home, e)
            if why is None:
                raise
            device = None
            cert_path = home.root / UNSIGNED_NAME
            write_withdrawal_certificate(cert_path, make_unsigned_withdrawal(
                cfg.get("study_id", "?"), cfg.get("pseudonym", "?"), _public_or_none(ks),
                _head_or_none(home), counts, why, now=now))
        if device is not None:
            ledger = Ledger(home, signing_key=device)
            ledger.append("withdrawn", scope="all")
            head = ledger.head()
            cert = make_withdrawal_certificate(cfg.get("study_id", "?"), cfg.get("pseudonym", "?"), device,
                                               {"seq": head["seq"], "hash": head["hash"]}, counts, now=now)
            cert_path = home.root / CERT_NAME
            write_withdrawal_certificate(cert_path, cert)
    return _finish(home, cert_path, passphrase, resumed=False)


def _public_or_none(ks):
    try:
        return ks.device_public()
    except Exception:  # noqa: BLE001 - the record is written without it
        return None


def _head_or_none(home: Home) -> dict | None:
    from ..ledger import Ledger

    try:
        head = Ledger(home).head()
        return {"seq": int(head["seq"]), "hash": str(head["hash"])}
    except Exception:  # noqa: BLE001 - the record is written without it
        return None


def _finish(home: Home, cert_path, passphrase, resumed: bool) -> dict:
    """Steps 5-7: vault and keys first, then the inbox, then everything else but the certificate."""
    from ..keystore import Keystore

    try:
        cert = json.loads(cert_path.read_text("utf-8"))
    except (OSError, ValueError) as e:
        raise StateError(f"{cert_path}: unreadable withdrawal certificate ({e}); "
                         f"the home was not destroyed") from None
    inbox_cap = _inbox_cap(home)
    lock = _try_lock(home)
    try:
        if home.vault_path.exists():
            try:
                from ..vault import Vault

                Vault.open(home, passphrase=passphrase).destroy()
            except Exception:  # noqa: BLE001 - destruction must go on whatever the vault says
                pass  # a half-destroyed vault is removed with the rest below
        with contextlib.suppress(Exception):  # a damaged key file is removed with the rest below
            Keystore(home, passphrase=passphrase).destroy()  # also the OS keyring entries
        rep = TreeReport()
        root = open_dir(home.root)
        try:
            try:
                inbox = open_subdir(root, "inbox")
            except OSError as e:
                if e.errno not in (errno.ENOENT, errno.ELOOP, errno.ENOTDIR):
                    raise
                inbox = None
            if inbox is not None:
                try:
                    destroy_tree(inbox, max_bytes=inbox_cap, _report=rep)
                finally:
                    os.close(inbox)
            top = destroy_tree(root, max_bytes=HOME_MAX_BYTES, keep={cert_path.name}, _report=rep)
        finally:
            os.close(root)
    finally:
        if lock is not None:
            os.close(lock)
    from .service import remove_installed

    signed = cert.get("format") != "lethe-withdrawal-unsigned"
    return {"certificate": str(cert_path), "counts_destroyed": cert.get("counts_destroyed", {}),
            "ledger_head": cert.get("ledger_head") or {}, "resumed": resumed, "left": top.left,
            "signed": signed, "unsigned_reason": None if signed else cert.get("why_unsigned"),
            "service_removed": remove_installed(home)}


def _inbox_cap(home: Home) -> int:
    try:
        return int(home.load_policy().intake.max_file_bytes)
    except Exception:  # noqa: BLE001 - an unreadable policy must not stop a withdrawal
        return INBOX_MAX_BYTES


def _try_lock(home: Home):
    """Hold the agent lock while destroying if it can be had; a running agent must not keep writing."""
    import fcntl

    try:
        fd = os.open(home.lock_path, os.O_RDWR | os.O_NOFOLLOW | getattr(os, "O_CLOEXEC", 0))
    except OSError:
        return None
    try:
        fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except OSError:
        os.close(fd)
        raise StateError(f"{home.root}: another lethe process holds this home; stop it, then run "
                         f"'lethe withdraw' again to finish the withdrawal") from None
    return fd


def _count(home: Home, passphrase) -> dict:
    counts: dict[str, int] = {}
    if home.vault_path.exists():
        from ..vault import Vault

        try:
            with Vault.open(home, passphrase=passphrase) as v:
                for table, n in v.tables().items():
                    counts[table] = int(n)
        except Exception as e:  # noqa: BLE001 - only a keyring failure is let through (see _key_unavailable)
            if _key_unavailable(home, e) is None:
                raise
            # the vault cannot be opened without its key: its records go uncounted, destroyed all the same
    for sub in ("inbox", "outbox"):
        counts[f"{sub}_files"] = _count_files(home.root, sub)
    if home.ledger_path.exists():
        with open(home.ledger_path, "rb") as f:
            counts["ledger_entries"] = sum(1 for _ in f)
    return counts


def _count_files(root, sub: str) -> int:
    """Entries other than directories under ``root/sub``, counted without following any link."""
    try:
        rfd = open_dir(root)
    except OSError:
        return 0
    try:
        try:
            fd = open_subdir(rfd, sub)
        except OSError:
            return 0
        return _count_fd(fd, 0)
    finally:
        os.close(rfd)


def _count_fd(fd: int, depth: int) -> int:
    n = 0
    try:
        for name in os.listdir(fd):
            try:
                st = os.stat(name, dir_fd=fd, follow_symlinks=False)
            except FileNotFoundError:
                continue
            if stat.S_ISDIR(st.st_mode):
                if depth < 32:
                    with contextlib.suppress(OSError):
                        n += _count_fd(open_subdir(fd, name, expect=st), depth + 1)
            else:
                n += 1
    finally:
        os.close(fd)
    return n
