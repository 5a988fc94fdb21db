"""``export_bundle`` on a real home: preview, confirmation, outbox, sequence numbers, budget."""

from __future__ import annotations

import json
import shutil

import pytest

from agent.export import export_bundle, home_card
from agent.errors import BudgetError, StateError
from agent.home import Home
from agent.keystore import Keystore
from agent.ledger import Ledger
from agent.export import build_payload, preview
from agent.policy import bundled_policy_path, load_policy
from agent.study.card import make_enrolment, write_card
from agent.study.keys import study_keygen
from agent.study.open import open_bundles
from agent.study.registry import enroll
from agent.vault import Vault

from _bundle_fixtures import FAST_N, FIT, PASS, episodes

NOW = 1764720000.0  # 2025-12-03T00:00Z


def make_world(tmp_path, policy_text=None, pseudonym="pX7QmN2a"):
    """A study directory and an enrolled participant home with episodes and a fit."""
    study = tmp_path / "study"
    src = tmp_path / "policy.toml"
    src.write_text(policy_text or bundled_policy_path("default").read_text())
    policy = load_policy(src)
    study_keygen(study, policy.study.study_id, PASS, scrypt_n=FAST_N)
    card_path = write_card(study, [src], "desk", tmp_path / "card.json")
    home = Home(tmp_path / "home").create()
    shutil.copy(src, home.policy_path)
    shutil.copy(card_path, home.root / "study-card.json")
    home.write_config({"pseudonym": pseudonym, "timezone": "UTC"})
    ks = Keystore(home).ensure()
    Ledger(home, signing_key=ks.device_key()).append("policy", fingerprint=policy.fingerprint)
    with Vault.open(home) as v:
        for e in episodes():
            v.put("episodes", e["key"], e)
        v.put("fits", "latest", FIT)
    enrolment = make_enrolment(home_card(home), home.load_policy(), pseudonym, ks.device_key())
    (tmp_path / "enrol.json").write_text(json.dumps(enrolment))
    enroll(study, tmp_path / "enrol.json")
    return home, study


def test_export_then_open(tmp_path):
    home, study = make_world(tmp_path)
    path = export_bundle(home, now=NOW)
    assert path.parent == home.outbox and path.name == "pX7QmN2a-000001.lethe"
    res = open_bundles(study, [path], PASS)
    stored = json.loads((study / "received" / "pX7QmN2a" / "1.json").read_text())
    assert res[0].ok and stored["payload"]["created"] == "2025-12-03"
    assert stored["payload"]["model"]["params"]["theta"]["hour|place"] == 1.2


def test_preview_is_exactly_what_is_sealed(tmp_path):
    home, study = make_world(tmp_path)
    with Vault.open(home) as v:
        shown = build_payload(home, home.load_policy(), v, now=NOW)
    seen = []
    path = export_bundle(home, now=NOW, confirm=lambda text: seen.append(text) or True)
    open_bundles(study, [path], PASS)
    stored = json.loads((study / "received" / "pX7QmN2a" / "1.json").read_text())["payload"]
    # relabelling codes are random per device, so compare everything but the edge-list node names
    assert {k: v for k, v in stored.items() if k != "edge_list"} == {k: v for k, v in shown.items() if k != "edge_list"}
    assert seen == [preview(stored)]


def test_declined_export_writes_nothing(tmp_path):
    home, _ = make_world(tmp_path)
    assert export_bundle(home, now=NOW, confirm=lambda text: False) is None
    assert list(home.outbox.iterdir()) == []
    with Vault.open(home) as v:
        assert v.count("exports") == 0


def test_sequence_numbers_increase_and_relabelling_is_stable(tmp_path):
    home, study = make_world(tmp_path)
    a, b = export_bundle(home, now=NOW), export_bundle(home, now=NOW)
    assert (a.name, b.name) == ("pX7QmN2a-000001.lethe", "pX7QmN2a-000002.lethe")
    open_bundles(study, [a, b], PASS)
    p1, p2 = (json.loads((study / "received" / "pX7QmN2a" / f"{i}.json").read_text())["payload"] for i in (1, 2))
    # The same random code for each place, sound and motion label in both bundles.  (The kept
    # links themselves may differ: a b-matching solve stopped at its time limit depends on the
    # machine's speed, docs/graph.md.)
    def codes(p):
        return {n for n in p["edge_list"]["nodes"] if n.split(":")[0] in ("place", "sound", "motion")}

    assert codes(p1) == codes(p2) and len(codes(p1)) >= 3


