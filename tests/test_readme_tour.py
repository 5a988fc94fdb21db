"""The README's tour, followed step by step as written, in a fresh folder outside the clone.

Every ``sh`` block of the README's "A short tour" section is read, each command
is run in order with the installed ``lethe`` console script, and each must exit
0 (the one step the README marks "exit 1" must exit 1).  Where a command asks
something in the terminal (consent, the memory test, the export confirmation,
the withdrawal) the test answers through a pseudo-terminal as a participant
would.  ``lethe open`` gets a stand-in browser (``BROWSER``, the standard
``webbrowser`` hook) that follows the link it is given and saves the page.
"""

from __future__ import annotations

import glob
import os
import re
import shlex
import shutil
import subprocess
import sys
import time
from pathlib import Path

import pytest

REPO = Path(__file__).resolve().parent.parent
pytestmark = pytest.mark.slow

FETCH = r'''
import sys, urllib.request, http.cookiejar
jar = http.cookiejar.CookieJar()
op = urllib.request.build_opener(urllib.request.HTTPCookieProcessor(jar))
page = op.open(sys.argv[1], timeout=60).read().decode()
import os
open(sys.argv[2] + ".part", "w").write(page)
os.replace(sys.argv[2] + ".part", sys.argv[2])  # appears whole
'''


def tour_commands(start: str = "## A short tour", end: str = "Exit codes:") -> list[tuple[str, list[str], bool]]:
    """(the line as written, its words, whether the README says it exits 1) for each command of a README section."""
    text = (REPO / "README.md").read_text("utf-8")
    section = text[text.index(start):text.index(end, text.index(start))]
    out = []
    for block in re.findall(r"```sh\n(.*?)```", section, flags=re.S):
        for line in block.replace("\\\n", " ").splitlines():
            if not line.strip():
                continue
            words = shlex.split(line, comments=True)
            if words:
                out.append((line.strip(), words, "exit 1" in line))
    return out


def installed_lethe() -> str | None:
    beside = Path(sys.executable).parent / "lethe"
    return str(beside) if beside.exists() else shutil.which("lethe")


def test_the_tour_has_the_steps_the_issue_asks_for():
    lines = [w for _, w, _ in tour_commands()]
    subcommands = [" ".join(w[3:4] if w[1:2] == ["--home"] else w[1:2]) for w in lines if w[0] == "lethe"]
    assert subcommands[-2:] == ["withdraw", "study"]  # withdrawal comes last, then its check
    assert "open" in subcommands and "policy" in subcommands
    assert not any("policies/" in " ".join(w) for w in lines)  # nothing needs the clone


@pytest.mark.timeout(1800)
@pytest.mark.skipif(installed_lethe() is None, reason="lethe is not installed (pip install -e .)")
def test_the_readme_tour_runs_as_written_outside_the_clone(tmp_path):
    work = tmp_path / "tour"
    work.mkdir()
    assert REPO not in work.parents
    lethe = installed_lethe()
    # PYTHONPATH is kept: a developer may point the installed script at a work tree
    env = {k: v for k, v in os.environ.items() if k not in ("LETHE_HOME", "LETHE_NO_KEYRING", "LETHE_KEY_STORAGE")}
    if not os.environ.get("LETHE_SECRET_SERVICE"):
        # No OS keyring here: the README's advice for such a machine, a passphrase (given
        # through the environment as a script would, instead of typed at each start).
        env["LETHE_KEY_STORAGE"] = "passphrase"
        env["LETHE_KEY_PASSPHRASE"] = "a participant's long passphrase"
    (tmp_path / "fetch.py").write_text(FETCH)
    page = tmp_path / "page.html"
    env["BROWSER"] = f"{sys.executable} {tmp_path / 'fetch.py'} %s {page}"
    background: list[subprocess.Popen] = []
    state: dict = {}
    try:
        _follow(tour_commands(), work, lethe, env, page, background, state)
        # then the study-server section, in the same folder, as the README says
        _follow(tour_commands("## With the study server", "Stop the server"), work, lethe, env, page,
                background, state)
    finally:
        for p in background:
            p.terminate()
            p.wait(60)
    # the tour left what it says it leaves
    assert sorted(p.name for p in (work / "ph").iterdir()) == ["withdrawal-certificate.json"]
    assert (work / "cohort-report" / "report.html").exists() and (work / "board" / "index.html").exists()
    # the second participant's enrolment and bundle reached the server and were acknowledged
    from agent.home import Home
    from agent.uploader import queue_status

    q = queue_status(Home(work / "ph2"))
    assert len(q["sent"]) >= 2 and not q["prepared"] and not q["failed"], q


