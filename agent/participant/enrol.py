"""Enrolment: study card + approved policy + consent -> a home, device keys, a pseudonym.

``enrol`` is the whole of ``lethe init``:

1. read the study card the researcher issued and the policy to enrol under;
2. refuse a policy the card does not approve (fingerprints compared), and a
   policy bound to a different study key (``study.key_fingerprint``);
3. require consent: the participant types (or, non-interactively, passes) the
   study id shown on the card after reading the consent text;
4. create the home (0700), the device signing key and the vault keys, and a
   random pseudonym (``secrets``; it carries no information about the person);
5. copy the policy verbatim into the home, record the card, the consent and the
   enrolment time in ``state/home.json`` and the policy fingerprint in the ledger;
6. write the signed enrolment file the participant sends to the researcher.
"""

from __future__ import annotations

import hashlib
import secrets
import shutil
import time
from pathlib import Path

from ..errors import DataError, StateError
from ..fsutil import write_private
from ..home import Home

PSEUDONYM_ALPHABET = "abcdefghjkmnpqrstuvwxyz23456789"  # no look-alikes (0/o, 1/l/i)


def new_pseudonym(nbytes: int = 10) -> str:
    """A random participant pseudonym such as ``p-7kq2-mx9a-tw3e``."""
    chars = "".join(secrets.choice(PSEUDONYM_ALPHABET) for _ in range(12))
    return f"p-{chars[:4]}-{chars[4:8]}-{chars[8:]}"


def laptop_timezone() -> str | None:
    """The IANA name of this laptop's time zone, or None when it cannot be told.

    In order: ``TZ`` when it names an IANA zone; the target of ``/etc/localtime``
    (a link into a zoneinfo tree on Linux and macOS); ``/etc/timezone`` (Debian).
    """
    import os
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    def valid(name: str | None) -> str | None:
        name = (name or "").strip().lstrip(":")
        if not name or name.startswith("/"):
            return None
        try:
            ZoneInfo(name)
        except (ZoneInfoNotFoundError, ValueError):
            return None
        return name

    tz = os.environ.get("TZ")
    if tz is not None:
        return valid(tz)  # TZ set to something we cannot name: do not guess from the system
    try:
        target = os.path.realpath("/etc/localtime")
        if "zoneinfo/" in target:
            name = valid(target.split("zoneinfo/", 1)[1])
            if name:
                return name
    except OSError:
        pass
    try:
        return valid(Path("/etc/timezone").read_text("utf-8").split()[0])
    except (OSError, IndexError):
        return None
def normalise_fingerprint(text: str) -> str:
    """Lower-case hex digits of a fingerprint as typed (spaces and colons dropped)."""
    return "".join(c for c in str(text).lower() if c not in " :\t-")


def check_key_confirmed(card, policy, confirm_fingerprint: str | None) -> None:
    """Refuse an unpinned study key unless the participant confirmed its fingerprint.

    Raises
    ------
    agent.errors.IntegrityError
        The policy does not pin the study key and no fingerprint (or a
        different one) was confirmed.
    """
    from ..errors import IntegrityError

    if policy.study.key_fingerprint:
        return  # pinned, and check_policy_approved compared it with the card
    fp = card.key_fingerprint
    if confirm_fingerprint is None:
        raise IntegrityError(
            f"{policy.source}: the policy does not pin the study key ([study].key_fingerprint is empty); compare "
            f"the card's key fingerprint {fp} with the one the study publishes and confirm it "
            f"(lethe init --confirm-fingerprint HEX)")
    typed = normalise_fingerprint(confirm_fingerprint)
    if len(typed) < 16 or not all(c in "0123456789abcdef" for c in typed) or not fp.startswith(typed):
        raise IntegrityError(
            f"{card.source}: the study card's key fingerprint {fp} does not match the one confirmed "
            f"({confirm_fingerprint!r}; at least 16 hex digits are needed): this may be a substituted card")


def consent_text(card, policy) -> str:
    return (getattr(card, "consent_text", None) or policy.study.consent_text).strip()


