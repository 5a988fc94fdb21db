"""Featurisation in forked children whose death the agent survives.

A reader runs on hostile bytes: a native decoder can crash the process, a
huge allocation can bring the OOM killer, a pathological input can loop.  The
agent therefore parses each group of files in a *forked child* and reads its
answers with a deadline per file:

* the child answers ``ok`` (the features), ``rejected`` (a reason code from
  ``docs/inbox-formats.md``) or ``error`` (a reader bug: its exception class),
  one answer per file, streamed as each file is done;
* if the child dies while parsing (a signal, ``os._exit``, the OOM killer,
  which picks the child: it holds the parse's memory), the file it was
  parsing -- known exactly from the answers received so far -- is rejected
  ``reader_crashed`` and destroyed unparsed; the files after it are parsed in
  a new child;
* if a file takes longer than the deadline the child is killed and the file is
  rejected ``reader_timeout``.

Why ``fork``: the child starts with the agent's readers already imported
(a fresh interpreter would cost the agent a second or more per start, which a
short-lived agent cannot afford), and nothing of the caller's ``__main__`` is
run again.  The child closes every inherited descriptor but its answer pipe
(so it never holds the agent's lock, the inbox or the ledger), arms an alarm
so it cannot outlive its deadline, touches no lock of the parent, and leaves
with ``os._exit``.  It answers in **JSON only**, so a child subverted by a
hostile file cannot make the agent run code by what it sends back.

Frames: 4-byte big-endian length, then a UTF-8 JSON body.
"""

from __future__ import annotations

import contextlib
import json
import os
import pickle
import selectors
import signal
import struct
import threading
import time

from ..errors import RejectedInput

_LEN = struct.Struct(">I")
MAX_ANSWER_BYTES = 256 << 20
PIPE_BYTES = 1 << 20    # asked for both pipes of a persistent worker (Linux F_SETPIPE_SZ; 64 KiB otherwise)


class WorkerDied(Exception):
    """The worker process ended while parsing a file (``reason``: ``reader_crashed`` or ``reader_timeout``)."""

    def __init__(self, reason: str, detail: str):
        self.reason = reason
        self.detail = detail
        super().__init__(f"{reason}: {detail}")



def _plain(o):
    tolist = getattr(o, "tolist", None)   # numpy scalars and arrays
    if tolist is not None:
        return tolist()
    raise TypeError(f"{type(o).__name__} is not a plain JSON type")


def _read(fd: int, n: int, deadline: float) -> bytes:
    """Exactly ``n`` bytes from a pipe before ``deadline`` (monotonic); TimeoutError / EOFError otherwise."""
    buf = bytearray()
    with selectors.DefaultSelector() as sel:
        sel.register(fd, selectors.EVENT_READ)
        while len(buf) < n:
            left = deadline - time.monotonic()
            if left <= 0 or not sel.select(left):
                raise TimeoutError
            chunk = os.read(fd, n - len(buf))
            if not chunk:
                raise EOFError
            buf += chunk
    return bytes(buf)


def _how(code: int | None) -> str:
    if code is None:
        return "exit status unknown"
    if code < 0:
        try:
            return f"killed by {signal.Signals(-code).name}"
        except ValueError:
            return f"killed by signal {-code}"
    return f"exit status {code}"


# -- forked readers (what the agent uses) ---------------------------------------------------
def featurise_forked(jobs, policy, now: float | None, timeout_s: float) -> list:
    """Featurise ``[(name, data), ...]`` in a forked child; one answer per job, in order.

    Each answer is an :class:`~agent.intake.item.ItemResult`, a
    :class:`~agent.errors.RejectedInput` (the reader's reason, or
    ``reader_error``) or a :class:`WorkerDied` (``reader_crashed`` /
    ``reader_timeout``).  The child parses the jobs one after another and
    streams each answer as soon as it has it (JSON only), so when it dies the
    file it was parsing is known exactly: that file alone gets ``WorkerDied``
    and the jobs after it are parsed in a new child.  The caller should have
    imported the readers already (:func:`agent.intake.warm_up`) so the child
    starts with them loaded.
    """
    jobs = list(jobs)
    answers: list = []
    while len(answers) < len(jobs):
        answers += _one_child(jobs[len(answers):], policy, now, timeout_s)
    return answers


