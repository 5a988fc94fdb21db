"""``lethe run``: the intake agent (watch the inbox, or drain it once with ``--once``)."""

from __future__ import annotations

from ._common import add_json, emit, home_from


def register(sub) -> None:
    p = sub.add_parser("run", help="run the intake agent: featurise raw drops and destroy the originals",
                       description="Watch HOME/inbox and take each raw file when it is complete: read it "
                                   "safely, keep only its features (encrypted), destroy the original within "
                                   "the policy's raw-retention window. Stop with Ctrl-C or SIGTERM.")
    p.add_argument("--once", action="store_true", help="drain the inbox, print a summary and exit")
    p.add_argument("--settle", type=float, metavar="S", default=None,
                   help="seconds a file's size and mtime must stay unchanged to count as complete "
                        "(default: the policy's retention.settle_seconds)")
    p.add_argument("--no-page", action="store_true",
                   help="do not serve the participant's page or raise mood-prompt notifications")
    add_json(p)
    p.set_defaults(func=_run)


def _run(args) -> int:
    import os
    import signal
    import sys
    import threading

    from ..errors import UsageError

    home = home_from(args)
    from ..participant.withdraw import withdrawal_record

    record = withdrawal_record(home)
    if record is not None:
        from ..errors import StateError

        raise StateError(f"{home.root}: this home was withdrawn from the study ({record.name} is all it holds), "
                         f"so there is nothing for 'lethe run' to do; if a background service started this, "
                         f"'lethe service remove' stops it (and if the withdrawal was interrupted, 'lethe withdraw' "
                         f"finishes it)")
    home.require()
    if args.settle is not None and not (0.0 <= args.settle <= 60.0):
        raise UsageError(f"--settle {args.settle}: expected seconds between 0 and 60")
    # numba (used by librosa) reads this when first imported: it must point into
    # the home before anything imports librosa, or each start recompiles.
    os.environ.setdefault("NUMBA_CACHE_DIR", str(home.numba_cache))
    home.numba_cache.mkdir(parents=True, exist_ok=True, mode=0o700)
    policy = home.load_policy()

    from ..intake.watcher import run_agent

    # Under the background service (its unit sets LETHE_SERVICE=1) everything this process would print
    # goes to the rotating agent log instead, and without file names: that output is persisted.
    service = os.environ.get("LETHE_SERVICE") == "1"
    restore = _service_output(home) if service else None
    stop = threading.Event()

    def _stop(signum, frame):
        stop.set()

    companion = None

    def _ready(seconds):
        nonlocal companion
        if args.once:
            return
        # On stderr, so --json output stays clean; a supervisor can wait for this line.
        print(f"lethe: watching {home.inbox} (ready in {seconds:.2f} s; stop with Ctrl-C)",
              file=sys.stderr, flush=True)
        if not args.no_page:
            # The participant's page and the mood prompts (agent/participant/companion.py),
            # started once this process holds the home.
            from ..participant.companion import Companion

            companion = Companion(home, policy, stop).start()
            if companion.server is not None:
                print(f"lethe: your page is served on 127.0.0.1:{companion.server.port}; 'lethe open' opens it",
                      file=sys.stderr, flush=True)

    bar = None
    on_outcome = None
    if args.once:
        # a backfill can be thousands of files: a bar on a terminal, nothing otherwise
        from ._common import progress

        waiting = sum(1 for p in home.inbox.iterdir() if not p.name.startswith(".")) if home.inbox.exists() else 0
        bar = progress(waiting, "files taken in", unit="file")
        on_outcome = lambda _o: bar.update(1)  # noqa: E731
    old = {s: signal.signal(s, _stop) for s in (signal.SIGTERM, signal.SIGINT)}
    try:
        report = run_agent(home, policy, once=args.once, settle_s=args.settle, stop_event=stop,
                           on_ready=_ready, on_outcome=on_outcome)
    finally:
        if bar is not None:
            bar.close()
        for s, h in old.items():
            signal.signal(s, h)
        if companion is not None:
            companion.close()
    try:
        if service:
            report = report.redacted()
        emit(args, report.as_dict(), report.text())
    finally:
        if restore is not None:
            restore()
    return 0


def _service_output(home):
    """Send stdout and stderr (summaries, tracebacks) to ``HOME/logs/agent.log`` (rotated); returns an undo.

    What the service manager still captures at the descriptor level (``logs/service.out``: only fatal
    interpreter errors) is rotated here too, by copy and truncate, once it passes 1 MiB.
    """
    import logging
    import sys

    from ..intake.watcher import setup_logging
    from ..participant.service import rotate_capture

    rotate_capture(home.logs / "service.out")
    handler = setup_logging(home)
    old = sys.stdout, sys.stderr
    sys.stdout = _LogStream(logging.getLogger("lethe.run"), logging.INFO)
    sys.stderr = _LogStream(logging.getLogger("lethe.run"), logging.ERROR)

    def restore():
        sys.stdout, sys.stderr = old
        if handler is not None:
            logging.getLogger("lethe").removeHandler(handler)
            handler.close()

    return restore


class _LogStream:
    """A text stream that writes whole lines to a logger."""

    def __init__(self, logger, level):
        self.logger, self.level, self.buf = logger, level, ""

    def write(self, text: str) -> int:
        self.buf += text
        while "\n" in self.buf:
            line, self.buf = self.buf.split("\n", 1)
            if line.strip():
                self.logger.log(self.level, "%s", line)
        return len(text)

    def flush(self) -> None:
        if self.buf.strip():
            self.logger.log(self.level, "%s", self.buf)
        self.buf = ""

    def isatty(self) -> bool:
        return False
