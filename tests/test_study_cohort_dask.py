"""Cohort analysis and study planning on a real Dask LocalCluster with 2 worker processes."""

from __future__ import annotations

import json
from dataclasses import asdict

import numpy as np
import pytest
from cryptography.hazmat.primitives.asymmetric.ed25519 import Ed25519PrivateKey
from scipy import stats

from agent.study.card import make_enrolment
from agent.study.cohort.analyse import analyse, bootstrap_means
from agent.study.cohort.plan import PlanModel, fit_weight, plan, simulate_fits
from agent.study.open import open_bundles
from agent.study.registry import enroll

from _bundle_fixtures import PASS, Study, make_payload


@pytest.fixture(scope="module")
def client():
    import logging

    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                           silence_logs=logging.ERROR)
    c = Client(cluster)
    assert len(c.scheduler_info()["workers"]) == 2
    yield c
    c.close()
    cluster.close()


@pytest.fixture
def cohort(tmp_path):
    s = Study(tmp_path)
    rng = np.random.default_rng(5)
    paths = []
    for i in range(9):
        name, key = f"pDask{i:03d}", Ed25519PrivateKey.generate()
        f = tmp_path / f"{name}.json"
        f.write_text(json.dumps(make_enrolment(s.card, s.policy, name, key)))
        enroll(s.dir, f)
        p = make_payload(s.policy)
        p["model"]["cv"]["pooled"]["agreement"] = float(np.round(rng.uniform(0.3, 0.8), 3))
        p["model"]["baselines"]["frequency"]["agreement"] = float(np.round(rng.uniform(0.3, 0.6), 3))
        paths.append(s.write(s.seal(p, seq=1, device=key), f"{name}.lethe"))
    open_bundles(s.dir, paths, PASS)
    return s


def test_analyse_matches_scipy(cohort, client):
    res = analyse(cohort.dir, n_boot=4000, seed=1, client=client)
    # The first study device has no bundle; nine participants report.
    assert res["participants"] == 9
    s = res["comparisons"]["frequency"]["agreement"]
    diffs = []
    for f in sorted((cohort.dir / "received").glob("pDask*/1.json")):
        m = json.loads(f.read_text())["payload"]["model"]
        diffs.append(m["cv"]["pooled"]["agreement"] - m["baselines"]["frequency"]["agreement"])
    diffs = np.array(diffs)
    assert s["mean"] == pytest.approx(diffs.mean(), abs=1e-12) and s["n"] == 9
    t = stats.ttest_1samp(diffs, 0.0)  # scipy reference for the t-test
    assert s["p_value"] == pytest.approx(t.pvalue, rel=1e-9)
    # scipy.stats.bootstrap (percentile method) as the reference interval; Monte Carlo error allows 0.02.
    ref = stats.bootstrap((diffs,), np.mean, n_resamples=4000, method="percentile", random_state=3)
    assert s["ci95"][0] == pytest.approx(ref.confidence_interval.low, abs=0.02)
    assert s["ci95"][1] == pytest.approx(ref.confidence_interval.high, abs=0.02)
    assert res["parameters"]["beta"]["n"] == 9


def test_analyse_is_reproducible(cohort, client):
    a = analyse(cohort.dir, n_boot=1000, seed=2, client=client)
    b = analyse(cohort.dir, n_boot=1000, seed=2, client=client)
    assert a == b
    v = np.arange(10.0)
    assert np.array_equal(bootstrap_means(v, 50, 7), bootstrap_means(v, 50, 7))


def test_fit_recovers_the_weight():
    # Maximum likelihood on many trials recovers the generating softmax weight (consistency of the MLE).
    rng = np.random.default_rng(0)
    x = rng.standard_normal((4000, 4))
    z = 1.5 * x
    p = np.exp(z) / np.exp(z).sum(axis=1, keepdims=True)
    choice = (p.cumsum(axis=1) > rng.random((4000, 1))).argmax(axis=1)
    assert fit_weight(x, choice) == pytest.approx(1.5, rel=0.08)


def test_plan_power_agrees_with_the_noncentral_t(client):
    # Handbook power of a one-sided one-sample t-test (noncentral t; e.g. Cohen 1988, ch. 2):
    # power = P(T' > t_crit), T' ~ nct(df = n - 1, nc = sqrt(n) * mean / sd), from the simulated differences.
    res = plan([12], [40], model=PlanModel(beta=0.6, gamma=0.5), n_studies=150, seed=4, client=client,
               per_task=300)
    g = res["grid"][0]
    n = 12
    d = g["mean_difference"] / g["sd_difference"]
    t_crit = stats.t.ppf(0.95, n - 1)
    expected = stats.nct.sf(t_crit, n - 1, np.sqrt(n) * d)
    assert g["power"] == pytest.approx(expected, abs=0.12)
    assert res["participants_simulated"] == 150 * 12


def test_plan_finds_a_design_and_power_grows(client):
    res = plan([5, 30], [20, 60], model=PlanModel(beta=1.0, gamma=0.5), n_studies=60, seed=1, client=client)
    power = {(g["participants"], g["trials"]): g["power"] for g in res["grid"]}
    assert power[(30, 60)] >= power[(5, 20)]
    assert power[(30, 60)] > 0.8 and res["smallest"] is not None


def test_plan_without_an_effect_rarely_detects_one(client):
    # beta = 0: the model has nothing to predict with, so it cannot beat the rival.
    res = plan([20], [40], model=PlanModel(beta=0.0, beta_sd=0.0, gamma=0.5), n_studies=60, seed=2, client=client)
    assert res["grid"][0]["power"] <= 0.1 and res["smallest"] is None


def test_simulated_fits_are_reproducible():
    a = simulate_fits(3, 4, 20, asdict(PlanModel()))
    assert np.array_equal(a, simulate_fits(3, 4, 20, asdict(PlanModel())))


def test_plan_model_validation():
    with pytest.raises(ValueError, match="rho"):
        PlanModel(rho=1.5)
    with pytest.raises(ValueError, match="n_participants"):
        plan([2], [40], n_studies=10)
