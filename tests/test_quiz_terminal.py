"""Drive ``lethe quiz`` through a pseudo-terminal: answer, skip, quit, resume, finish."""

from __future__ import annotations

from card_pin import card_fingerprint  # the participant confirms the study key (issue 12, finding 8)
import sys
import time
from datetime import datetime, UTC

import pexpect
import pytest

from tests.test_quiz import make_episodes


@pytest.fixture
def quiz_home(tmp_path, repo, default_policy):
    from agent.participant.enrol import enrol
    from agent.study.card import write_card
    from agent.study.keys import study_keygen
    from agent.vault import Vault

    study_keygen(tmp_path / "study", "harbour-days-2027", b"test passphrase", scrypt_n=2**10)
    card = write_card(tmp_path / "study", [repo / "policies" / "default.toml"], contact="desk",
                      out=tmp_path / "card.json")
    res = enrol(tmp_path / "home", card, repo / "policies" / "default.toml", consent="harbour-days-2027",
                confirm_fingerprint=card_fingerprint(card))
    start = datetime.fromtimestamp(time.time() - 20 * 86400, UTC).replace(minute=0, second=0,
                                                                                     microsecond=0)
    from agent.home import Home

    with Vault.open(Home(res["home"])) as v, v.transaction():
        for e in make_episodes(start, 24 * 12):
            v.put("episodes", e["key"], e)
    return res["home"]


def _spawn(home):
    return pexpect.spawn(sys.executable, ["-m", "agent.cli", "--home", str(home), "quiz"],
                         encoding="utf-8", timeout=60, dimensions=(40, 120))


def test_answer_skip_quit_resume_finish(quiz_home):
    from agent.home import Home
    from agent.vault import Vault

    child = _spawn(quiz_home)
    child.expect(r"Memory test: 20 questions to go")
    child.expect(r"\[1/20\] Where were you on (\w+) ")
    child.expect("answer> ")
    child.sendline("9")                      # out of range: asked again
    child.expect("Please type a number from 1 to 4")
    child.sendline("2")                      # answer
    child.expect(r"\[2/20\]")
    child.expect("answer> ")
    child.sendline("s")                      # skip
    child.expect(r"\[3/20\]")
    child.expect("answer> ")
    child.sendline("q")                      # quit, resume later
    child.expect("continue where you left off")
    child.expect(pexpect.EOF)
    with Vault.open(Home(quiz_home)) as v:
        answers = [a for _, a in v.items("answers")]
    assert [a["choice"] is None for a in answers] == [False, True]
    assert all(a["source"] == "terminal" and a["rt_s"] >= 0 for a in answers)

    child = _spawn(quiz_home)                # resume: picks up at question 3
    child.expect(r"Memory test: 18 questions to go")  # the counter counts this session's questions
    for k in range(1, 19):
        child.expect(rf"\[{k}/18\]")
        child.expect("answer> ")
        child.sendline("1")
    child.expect(r"Done\. You placed \d+ of 19 hours correctly")
    child.expect("guessing would get about 25%")
    child.expect(pexpect.EOF)
