"""The bundle payload: the builder from the home and the strict check against ``payload.json``.

The payload is everything that leaves the device.  It is built only from the
policy's export allowlist (``export.allow``, ``include_edge_list``,
``include_model``, ``include_quiz_summary``) and holds no coordinates, no
centroids, no timestamps finer than ``export.time_granularity``, no place names
and no audio.  :func:`validate_payload` refuses any field the schema does not
know, both before sealing (export) and after opening (researcher).

Schema version 2 is specified field by field in ``docs/bundle-format.md``; its
machine-readable contract is ``agent/contracts/schemas/payload.json``.
"""

from __future__ import annotations

import datetime as _dt
import math
import re
import secrets
from typing import Any
from collections.abc import Callable, Iterable, Mapping, Sequence

from .. import contracts
from ..errors import DataError, LetheError

__all__ = ["PAYLOAD_SCHEMA", "RELABELLED", "RELABEL_TABLE", "Relabeller", "build_payload",
           "build_payload_and_relabel", "check_coarse", "coarse_date", "edge_list_from", "payload_from_parts",
           "project_fit", "project_ledger_digest", "project_quiz", "validate_payload"]


PAYLOAD_SCHEMA: int = contracts.schema("payload")["properties"]["schema"]["const"]

#: Kinds whose labels are relabelled per device before export.
RELABELLED = ("place", "sound", "motion")
RELABEL_TABLE = "relabel"

_NAME = re.compile(r"^[A-Za-z0-9_.:|+-]{1,80}$")
_DAY = re.compile(r"^\d{4}-\d{2}-\d{2}$")
_WEEK = re.compile(r"^\d{4}-W\d{2}$")


# ----------------------------------------------------------------------------- coarse time
def coarse_date(now: float | None, granularity: str, tz=None) -> str:
    """``"2026-12-01"`` (day) or ISO week ``"2026-W49"`` (week) of ``now`` in ``tz`` (UTC default)."""
    t = _dt.datetime.fromtimestamp(_dt.datetime.now().timestamp() if now is None else float(now),
                                   tz or _dt.UTC)
    if granularity == "day":
        return t.date().isoformat()
    if granularity == "week":
        y, w, _ = t.isocalendar()
        return f"{y:04d}-W{w:02d}"
    raise DataError(f"time_granularity {granularity!r}: expected 'day' or 'week'")


def check_coarse(value, granularity: str, where: str) -> None:
    rx = _DAY if granularity == "day" else _WEEK
    if not isinstance(value, str) or not rx.match(value):
        raise DataError(f"[{where}] {value!r} is not a {granularity} ('YYYY-MM-DD' or 'YYYY-Www')")


# ----------------------------------------------------------------------------- relabelling
class Relabeller:
    """A per-device secret relabelling of place, sound and motion ids.

    The map is kept in the vault (table ``relabel``, one record per kind) and
    only grows: a label keeps its code across exports of the same device, and
    a new label gets a fresh random code (``p`` + 6 hex digits for places,
    ``s`` for sounds, ``m`` for motion).  Codes mean nothing across devices.
    """

    def __init__(self, maps: Mapping[str, Mapping[str, str]] | None = None,
                 token: Callable[[], str] = lambda: secrets.token_hex(3)):
        self.maps = {k: dict((maps or {}).get(k, {})) for k in RELABELLED}
        self._token = token
        self.changed = False

    @classmethod
    def from_vault(cls, vault) -> Relabeller:
        maps = {}
        for kind in RELABELLED:
            rec = vault.get(RELABEL_TABLE, kind)
            maps[kind] = dict(rec.get("map", {})) if rec else {}
        return cls(maps)

    def save(self, vault) -> None:
        for kind in RELABELLED:
            vault.upsert(RELABEL_TABLE, kind, {"map": self.maps[kind]})

    def code(self, kind: str, label) -> str:
        label = str(label)
        if kind not in RELABELLED:
            return label
        m = self.maps[kind]
        if label not in m:
            used = set(m.values())
            while True:
                c = f"{kind[0]}{self._token()}"
                if c not in used:
                    break
            m[label] = c
            self.changed = True
        return m[label]