def _one_child(jobs, policy, now, timeout_s) -> list:
    r, w = os.pipe()
    pid = os.fork()
    if pid == 0:   # the child: parse, answer, and leave without running any of the parent's clean-up
        code = 0
        try:
            os.closerange(3, w)
            os.closerange(w + 1, _max_fd())
            for sig in (signal.SIGALRM, signal.SIGTERM, signal.SIGINT):   # not the agent's handlers
                signal.signal(sig, signal.SIG_DFL)
            signal.alarm(int(timeout_s * len(jobs)) + 1)   # never outlives its deadline, even if orphaned
            for name, data in jobs:
                body = json.dumps(_answer(name, data, policy, now), default=_plain).encode("utf-8")
                view = memoryview(_LEN.pack(len(body)) + body)
                while view:
                    view = view[os.write(w, view):]
        except BaseException:  # noqa: BLE001 - whatever happens, the child must not return into the agent
            code = 70
        finally:
            os._exit(code)
    os.close(w)
    out: list = []
    status = None
    try:
        deadline = time.monotonic() + timeout_s
        for name, _ in jobs:
            try:
                (n,) = _LEN.unpack(_read(r, 4, deadline))
                if n > MAX_ANSWER_BYTES:
                    raise EOFError
                out.append(_decode(name, _read(r, n, deadline)))
                deadline = time.monotonic() + timeout_s   # each file has its own time
            except TimeoutError:
                os.kill(pid, signal.SIGKILL)
                out.append(WorkerDied("reader_timeout", f"parsing took longer than {timeout_s:g} s; "
                                                        f"the reader process was stopped"))
                break
            except (EOFError, OSError, ValueError, KeyError, TypeError):
                status = _reap_pid(pid)
                out.append(WorkerDied("reader_crashed", f"the reader process ended while parsing "
                                                        f"({_how(_exit_code(status))})"))
                break
    finally:
        os.close(r)
        if status is None:
            _reap_pid(pid)
    return out


def _decode(name: str, body: bytes):
    from .item import ItemResult

    ans = json.loads(body)
    status = ans["status"]
    if status == "rejected":
        return RejectedInput(name, str(ans.get("reason", "reader_error")), str(ans.get("detail", "")))
    if status == "error":
        return RejectedInput(name, "reader_error", f"{ans.get('error', 'Exception')} in the reader")
    if status != "ok":
        raise ValueError(status)
    rows = {str(t): [(str(s), p) for s, p in rs] for t, rs in ans["rows"].items()}
    return ItemResult(kind=str(ans["kind"]), rows=rows, warnings=[str(w) for w in ans.get("warnings", [])],
                      n_samples=int(ans.get("n_samples", 0)), dropped=dict(ans.get("dropped", {})),
                      t_start=ans.get("t_start"), t_end=ans.get("t_end"))


def _reap_pid(pid: int) -> int:
    while True:
        try:
            return os.waitpid(pid, 0)[1]
        except InterruptedError:
            continue
        except ChildProcessError:
            return 0


def _exit_code(status: int) -> int:
    return os.waitstatus_to_exitcode(status)



def _max_fd() -> int:
    try:
        return int(os.sysconf("SC_OPEN_MAX"))
    except (ValueError, OSError):
        return 4096


