"""The occfuse command: db upgrade, node add, plan load, free, and clear errors."""

from __future__ import annotations

import pytest
from click.testing import CliRunner

from fusion.cli import cli

PLAN_TOML = """
[[channel]]
id = "21"
center_hz = 474_000_000
bandwidth_hz = 6e6

[[channel]]
id = "ch-b"
center_hz = 482e6
bandwidth_hz = 6e6
"""


@pytest.fixture
def runner(tmp_path, monkeypatch):
    monkeypatch.setenv("OCCFUSE_DATABASE_URL", f"sqlite:///{tmp_path / 'cli.db'}")
    monkeypatch.setenv("OCCFUSE_CONFIG", "")  # so the --config test cannot leak its file into later tests
    return CliRunner()


def test_db_upgrade_creates_the_schema(runner):
    r = runner.invoke(cli, ["db", "upgrade"])
    assert r.exit_code == 0, r.output
    assert "is at head" in r.output


def test_node_add_prints_the_token_once(runner):
    r = runner.invoke(cli, ["node", "add", "mast-1"])
    assert r.exit_code == 0, r.output
    token = r.stdout.strip().splitlines()[0]
    assert len(token) >= 43
    again = runner.invoke(cli, ["node", "add", "mast-1"])
    assert again.exit_code == 2 and "already exists" in again.output
    listed = runner.invoke(cli, ["node", "list"])
    assert "mast-1" in listed.output and token not in listed.output


def test_plan_load_and_integer_ids(runner, tmp_path):
    f = tmp_path / "plan.toml"
    f.write_text(PLAN_TOML)
    r = runner.invoke(cli, ["plan", "load", str(f)])
    assert r.exit_code == 0, r.output
    assert "2 channels" in r.output


@pytest.mark.parametrize("text,needle", [
    ("[[channel]]\nid = \"a\"\ncenter_hz = -1\nbandwidth_hz = 1e6\n", "channel[0].center_hz"),
    ("[[channel]]\nid = \"a\"\ncenter_hz = 1e6\n", "channel[0].bandwidth_hz"),
    ("title = 'no channels'\n", "no [[channel]]"),
    ("[[channel]]\nid = \"a\"\ncenter_hz = 1e6\nbandwidth_hz = 1e3\n[[channel]]\nid = \"a\"\n"
     "center_hz = 2e6\nbandwidth_hz = 1e3\n", "more than once"),
])
def test_bad_plan_files_fail_with_the_path(runner, tmp_path, text, needle):
    f = tmp_path / "plan.toml"
    f.write_text(text)
    r = runner.invoke(cli, ["plan", "load", str(f)])
    assert r.exit_code == 2 and needle in r.output


def test_free_before_any_epoch_says_nothing_is_known(runner):
    r = runner.invoke(cli, ["free", "--min-confidence", "0.9"])
    assert r.exit_code == 0 and "nothing is known to be free" in r.output


def test_free_rejects_a_confidence_outside_0_1(runner):
    r = runner.invoke(cli, ["free", "--min-confidence", "1.5"])
    assert r.exit_code == 2


def test_config_file_option(runner, tmp_path):
    f = tmp_path / "c.toml"
    f.write_text("interval_s = 'often'\n")
    r = runner.invoke(cli, ["--config", str(f), "free"])
    assert r.exit_code == 2 and "interval_s" in r.output.lower()


def test_free_warns_when_the_design_snr_is_below_the_snr_wall(runner, monkeypatch):
    # Tandra & Sahai (2008): 2 dB of noise uncertainty puts the wall at 10 log10(rho - 1/rho) = -0.2 dB, so
    # the default design SNR (-10 dB) cannot be detected at any sensing time; the command says so on stderr.
    monkeypatch.setenv("OCCFUSE_NOISE_UNCERTAINTY_DB", "2")
    r = CliRunner().invoke(cli, ["free"])
    assert r.exit_code == 0 and "warning: snr_db: Target SNR -10.0 dB is below the SNR wall" in r.stderr


def test_noise_uncertainty_must_be_a_sane_number_of_db(runner, monkeypatch):
    monkeypatch.setenv("OCCFUSE_NOISE_UNCERTAINTY_DB", "-1")
    r = CliRunner().invoke(cli, ["free"])
    assert r.exit_code != 0 and "NOISE_UNCERTAINTY_DB must be in [0, 20) dB, was -1.0" in r.output