# ----------------------------------------------------------------------------- builder
def _num(v) -> float | None:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        try:
            import numpy as np

            if isinstance(v, np.generic):
                v = v.item()
            else:
                return None
        except ImportError:  # pragma: no cover
            return None
        if isinstance(v, bool) or not isinstance(v, (int, float)):
            return None
    v = float(v)
    return v if math.isfinite(v) else None


def _numeric_map(d) -> dict[str, Any]:
    """Flatten one level of metrics into ``{name: number}``.

    A number stays as it is; an interval record ``{"value", "k", "ci": [lo, hi]}``
    (as ``agent/model/crossval.py`` writes them) becomes ``name``, ``name_k``,
    ``name_ci_low`` and ``name_ci_high``.  Strings, lists and anything deeper
    are left on the device.
    """
    if not isinstance(d, Mapping):
        return {}
    out: dict[str, Any] = {}
    for k, v in d.items():
        if not (isinstance(k, str) and _NAME.match(k)) or k.startswith("_"):
            continue
        n = _num(v)
        if n is not None:
            out[k] = n
        elif isinstance(v, Mapping) and "value" in v:
            if _num(v.get("value")) is not None:
                out[k] = _num(v["value"])
            if _num(v.get("k")) is not None:
                out[f"{k}_k"] = _num(v["k"])
            ci = v.get("ci")
            if isinstance(ci, (list, tuple)) and len(ci) == 2 and all(_num(c) is not None for c in ci):
                out[f"{k}_ci_low"], out[f"{k}_ci_high"] = _num(ci[0]), _num(ci[1])
    return out


def project_fit(fit: Mapping | None, kinds: Sequence[str]) -> dict | None:
    """The exported part of a ``FitResult.to_dict()``: numbers only, exported type pairs only.

    ``cv`` and each baseline are ``{"folds": [...], "pooled": {...}}`` of metric
    records; they are flattened with :func:`_numeric_map`.  Anything that is not
    a finite number at a known position (fold dates, notes, per-trial lists,
    nested objects) is left behind on the device.
    """
    if not fit:
        return None
    params = fit.get("params") or {}
    theta = {}
    for k, v in (params.get("theta") or {}).items():
        a, _, b = str(k).partition("|")
        n = _num(v)
        if a in kinds and b in kinds and n is not None:
            theta[f"{a}|{b}"] = n
    out_params: dict[str, Any] = {"theta": theta}
    for k in ("beta", "tau"):
        out_params[k] = _num(params.get(k))
    ref = params.get("reference_pair")
    out_params["reference_pair"] = ref if isinstance(ref, str) and ref in theta else None
    _project_recovery(fit, params, out_params)
    _project_grouping(fit, out_params)
    cv = fit.get("cv") or {}
    folds = [_numeric_map(f) for f in (cv.get("folds") or []) if isinstance(f, Mapping)]
    baselines = {}
    for name, b in (fit.get("baselines") or {}).items():
        if not (isinstance(name, str) and _NAME.match(name)):
            continue
        if isinstance(b, Mapping):
            baselines[name] = _numeric_map(b["pooled"] if isinstance(b.get("pooled"), Mapping) else b)
        elif _num(b) is not None:
            baselines[name] = {"value": _num(b)}
    if isinstance(fit.get("chance_level"), Mapping) and "chance_level" not in baselines:
        baselines["chance_level"] = _numeric_map(fit["chance_level"])
    n_trials = fit.get("n_trials")
    out = {"params": out_params, "cv": {"pooled": _numeric_map(cv.get("pooled")), "folds": folds},
           "baselines": baselines, "n_trials": int(n_trials) if isinstance(n_trials, int) else None}
    paired = {name: {m: _numeric_map({m: v}) for m, v in diff.items() if isinstance(v, Mapping)}
              for name, diff in (fit.get("paired") or {}).items()
              if isinstance(name, str) and _NAME.match(name) and isinstance(diff, Mapping)}
    if paired:
        out["paired"] = {name: {k: x for part in d.values() for k, x in part.items()}
                         for name, d in paired.items()}
    return out


