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

from ..errors import EXIT_FAILURE, EXIT_INTEGRITY, EXIT_OK, PolicyError
from ..home import Home

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
        return f"{where} was received but no destruction is recorded {words} after it was complete (limit {v['limit_s']:g} s)"
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

    report: object
    home: str
    policy_name: str | None = None
    policy_fingerprint: str | None = None
    policy_findings: list = field(default_factory=list)

    @property
    def integrity_ok(self) -> bool:
        return not self.report.problems

    @property
    def retention_ok(self) -> bool:
        return not self.report.violations

    @property
    def ok(self) -> bool:
        return self.integrity_ok and self.retention_ok and not self.policy_findings

    @property
    def exit_code(self) -> int:
        if not self.integrity_ok:
            return EXIT_INTEGRITY
        if not self.retention_ok or self.policy_findings:
            return EXIT_FAILURE
        return EXIT_OK

    def verdict(self) -> str:
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
        lines.append(f"Ledger: {r.entries} entries, head entry {r.head['seq']} ({r.head['hash'][:16]}...)")
        if r.anchor:
            lines.append(f"Anchor: entry {r.anchor['seq']} ({r.anchor['hash'][:16]}...)")
        lines.append(f"Device key: {r.device_key_id or 'unavailable'}")
        if self.policy_fingerprint:
            lines.append(f"Policy: {self.policy_name}, fingerprint {self.policy_fingerprint}")
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
            lines.append(f"Raw exposure (complete to destroyed) over {e['n']} items: median {e['median']:.2f} s, "
                         f"p95 {e['p95']:.2f} s, max {e['max']:.2f} s; limit {limit}")
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
        return "\n".join(lines).rstrip() + "\n"

    def as_dict(self) -> dict:
        r = self.report
        d = r.to_dict()
        d.pop("exposures", None)  # the distribution is in "exposure"; the full list is long
        return {"home": self.home, "ok": self.ok, "exit_code": self.exit_code, "verdict": self.verdict(),
                "integrity_ok": self.integrity_ok, "retention_ok": self.retention_ok,
                "policy": {"name": self.policy_name, "fingerprint": self.policy_fingerprint},
                "checks": [{"check": w, "ok": ok} for w, ok in self.checks()],
                "policy_findings": list(self.policy_findings), "ledger": d}


def _utc(t: float) -> str:
    return time.strftime("%Y-%m-%d %H:%M", time.gmtime(t))


def verify_home(home, policy=None, public_key=None, now: float | None = None) -> VerifyResult:
    """Verify a home's ledger against its policy (or ``policy``).

    Parameters
    ----------
    home : Home or path-like
        A lethe home or a copy of one.  Only ``ledger.jsonl``, ``ledger.head``,
        ``keys/device.pub`` and ``policy.toml`` are read.
    policy : agent.policy.Policy, optional
        The limit to judge retention by; default the home's ``policy.toml``.
    public_key : optional
        Device public key; default ``HOME/keys/device.pub``.
    now : float, optional
        Unix seconds for judging items not yet destroyed; default now.

    Returns
    -------
    VerifyResult
    """
    from ..ledger import verify_ledger

    home = home if isinstance(home, Home) else Home(home)
    from_home = policy is None
    findings = []
    if from_home and home.policy_path.exists():
        try:
            policy = home.load_policy()
        except PolicyError as e:
            findings.append({"check": "policy", "message": f"the home's policy does not load: {e}"})
            policy = None
    report = verify_ledger(home, public_key=public_key, policy=policy, now=now)
    result = VerifyResult(report, str(home.root),
                          policy.policy.name if policy is not None else None,
                          policy.fingerprint if policy is not None else None, findings)
    if from_home and policy is not None and report.policies:
        recorded = report.policies[-1]["fingerprint"]
        if recorded != policy.fingerprint:
            findings.append({"check": "policy",
                             "message": f"the home's policy.toml (fingerprint {policy.fingerprint[:16]}...) is not "
                                        f"the policy the agent last recorded (entry {report.policies[-1]['seq']}, "
                                        f"fingerprint {recorded[:16]}...)"})
    return result