def _follow(commands, work, lethe, env, page, background, state):
    import json

    import pexpect

    for line, words, exits_1 in commands:
        if words[0] == "export":
            name, _, value = words[1].partition("=")
            env[name] = value
            continue
        assert words[0] == "lethe", line
        in_background = words[-1] == "&"
        if in_background:
            words = words[:-1]
        args = []
        for w in words[1:]:
            w = w.replace("$PWD", str(work))  # the shell would expand it
            if w == "CODE" and state.get("invitation"):
                w = state["invitation"]  # the participant types the code the study gave them
            hits = sorted(glob.glob(w, root_dir=work)) if any(c in w for c in "*?[") else []
            args += hits or [w]
        sub = args[2] if args[:1] == ["--home"] else args[0]
        if sub == "study" and "--study-id" in args:
            state["study_id"] = args[args.index("--study-id") + 1]
        if in_background:
            # the study server: started as the README starts it, stopped when the tour is over
            with open(work / f"background-{len(background)}.log", "w") as log:
                background.append(subprocess.Popen([lethe] + args, cwd=work, env=env, stdin=subprocess.DEVNULL,
                                                   stdout=log, stderr=subprocess.STDOUT))
            _wait_for_port(args, background[-1], work)
            continue
        interactive = (sub in ("init", "quiz", "withdraw", "open")
                       or (sub == "export" and "--preview" not in args and "--yes" not in args))
        if not interactive:
            r = subprocess.run([lethe] + args, cwd=work, env=env, stdin=subprocess.DEVNULL,
                               capture_output=True, text=True, timeout=900)
            assert r.returncode == (1 if exits_1 else 0), f"{line}\n{r.stdout[-2000:]}\n{r.stderr[-2000:]}"
            assert "Traceback" not in r.stderr, line
            if sub == "study" and args[1:2] == ["invite"]:
                codes = re.findall(r"\b[A-Za-z0-9_-]{12,}\b", r.stdout)
                state["invitation"] = codes[0] if codes else None
            continue
        child = pexpect.spawn(lethe, args, cwd=str(work), env=env, encoding="utf-8", timeout=600,
                              dimensions=(50, 200))
        if sub == "init":
            card = json.loads((work / args[args.index("--study") + 1]).read_text())
            child.expect(r"Type the published fingerprint")
            child.sendline(card["key_fingerprint"])  # as printed by 'lethe study card' above
            child.expect(r"To agree, type the study id")
            child.sendline(state["study_id"])
        elif sub == "quiz":
            k = 0
            while child.expect([r"answer> ", pexpect.EOF]) == 0:
                child.sendline("s" if k % 4 == 3 else "1")
                k += 1
            assert k >= 1 and "You placed" in child.before
        elif sub == "export":
            child.expect(r"\[y/N\]")
            child.sendline("y")
            child.expect(r"It has not been sent")
        elif sub == "withdraw":
            child.expect(r"Type the study id")
            child.sendline(state["study_id"])
            child.expect(r"You have withdrawn")
        elif sub == "open":
            deadline = time.monotonic() + 300  # waiting for the stand-in browser, not a timing check
            while not page.exists() and time.monotonic() < deadline and child.isalive():
                time.sleep(0.5)
            assert page.exists(), child.before
            assert "<h1>Today</h1>" in page.read_text()
            child.sendintr()  # Ctrl-C ends the page served by 'lethe open'
        child.expect(pexpect.EOF)
        child.close()
        assert child.exitstatus == 0, f"{line}\n{child.before}"


def _wait_for_port(args, proc, work):
    """Wait until the background server accepts connections on its --port (a wait, not a timing check)."""
    import socket

    port = int(args[args.index("--port") + 1]) if "--port" in args else None
    deadline = time.monotonic() + 120
    while port and time.monotonic() < deadline and proc.poll() is None:
        try:
            socket.create_connection(("127.0.0.1", port), timeout=1).close()
            return
        except OSError:
            time.sleep(0.5)
    assert proc.poll() is None, (work / "background-0.log").read_text()