# -- the fitted parameters and their recovery (owned with agent/model; docs/model.md) --------------
_PARAM = re.compile(r"^(theta\[[a-z|-]{3,40}\]|beta|tau)$")
_GROUP = re.compile(r"^[a-z|-]{3,40}$")
_PAIR_FAMILY = {"hour": "time", "weekday": "time", "week": "time", "place": "place",
                "sound": "context", "motion": "context", "mood": "context"}


def _pair_group(pair: str, groups) -> str | None:
    """The weight group of a kind pair: the pair itself (full weights) or its family class."""
    if pair in groups:
        return pair
    from ..model.likelihood import COARSE  # the default grouping's classes (docs/model.md)

    a, _, b = pair.partition("|")
    fa, fb = _PAIR_FAMILY.get(a, a), _PAIR_FAMILY.get(b, b)
    for name in (f"{fa}-{fb}", f"{fb}-{fa}"):
        if name in groups:
            return name  # five family classes
        if COARSE.get(name) in groups:
            return COARSE[name]  # three classes: time-time, time-context, context-context share "non-place"
    if "other" in groups and {fa, fb} != {"time", "place"}:
        return "other"  # two classes (classes2): everything but time-place shares "other"
    return None


def _project_recovery(fit: Mapping, params: Mapping, out_params: dict) -> None:
    """Carry each fitted parameter with its recovery figures; hold back the unidentifiable.

    With an on-device recovery in the fit, ``params.recovery`` lists every
    free parameter as ``{"value", "r", "bias", "rmse", "identifiable"}`` (log
    scale figures), and ``theta``/``beta``/``tau`` keep only the identifiable
    ones (a θ pair when its group is identifiable; the reference group, fixed
    to 1, always), so cohort summaries built from those leave the others out by
    default while the figures still travel.
    """
    groups = {k: _num(v) for k, v in (params.get("theta_groups") or {}).items()
              if isinstance(k, str) and _GROUP.match(k) and _num(v) is not None}
    if groups:
        out_params["groups"] = groups
    rec = (fit.get("recovery") or {}).get("params") if isinstance(fit.get("recovery"), Mapping) else None
    if not isinstance(rec, Mapping):
        return
    table = {}
    for name, row in rec.items():
        if not (isinstance(name, str) and _PARAM.match(name) and isinstance(row, Mapping)):
            continue
        value = params.get(name) if name in ("beta", "tau") else groups.get(name[6:-1])
        table[name] = {"value": _num(value), "r": _num(row.get("r")), "bias": _num(row.get("bias")),
                       "rmse": _num(row.get("rmse")), "identifiable": row.get("identifiable") is True}
    out_params["recovery"] = table
    for k in ("beta", "tau"):
        if k in table and not table[k]["identifiable"]:
            out_params[k] = None
    for pair in list(out_params["theta"]):
        g = _pair_group(pair, groups)
        row = table.get(f"theta[{g}]") if g is not None else None
        if row is not None and not row["identifiable"]:
            del out_params["theta"][pair]


_GROUPINGS = ("grouped", "classes5", "classes2", "full")  # likelihood.WEIGHTS (docs/model.md)


def _project_grouping(fit: Mapping, out_params: dict) -> None:
    """Which weight grouping the fit reports and each candidate's figures (numbers and known names only).

    ``params.grouping = {"chosen", "forced", "candidates": {name: {"loglik", "aic",
    "n_params", "min_r", "n_unidentifiable"}}}``; a fit record without a
    grouping (before the per-participant choice) exports none.
    """
    g = fit.get("grouping")
    if not isinstance(g, Mapping) or g.get("chosen") not in _GROUPINGS:
        return
    cands: dict[str, Any] = {}
    for row in g.get("candidates") or []:
        if not isinstance(row, Mapping) or row.get("weights") not in _GROUPINGS:
            continue
        bad = row.get("unidentifiable")
        cands[row["weights"]] = {"loglik": _num(row.get("loglik")), "aic": _num(row.get("aic")),
                                 "n_params": _num(row.get("n_params")), "min_r": _num(row.get("min_r")),
                                 "n_unidentifiable": float(len(bad)) if isinstance(bad, list) else None}
    out_params["grouping"] = {"chosen": g["chosen"], "forced": g.get("forced") is True, "candidates": cands}


