"""The participant's page as a Starlette app (routes, the request guard, the export dialogue).

Every request passes :class:`Guard` (Host, origin, session); every POST goes
through :func:`_post`, which checks the CSRF token before the handler runs.
Handlers only call library functions and render templates (jinja2 with
autoescape on).
"""

from __future__ import annotations

import threading
import time
from dataclasses import dataclass
from pathlib import Path

from starlette.applications import Starlette
from starlette.background import BackgroundTask
from starlette.concurrency import run_in_threadpool
from starlette.requests import Request
from starlette.responses import HTMLResponse, PlainTextResponse, RedirectResponse, Response
from starlette.routing import Mount, Route
from starlette.staticfiles import StaticFiles
from starlette.templating import Jinja2Templates

from ...errors import LetheError
from ...home import Home
from . import auth, views
import contextlib

HERE = Path(__file__).resolve().parent
PAGES = (("/", "Today"), ("/places", "My places"), ("/test", "Memory test"), ("/feel", "How I feel"),
         ("/leaves", "What leaves"), ("/pause", "Pause or withdraw"))


@dataclass
class PageState:
    """What one serving process remembers: its port, the sessions, the export in progress, a withdrawal."""

    port: int
    sessions: auth.Sessions
    cookie_name: str
    export: ExportDialogue | None = None
    withdrawn: dict | None = None


class Guard:
    """ASGI middleware: wrong Host -> 400; another site, or no session -> 403; headers on every answer."""

    def __init__(self, app, state):
        self.app = app
        self.state = state

    async def __call__(self, scope, receive, send):
        if scope["type"] != "http":
            return await self.app(scope, receive, send)
        headers = {k.decode("latin-1").lower(): v.decode("latin-1") for k, v in scope.get("headers", [])}
        port = self.state.port
        refusal = None
        if not auth.host_allowed(headers.get("host"), port):
            refusal = (400, "This page answers only at its own local address. Open it with 'lethe open'.")
        elif not auth.origin_allowed(headers, port):
            refusal = (403, "Refused: the request came from another web site.")
        elif scope["path"] != "/login":
            sid = _cookie(headers.get("cookie", ""), self.state.cookie_name)
            session = self.state.sessions.get(sid)
            if session is None:
                refusal = (403, "This page opens only with a fresh link. Run 'lethe open' in a terminal.")
            else:
                scope.setdefault("state", {})["session"] = session

        async def send_with_headers(message):
            if message["type"] == "http.response.start":
                raw = [(k, v) for k, v in message.get("headers", []) if k.lower() not in
                       {h.encode() for h in auth.SECURITY_HEADERS}]
                raw += [(k.encode(), v.encode()) for k, v in auth.SECURITY_HEADERS.items()]
                message = {**message, "headers": raw}
            await send(message)

        if refusal is not None:
            resp = PlainTextResponse(refusal[1], status_code=refusal[0])
            return await resp(scope, receive, send_with_headers)
        return await self.app(scope, receive, send_with_headers)


def _cookie(header: str, name: str) -> str | None:
    for part in header.split(";"):
        k, _, v = part.strip().partition("=")
        if k == name:
            return v
    return None