# -- persistent forked workers (what the agent uses) ---------------------------------------------
class ForkedWorker:
    """A child forked from the agent once its readers are loaded, answering one file after another.

    Forked on first use and again after it dies, so the fork and the child's
    first copy-on-write faults are paid once per agent life, not per group.
    Jobs go down one pipe (pickled by the agent, which trusts itself); answers
    come up another, in JSON only.  The child closes every other descriptor it
    inherited, arms ``alarm`` around each parse (a hung or orphaned child
    ends by itself) and leaves when its job pipe closes (the agent stopped or
    died).

    Parameters
    ----------
    policy : agent.policy.Policy
    """

    def __init__(self, policy):
        self.policy = policy
        self.pid = 0
        self.jobs_w = -1
        self.answers_r = -1
        self.forks = 0
        self.last_exit: int | None = None
        self.pipe_bytes = 1 << 16

    def _fork(self) -> None:
        jobs_r, jobs_w = os.pipe()
        ans_r, ans_w = os.pipe()
        self.pipe_bytes = min(_grow_pipe(jobs_w), _grow_pipe(ans_w))
        pid = os.fork()
        if pid == 0:
            code = 0
            try:
                os.closerange(3, min(jobs_r, ans_w))
                for fd in range(min(jobs_r, ans_w) + 1, max(jobs_r, ans_w)):
                    with contextlib.suppress(OSError):
                        os.close(fd)
                os.closerange(max(jobs_r, ans_w) + 1, _max_fd())
                _child_loop(jobs_r, ans_w, self.policy)
            except BaseException:  # noqa: BLE001 - the child must never return into the agent
                code = 70
            finally:
                os._exit(code)
        os.close(jobs_r)
        os.close(ans_w)
        self.pid, self.jobs_w, self.answers_r = pid, jobs_w, ans_r
        self.forks += 1

    def featurise(self, name: str, data: bytes, now: float | None, timeout_s: float):
        """An ItemResult, a RejectedInput or a WorkerDied for one file (never raises for the file)."""
        if not self.pid:
            self._fork()
        body = pickle.dumps((name, data, now, timeout_s))
        try:
            _write_all(self.jobs_w, _LEN.pack(len(body)) + body)
            deadline = time.monotonic() + timeout_s
            (n,) = _LEN.unpack(_read(self.answers_r, 4, deadline))
            if n > MAX_ANSWER_BYTES:
                raise EOFError
            return _decode(name, _read(self.answers_r, n, deadline))
        except TimeoutError:
            self.close(kill=True)
            return WorkerDied("reader_timeout", f"parsing took longer than {timeout_s:g} s; "
                                                f"the reader process was stopped")
        except (EOFError, OSError, ValueError, KeyError, TypeError):
            self.close(kill=True)
            return WorkerDied("reader_crashed", f"the reader process ended while parsing "
                                                f"({_how(self.last_exit)})")

    def run(self, jobs, now: float | None, timeout_s: float) -> list:
        """Answers for ``[(name, data), ...]`` in order, the next job queued while the child parses one.

        The job after the one being parsed is written ahead into the job pipe
        when both fit in it together (so a write never waits for the child
        while the child waits to send an answer), and the child starts on it
        as soon as it has answered: the child does not idle while the agent
        reads its answer and writes the next job.  Each file still has its own
        deadline, counted from the previous answer, and a child that dies or
        hangs still takes only the file it was parsing: the file written
        ahead was not begun (the child reads a job only after answering the
        one before) and is sent again to the next child.
        """
        jobs = list(jobs)
        bodies: list[bytes | None] = [None] * len(jobs)
        out: list = []
        sent = 0   # jobs written to the current child; out holds the answers read so far
        while len(out) < len(jobs):
            got = len(out)
            if not self.pid:
                self._fork()
                sent = got
            try:
                while sent < len(jobs) and (sent == got or (sent == got + 1 and self._fits(bodies, jobs, got, sent))):
                    _write_all(self.jobs_w, self._frame(bodies, jobs, sent, now, timeout_s))
                    bodies[sent] = None
                    sent += 1
                deadline = time.monotonic() + timeout_s
                (n,) = _LEN.unpack(_read(self.answers_r, 4, deadline))
                if n > MAX_ANSWER_BYTES:
                    raise EOFError
                out.append(_decode(jobs[got][0], _read(self.answers_r, n, deadline)))
            except TimeoutError:
                self.close(kill=True)
                out.append(WorkerDied("reader_timeout", f"parsing took longer than {timeout_s:g} s; "
                                                        f"the reader process was stopped"))
            except (EOFError, OSError, ValueError, KeyError, TypeError):
                self.close(kill=True)
                out.append(WorkerDied("reader_crashed", f"the reader process ended while parsing "
                                                        f"({_how(self.last_exit)})"))
        return out

    def _frame(self, bodies, jobs, i, now, timeout_s) -> bytes:
        if bodies[i] is None:
            name, data = jobs[i]
            body = pickle.dumps((name, data, now, timeout_s))
            bodies[i] = _LEN.pack(len(body)) + body
        return bodies[i]

    def _fits(self, bodies, jobs, got, ahead) -> bool:
        """Whether the job being parsed and the one ahead fit in the job pipe together."""
        size = sum(len(jobs[i][1]) + 512 for i in (got, ahead))
        return size <= self.pipe_bytes

    def close(self, kill: bool = False) -> None:
        """Stop the child (closing its job pipe ends it; ``kill`` for one that may hang) and reap it."""
        if not self.pid:
            return
        for fd in (self.jobs_w, self.answers_r):
            with contextlib.suppress(OSError):
                os.close(fd)
        if kill:
            with contextlib.suppress(OSError):
                os.kill(self.pid, signal.SIGKILL)
        self.last_exit = _exit_code(_reap_pid(self.pid))
        self.pid, self.jobs_w, self.answers_r = 0, -1, -1


