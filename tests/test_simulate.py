"""``lethe simulate``: the demo recorder fills a freshly enrolled home, and only that."""

from __future__ import annotations

from card_pin import card_fingerprint  # the participant confirms the study key (issue 12, finding 8)
import pytest

from agent.errors import StateError


@pytest.fixture
def fresh_home(tmp_path, repo):
    from agent.participant.enrol import enrol
    from agent.study.card import write_card
    from agent.study.keys import study_keygen

    study_keygen(tmp_path / "study", "harbour-days-2027", b"test passphrase", scrypt_n=2**10)
    card = write_card(tmp_path / "study", [repo / "policies" / "default.toml"], out=tmp_path / "card.json")
    return enrol(tmp_path / "home", card, repo / "policies" / "default.toml",
                 consent="harbour-days-2027",
                 confirm_fingerprint=card_fingerprint(card))["home"]


@pytest.mark.slow
def test_one_simulated_day_is_taken_in_and_destroyed(fresh_home):
    from agent.demo.record import record
    from agent.home import Home
    from agent.ledger import verify_ledger

    home = Home(fresh_home)
    totals = record(home, days=1, seed=3, say=lambda s: None)
    assert totals["files"] > 100
    assert [p for p in home.inbox.iterdir()] == []
    rep = verify_ledger(home, retention_limit_s=home.load_policy().retention.raw_seconds)
    assert rep.ok and not rep.violations
    assert rep.counts["destroyed"] == totals["files"]
    # the study start moved back to the first simulated day, which ended before now
    assert home.read_config()["simulated"] is True
    with pytest.raises(StateError, match="already received raw data"):
        record(home, days=1, say=lambda s: None)
