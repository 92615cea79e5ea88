"""occfuse evaluate and occfuse replay as a user runs them: outputs, JSON on stdout only, clear errors."""

from __future__ import annotations

import csv
import json

import pytest
from click.testing import CliRunner

from fusion.cli import cli

SHORT = ["--nodes", "4", "--snr-db", "-10", "--samples", "200", "--trials", "2000", "--seed", "1"]


@pytest.fixture
def runner(tmp_path, monkeypatch):
    monkeypatch.setenv("OCCFUSE_DATABASE_URL", f"sqlite:///{tmp_path / 'cli.db'}")
    monkeypatch.setenv("OCCFUSE_CONFIG", "")
    return CliRunner()


def test_evaluate_json_prints_only_the_report_on_stdout(runner):
    r = runner.invoke(cli, ["evaluate", *SHORT, "--fading", "rayleigh", "--rules", "or,k_of_n:3,majority,egc",
                            "--json"])
    assert r.exit_code == 0, r.output
    report = json.loads(r.stdout)  # nothing but the JSON document
    assert report["target_pf"] == 0.1
    assert [(x["rule"], x["k"]) for x in report["rules"]] == [("or", 1), ("k_of_n", 3), ("majority", 3), ("egc", None)]
    for x in report["rules"]:
        assert set(x["pd_at_target_pf"]) == {"monte_carlo", "ci", "analytic"}
        assert len(x["roc"]["pf"]) == len(x["roc"]["pd"])


def test_evaluate_out_writes_json_csv_and_plots(runner, tmp_path):
    out = tmp_path / "ev"
    r = runner.invoke(cli, ["evaluate", *SHORT, "--rules", "or,egc,weighted_llr", "--out", str(out)])
    assert r.exit_code == 0, r.output
    assert "meets 802.22" in r.stdout and "egc" in r.stdout
    for name in ("roc.png", "calibration.png", "falsifiers.png", "optimal_k.png"):
        assert (out / name).read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
    assert json.loads((out / "evaluate.json").read_text())["trials"] == 2000
    with open(out / "evaluate.csv", newline="") as fh:
        rows = list(csv.DictReader(fh))
    assert {"roc_mc", "roc_analytic", "falsifiers_mc", "calibration"} <= {row["series"] for row in rows}


def test_evaluate_a_shipped_scenario_by_name(runner):
    r = runner.invoke(cli, ["evaluate", "ridge10", "--rules", "or,egc", "--trials", "1000", "--json"])
    assert r.exit_code == 0, r.output
    assert json.loads(r.stdout)["setup"]["scenario"] == "Ridgeway ten"


@pytest.mark.parametrize("args,needle", [
    ([], "give a SCENARIO"),
    (["demo", "--nodes", "3"], "not both"),
    (["--nodes", "3", "--snr-db", "-10", "--samples", "100", "--rules", "nope"], "unknown rule"),
    (["--nodes", "3", "--snr-db", "-10", "--samples", "100", "--rules", "k_of_n:4"], "[1, 3]"),
    (["demo", "--channel", "XX"], "not in the scenario"),
    (["--nodes", "3", "--snr-db", "-10", "--samples", "100", "--target-pf", "1.5"], "target-pf"),
])
def test_evaluate_bad_input_is_a_usage_error_naming_what(runner, args, needle):
    r = runner.invoke(cli, ["evaluate", *args])
    assert r.exit_code == 2
    assert needle in r.output


def test_replay_on_an_empty_database_replays_nothing(runner):
    r = runner.invoke(cli, ["replay", "--rules", "egc,k_of_n:2", "--json"])
    assert r.exit_code == 0, r.output
    out = json.loads(r.stdout)
    assert out["epochs"] == 0 and [x["label"] for x in out["rules"]] == ["egc", "2_of_n"]


@pytest.mark.parametrize("args,needle", [
    (["--rules", "bogus"], "unknown rule"),
    (["--rules", "egc", "--since", "yesterday"], "RFC 3339"),
])
def test_replay_bad_input_names_the_option(runner, args, needle):
    r = runner.invoke(cli, ["replay", *args])
    assert r.exit_code == 2 and needle in r.output


def test_replay_refuses_a_file_that_is_not_a_truth_log(runner, tmp_path):
    f = tmp_path / "t.jsonl"
    f.write_text("not json\n")
    r = runner.invoke(cli, ["replay", "--rules", "egc", "--truth", str(f)])
    assert r.exit_code == 2 and "ground-truth" in r.output


def test_ctrl_c_during_evaluate_still_writes_the_partial_results(runner, tmp_path, monkeypatch):
    """Ctrl-C (KeyboardInterrupt) after the first chunk of trials: files written, marked incomplete, exit 130."""
    from sim_nodes import evaluate as ev

    real, calls = ev._run_chunk, []

    def interrupted(*args, **kwargs):
        calls.append(1)
        if len(calls) > 1:
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(ev, "_run_chunk", interrupted)
    monkeypatch.setattr(ev, "_CHUNK", 500)
    out = tmp_path / "partial"
    r = runner.invoke(cli, ["evaluate", "--nodes", "3", "--snr-db", "-10", "--samples", "100", "--trials", "5000",
                            "--rules", "or,egc", "--out", str(out)])
    assert r.exit_code == 130
    report = json.loads((out / "evaluate.json").read_text())
    assert report["complete"] is False and report["trials"] == 500
    assert (out / "roc.png").exists() and "INTERRUPTED" in r.stdout
