"""The researcher's side: study keys, cards, enrolment registry, open, merge, report.

Library functions (the CLI in ``agent/commands/study.py`` is a thin wrapper)::

    study_keygen(study_dir, study_id, passphrase, suite="default") -> StudyKeyPair
    write_card(study_dir, policies, contact, out) -> Path
    load_card(path) -> StudyCard
    enroll(study_dir, enrolment_path) -> Device
    open_bundles(study_dir, paths, passphrase) -> list[OpenResult]
    verify_withdrawal(cert, registry) -> WithdrawalCheck

``merge`` and ``report`` share their names with their modules, so import them
from there: ``from agent.study.merge import merge``, ``from agent.study.report
import report``.
"""

from __future__ import annotations

import importlib

_EXPORTS = {
    "study_keygen": "keys", "load_study_key": "keys", "StudyKeyPair": "keys", "read_passphrase": "keys",
    "write_card": "card", "load_card": "card", "make_card": "card", "StudyCard": "card",
    "check_policy_approved": "card", "make_enrolment": "card", "write_enrolment": "card",
    "verify_enrolment": "card", "load_enrolment": "card",
    "enroll": "registry", "Registry": "registry",
    "make_withdrawal_certificate": "withdrawal", "verify_withdrawal": "withdrawal",
    "verify_withdrawal_signature": "withdrawal", "register_withdrawal": "withdrawal",
    "open_bundles": "open", "OpenResult": "open",
}


def __getattr__(name):
    mod = _EXPORTS.get(name)
    if mod is None:
        raise AttributeError(f"module 'agent.study' has no attribute {name!r}")
    return getattr(importlib.import_module(f"{__name__}.{mod}"), name)


__all__ = sorted(_EXPORTS)
