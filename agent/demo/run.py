"""The end-to-end demo: one fictional participant, every stage, plain words at each step.

Roles are played in one work directory::

    WORKDIR/
      study/          the researcher's study directory (keys, card, enrolments, received bundles)
      home/           the participant's lethe home (inbox, vault, ledger, outbox)
      truth.json      the generator's ground truth (demo only; a real study has none)
      audit-report/   the ethics board's report
      cohort/         the researcher's merged tables and report

The simulated days end seven days before "now" so that every simulated hour is
old enough for the memory test (``quiz.min_age_days``).
"""

from __future__ import annotations

import sys
import tempfile
import time
from dataclasses import dataclass, field
from typing import Any
from pathlib import Path

DEMO_PASSPHRASE = b"harbour-days demo only"  # the researcher's study key passphrase in the demo


@dataclass
class DemoContext:
    workdir: Path
    days: int
    seed: int
    policy_path: Path
    out: Any = sys.stdout
    started: float = field(default_factory=time.monotonic)
    facts: dict = field(default_factory=dict)
    server: Any = None  # the study server (agent.study.server.run.ServerThread) while the demo runs

    @property
    def study_dir(self) -> Path:
        return self.workdir / "study"

    @property
    def home_dir(self) -> Path:
        return self.workdir / "home"

    def say(self, text: str = "") -> None:
        print(text, file=self.out, flush=True)

    def stage(self, title: str) -> None:
        self.say("")
        self.say(f"== {title}  (t+{time.monotonic() - self.started:.1f} s)")


def run_demo(workdir=None, days: int = 14, seed: int = 7, policy_path=None, out=None, serve: bool = False) -> dict:
    """Run every stage on a fresh fictional participant and return the facts printed."""
    from ..policy import bundled_policy_path

    if days < 1:
        from ..errors import UsageError

        raise UsageError(f"--days must be at least 1, got {days}")
    if workdir is None:
        workdir = Path(tempfile.mkdtemp(prefix="lethe-demo-"))
    workdir = Path(workdir).absolute()
    if workdir.exists() and any(workdir.iterdir()):
        from ..errors import UsageError

        raise UsageError(f"{workdir}: the demo work directory must be new or empty")
    workdir.mkdir(parents=True, exist_ok=True)
    ctx = DemoContext(workdir=workdir, days=days, seed=seed,
                      policy_path=Path(policy_path or bundled_policy_path("default")),
                      out=out or sys.stdout)
    ctx.say(f"lethe demo: a fictional participant, {days} simulated day(s), seed {seed}")
    ctx.say(f"work directory: {workdir}")
    try:
        for step in STEPS:
            step(ctx)
        ctx.stage("Done")
        ctx.say(f"Everything is in {workdir}")
        if serve:
            ctx.say(f"Researcher's dashboard: {ctx.facts['dashboard']} "
                    f"(password {ctx.facts['dashboard_password']})")
            ctx.say("The study server keeps running for the dashboard; press Ctrl-C to stop it.")
            try:
                while True:
                    time.sleep(3600)
            except KeyboardInterrupt:
                pass
        else:
            ctx.say(f"The demo's study server stops now that the demo is done, so its dashboard "
                    f"({ctx.facts['dashboard']}) goes with it; 'lethe demo --serve' keeps the server and its "
                    f"dashboard up until Ctrl-C.")
    finally:
        if getattr(ctx, "server", None) is not None:
            ctx.server.stop()
    ctx.facts["workdir"] = str(workdir)
    ctx.facts["seconds"] = round(time.monotonic() - ctx.started, 1)
    return ctx.facts


