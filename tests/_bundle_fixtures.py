"""Small shared fixtures for the bundle and study tests (no home, no vault)."""

from __future__ import annotations

import json

from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey

from agent.bundle import make_header, seal_bundle
from agent.export import Relabeller, coarse_date, payload_from_parts
from agent.policy import bundled_policy_path, load_policy
from agent.identity import device_key_id
from agent.study.card import load_card, make_enrolment, write_card
from agent.study.keys import load_study_key, study_keygen
from agent.study.registry import enroll

NOW = 1764720000.0  # 2025-12-03T00:00Z, a fixed instant for the fixtures
PASS = b"correct horse battery"
FAST_N = 2**10  # tests only


def episodes(n=60):
    """Deterministic fictional episodes in the architecture's episode shape."""
    places = ["P1", "P2", "P3"]
    out = []
    for i in range(n):
        out.append({"key": f"k{i}", "utc": 1764547200.0 + 3600 * i, "date": "2025-12-01",
                    "hour": i % 24, "weekday": (i // 24) % 7, "week": 1 + i // 168,
                    "place": places[i % 3] if i % 5 else None, "sound": f"S{i % 2}",
                    "motion": "sedentary" if i % 4 else "active",
                    "moods": ["calm"] if i % 6 == 0 else (["tired", "calm"] if i % 7 == 0 else []),
                    "coverage": {}})
    return out


LEDGER = {"counts": {"audio.received": 10, "audio.destroyed": 10}, "max_exposure_s": 1.5,
          "median_exposure_s": 0.7, "p95_exposure_s": 1.2, "violations": 0,
          "head": {"seq": 42, "hash": "ab" * 32}}

def _m(v, k=None, n=18):
    """A metric record in the shape agent/model/crossval.py writes."""
    out = {"value": v, "ci": [max(0.0, v - 0.2), min(1.0, v + 0.2)]}
    if k is not None:
        out["k"] = float(k)
    return out


def _pooled(agree, acc):
    return {"n": 18, "n_days": 6, "agreement": _m(agree, round(agree * 18)), "accuracy": _m(acc, round(acc * 18)),
            "loglik": {"value": -1.1, "ci": [-1.3, -0.9]}}


# The shape of FitResult.to_dict() (agent/model/fit.py), with fictional numbers.
FIT = {"params": {"theta": {"hour|place": 1.2, "place|sound": 0.3, "mood|place": 0.1}, "beta": 2.0, "tau": 0.5,
                  "reference_pair": "hour|place", "activation": "sqrt(n) * unit-norm eigenvector"},
       "cv": {"folds": [{**_pooled(0.5, 0.5), "fold": 0, "days": ["2025-11-20", "2025-11-21"]}],
              "pooled": _pooled(0.6, 0.45)},
       "baselines": {"chance": {"folds": [], "pooled": _pooled(0.25, 0.25)},
                     "frequency": {"folds": [], "pooled": _pooled(0.4, 0.4)}},
       "n_trials": 20, "n_answered": 18, "n_skipped": 2,
       "fit": {"nll": 20.1, "type_pairs": ["hour|place"]}, "chance_level": {"agreement": 0.25, "loglik": -1.386},
       "participant_accuracy": _m(0.5, 9), "notes": ["only 6 days with answers"]}

QUIZ = {"issued": 20, "answered": 18, "skipped": 2, "pending": 0, "correct": 9, "chance": 0.25,
        "accuracy": 0.5, "p_value": 0.01}


_EDGES: dict = {}  # the fixture graph's edge list per policy graph section, built once per session


def fixture_edges(policy) -> list:
    """The capped graph of :func:`episodes` under ``policy`` (cached: the episodes never change)."""
    from agent.graph import CooccurrenceGraph

    key = repr(policy.graph)
    if key not in _EDGES:
        _EDGES[key] = CooccurrenceGraph.from_episodes(episodes(), policy).edge_list()
    return list(_EDGES[key])


def make_payload(policy=None, *, edges=None):
    policy = policy or load_policy(bundled_policy_path("default"))
    eps = episodes()
    if edges is None:
        edges = fixture_edges(policy)
    return payload_from_parts(policy, episodes=eps, edges=edges, fit=FIT, quiz_score=QUIZ,
                              ledger_digest=LEDGER, relabel=Relabeller(),
                              created=coarse_date(NOW, policy.export.time_granularity),
                              software_version="0.1.0")


class Study:
    """A study directory with one enrolled device."""

    def __init__(self, tmp_path, pseudonym="pX7QmN2a", suite="default"):
        self.dir = tmp_path / "study"
        self.policy = load_policy(bundled_policy_path("default"))
        self.pair = study_keygen(self.dir, "harbour-days-2027", PASS, suite=suite, scrypt_n=FAST_N)
        self.card_path = write_card(self.dir, [bundled_policy_path("default")], "desk", tmp_path / "card.json")
        self.card = load_card(self.card_path)
        self.device = Ed25519PrivateKey.generate()
        self.pseudonym = pseudonym
        f = tmp_path / f"enrol-{pseudonym}.json"
        f.write_text(json.dumps(make_enrolment(self.card, self.policy, pseudonym, self.device)))
        enroll(self.dir, f)
        self.tmp = tmp_path

    def key(self):
        return load_study_key(self.dir, PASS)

    def seal(self, payload=None, seq=1, device=None, recipient_key=None, header_overrides=None):
        device = device or self.device
        pub = device.public_key().public_bytes_raw()
        header = make_header(suite=self.card.suite, study_id=self.card.study_id,
                             recipient=self.card.key_fingerprint, device_key_id=device_key_id(pub),
                             seq=seq, created="")
        payload = payload if payload is not None else make_payload(self.policy)
        header["created"] = payload["created"]
        header.update(header_overrides or {})
        return seal_bundle(payload, header, recipient_key or self.card.hpke_public_key(), device)

    def write(self, data, name="b.lethe"):
        p = self.tmp / name
        p.write_bytes(data)
        return p
