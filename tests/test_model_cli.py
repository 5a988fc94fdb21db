"""``lethe fit`` end to end on a home whose vault holds synthetic trials, answers and episodes."""

import json
import shutil

import numpy as np

from agent.cli import main
from agent.errors import EXIT_DATA, EXIT_STATE, EXIT_USAGE


def _fill(home, repo, n_trials=60, days=10):
    from agent.graph import CooccurrenceGraph
    from agent.model.design import ModelGraph
    from agent.model.synthetic import quiz_trials, routine_episodes, simulate_answers
    from agent.policy import load_policy
    from agent.vault import Vault

    # the default policy with a quick fit (2 folds, 1 restart) to keep the test short
    text = (repo / "policies" / "default.toml").read_text()
    text = text.replace("folds = 5", "folds = 2\nrecovery_sims = 3").replace("restarts = 2", "restarts = 1")
    home.policy_path.write_text(text)
    home.write_config({"pseudonym": "test"})
    policy = load_policy(home.policy_path)
    assert policy.model.folds == 2
    eps = routine_episodes(days, seed=1)
    mg = ModelGraph.from_graph(CooccurrenceGraph.from_episodes(eps, policy))
    trials = quiz_trials(eps, n_trials, seed=2)
    rows = simulate_answers(mg, trials, mg.theta_dict(np.ones(len(mg.type_pairs))), 2.0, 0.2, seed=3)
    v = Vault.open(home)
    for e in eps:
        v.put("episodes", e["key"], e)
    for t, r in zip(trials, rows, strict=True):
        v.put("trials", t["trial_id"], t)
        v.put("answers", t["trial_id"], {"trial_id": t["trial_id"], "choice": r["choice"], "rt_s": 2.0,
                                          "answered_at": 0.0, "source": "simulated"})
    v.close()


def test_fit_json_stores_latest(home, repo, capsys):
    from agent.vault import Vault

    _fill(home, repo)
    assert main(["--home", str(home.root), "fit", "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    rivals = {"chance", "most_visited", "frequency", "centrality", "time_links", "actr"}
    assert set(out["baselines"]) == rivals
    # --json carries the paired model-minus-rival differences
    assert set(out["paired"]) == rivals
    assert set(out["paired"]["frequency"]) == {"loglik", "agreement", "accuracy"}
    assert out["n_trials"] == 60
    v = Vault.open(home)
    stored = v.get("fits", "latest")
    v.close()
    assert stored["params"] == out["params"]


def test_fit_text_prints_the_table(home, repo, capsys):
    _fill(home, repo)
    assert main(["--home", str(home.root), "fit", "--no-store"]) == 0
    text = capsys.readouterr().out
    assert "cue-biased eigenvector" in text and "chance" in text
    assert "model minus rival" in text and "ACT-R base level" in text


def test_fit_without_trials_exits_with_data_error(home, repo, capsys):
    shutil.copy(repo / "policies" / "default.toml", home.policy_path)
    home.write_config({"pseudonym": "test"})
    assert main(["--home", str(home.root), "fit"]) == EXIT_DATA
    assert "no quiz trials" in capsys.readouterr().err


def test_fit_refuses_too_few_answers(home, repo, capsys):
    # 8 answers: below MIN_FIT_ANSWERS, so the fit is refused rather than printing noise
    from agent.model.fit import MIN_FIT_ANSWERS

    _fill(home, repo, n_trials=8)
    assert main(["--home", str(home.root), "fit"]) == EXIT_STATE
    err = capsys.readouterr().err
    assert "8 answered" in err and f"at least {MIN_FIT_ANSWERS} answers" in err


def test_fit_refuses_answers_from_too_few_days(home, repo, capsys):
    # plenty of answers, but all from two days: day folds cannot hold anything out
    from agent.model.fit import MIN_FIT_DAYS

    _fill(home, repo, n_trials=40, days=2)
    assert main(["--home", str(home.root), "fit"]) == EXIT_STATE
    assert f"on {MIN_FIT_DAYS} different days" in capsys.readouterr().err


def test_fit_outside_a_home_exits_with_state_error(tmp_path, capsys):
    assert main(["--home", str(tmp_path / "none"), "fit"]) == EXIT_STATE


def test_fit_full_weights_fits_one_weight_per_pair(home, repo, capsys):
    _fill(home, repo)
    assert main(["--home", str(home.root), "fit", "--json", "--no-store", "--weights", "full"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["params"]["weights"] == "full"
    assert set(out["params"]["theta_groups"]) == set(out["params"]["theta"])
    assert out["recovery"]["n_sims"] == 3


def test_graph_reports_routine_diagnostics(home, repo, capsys):
    _fill(home, repo)
    assert main(["--home", str(home.root), "graph", "--json", "--cap-rule", "routine", "--degree-cap", "6"]) == 0
    out = json.loads(capsys.readouterr().out)
    d = out["diagnostics"]
    assert out["cap_rule"] == "routine" and out["degree_cap"] == 6
    assert d["n_isolated"] == 0 and d["hours_without_place_2"] == []
    assert d["n_trials"] == 60 and 0 <= d["trials_reachable"] <= 1
    assert main(["--home", str(home.root), "graph"]) == 0
    text = capsys.readouterr().out
    assert "isolated nodes" in text and "memory-test trials" in text


def test_graph_refuses_an_unknown_cap_rule(home, repo, capsys):
    _fill(home, repo)
    assert main(["--home", str(home.root), "graph", "--cap-rule", "widest"]) == EXIT_USAGE
    assert "cap_rule 'widest'" in capsys.readouterr().err


def test_fit_help_states_the_thresholds_in_force(capsys):
    # the help text is written out (importing the model at start-up would slow every command)
    import pytest

    from agent.model.fit import MIN_FIT_ANSWERS, MIN_FIT_DAYS

    with pytest.raises(SystemExit):
        main(["fit", "--help"])
    text = " ".join(capsys.readouterr().out.split())
    assert f"at least {MIN_FIT_ANSWERS} answers on {MIN_FIT_DAYS} different" in text