def enrol(home_dir, card_path, policy_path, *, consent: str, timezone: str | None = None,
          now: float | None = None, enrolment_out=None, passphrase=None, key_storage: str | None = None,
          confirm_fingerprint: str | None = None) -> dict:
    """Enrol this device in the study described by ``card_path``.

    Parameters
    ----------
    home_dir : path-like or None
        The new home (default: ``LETHE_HOME`` or the per-user data directory).
    card_path : path-like
        The study card JSON issued by the researcher.
    policy_path : path-like
        The study policy TOML; its fingerprint must be approved by the card.
    consent : str
        What the participant typed after reading the consent text; must equal
        the study id.
    timezone : str, optional
        The participant's IANA time zone (default: the policy's).
    now : float, optional
        Enrolment time, Unix seconds; the study weeks count from it.
    enrolment_out : path-like, optional
        Where to write the enrolment file (default: ``HOME/enrolment.json``).
    passphrase : str or bytes, optional
        For ``key_storage="passphrase"``.
    key_storage : {"keyring", "passphrase", "plain"}, optional
        How the keys are held (default: the OS keyring; see
        :class:`agent.keystore.Keystore`).  ``plain`` is an explicit choice and
        is reported as a warning by ``lethe status`` and the board's report.
    confirm_fingerprint : str, optional
        The study key fingerprint the participant compared with the one the
        study publishes (at least its first 16 hex digits).  Required when the
        policy does not pin the key (``study.key_fingerprint = ""``): a
        substituted card with another key and the same study id is refused.

    Returns
    -------
    dict with ``pseudonym``, ``device_key_id``, ``enrolment``, ``home``.
    """
    from zoneinfo import ZoneInfo, ZoneInfoNotFoundError

    from ..keystore import Keystore, device_key_id
    from ..ledger import Ledger
    from ..policy import load_policy
    from ..study.card import check_policy_approved, load_card, write_enrolment

    home = Home(home_dir)
    if home.exists():
        raise StateError(f"{home.root}: already enrolled (pseudonym {home.read_config().get('pseudonym')}); "
                         f"'lethe withdraw' ends an enrolment")
    card = load_card(card_path)
    policy = load_policy(policy_path)
    check_policy_approved(card, policy)  # also: same study id, and a pinned key matches the card
    check_key_confirmed(card, policy, confirm_fingerprint)
    if (consent or "").strip() != card.study_id:
        raise DataError(f"consent not given: type the study id {card.study_id!r} exactly to agree "
                        f"(got {consent!r})")
    tz = timezone or policy.study.default_timezone
    try:
        ZoneInfo(tz)
    except (ZoneInfoNotFoundError, ValueError):
        raise DataError(f"time zone {tz!r} is not an IANA zone name such as 'Europe/Lisbon'") from None

    now = time.time() if now is None else float(now)
    ks = Keystore(home, passphrase=passphrase, storage=key_storage)
    ks.ensure()  # first: with no keyring reachable nothing else is written
    home.create()
    shutil.copyfile(policy_path, home.policy_path)
    home.policy_path.chmod(0o600)
    write_private(home.root / "study-card.json", Path(card_path).read_bytes())
    # The ledger's first entry comes before anything else is recorded: its hash
    # (the log's origin) goes into the enrolment, so the study can tell a
    # ledger started again from the one this device began with.
    first = Ledger(home, signing_key=ks.device_key()).append(
        "policy", fingerprint=policy.fingerprint, name=policy.policy.name, version=policy.policy.version)
    pseudonym = new_pseudonym()
    text = consent_text(card, policy)
    out = Path(enrolment_out) if enrolment_out else home.root / "enrolment.json"
    write_enrolment(home, card, policy, pseudonym, out, device_private_key=ks.device_key(),
                    log_origin=first["hash"])
    home.write_config({
        "format": "lethe-home", "version": 1,
        "study_id": card.study_id, "pseudonym": pseudonym, "timezone": tz,
        "enrolled_at": now, "policy_fingerprint": policy.fingerprint,
        "card_key_fingerprint": card.key_fingerprint,
        "consent": {"study_id": card.study_id, "text_sha256": hashlib.sha256(text.encode()).hexdigest(),
                    "at": now},
        "enrolment_file": str(out), "log_origin": first["hash"], "key_storage": ks.storage,
    })
    kid = device_key_id(ks.device_public())
    return {"pseudonym": pseudonym, "device_key_id": kid, "enrolment": str(out), "home": str(home.root),
            "study_id": card.study_id, "policy_fingerprint": policy.fingerprint, "timezone": tz,
            "key_storage": ks.storage}