def project_quiz(score: Mapping | None, fit_pooled: Mapping | None = None) -> dict | None:
    """Quiz summary: trials issued, answered, accuracy, chance; model agreement if the fit has it."""
    if not score:
        return None
    agreement = _num((fit_pooled or {}).get("agreement"))
    return {"trials": int(score.get("issued", 0)), "answered": int(score.get("answered", 0)),
            "correct": int(score.get("correct", 0)), "accuracy": _num(score.get("accuracy")),
            "chance": _num(score.get("chance")), "p_value": _num(score.get("p_value")),
            "agreement": agreement}


def project_ledger_digest(d: Mapping) -> dict:
    out = {"counts": {str(k): int(v) for k, v in (d.get("counts") or {}).items()},
           "violations": int(d.get("violations") or 0),
           "head": {"seq": int(d["head"]["seq"]), "hash": str(d["head"]["hash"])}}
    for k in ("max_exposure_s", "median_exposure_s", "p95_exposure_s"):
        if k in d:
            out[k] = _num(d[k])
    return out


def edge_list_from(edges: Iterable, kinds: Sequence[str], relabel: Relabeller, degree_cap: int) -> dict:
    """The degree-capped edge list over exported node ids.

    ``edges`` yields ``((kind, label), (kind, label), ...)``; edges touching a
    kind that is not exported are dropped.
    """
    ids: dict[str, int] = {}
    out = []
    for e in edges:
        a, b = e[0], e[1]
        if a[0] not in kinds or b[0] not in kinds:
            continue
        na = f"{a[0]}:{relabel.code(a[0], a[1])}"
        nb = f"{b[0]}:{relabel.code(b[0], b[1])}"
        ia = ids.setdefault(na, len(ids))
        ib = ids.setdefault(nb, len(ids))
        out.append(sorted((ia, ib)))
    return {"degree_cap": int(degree_cap), "nodes": list(ids), "edges": sorted(out)}


def payload_from_parts(policy, *, episodes: Iterable[Mapping], edges: Iterable | None,
                       fit: Mapping | None, quiz_score: Mapping | None, ledger_digest: Mapping,
                       relabel: Relabeller, created: str, software_version: str,
                       log: Mapping | None = None) -> dict:
    """Assemble a payload from already-loaded parts (pure; the tests' entry point).

    Parameters
    ----------
    policy : Policy
    episodes : iterable of episode dicts (``docs/architecture.md``)
    edges : iterable of ``(node_a, node_b, ...)`` capped edges, or None
    fit : ``FitResult.to_dict()`` or None
    quiz_score : :func:`agent.quiz.score` output or None
    ledger_digest : :func:`agent.ledger.digest` output
    relabel : Relabeller
    log : :func:`agent.ledger.log_section` output, optional
        The ledger's Merkle tree head and consistency proofs (``docs/ledger.md``).
    created : str
        Coarse date (:func:`coarse_date`).
    """
    from ..disclosure import count_vector, release_counts

    kinds = policy.exported_kinds()
    withheld: dict[str, str] = {}
    counts = release_counts(count_vector(list(episodes), kinds), policy)

    edge_list = None
    if not policy.export.include_edge_list:
        withheld["edge_list"] = "the policy does not include it (export.include_edge_list = false)"
    elif policy.privacy.dp:
        withheld["edge_list"] = ("differential privacy is on and the edge list is a set release that the "
                                 "count mechanism does not cover")
    elif edges is None:
        withheld["edge_list"] = "no graph yet"
    else:
        edge_list = edge_list_from(edges, kinds, relabel, policy.graph.degree_cap)

    model = None
    if not policy.export.include_model:
        withheld["model"] = "the policy does not include it (export.include_model = false)"
    else:
        model = project_fit(fit, kinds)
        if model is None:
            withheld["model"] = "no fitted model yet"

    quiz = None
    if not policy.export.include_quiz_summary:
        withheld["quiz"] = "the policy does not include it (export.include_quiz_summary = false)"
    else:
        quiz = project_quiz(quiz_score, (model or {}).get("cv", {}).get("pooled"))
        if quiz is None:
            withheld["quiz"] = "no quiz yet"

    payload = {
        "schema": PAYLOAD_SCHEMA, "study_id": policy.study.study_id, "created": created,
        "time_granularity": policy.export.time_granularity,
        "policy_fingerprint": policy.fingerprint, "software_version": software_version,
        "kinds": list(kinds), "counts": counts, "edge_list": edge_list, "model": model, "quiz": quiz,
        "ledger_digest": project_ledger_digest(ledger_digest), "withheld": withheld,
    }
    if log is not None:
        payload["log"] = dict(log)
    validate_payload(payload)
    return payload