class ExportDialogue:
    """One export at a time: the preview shown is the one the sealing step asks about.

    With ``export.confirm_each`` the export runs in a thread whose confirm callback
    waits for the participant's answer, so the words on the page describe exactly
    what would be sealed (noise included).  Without it, the preview is built
    separately and confirming runs the export.
    """

    def __init__(self, home: Home, policy):
        self.home, self.policy = home, policy
        self.preview: str | None = None
        self.result: Path | None = None
        self.error: str | None = None
        self._ready = threading.Event()
        self._decided = threading.Event()
        self._done = threading.Event()
        self._yes = False
        self._thread: threading.Thread | None = None

    def start(self, timeout_s: float = 120.0) -> None:
        if self.policy.export.confirm_each:
            self._thread = threading.Thread(target=self._run, name="lethe-export", daemon=True)
            self._thread.start()
            self._ready.wait(timeout_s)
        else:
            from ...export import build_payload, preview
            from ...vault import Vault

            try:
                with Vault.open(self.home) as v:
                    self.preview = preview(build_payload(self.home, self.policy, v))
            except LetheError as e:
                self.error = str(e)

    def _run(self) -> None:
        from ...export import export_bundle

        try:
            self.result = export_bundle(self.home, self.policy, confirm=self._confirm)
        except LetheError as e:
            self.error = str(e)
        finally:
            self._ready.set()
            self._done.set()

    def _confirm(self, text: str) -> bool:
        self.preview = text
        self._ready.set()
        self._decided.wait(900.0)  # no answer within 15 minutes counts as declined
        return self._yes

    def decide(self, yes: bool, timeout_s: float = 120.0):
        if self._thread is None:
            if yes and self.error is None:
                from ...export import export_bundle

                try:
                    self.result = export_bundle(self.home, self.policy)
                except LetheError as e:
                    self.error = str(e)
            return self.result
        self._yes = bool(yes)
        self._decided.set()
        self._done.wait(timeout_s)
        return self.result