# ----------------------------------------------------------------------------- stages
def researcher_setup(ctx: DemoContext) -> None:
    from ..policy import load_policy
    from ..study.card import write_card
    from ..study.keys import study_keygen

    import secrets

    from ..study.server.app import ServerSettings
    from ..study.server.run import ServerThread

    ctx.stage("Researcher: study keys, study server and study card")
    policy = load_policy(ctx.policy_path)
    study_keygen(ctx.study_dir, policy.study.study_id, DEMO_PASSPHRASE)
    # The study server on loopback only, with a self-signed certificate whose pin goes on the card.
    password = secrets.token_urlsafe(12)
    server = ServerThread(ctx.study_dir, DEMO_PASSPHRASE, ServerSettings(password))  # certificate and port
    card = write_card(ctx.study_dir, [ctx.policy_path], contact=policy.study.contact,
                      out=ctx.workdir / "harbour-days.card.json", server_url=server.url, server_pin=server.pin)
    ctx.server = server.start()
    ctx.facts.update(server_url=server.url, dashboard=f"{server.url}/dashboard", dashboard_password=password,
                     server_pin=server.pin)
    ctx.facts["card"] = str(card)
    assert server.ctx is not None  # set once the server thread is constructed
    ctx.facts["invitation"] = server.ctx.store.invite(1, "demo participant")[0]
    ctx.say(f"Created the study key pair (HPKE, X25519) in {ctx.study_dir / 'keys'}, started the study server at "
            f"{server.url} (self-signed certificate, SHA-256 pin {server.pin[:16]}...), and wrote the study card "
            f"{card.name}, approving policy {policy.policy.name} ({policy.fingerprint[:16]}...) and naming the "
            f"server and its pin. One invitation code issued: {ctx.facts['invitation']}.")


def participant_enrols(ctx: DemoContext) -> None:
    from ..participant.enrol import enrol
    from ..policy import load_policy
    from ..study.registry import enroll

    ctx.stage("Participant: enrolment and consent")
    policy = load_policy(ctx.policy_path)
    start = _study_start(ctx)
    from ..study.card import load_card

    # The demo's researcher published the key fingerprint it just made; the
    # participant confirms it (the shipped policy leaves the key unpinned).
    published = load_card(ctx.facts["card"]).key_fingerprint
    # The demo's home is a throw-away directory of fictional data: plain key
    # files by this explicit choice, so no entries are left in the OS keyring
    # after the directory is deleted (a real enrolment uses the keyring).
    storage = "plain"
    res = enrol(ctx.home_dir, ctx.facts["card"], ctx.policy_path, consent=policy.study.study_id,
                now=start, enrolment_out=ctx.workdir / "enrolment.json", confirm_fingerprint=published,
                key_storage=storage)
    enroll(ctx.study_dir, ctx.workdir / "enrolment.json")
    from ..uploader import Uploader

    up = Uploader(Path(ctx.home_dir))
    up.enqueue_enrolment(ctx.facts["invitation"], ctx.workdir / "enrolment.json")
    sent = up.run_once()
    ctx.say(f"The agent sent the enrolment with the invitation code to the study server "
            f"({'acknowledged' if sent['sent'] else 'not acknowledged: ' + str(sent['error'])}).")
    ctx.facts["pseudonym"] = res["pseudonym"]
    ctx.say(f"The participant read the consent text, confirmed study id {policy.study.study_id}, "
            f"compared the study key fingerprint {published[:16]}... with the published one, "
            f"and got pseudonym {res['pseudonym']} (keys: plain files, the demo's explicit choice for a throw-away "
            f"home; a real enrolment keeps them in the OS keyring). The researcher registered the device "
            f"(key {res['device_key_id']}).")