def build_payload(home, policy, vault, now: float | None = None) -> dict:
    """Build the payload from the home (vault episodes, graph, fit, quiz, ledger).

    The relabelling map grows as new places appear; it is saved to the vault
    only when a bundle is sealed (:func:`agent.export.flow.export_bundle`), so a
    preview writes nothing.
    """
    return build_payload_and_relabel(home, policy, vault, now)[0]


def build_payload_and_relabel(home, policy, vault, now: float | None = None):
    """:func:`build_payload` plus the (possibly grown) :class:`Relabeller` to save on export."""
    from .. import __version__
    from ..home import Home
    from ..ledger import digest, log_section, verify_ledger

    home = home if isinstance(home, Home) else Home(home)
    episodes = [e for _, e in vault.items("episodes")]
    edges = None
    if policy.export.include_edge_list and not policy.privacy.dp and episodes:
        from ..graph import CooccurrenceGraph

        edges = CooccurrenceGraph.from_episodes(episodes, policy).edge_list()
    fit = vault.get("fits", "latest")
    quiz_score = None
    if policy.export.include_quiz_summary and vault.count("trials"):
        from ..quiz import score

        quiz_score = score(vault, policy)
    relabel = Relabeller.from_vault(vault)
    try:
        tz = home.timezone()
    except (LetheError, KeyError, ValueError):  # no policy copy or an unknown zone: UTC dates
        tz = None
    created = coarse_date(now, policy.export.time_granularity, tz)
    report = verify_ledger(home, retention_limit_s=policy.retention.raw_seconds, keep_leaves=True)
    payload = payload_from_parts(policy, episodes=episodes, edges=edges, fit=fit, quiz_score=quiz_score,
                                 ledger_digest=digest(report), relabel=relabel, created=created,
                                 software_version=__version__, log=log_section(report))
    return payload, relabel


# ----------------------------------------------------------------------------- schema
def _payload_error(source: str | None):
    def make(_src, key: str, message: str) -> DataError:
        where = f"{source}: " if source else ""
        return DataError(f"{where}payload [{key}] {message}")
    return make


def validate_payload(payload: Any, source: str | None = None) -> dict:
    """Check a payload against ``agent/contracts/schemas/payload.json``; :class:`DataError` names the field.

    The schema version is checked first, so that a newer payload is refused as
    such rather than as a list of unknown fields.  Beyond the schema: distinct
    node ids and in-range edges in ``edge_list``, and ``created`` at the
    payload's own ``time_granularity``.
    """
    fail = _payload_error(source)
    if not isinstance(payload, dict):
        raise fail(None, "", "expected a JSON object")
    schema = payload.get("schema")
    if schema != PAYLOAD_SCHEMA or isinstance(schema, bool) or not isinstance(schema, int):
        raise fail(None, "schema", f"payload schema {schema!r} is not supported; this lethe reads schema "
                                   f"{PAYLOAD_SCHEMA}")
    contracts.validate("payload", payload, source, error=fail)
    e = payload["edge_list"]
    if e is not None:
        n = len(e["nodes"])
        if len(set(e["nodes"])) != n:
            raise fail(None, "edge_list.nodes", "node ids must be distinct")
        for i, pair in enumerate(e["edges"]):
            if len(pair) != 2 or not pair[0] < pair[1] < n:
                raise fail(None, f"edge_list.edges[{i}]", f"expected [i, j] with i < j < {n}")
    try:
        check_coarse(payload["created"], payload["time_granularity"], "created")
    except DataError as err:
        raise DataError(f"{source}: payload {err}" if source else f"payload {err}") from None
    return payload
