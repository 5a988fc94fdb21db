"""``lethe audit verify``: the board's reading of :func:`agent.ledger.verify_ledger`.

The checks themselves (chain, signatures, anchor, retention) live in
:mod:`agent.ledger`; this module decides the exit code and words the findings
for a board member.  Only ``HOME/keys/device.pub`` is read, so a copy of a home
verifies without the participant's passphrase.

Exit codes (``agent.errors``): 4 (``EXIT_INTEGRITY``) when any integrity check
fails (chain, hash, signature, anchor, sequence, truncation, missing ledger or
key); otherwise 1 (``EXIT_FAILURE``) when an item was destroyed late or not at
all within the limit, or the home's policy is not the one the agent last
recorded; otherwise 0.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import TYPE_CHECKING

from ..errors import EXIT_FAILURE, EXIT_INTEGRITY, EXIT_OK, LetheError, PolicyError
from ..home import Home

if TYPE_CHECKING:
    from ..ledger.verify import LedgerReport

KIND_ORDER = ("audio", "gps", "accel", "mood", "unknown")

# Integrity checks as a board member reads them, with the ledger's check names.
CHECKS = (
    ("ledger present", ("missing",)),
    ("entry format", ("json", "schema")),
    ("hash chain", ("chain",)),
    ("entry hashes", ("hash",)),
    ("signatures (device key)", ("signature", "key")),
    ("sequence: nothing missing, nothing reordered", ("seq", "order")),
    ("rollback anchor", ("anchor",)),
    ("no truncation", ("truncation",)),
    ("checkpoint of running counts", ("checkpoint",)),
    ("log origin (from the enrolment)", ("origin",)),
)

# What a device-signed ledger can and cannot show, in plain words (docs/ledger.md).
PROVES = (
    "What this check can show: the ledger was written by the holder of the device key named above, "
    "entries were not edited, removed or reordered after they were signed (up to the anchor and the last "
    "checkpoint), and the destruction times it records are within the policy's limit.",
    "What it cannot show: that the device recorded every file that arrived, that its clock was right, "
    "or that the device itself (or whoever controls it and its key) did not write a false but "
    "well-formed ledger. A ledger started again from scratch is caught by comparing its origin and "
    "Merkle root with the enrolment and the bundles the study received (--enrolment here, "
    "'lethe study open' there), not by the device's own files.",
)


def approx_duration(s: float) -> str:
    """``42.0 s``, ``about 14 minutes``, ``about 5.2 hours``, ``about 4.6 days``."""
    if s < 120:
        return f"{s:.1f} s"
    if s < 7200:
        return f"about {s / 60:.0f} minutes"
    if s < 172800:
        return f"about {s / 3600:.1f} hours"
    return f"about {s / 86400:.1f} days"


def violation_words(v: dict) -> str:
    """One retention violation in plain words, with long durations in hours or days."""
    item = str(v.get("item", "?"))[:12] + "..."
    where = f"entry {v.get('seq')}: {v.get('kind')} item {item}"
    if v.get("check") == "late":
        exp = max(v.get("exposure_s") or 0.0, v.get("recorded_exposure_s") or 0.0)
        return f"{where} destroyed {exp:.1f} s after it was complete (limit {v['limit_s']:g} s)"
    if v.get("check") == "not_destroyed":
        age = v.get("age_s") or 0.0
        words = approx_duration(age)
        return (f"{where} was received but no destruction is recorded {words} after it was complete "
                f"(limit {v['limit_s']:g} s)")
    return f"{where}: {v.get('message', v.get('check'))}"


@dataclass
class VerifyResult:
    """A ledger report together with the policy it was judged against.

    Attributes
    ----------
    report : agent.ledger.LedgerReport
    home : str
    policy_name, policy_fingerprint : str or None
        The policy whose ``retention.raw_seconds`` was the limit.
    policy_findings : list of dict
        ``{"check": "policy", "message"}``: the home's policy differs from the
        last ``policy`` event in the ledger.
    """

    report: LedgerReport
    home: str
    policy_name: str | None = None
    policy_fingerprint: str | None = None
    policy_findings: list = field(default_factory=list)
    key_source: str = "home"          # where the device public key came from: home, enrolment, given
    policy_source: str = "home"       # where the policy came from: home, file, given
    key_storage: str | None = None    # how the home holds its keys (keystore.key_storage)
    withdrawn: dict | None = None     # the withdrawal certificate's check, for a withdrawn home

    @property
    def integrity_ok(self) -> bool:
        return not self.report.problems

    @property
    def retention_ok(self) -> bool:
        return not self.report.violations

    @property
    def ok(self) -> bool:
        if self.withdrawn is not None:
            return bool(self.withdrawn.get("ok"))
        return self.integrity_ok and self.retention_ok and not self.policy_findings

    @property
    def exit_code(self) -> int:
        if self.withdrawn is not None:
            return EXIT_OK if self.withdrawn.get("ok") else EXIT_INTEGRITY
        if not self.integrity_ok:
            return EXIT_INTEGRITY
        if not self.retention_ok or self.policy_findings:
            return EXIT_FAILURE
        return EXIT_OK

    def verdict(self) -> str:
        if self.withdrawn is not None:
            w = self.withdrawn
            if not w.get("ok"):
                return f"FAILED: the home was withdrawn but its certificate does not verify ({w.get('error')})."
            return (f"WITHDRAWN: the participant withdrew at {w['time']}; the certificate is signed by device key "
                    f"{w['device_key_id']} ({w['key_source']}) and records the ledger's last entry "
                    f"#{w['ledger_head']['seq']}. Everything else was destroyed, as withdrawal requires.")
        if self.ok:
            return "PASSED: the ledger is intact and every raw item was destroyed within the limit."
        parts = []
        if not self.integrity_ok:
            parts.append(f"{len(self.report.problems)} integrity problem(s)")
        if not self.retention_ok:
            parts.append(f"{len(self.report.violations)} retention violation(s)")
        if self.policy_findings:
            parts.append("a policy mismatch")
        return "FAILED: " + ", ".join(parts) + "."

    def checks(self) -> list[tuple[str, bool]]:
        """(check in words, passed) for each integrity check."""
        failed = {p["check"] for p in self.report.problems}
        return [(words, not (failed & set(ids))) for words, ids in CHECKS]

    def kind_rows(self) -> list[dict]:
        kinds = self.report.kinds
        order = [k for k in KIND_ORDER if k in kinds] + sorted(k for k in kinds if k not in KIND_ORDER)
        return [{"kind": k, **kinds[k]} for k in order]

    def text(self) -> str:
        r = self.report
        e = r.exposure or {}
        lines = [f"Ledger verification for {self.home}", ""]
        lines.append(self.verdict())
        lines.append("")
        if self.withdrawn is not None:
            w = self.withdrawn
            if w.get("ok"):
                lines.append("Destroyed per the certificate: " + ", ".join(
                    f"{k} {v}" for k, v in sorted(w["counts_destroyed"].items())))
            return "\n".join(lines).rstrip() + "\n"
        if self.key_storage == "plain":
            lines.append("WARNING: this home keeps its keys as plain files (chosen at enrolment); anyone who "
                         "copied it could sign as the device.")
            lines.append("")
        lines.append(f"Ledger: {r.entries} entries, head entry {r.head['seq']} ({r.head['hash'][:16]}...)")
        if r.anchor:
            lines.append(f"Anchor: entry {r.anchor['seq']} ({r.anchor['hash'][:16]}...)")
        lines.append(f"Device key: {r.device_key_id or 'unavailable'} (from {self.key_source})")
        lines.append(f"Merkle log: {r.size} entries, root {r.root[:16]}..., origin "
                     f"{(r.origin or 'none')[:16]}...")
        if self.policy_fingerprint:
            lines.append(f"Policy: {self.policy_name}, fingerprint {self.policy_fingerprint} "
                         f"(from {self.policy_source})")
        if r.first_t is not None and r.last_t is not None:
            lines.append(f"Period: {_utc(r.first_t)} to {_utc(r.last_t)} (UTC)")
        lines.append("")
        lines.append("Integrity checks")
        lines += [f"  {'pass' if ok else 'FAIL'}  {words}" for words, ok in self.checks()]
        lines.append("")
        lines.append("Raw items per kind (received / featurised / rejected / destroyed)")
        for row in self.kind_rows():
            lines.append(f"  {row['kind']:<8} {row['received']:6d} / {row['featurised']:6d} / "
                         f"{row['rejected']:6d} / {row['destroyed']:6d}")
        if not r.kinds:
            lines.append("  (none recorded)")
        lines.append("")
        limit = f"{r.limit_s:g} s" if r.limit_s is not None else "not checked (no policy)"
        if e.get("n"):
            lines.append(f"Raw exposure (complete to destroyed) over {e['n']} items: median {e['median_s']:.2f} s, "
                         f"p95 {e['p95_s']:.2f} s, max {e['max_s']:.2f} s; limit {limit}")
        else:
            lines.append(f"Raw exposure: no destroyed items recorded; limit {limit}")
        if r.rejections:
            lines.append("Rejections by reason: " + ", ".join(f"{k} {v}" for k, v in sorted(r.rejections.items())))
        lines.append(f"Exports recorded: {len(r.exports)}")
        lines.append("")
        if r.problems:
            lines.append(f"Integrity problems ({len(r.problems)})")
            lines += [f"  [{p['check']}] {p['message']}" for p in r.problems]
            lines.append("")
        if r.violations:
            lines.append(f"Retention violations ({len(r.violations)})")
            lines += [f"  {violation_words(v)}" for v in r.violations]
            lines.append("")
        for f in self.policy_findings:
            lines.append(f"Policy: {f['message']}")
        if r.pending:
            lines.append(f"Pending: {len(r.pending)} item(s) received and still within the raw window.")
        for n in r.notes:
            lines.append(f"Note: {n}")
        lines.append("")
        lines += list(PROVES)
        return "\n".join(lines).rstrip() + "\n"

    def as_dict(self) -> dict:
        r = self.report
        d = r.to_dict()
        d.pop("exposures", None)  # the distribution is in "exposure"; the full list is long
        return {"home": self.home, "ok": self.ok, "exit_code": self.exit_code, "verdict": self.verdict(),
                "integrity_ok": self.integrity_ok, "retention_ok": self.retention_ok,
                "policy": {"name": self.policy_name, "fingerprint": self.policy_fingerprint},
                "checks": [{"check": w, "ok": ok} for w, ok in self.checks()],
                "policy_findings": list(self.policy_findings), "ledger": d,
                "key_source": self.key_source, "policy_source": self.policy_source,
                "key_storage": self.key_storage, "withdrawn": self.withdrawn, "limits_of_proof": list(PROVES)}


def _utc(t: float) -> str:
    return time.strftime("%Y-%m-%d %H:%M", time.gmtime(t))


def _withdrawn(home: Home, enrolment: dict | None) -> dict | None:
    """The withdrawal certificate's check when the home was withdrawn (its ledger is gone), else None."""
    from ..participant.withdraw import CERT_NAME
    from ..study.withdrawal import load_withdrawal, verify_withdrawal_signature

    cert_path = home.root / CERT_NAME
    if not cert_path.exists() or home.ledger_path.exists():
        return None
    key_source = "the enrolment" if enrolment is not None else "the certificate itself"
    try:
        cert = load_withdrawal(cert_path)
        check = verify_withdrawal_signature(
            cert, enrolment["device_public_key"] if enrolment is not None else None, str(cert_path))
    except LetheError as e:
        return {"ok": False, "error": str(e), "certificate": str(cert_path)}
    return {"ok": True, "certificate": str(cert_path), "time": check.time, "device_key_id": check.device_key_id,
            "key_source": key_source, "ledger_head": check.ledger_head, "counts_destroyed": check.counts_destroyed,
            "pseudonym": check.pseudonym}