def _answer(name, data, policy, now) -> dict:
    """One file's outcome as the child reports it (JSON-ready)."""
    from . import featurise

    try:
        res = featurise(name, data, policy, now=now)
        return {"status": "ok", "kind": res.kind, "rows": res.rows, "warnings": list(res.warnings),
                "n_samples": int(res.n_samples), "dropped": dict(res.dropped),
                "t_start": res.t_start, "t_end": res.t_end}
    except RejectedInput as e:
        return {"status": "rejected", "reason": e.reason, "detail": e.detail}
    except Exception as e:  # noqa: BLE001 - a reader bug is reported by its class
        return {"status": "error", "error": type(e).__name__}


def _child_loop(jobs_r: int, ans_w: int, policy) -> None:
    for sig in (signal.SIGALRM, signal.SIGTERM, signal.SIGINT):   # not the agent's handlers
        signal.signal(sig, signal.SIG_DFL)
    limits = _one_thread()   # one worker per core: BLAS/OpenMP pools in a worker only oversubscribe  # noqa: F841

    while True:
        try:
            head = _read_blocking(jobs_r, 4)
        except EOFError:
            return
        (n,) = _LEN.unpack(head)
        name, data, now, timeout_s = pickle.loads(_read_blocking(jobs_r, n))
        signal.alarm(int(timeout_s) + 2)   # a hang ends the child even if the agent is gone
        try:
            ans = _answer(name, data, policy, now)
        finally:
            signal.alarm(0)
        del data
        body = json.dumps(ans, default=_plain).encode("utf-8")
        _write_all(ans_w, _LEN.pack(len(body)) + body)


def _one_thread():
    """Limit the BLAS and OpenMP thread pools loaded in this process to one thread (threadpoolctl)."""
    try:
        from threadpoolctl import threadpool_limits

        return threadpool_limits(limits=1)
    except Exception:  # noqa: BLE001 - a missing or failing introspection must not stop a reader
        return None


def _grow_pipe(fd: int) -> int:
    """Ask for a :data:`PIPE_BYTES` pipe buffer; returns the size the pipe has."""
    import fcntl

    setsz = getattr(fcntl, "F_SETPIPE_SZ", None)
    getsz = getattr(fcntl, "F_GETPIPE_SZ", None)
    if setsz is not None:
        with contextlib.suppress(OSError):
            fcntl.fcntl(fd, setsz, PIPE_BYTES)
    if getsz is not None:
        with contextlib.suppress(OSError):
            return int(fcntl.fcntl(fd, getsz))
    return 1 << 16


def _read_blocking(fd: int, n: int) -> bytes:
    buf = bytearray()
    while len(buf) < n:
        chunk = os.read(fd, n - len(buf))
        if not chunk:
            raise EOFError
        buf += chunk
    return bytes(buf)


def _write_all(fd: int, data: bytes) -> None:
    view = memoryview(data)
    while view:
        view = view[os.write(fd, view):]


class ForkedPool:
    """One :class:`ForkedWorker` per featurising thread (taken and given back around each chunk)."""

    def __init__(self, policy, n: int):
        if int(n) < 1:
            raise ValueError(f"n must be a positive number of reader processes, got {n!r}")
        self._idle = [ForkedWorker(policy) for _ in range(int(n))]
        self._all = list(self._idle)
        self._lock = threading.Lock()

    def run(self, jobs, now: float | None, timeout_s: float) -> list:
        """Answers for ``[(name, data), ...]``, in order, from one worker."""
        with self._lock:
            w = self._idle.pop()
        try:
            return w.run(jobs, now, timeout_s)
        finally:
            with self._lock:
                self._idle.append(w)

    @property
    def forks(self) -> int:
        return sum(w.forks for w in self._all)

    def close(self) -> None:
        for w in self._all:
            w.close()