def build_app(home, port: int, *, in_agent: bool = False, stop_agent=None, on_withdrawn=None) -> Guard:
    """The page for ``home`` served on ``127.0.0.1:port`` (the Starlette app inside its :class:`Guard`).

    Parameters
    ----------
    home : Home or path-like
    port : int
        The port the server is bound to (the Host check needs it).
    in_agent : bool
        Served by the running agent (it takes mood answers in itself); otherwise
        the page drains the inbox once after writing an answer.
    stop_agent : callable, optional
        Stops the agent's intake and returns once its lock is released (withdrawal).
    on_withdrawn : callable, optional
        Called after the withdrawal page was sent (the server then stops).
    """
    home = home if isinstance(home, Home) else Home(home)
    import jinja2

    env = jinja2.Environment(loader=jinja2.FileSystemLoader(str(HERE / "templates")), autoescape=True)
    templates = Jinja2Templates(env=env)
    templates.env.globals["pages"] = PAGES

    st = PageState(port=int(port), sessions=auth.Sessions(), cookie_name=f"{auth.COOKIE}_{int(port)}")

    def render(request: Request, name: str, **ctx) -> HTMLResponse:
        session = request.scope["state"]["session"]
        if st.withdrawn is not None:
            name, ctx = "withdrawn.html", {"res": st.withdrawn, "title": "Withdrawn"}
        ctx.setdefault("message", request.query_params.get("m"))
        return templates.TemplateResponse(request, name, {"csrf": session.csrf, "path": request.url.path, **ctx})

    def back(path: str, message: str | None = None) -> RedirectResponse:
        from urllib.parse import quote

        return RedirectResponse(path + (f"?m={quote(message)}" if message else ""), status_code=303)

    def _post(handler):
        async def endpoint(request: Request):
            session = request.scope["state"]["session"]
            form = await request.form()
            if st.withdrawn is not None:
                return render(request, "withdrawn.html")
            sent = form.get("csrf")
            if not auth.csrf_ok(session, sent if isinstance(sent, str) else None):
                return PlainTextResponse("Refused: this form is out of date. Reload the page and try again.",
                                         status_code=403)
            try:
                return await handler(request, form)
            except LetheError as e:
                return back(request.url.path if request.url.path in dict(PAGES) else "/", f"Not done: {e}")
        return endpoint

    # -------------------------------------------------------------- login
    async def login(request: Request):
        token = request.query_params.get("t", "")
        if not await run_in_threadpool(auth.consume_login, home, token):
            return PlainTextResponse("This link has expired or was already used. Run 'lethe open' for a "
                                     "fresh one.", status_code=403)
        session = st.sessions.new()
        target = request.query_params.get("next", "/")
        resp = RedirectResponse(target if target in dict(PAGES) else "/", status_code=303)
        resp.set_cookie(st.cookie_name, session.sid, httponly=True, samesite="strict", path="/",
                        max_age=int(auth.SESSION_TTL_S))
        return resp

    # -------------------------------------------------------------- today
    async def today(request: Request):
        data = await run_in_threadpool(views.today, home)
        return render(request, "today.html", d=data, title="Today")

    # -------------------------------------------------------------- places
    def _places():
        from ...vault import Vault

        with Vault.open(home) as v:
            return views.places(v)

    async def places_page(request: Request):
        rows = await run_in_threadpool(_places)
        return render(request, "places.html", rows=rows, title="My places")

    async def places_post(request: Request, form):
        from ... import places as pl
        from ...vault import Vault

        pid, action = str(form.get("place", "")), str(form.get("action", ""))

        def work():
            with Vault.open(home) as v:
                if action == "name":
                    pl.set_name(v, pid, str(form.get("name", "")))
                    return "Name saved."
                if action == "merge":
                    into = str(form.get("into", ""))
                    if into:
                        pl.merge(v, pid, into)
                        return "Saved: the two are now one place."
                    pl.unmerge(v, pid)
                    return "Saved: kept as a place of its own."
                if action == "exclude":
                    pl.set_excluded(v, pid, True)
                    return "Saved: this place will not be asked about."
                if action == "include":
                    pl.set_excluded(v, pid, False)
                    return "Saved: this place may be asked about again."
            return "Nothing changed."
        msg = await run_in_threadpool(work)
        return back("/places", msg)

    # -------------------------------------------------------------- memory test
    def _test_state():
        from ... import quiz
        from ...vault import Vault

        with Vault.open(home) as v:
            rows = {r["id"]: r for r in views.places(v)}
            trials = [t for _, t in v.items("trials")]
            pending = quiz.pending_trials(v)
            s = quiz.score(v, home.load_policy())
        total = len(trials)
        trial = pending[0] if pending else None
        options = [(pid, views.option_label(pid, rows)) for pid in trial["options"]] if trial else []
        return {"trial": trial, "options": options, "done": total - len(pending), "total": total,
                "pending": len(pending), "score": s}

    async def test_page(request: Request):
        data = await run_in_threadpool(_test_state)
        if data["trial"]:
            request.scope["state"]["session"].shown[data["trial"]["trial_id"]] = time.monotonic()
        return render(request, "test.html", t=data, title="Memory test")

    async def test_start(request: Request, form):
        from ... import quiz
        from ...vault import Vault

        def work():
            with Vault.open(home) as v:
                return len(quiz.issue_trials(v, home.load_policy()))
        n = await run_in_threadpool(work)
        return back("/test", f"{n} new question(s) are ready." if n else
                    "No hours are ready to ask about yet. Please come back in a few days.")

    async def test_answer(request: Request, form):
        from ... import quiz
        from ...errors import DataError
        from ...vault import Vault

        tid, choice = str(form.get("trial", "")), form.get("choice")
        if choice is None:
            return back("/test", "Please choose an answer, or 'Not sure'.")
        shown = request.scope["state"]["session"].shown.pop(tid, None)
        rt = (time.monotonic() - shown) if shown is not None else float("nan")

        def work():
            with Vault.open(home) as v:
                trial = v.get("trials", tid)
                if trial is None:
                    raise DataError(f"no question {tid!r} on this device")
                quiz.record_answer(v, trial, None if choice == "not-sure" else str(choice), rt, "page")
        await run_in_threadpool(work)
        return back("/test")

    # -------------------------------------------------------------- how I feel
    def _feel_state():
        from ..prompts import PromptBook

        policy = home.load_policy()
        book = PromptBook(home, policy)
        zone = home.timezone()
        op = book.open_prompt()
        upcoming = book.next_prompt()
        s = policy.schedule
        return {"open": op, "open_at": views.local_text(op.t, zone) if op else None,
                "open_until": views.local_text(op.expires, zone, with_date=False) if op else None,
                "counts": book.counts(), "next": views.local_text(upcoming.t, zone) if upcoming else "-",
                "emotions": list(s.emotions), "scale": list(range(s.mood_scale_min, s.mood_scale_max + 1)),
                "fate": views.answer_fate(home, book.last_answer()), "waking": book.waking()}

    async def feel_page(request: Request):
        data = await run_in_threadpool(_feel_state)
        return render(request, "feel.html", f=data, title="How I feel")

    async def feel_post(request: Request, form):
        from ...errors import DataError
        from ..prompts import PromptBook

        policy = home.load_policy()
        ratings = {}
        for e in policy.schedule.emotions:
            raw = form.get(f"r_{e}")
            if raw is None or not str(raw).isdigit():
                raise DataError(f"please rate every feeling; '{e}' has no answer")
            ratings[e] = int(raw)

        def work():
            book = PromptBook(home, policy)
            op = book.open_prompt()
            base = views.mood_counts(home)
            name = views.write_mood_answer(home, policy, ratings)
            if op:
                book.mark_answered(op.prompt_id)
            book.note_answer_file(name, base)
            return name
        await run_in_threadpool(work)
        task = None if in_agent else BackgroundTask(_drain_once, home)
        resp = back("/feel", "Thank you for your answer.")
        resp.background = task
        return resp

    async def waking_post(request: Request, form):
        from ..prompts import PromptBook

        res = await run_in_threadpool(lambda: PromptBook(home).set_waking(str(form.get("start", "")),
                                                                           str(form.get("end", ""))))
        return back("/feel", f"Saved: from {res['from']} questions come between {res['start']} and {res['end']}.")

    # -------------------------------------------------------------- what leaves
    async def leaves_page(request: Request):
        ex = st.export
        ob = await run_in_threadpool(views.outbox, home)
        return render(request, "leaves.html", ex=ex, ob=ob, rows=ob["rows"], title="What leaves")

    async def leaves_prepare(request: Request, form):
        if st.export is not None and st.export.preview and st.export.result is None and not st.export._done.is_set():
            return back("/leaves")
        st.export = ExportDialogue(home, home.load_policy())
        await run_in_threadpool(st.export.start)
        return back("/leaves")

    async def leaves_decide(request: Request, form):
        ex = st.export
        if ex is None:
            return back("/leaves", "There is nothing to confirm. Prepare a preview first.")
        yes = form.get("decision") == "confirm"
        result = await run_in_threadpool(ex.decide, yes)
        st.export = None
        if ex.error:
            return back("/leaves", f"Not prepared: {ex.error}")
        if yes and result is not None:
            from ...uploader import Uploader

            queued = await run_in_threadpool(lambda: Uploader(home).enqueue_outbox())
            return back("/leaves", f"Prepared {Path(result).name}: sealed for the study and signed. It is in "
                                   f"the outbox and has not been sent yet"
                                   + (" (it waits for 'Send now' or the next upload)." if queued else "."))
        return back("/leaves", "Declined. Nothing was prepared and nothing leaves.")

    async def leaves_send(request: Request, form):
        from ...uploader import Uploader

        def work():
            up = Uploader(home)
            up.enqueue_outbox()
            return up.run_once()
        res = await run_in_threadpool(work)
        msg = f"Tried to send: {res['sent']} sent, {max(res['waiting'] - res['sent'], 0)} still waiting."
        return back("/leaves", msg + (f" Problem: {res['error']}" if res.get("error") else ""))

    # -------------------------------------------------------------- pause / withdraw
    def _pause_state():
        from ...pause import is_paused, read_pause

        p = read_pause(home)
        paused = is_paused(home)
        zone = home.timezone()
        return {"paused": paused,
                "until": views.local_text(p.get("until"), zone) if paused and p.get("until") else None,
                "durations": views.DURATIONS, "study_id": home.read_config().get("study_id"),
                "counts": views.withdraw_counts(home)}

    async def pause_page(request: Request):
        data = await run_in_threadpool(_pause_state)
        return render(request, "pause.html", p=data, title="Pause or withdraw")

    def _ledger():
        from ...keystore import Keystore
        from ...ledger import Ledger

        return Ledger(home, signing_key=Keystore(home).device_key())

    async def pause_post(request: Request, form):
        from ...errors import DataError
        from ...pause import set_paused

        key = str(form.get("duration", ""))
        choice = {k: s for k, _, s in views.DURATIONS}
        if key not in choice:
            raise DataError(f"pause length {key!r}: choose one of the offered lengths")
        secs = choice[key]
        await run_in_threadpool(lambda: set_paused(home, until=time.time() + secs if secs else None,
                                                   ledger=_ledger()))
        return back("/pause", "Paused. Files that arrive are destroyed without being read.")

    async def resume_post(request: Request, form):
        from ...pause import clear_pause

        await run_in_threadpool(lambda: clear_pause(home, ledger=_ledger()))
        return back("/pause", "Resumed. Files that arrive are taken in again.")

    async def withdraw_post(request: Request, form):
        typed = str(form.get("confirm", "")).strip()
        study = home.read_config().get("study_id")
        if typed != study:
            return back("/pause", f"Not withdrawn: to withdraw, type the study name exactly as shown "
                                  f"({study}).")

        def work():
            from ..withdraw import withdraw

            if stop_agent is not None:
                stop_agent()
            return withdraw(home)
        res = await run_in_threadpool(work)
        st.withdrawn = res
        resp = render(request, "withdrawn.html", res=res, title="Withdrawn")
        if on_withdrawn is not None:
            resp.background = BackgroundTask(on_withdrawn)
        return resp

    async def favicon(request: Request):
        return Response(status_code=204)

    def _get(handler):
        async def endpoint(request: Request):
            if st.withdrawn is not None:
                return render(request, "withdrawn.html")
            return await handler(request)
        return endpoint

    routes = [
        Route("/login", login),
        Route("/", _get(today)),
        Route("/places", _get(places_page)),
        Route("/places", _post(places_post), methods=["POST"]),
        Route("/test", _get(test_page)),
        Route("/test/start", _post(test_start), methods=["POST"]),
        Route("/test/answer", _post(test_answer), methods=["POST"]),
        Route("/feel", _get(feel_page)),
        Route("/feel", _post(feel_post), methods=["POST"]),
        Route("/feel/waking", _post(waking_post), methods=["POST"]),
        Route("/leaves", _get(leaves_page)),
        Route("/leaves/prepare", _post(leaves_prepare), methods=["POST"]),
        Route("/leaves/decide", _post(leaves_decide), methods=["POST"]),
        Route("/leaves/send", _post(leaves_send), methods=["POST"]),
        Route("/pause", _get(pause_page)),
        Route("/pause", _post(pause_post), methods=["POST"]),
        Route("/resume", _post(resume_post), methods=["POST"]),
        Route("/withdraw", _post(withdraw_post), methods=["POST"]),
        Route("/favicon.ico", favicon),
        Mount("/static", StaticFiles(directory=str(HERE / "static")), name="static"),
    ]
    app = Starlette(routes=routes)
    app.state.page = st
    return Guard(app, st)


def _drain_once(home: Home) -> None:
    """Served without the agent: take the answer in now (skipped if an agent took the home meanwhile)."""
    from ...errors import StateError
    from ...intake.watcher import run_agent

    with contextlib.suppress(StateError):
        run_agent(home, home.load_policy(), once=True, warm=False)