def test_no_raw_labels_leave(tmp_path):
    home, study = make_world(tmp_path)
    open_bundles(study, [export_bundle(home, now=NOW)], PASS)
    text = (study / "received" / "pX7QmN2a" / "1.json").read_text()
    nodes = json.loads(text)["payload"]["edge_list"]["nodes"]
    assert not any(n in ("place:P1", "place:P2", "sound:S0", "motion:sedentary") for n in nodes)
    assert any(n.startswith("hour:") for n in nodes) and any(n == "mood:calm" for n in nodes)


def dp_policy_text(per, total):
    text = bundled_policy_path("default").read_text()
    return text.replace("dp = false", "dp = true").replace("epsilon_per_export = 1.0", f"epsilon_per_export = {per}") \
               .replace("epsilon_total = 4.0", f"epsilon_total = {total}")


def test_budget_refusal_writes_nothing(tmp_path):
    home, _ = make_world(tmp_path, dp_policy_text(1.0, 2.0))
    export_bundle(home, now=NOW)
    export_bundle(home, now=NOW)
    before = sorted(p.name for p in home.outbox.iterdir())
    with pytest.raises(BudgetError, match="privacy budget exhausted"):
        export_bundle(home, now=NOW)
    assert sorted(p.name for p in home.outbox.iterdir()) == before
    with Vault.open(home) as v:
        assert [r["epsilon"] for _, r in v.items("exports")] == [1.0, 1.0]


def test_dp_withholds_edge_list(tmp_path):
    home, study = make_world(tmp_path, dp_policy_text(1.0, 4.0))
    open_bundles(study, [export_bundle(home, now=NOW)], PASS)
    payload = json.loads((study / "received" / "pX7QmN2a" / "1.json").read_text())["payload"]
    assert payload["edge_list"] is None and "differential privacy" in payload["withheld"]["edge_list"]
    assert payload["counts"]["dp"]["epsilon"] == 1.0


def test_export_refuses_unapproved_policy(tmp_path):
    home, _ = make_world(tmp_path)
    strict = load_policy(bundled_policy_path("strict"))
    with pytest.raises(StateError, match="not approved by the study card"):
        export_bundle(home, strict, now=NOW)
    assert list(home.outbox.iterdir()) == []


def test_canaries_in_the_vault_do_not_leave(tmp_path):
    # Distinctive values planted in every vault table that must stay on the device.
    home, study = make_world(tmp_path)
    with Vault.open(home) as v:
        v.put("place_names", "P1", {"name": "Canary Cottage", "merged_into": None, "exclude": False})
        v.put("codebook", "place", {"centroids": [[38.7654321, -27.1234567]], "ids": ["P1"]})
        v.put("gps_fixes", "x:0", {"t": 1764590000.125, "lat": 38.7654321, "lon": -27.1234567, "acc_m": 5.0})
        v.put("stays", "1764590000", {"t_start": 1764590000.125, "t_end": 1764593600.0,
                                      "lat": 38.7654321, "lon": -27.1234567, "n": 9})
        v.put("audio_features", "a1", {"t": 1764590000.125, "vec": [440.123456], "dbfs": -31.4159, "dba": 44.0})
    path = export_bundle(home, now=NOW)
    open_bundles(study, [path], PASS)
    opened = (study / "received" / "pX7QmN2a" / "1.json").read_text()
    for canary in ("Canary", "38.765", "27.123", "1764590000", "440.123", "31.4159"):
        assert canary not in opened, canary
        assert canary.encode() not in path.read_bytes(), canary


def test_concurrent_exports_cannot_overspend(tmp_path):
    # Two exports racing for the last epsilon: exactly one is sealed, the other refused.
    import threading

    home, _ = make_world(tmp_path, dp_policy_text(1.0, 1.0))
    results, barrier = [], threading.Barrier(2)

    def run():
        barrier.wait()
        try:
            results.append(export_bundle(home, now=NOW).name)
        except BudgetError as e:
            results.append(type(e).__name__)

    threads = [threading.Thread(target=run) for _ in range(2)]
    for t in threads:
        t.start()
    for t in threads:
        t.join()
    assert sorted(results) == ["BudgetError", "pX7QmN2a-000001.lethe"]
    assert [p.name for p in home.outbox.iterdir()] == ["pX7QmN2a-000001.lethe"]
