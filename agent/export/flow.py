"""The participant's export: confirm, seal, sign, write to the outbox.

One export at a time (an advisory lock on ``HOME/state/export.lock``): the
privacy-budget check, the sequence number and the record of the export never
interleave with a second export.  The bundle container itself is
:mod:`agent.bundle`; the payload is built by :mod:`agent.export.payload`.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

from ..bundle import bundle_name, make_header, seal_bundle
from ..errors import StateError
from ..fsutil import file_lock

def next_seq(vault) -> int:
    seqs = [int(r) for r in vault.rids("exports") if str(r).isdigit()]
    return max(seqs, default=0) + 1


def home_card(home):
    """The study card this home enrolled with.

    Looked up as ``home.json``'s ``"card"`` entry (a path, relative to the home
    or absolute), else ``HOME/study-card.json`` (where ``lethe init`` keeps it),
    else ``HOME/state/card.json``.
    """
    from ..study.card import load_card

    cfg = home.read_config()
    card_cfg = cfg.get("card") if isinstance(cfg.get("card"), str) else None
    for cand in ([card_cfg] if card_cfg else []) + ["study-card.json", "state/card.json"]:
        p = Path(cand)
        p = p if p.is_absolute() else home.root / p
        if p.exists():
            return load_card(p)
    raise StateError(f"{home.root}: no study card in this home (expected study-card.json); "
                     f"enrol first with 'lethe init --study CARD'")


def export_bundle(home, policy=None, now: float | None = None, confirm=lambda preview: True, *,
                  card=None, vault=None) -> Path | None:
    """Build, show, seal, sign and write the next bundle into ``HOME/outbox``.

    Parameters
    ----------
    home : Home or path-like
    policy : Policy, optional
        Defaults to the home's policy.
    now : float, optional
        Unix seconds for the bundle date (coarsened per the policy).
    confirm : callable(str) -> bool
        Called with the plain-language preview when ``export.confirm_each`` is
        true; a false answer cancels the export (returns None, writes nothing).
    card : StudyCard, optional
        Defaults to :func:`home_card`.

    Returns
    -------
    Path of the bundle, or None when the participant declined.
    """
    from ..home import Home
    from ..study.card import check_policy_approved

    home = home if isinstance(home, Home) else Home(home)
    home.require()
    policy = policy or home.load_policy()
    card = card or home_card(home)
    check_policy_approved(card, policy)
    # One export at a time: the budget check, the sequence number and the record
    # must not interleave with a second export (the agent itself may keep running).
    with _export_lock(home):
        return _export_locked(home, policy, card, now, confirm, vault)


def _export_lock(home):
    return file_lock(home.state / "export.lock")


def _export_locked(home, policy, card, now, confirm, vault):
    from ..disclosure import check_budget
    from ..fsutil import write_private
    from ..keystore import Keystore
    from ..ledger import Ledger
    from .payload import build_payload_and_relabel
    from .preview import preview

    own_vault = vault is None
    if own_vault:
        from ..vault import Vault

        vault = Vault.open(home)
    try:
        epsilon = check_budget(vault, policy)
        payload, relabel = build_payload_and_relabel(home, policy, vault, now)
        if policy.export.confirm_each and not confirm(preview(payload)):
            return None
        ks = Keystore(home)
        device_key = ks.device_key()
        seq = next_seq(vault)
        header = make_header(suite=card.suite, study_id=card.study_id, recipient=card.key_fingerprint,
                             device_key_id=ks.device_key_id(), seq=seq, created=payload["created"])
        data = seal_bundle(payload, header, card.hpke_public_key(), device_key)
        digest = hashlib.sha256(data).hexdigest()
        # Record the export (and spend the budget) before the file exists: a crash in
        # between leaves a gap in the sequence, never a reused number or an unspent epsilon.
        with vault.transaction():
            vault.put("exports", str(seq), {"seq": seq, "created": payload["created"],
                                            "epsilon": epsilon, "digest": digest})
            if relabel.changed:
                relabel.save(vault)
        path = home.outbox / bundle_name(seq, home.read_config().get("pseudonym"))
        write_private(path, data)
        log_size = {"log_size": payload["log"]["size"]} if "log" in payload else {}
        Ledger(home, signing_key=device_key).append("exported", bundle_seq=seq, digest=digest, **log_size)
        return path
    finally:
        if own_vault:
            vault.close()