def verify_home(home, policy=None, public_key=None, now: float | None = None, *, enrolment=None,
                workers: int | None = None) -> VerifyResult:
    """Verify a home's ledger against its policy (or ``policy``).

    Parameters
    ----------
    home : Home or path-like
        A lethe home or a copy of one.  Only ``ledger.jsonl``, ``ledger.head``,
        ``ledger.checkpoint``, ``keys/device.pub``, the key files' descriptions
        (never a secret) and ``policy.toml`` are read.
    policy : agent.policy.Policy or path-like, optional
        The approved policy to judge retention by (the study's copy); default
        the home's ``policy.toml``.  With a study policy, the policy the
        agent recorded in its ledger must be this one.
    public_key : optional
        Device public key; default the enrolment's, else ``HOME/keys/device.pub``.
    now : float, optional
        Unix seconds for judging items not yet destroyed; default now.
    enrolment : dict or path-like, optional
        The device's enrolment file as the study holds it: its device key is
        used instead of the home's copy, and the ledger must start at its
        ``log_origin``.
    workers : int, optional
        Processes for signature verification (default one per core).

    Returns
    -------
    VerifyResult
    """
    from ..keystore import key_storage
    from ..ledger import verify_ledger
    from ..policy import load_policy

    home = home if isinstance(home, Home) else Home(home)
    findings = []
    key_source = "home"
    if enrolment is not None and not isinstance(enrolment, dict):
        from ..study.card import load_enrolment

        enrolment = load_enrolment(enrolment)
    if enrolment is not None and public_key is None:
        public_key, key_source = enrolment["device_public_key"], "enrolment"
    elif public_key is not None:
        key_source = "given"
    policy_source = "home" if policy is None else "given"
    if policy is not None and not hasattr(policy, "fingerprint"):
        policy, policy_source = load_policy(policy), "file"
    from_home = policy is None
    withdrawn = _withdrawn(home, enrolment)
    if from_home and home.policy_path.exists() and withdrawn is None:
        try:
            policy = home.load_policy()
        except PolicyError as e:
            findings.append({"check": "policy", "message": f"the home's policy does not load: {e}"})
            policy = None
    if policy is not None:
        limit_s: float | None = float(policy.retention.raw_seconds)
    else:
        limit_s = None if withdrawn is None else 0.0
    report = verify_ledger(home, public_key=public_key, retention_limit_s=limit_s, now=now, workers=workers)
    result = VerifyResult(report, str(home.root),
                          policy.policy.name if policy is not None else None,
                          policy.fingerprint if policy is not None else None, findings,
                          key_source=key_source, policy_source=policy_source, key_storage=key_storage(home),
                          withdrawn=withdrawn)
    if withdrawn is not None:
        return result
    origin = (enrolment or {}).get("log_origin")
    if origin and report.origin != origin:
        report.problems.append({"seq": None, "check": "origin",
                                "message": f"the ledger starts at entry hash {(report.origin or 'none')[:16]}..., "
                                           f"not at the origin the enrolment recorded ({origin[:16]}...): the "
                                           f"device started a new ledger"})
        report.ok = False
    if enrolment is not None and policy is not None and policy.fingerprint != enrolment.get("policy_fingerprint"):
        findings.append({"check": "policy",
                         "message": f"the policy given (fingerprint {policy.fingerprint[:16]}...) is not the one "
                                    f"the device enrolled under ({str(enrolment.get('policy_fingerprint'))[:16]}...)"})
    if policy is not None and report.policies:
        recorded = report.policies[-1]["fingerprint"]
        if recorded != policy.fingerprint:
            what = "the home's policy.toml" if from_home else "the approved policy"
            findings.append({"check": "policy",
                             "message": f"{what} (fingerprint {policy.fingerprint[:16]}...) is not "
                                        f"the policy the agent last recorded (entry {report.policies[-1]['seq']}, "
                                        f"fingerprint {recorded[:16]}...)"})
    return result