def collect_days(ctx: DemoContext) -> None:
    from ..demo.generator import Scenario, simulate_days, write_day, write_truth
    from ..home import Home
    from ..intake.pipeline import drain
    from ..intake.report import intake_counts

    home = Home(ctx.home_dir)
    policy = home.load_policy()
    ctx.stage(f"Recorder and agent: {ctx.days} day(s) of raw drops, featurised and destroyed")
    scenario = Scenario.load()
    timeline = simulate_days(scenario, _study_start(ctx), ctx.days, ctx.seed)
    write_truth(timeline, ctx.workdir / "truth.json")
    totals: dict = {}
    reasons: dict = {}
    for day in range(ctx.days):
        write_day(timeline, day, home.inbox, policy, ctx.seed)
        rep = drain(home, policy)
        for stage in ("received", "featurised", "rejected", "destroyed"):
            for kind, n in getattr(rep, stage).items():
                totals[f"{kind}.{stage}"] = totals.get(f"{kind}.{stage}", 0) + n
        for why, n in rep.reasons.items():
            reasons[why] = reasons.get(why, 0) + n
    left = [p.name for p in home.inbox.iterdir()]
    ctx.facts["intake"] = totals
    ctx.say("Per kind, received / featurised / rejected / destroyed:")
    for kind in ("audio", "gps", "accel", "mood"):
        ctx.say(f"  {kind:6s} {totals.get(f'{kind}.received', 0):5d} / {totals.get(f'{kind}.featurised', 0):5d}"
                f" / {totals.get(f'{kind}.rejected', 0):3d} / {totals.get(f'{kind}.destroyed', 0):5d}")
    if reasons:
        ctx.say("Rejected, by reason: " + ", ".join(f"{r} {n}" for r, n in sorted(reasons.items())))
    exp = intake_counts(home, policy)["exposure"]
    if exp.get("n"):
        ctx.say(f"Raw exposure (file complete to destroyed): median {exp['median_s']:.2f} s, "
                f"p95 {exp['p95_s']:.2f} s, max {exp['max_s']:.2f} s; the policy allows "
                f"{policy.retention.raw_seconds:g} s.")
    ctx.say(f"Files left in the inbox: {len(left)}.")


