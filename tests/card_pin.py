"""Test helper: the study key fingerprint a participant confirms at enrolment (issue 12, finding 8)."""

from __future__ import annotations


def card_fingerprint(card_path) -> str:
    """The key fingerprint printed on a study card, as a participant would confirm it."""
    from agent.study.card import load_card

    return load_card(card_path).key_fingerprint
