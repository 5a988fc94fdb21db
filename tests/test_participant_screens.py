"""What a volunteer reads in the terminal: plain words, nothing cut short, no tracebacks."""

from __future__ import annotations

import subprocess
import sys
from collections import Counter
from pathlib import Path

import pytest

from page_home import make_page_home

REPO = Path(__file__).resolve().parent.parent
# Words of the trade that mean nothing to a volunteer (issue 14's list).
INTERNAL = ("codebook", "featurised", "episode", "ledger", "silhouette", "enmo", "binomial", "theta", "fingerprint")


@pytest.fixture(scope="module")
def ph(tmp_path_factory):
    return make_page_home(tmp_path_factory.mktemp("screens"))


def lethe(*args, home=None):
    cmd = [sys.executable, "-m", "agent.cli"] + (["--home", str(home)] if home else []) + list(args)
    return subprocess.run(cmd, capture_output=True, text=True, cwd=REPO, timeout=300)


def test_places_text_keeps_whole_hour_ranges(ph):
    r = lethe("places", home=ph)
    assert r.returncode == 0, r.stderr
    # the café (P3) is visited 17:00-19:00 on Tuesdays and Thursdays (tests/page_home.py)
    assert "usually Tuesdays, Thursdays, from 17:00 to 19:00" in r.stdout
    assert "from 19:00 to 09:00" in r.stdout or "from 17:00 to 09:00" in r.stdout  # home, overnight, whole
    assert not any(w in r.stdout.lower() for w in INTERNAL)


def test_hour_ranges_run_through_midnight_and_never_truncate():
    from agent.places import hour_ranges, hours_words

    assert hour_ranges(Counter({21: 5, 22: 5, 23: 5})) == [(21, 24)]
    assert hours_words(Counter({21: 5, 22: 5, 23: 5})) == "from 21:00 to 00:00"
    assert hours_words(Counter({22: 3, 23: 3, 0: 3, 1: 3})) == "from 22:00 to 02:00"
    assert hours_words(Counter({h: 1 for h in range(24)})) == "at any hour"
    assert hours_words(Counter({9: 10, 10: 10, 14: 1})) == "from 09:00 to 11:00"  # a stray hour is left out


def test_places_json_into_a_closed_pipe_is_quiet(ph):
    # `lethe places --json | head -c 10`: the reader closes early; no traceback
    p = subprocess.Popen(f"{sys.executable} -m agent.cli --home {ph} places --json | head -c 10",
                         shell=True, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, cwd=REPO)
    out, err = p.communicate(timeout=300)
    assert len(out) == 10
    assert "Traceback" not in err and "BrokenPipeError" not in err


def test_status_is_in_plain_words(ph):
    r = lethe("status", home=ph)
    assert r.returncode == 0, r.stderr
    assert "lethe is not running in the background" in r.stdout
    assert "Summaries for the study: 0 prepared" in r.stdout
    assert not any(w in r.stdout.lower() for w in INTERNAL)


def test_quiz_options_are_names_or_recognisable_descriptions(ph):
    from agent import quiz
    from agent.home import Home
    from agent.vault import Vault

    out: list[str] = []
    replies = iter(["1", "s", "q"])
    with Vault.open(Home(ph)) as v:
        quiz.run_session(v, Home(ph).load_policy(), read=lambda _: next(replies), write=out.append)
    text = "\n".join(out)
    assert "Memory test: 20 questions to go" in text and "[1/20]" in text and "[3/20]" in text
    options = [line for line in out if line.startswith("  ") and ". " in line]
    assert options and all("usually" in o for o in options)  # nothing named yet: described by when
    assert "place P" not in text
    assert not any(w in text.lower() for w in INTERNAL)


def test_policy_list_and_write(tmp_path):
    r = lethe("policy", "list")
    assert r.returncode == 0 and "default" in r.stdout and "strict" in r.stdout
    r = lethe("policy", "write", "default", str(tmp_path / "p.toml"))
    assert r.returncode == 0 and (tmp_path / "p.toml").read_bytes() == (REPO / "policies" / "default.toml").read_bytes()