def code_and_graph(ctx: DemoContext) -> None:
    from ..codebook import run_codebook
    from ..episodes import build_episodes
    from ..graph import CooccurrenceGraph
    from ..home import Home
    from ..spectrum import spectrum_report
    from ..vault import Vault

    home = Home(ctx.home_dir)
    policy = home.load_policy()
    ctx.stage("Agent: codebook, hourly episodes and the degree-capped graph")
    with Vault.open(home) as vault:
        cb = run_codebook(home, policy, vault, now=_now(ctx))
        episodes = build_episodes(home, policy, vault, now=_now(ctx))
        g = CooccurrenceGraph.from_episodes(episodes, policy)
        spec = spectrum_report(g)
    ctx.facts["codebook"] = {"places": cb.n_places, "sounds": cb.n_sounds, "motions": cb.n_motions}
    ctx.facts["episodes"] = len(episodes)
    ctx.facts["edges"] = int(g.capped.nnz // 2)
    ctx.say(f"Found {cb.n_places} places, {cb.n_sounds} sound classes and {cb.n_motions} motion classes; "
            f"the features they came from are gone, only the codes remain.")
    ctx.say(f"Built {len(episodes)} hourly episodes and a graph of {len(g.nodes)} nodes and "
            f"{ctx.facts['edges']} edges (no node above the cap of {policy.graph.degree_cap}).")
    ctx.say("Leading-eigenvalue ratio λ1/λ2: " + ", ".join(
        f"{name} {spec[name]['ratio']:.2f}" for name in ("counts", "binary", "capped")))
    _accuracy_against_truth(ctx, home)


def _accuracy_against_truth(ctx, home) -> None:
    """Demo only: compare the device's places with the generator's ground truth."""
    try:
        from sklearn.metrics import adjusted_rand_score

        from ..demo.generator import load_truth
        from ..vault import Vault
    except ImportError:
        return
    truth = load_truth(ctx.workdir / "truth.json")
    with Vault.open(home) as vault:
        eps = [e for _, e in vault.items("episodes") if e.get("place")]
    pairs = [(e["place"], truth.place_at(e["utc"] + 1800)) for e in eps]
    pairs = [(a, b) for a, b in pairs if b is not None]
    if pairs:
        ari = adjusted_rand_score([b for _, b in pairs], [a for a, _ in pairs])
        ctx.facts["place_ari"] = round(float(ari), 3)
        ctx.say(f"(Demo check against the generator's ground truth: place ARI {ari:.2f} over "
                f"{len(pairs)} hours.)")


def participant_names_places(ctx: DemoContext) -> None:
    from ..demo.answers import simulate_place_names
    from ..demo.generator import load_truth
    from ..home import Home
    from ..places import set_name
    from ..vault import Vault

    home = Home(ctx.home_dir)
    ctx.stage("Participant: naming places in their own words")
    truth = load_truth(ctx.workdir / "truth.json")
    with Vault.open(home) as vault:
        episodes = [e for _, e in vault.items("episodes")]
        names = simulate_place_names(episodes, truth)
        for pid, name in sorted(names.items()):
            set_name(vault, pid, name)
    ctx.say("Named " + ", ".join(f"{pid} '{n}'" for pid, n in sorted(names.items())) +
            ". Names stay encrypted on the laptop.")


def participant_quiz(ctx: DemoContext) -> None:
    from ..demo.answers import simulate_answers
    from ..demo.generator import load_truth
    from ..home import Home
    from ..quiz import issue_trials, record_answer, score, score_text
    from ..vault import Vault

    home = Home(ctx.home_dir)
    policy = home.load_policy()
    ctx.stage("Participant: the memory test (answers simulated)")
    from ..errors import StateError

    truth = load_truth(ctx.workdir / "truth.json")
    with Vault.open(home) as vault:
        trials = []
        while True:
            try:
                batch = issue_trials(vault, policy, now=_now(ctx), n=60)
            except StateError as e:
                ctx.say(f"No memory test yet: {e}. (Try more --days.)")
                ctx.facts["quiz"] = None
                return
            trials += batch
            if len(batch) < 60 or len(trials) >= 240:
                break
        episodes = [e for _, e in vault.items("episodes")]
        answers = simulate_answers(trials, episodes, truth, ctx.seed)
        by_id = {t["trial_id"]: t for t in trials}
        with vault.transaction():
            for a in answers:
                record_answer(vault, by_id[a["trial_id"]], a["choice"], a["rt_s"], "simulated", now=_now(ctx))
        s = score(vault, policy)
    ctx.facts["quiz"] = s
    ctx.say(f"Issued {len(trials)} trials from hours {policy.quiz.min_age_days:g}-"
            f"{policy.quiz.max_age_days:g} days old; the simulated participant answered {s['answered']}.")
    ctx.say(score_text(s))


def fit_model(ctx: DemoContext) -> None:
    from ..home import Home
    from ..errors import StateError
    from ..model import fit_from_home

    home = Home(ctx.home_dir)
    policy = home.load_policy()
    ctx.stage("Agent: fitting the memory model on the device")
    if not (ctx.facts.get("quiz") or {}).get("answered"):
        ctx.say("Skipped: there are no memory-test answers to fit yet.")
        return
    try:
        fit = fit_from_home(home, policy, seed=ctx.seed)
    except StateError as err:  # too few answers on a short demo: say so and go on
        ctx.say(f"Skipped: {err}")
        return
    ctx.facts["fit"] = fit.summary() if hasattr(fit, "summary") else None
    ctx.say(fit.table())


def export_bundle_step(ctx: DemoContext) -> None:
    from ..export import export_bundle
    from ..home import Home

    home = Home(ctx.home_dir)
    policy = home.load_policy()
    ctx.stage("Participant: previewing and sending the export")
    shown = {}

    def confirm(preview_text: str) -> bool:
        shown["text"] = preview_text
        return True

    path = export_bundle(home, policy, now=_now(ctx), confirm=confirm)
    assert path is not None  # confirm() above always says yes
    ctx.facts["bundle"] = str(path)
    ctx.say(shown.get("text", "").rstrip())
    ctx.say(f"The participant confirmed; sealed and signed bundle: {path.name} ({path.stat().st_size} bytes), "
            f"prepared in the outbox.")
    from ..uploader import Uploader, queue_status

    up = Uploader(home)
    up.enqueue_outbox()
    up.run_once()
    st = queue_status(home)
    ctx.facts["uploaded"] = [s["name"] for s in st["sent"] if s["kind"] == "bundle"]
    ctx.say(f"The agent uploaded it over pinned HTTPS: {len(ctx.facts['uploaded'])} bundle(s) sent "
            f"(acknowledged by the study server), {len(st['prepared'])} still prepared and waiting.")


def researcher_opens(ctx: DemoContext) -> None:
    from ..study.merge import merge
    from ..study.open import open_bundles
    from ..study.report import report

    ctx.stage("Researcher: opening, merging and reporting")
    results = open_bundles(ctx.study_dir, [Path(ctx.facts["bundle"])], DEMO_PASSPHRASE)
    for r in results:
        ctx.say(f"Opened {Path(r.path).name}: signature, seal, schema and policy verified "
                f"(participant {r.pseudonym}, bundle #{r.seq}).")
    merged = merge(ctx.study_dir, ctx.workdir / "cohort")
    rep = report(ctx.study_dir, ctx.workdir / "cohort" / "report")
    tables = sorted({Path(p).stem for p in merged.values()})
    ctx.say(f"Cohort tables ({', '.join(tables)}) in {ctx.workdir / 'cohort'}; report at {rep}.")
    counts = ctx.server.ctx.store.counts()
    ctx.facts["server_counts"] = counts
    seen = _dashboard_check(ctx)
    ctx.say(f"The study server holds {counts['enrolled']} enrolled participant(s) and {counts['bundles']} "
            f"bundle(s), verified on arrival exactly as 'lethe study open' verifies. The researcher's dashboard "
            f"{'shows the cohort' if seen else 'could not be read'}: {ctx.facts['dashboard']} "
            f"(password {ctx.facts['dashboard_password']}; the server stops when the demo ends unless it was "
            f"started with --serve).")


def _dashboard_check(ctx) -> bool:
    """Log in to the dashboard as the researcher would and check it lists the cohort."""
    import httpx

    from ..uploader import pinned_context

    verify = pinned_context(ctx.facts["server_url"], ctx.facts["server_pin"])
    with httpx.Client(base_url=ctx.facts["server_url"], verify=verify, timeout=60) as c:
        r = c.post("/login", content=f"password={ctx.facts['dashboard_password']}".encode(),
                   headers={"Content-Type": "application/x-www-form-urlencoded"})
        if r.status_code != 303:
            return False
        page = c.get("/dashboard").text
    ok = 'id="n-enrolled">1<' in page and 'id="n-bundles">1<' in page
    ctx.facts["dashboard_ok"] = ok
    return ok


def ethics_board_audits(ctx: DemoContext) -> None:
    from ..audit.report import write_report
    from ..audit.verify import verify_home
    from ..home import Home

    home = Home(ctx.home_dir)
    policy = home.load_policy()
    ctx.stage("Ethics board: ledger verification and retention report")
    result = verify_home(home, policy=policy)
    ctx.facts["audit_ok"] = bool(result.ok)
    ctx.say(result.text().rstrip())
    path = write_report(home, ctx.workdir / "audit-report", policy=policy)
    ctx.facts["audit_report"] = str(path)
    ctx.say(f"Report for the board (open it in a browser, no network needed): {path}")


def participant_status(ctx: DemoContext) -> None:
    from ..home import Home
    from ..participant.status import collect_status, status_text

    ctx.stage("Participant: status at the end")
    st = collect_status(Home(ctx.home_dir), now=_now(ctx))
    ctx.say(status_text(st))


STEPS = (researcher_setup, participant_enrols, collect_days, code_and_graph,
         participant_names_places, participant_quiz, fit_model, export_bundle_step,
         researcher_opens, ethics_board_audits, participant_status)


# ----------------------------------------------------------------------------- time
def _study_start(ctx) -> float:
    """UTC midnight ``days + 7`` days ago: the simulated days end a week before now."""
    if "study_start" not in ctx.facts:
        day = 86400
        today = (int(time.time()) // day) * day
        ctx.facts["study_start"] = float(today - (ctx.days + 7) * day)
    return ctx.facts["study_start"]


def _now(ctx) -> float:
    return time.time()
