"""`lethe status` stays light: no scipy on its path, no numpy for the quiz score.

Start-up cost is what a participant waits for each time they ask; the issue
measured 70 % of a 1 s status in importing scipy.stats for one binomial test.
The tail itself is checked against scipy.stats.binomtest in tests/test_stats.py.
"""

from __future__ import annotations

import subprocess
import sys

from agent.vault import Vault


def _modules_after(code: str) -> set[str]:
    out = subprocess.run([sys.executable, "-c", code + "\nprint(' '.join(sorted(sys.modules)))"],
                         capture_output=True, text=True, check=True)
    return set(out.stdout.split())


def test_quiz_score_imports_no_numpy():
    mods = _modules_after("import sys\nfrom agent.quiz import score\nfrom agent.stats import binomial_upper_tail\n"
                          "binomial_upper_tail(7, 10, 0.25)")
    assert "numpy" not in mods


def test_status_with_answers_imports_no_scipy(h):
    with Vault.open(h) as v:
        v.put("trials", "t1", {"trial_id": "t1", "correct": "P1", "options": ["P1", "P2", "P3", "P4"]})
        v.put("answers", "t1", {"trial_id": "t1", "choice": "P1", "rt_s": 1.0})
    mods = _modules_after(f"import sys\nfrom agent.cli import main\nmain(['--home', {str(h.root)!r}, 'status'])")
    assert "agent.quiz" in mods          # the score was computed
    assert not {m for m in mods if m == "scipy" or m.startswith("scipy.")}


def test_status_summary_line_follows_the_upload_queue():
    # common practice, no source: one word per state -- "prepared" until the server acknowledged, "sent" after
    from agent.participant.status import _summaries_made

    up = {"server": "https://127.0.0.1:1",
          "sent": [{"kind": "enrolment", "name": "e"}, {"kind": "bundle", "name": "b1"}],
          "prepared": [{"kind": "bundle", "name": "b2"}], "failed": []}
    assert _summaries_made(2, up) == "2 made (1 sent, 1 prepared and waiting)"


def test_status_summary_line_without_a_server_keeps_the_outbox_words():
    from agent.participant.status import _summaries_made

    assert _summaries_made(3, {"server": None}) == "3 prepared (in the outbox)"