def test_policy_write_does_not_overwrite(tmp_path):
    (tmp_path / "p.toml").write_text("mine")
    r = lethe("policy", "write", "default", str(tmp_path / "p.toml"))
    assert r.returncode == 2 and "already exists" in r.stderr and (tmp_path / "p.toml").read_text() == "mine"


def test_policy_write_unknown_name():
    r = lethe("policy", "write", "lenient", "x.toml")
    assert r.returncode == 2 and "no shipped policy 'lenient'" in r.stderr


def test_repository_policies_folder_is_the_shipped_package_data():
    # One source of truth: agent/data/policies/ (package data, in every install) and the
    # repository's policies/ is a link to it, so the paths in the docs keep working.
    from agent.policy_files import DATA, shipped

    assert (REPO / "policies").is_symlink() and (REPO / "policies").resolve() == DATA.resolve()
    assert sorted(shipped()) == ["board-limits.example", "default", "strict"]


def test_laptop_time_zone_is_the_default(tmp_path):
    # The C library's view of the zone (time.localtime().tm_gmtoff, POSIX) must agree with
    # the zone lethe picks, checked with zoneinfo on a summer and a winter date.
    code = ("import time, datetime as d, zoneinfo\n"
            "from agent.participant.enrol import laptop_timezone\n"
            "z = laptop_timezone(); print(z)\n"
            "for t in (1782000000, 1798000000):\n"
            "    assert time.localtime(t).tm_gmtoff == d.datetime.fromtimestamp(t, zoneinfo.ZoneInfo(z))"
            ".utcoffset().total_seconds(), (z, t)\n")
    for zone in ("Pacific/Chatham", "America/Sao_Paulo", "Europe/Lisbon"):
        env = {"PATH": "/usr/bin:/bin", "TZ": zone, "PYTHONPATH": str(REPO)}
        r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, cwd=REPO)
        assert r.returncode == 0 and r.stdout.strip() == zone, r.stderr


def test_unnameable_tz_gives_no_guess():
    code = "from agent.participant.enrol import laptop_timezone; print(laptop_timezone())"
    env = {"PATH": "/usr/bin:/bin", "TZ": "EST5EDT4,M3.2.0,M11.1.0", "PYTHONPATH": str(REPO)}
    r = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, cwd=REPO)
    assert r.stdout.strip() == "None"


def _three_mood_answers(root):
    from agent.home import Home
    from agent.participant.web.views import write_mood_answer

    home = Home(root)
    policy = home.load_policy()
    for i in range(3):
        write_mood_answer(home, policy, {e: policy.schedule.mood_scale_min + i for e in policy.schedule.emotions},
                          now=1_790_000_000.0 + i)


def test_backfill_progress_bar_on_a_terminal(tmp_path):
    import pexpect

    root = make_page_home(tmp_path, days=1)
    _three_mood_answers(root)
    child = pexpect.spawn(sys.executable, ["-m", "agent.cli", "--home", str(root), "run", "--once"],
                          cwd=str(REPO), encoding="utf-8", timeout=300, dimensions=(30, 120))
    child.expect(r"files taken in: +\d+%.*/3")  # the bar, as tqdm draws it
    child.expect(pexpect.EOF)


def test_no_progress_bar_off_a_terminal(tmp_path):
    root = make_page_home(tmp_path, days=1)
    _three_mood_answers(root)
    r = lethe("run", "--once", home=root)
    assert r.returncode == 0 and "files taken in" not in r.stderr and "\r" not in r.stderr


def test_fit_shows_a_running_clock_on_a_terminal_only(tmp_path):
    import pexpect

    from agent import quiz
    from agent.home import Home
    from agent.vault import Vault

    root = make_page_home(tmp_path)
    home = Home(root)
    with Vault.open(home) as v:
        for k, t in enumerate(quiz.issue_trials(v, home.load_policy())):
            quiz.record_answer(v, t, t["options"][k % 2], 3.0, "terminal")
    child = pexpect.spawn(sys.executable, ["-m", "agent.cli", "--home", str(root), "fit", "--no-store"],
                          cwd=str(REPO), encoding="utf-8", timeout=600, dimensions=(30, 160))
    child.expect(r"fitting the model on this laptop")
    child.expect(pexpect.EOF)
    r = lethe("fit", "--no-store", "--json", home=root)
    assert r.returncode == 0 and "fitting the model" not in r.stderr
