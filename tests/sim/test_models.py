"""Transmitter activity, node behaviours and scenario files."""

import numpy as np
import pytest
from numpy.testing import assert_allclose

from sim_nodes.activity import markov_timeline, schedule_timeline
from sim_nodes.behaviour import make_behaviour
from sim_nodes.scenario import DEMO_SCENARIO, SCENARIO_DIR, load_scenario, parse_scenario


class TestMarkovTimeline:
    def test_holding_times_and_duty_cycle(self):
        # Alternating renewal process with exponential holding times (standard result): mean holding
        # times as given, long-run duty cycle on/(on+off). Exponential holding times have sd = mean,
        # so each sample mean has se mean/sqrt(k); tolerance 4 se. The duty cycle of a horizon
        # H has sd sqrt(2 on^2 off^2 / ((on+off)^3 H)) (renewal-reward CLT, from memory); 4 sd.
        on, off, h = 3.0, 7.0, 50_000.0
        tl = markov_timeline(on, off, h, rng=np.random.default_rng(7))
        dur = np.diff(np.append(tl.times, h))[:-1]
        st = tl.states[:-1]
        for state, mean in ((True, on), (False, off)):
            d = dur[st == state]
            assert abs(d.mean() - mean) < 4 * mean / np.sqrt(d.size)
        duty_sd = np.sqrt(2 * on**2 * off**2 / ((on + off) ** 3 * h))
        assert abs(tl.on_time() / h - 0.3) < 4 * duty_sd
        assert np.all(tl.states[1:] != tl.states[:-1])

    def test_state_at_and_start_state(self):
        tl = markov_timeline(1.0, 1.0, 100.0, rng=1, start_on=True)
        assert bool(tl.state_at(0.0)) and tl.times[0] == 0.0
        assert bool(tl.state_at(tl.times[1])) is False

    def test_input_validation(self):
        with pytest.raises(ValueError, match="`mean_on_s` must be positive"):
            markov_timeline(0.0, 1.0, 10.0)


class TestScheduleTimeline:
    def test_intervals(self):
        tl = schedule_timeline([(0.0, 2.0), (5.0, 8.0)], 7.0)
        assert tl.times.tolist() == [0.0, 2.0, 5.0] and tl.states.tolist() == [True, False, True]
        assert_allclose(tl.on_time(), 4.0)

    def test_input_validation(self):
        with pytest.raises(ValueError, match="must not overlap"):
            schedule_timeline([(0, 5), (3, 6)], 10)


class TestBehaviours:
    def test_stuck_repeats_its_last_sweep_before_the_fault(self):
        b = make_behaviour({"kind": "stuck", "after_s": 5.0}, 60.0)
        rng = np.random.default_rng(0)
        b.transform(1.0, [1.0, 2.0], 1.0, 10, rng)
        last = b.transform(4.0, [3.0, 4.0], 1.0, 10, rng)
        assert b.transform(9.0, [7.0, 7.0], 1.0, 10, rng).tolist() == last.tolist() == [3.0, 4.0]

    def test_silent_spells_cover_their_share_of_time(self):
        # Silent share = silent / (silent + active) = 0.25 (alternating renewal); 10^4 s of ~100 spells:
        # the tolerance 0.06 is ~4 sd of a duty cycle over ~250 cycles (renewal CLT, from memory).
        b = make_behaviour({"kind": "silent", "mean_active_s": 30.0, "mean_silent_s": 10.0}, 10_000.0, rng=3)
        share = np.mean([not b.reporting(t) for t in np.arange(0, 10_000.0, 1.0)])
        assert abs(share - 0.25) < 0.06

    def test_drift_ramps_to_its_cap(self):
        b = make_behaviour({"kind": "drift", "after_s": 10.0, "rate_db_per_min": 6.0, "max_db": 3.0}, 100.0)
        assert [b.noise_offset_db(t) for t in (5.0, 20.0, 90.0)] == [0.0, 1.0, 3.0]

    @pytest.mark.parametrize("mode, scale", [("free", 1.0), ("occupied", 11.0)])
    def test_falsifiers_report_noise_or_a_fake_signal(self, mode, scale):
        # Mean of Gamma(N, 1)/N times the floor (1 + snr) is the floor (1 + snr); 2000 draws of N = 100
        # give relative se 1/sqrt(2e5); tolerance 4 se.
        b = make_behaviour({"kind": "falsify", "mode": mode, "fake_snr_db": 10.0}, 10.0)
        p = b.transform(1.0, np.full(2000, 1e-9), 2.0, 100, np.random.default_rng(1))
        assert_allclose(p.mean(), 2.0 * scale, rtol=4 / np.sqrt(2e5))

    def test_input_validation(self):
        with pytest.raises(ValueError, match="behaviour `kind` must be one of"):
            make_behaviour("sleepy", 10.0)
        with pytest.raises(ValueError, match="takes"):
            make_behaviour({"kind": "stuck", "rate_db_per_min": 1.0}, 10.0)
        with pytest.raises(ValueError, match="falsify `mode`"):
            make_behaviour({"kind": "falsify", "mode": "sometimes"}, 10.0)


class TestScenarioFiles:
    @pytest.mark.parametrize("path", sorted(SCENARIO_DIR.glob("*.toml")), ids=lambda p: p.stem)
    def test_shipped_scenarios_load(self, path):
        sc = load_scenario(path)
        assert sc.nodes and sc.channels and sc.transmitters

    def test_demo_scenario_fits_the_brief(self):
        sc = load_scenario(DEMO_SCENARIO)
        assert 6 <= len(sc.nodes) <= 10 and 6 <= len(sc.channels) <= 10
        assert all(n.interval_s == 1.0 for n in sc.nodes)
        means = [v for t in sc.transmitters for k, v in t.activity.items() if k.startswith("mean_")]
        assert all(10.0 <= m <= 60.0 for m in means)  # "tens of seconds"

    def test_ten_node_scenario_by_name(self):
        assert len(load_scenario("ridge10").nodes) == 10

    @pytest.mark.parametrize(
        "change, message",
        [
            ({"channel": []}, "at least one"),
            ({"node": [{"name": "bad name!", "x_m": 0.0, "y_m": 0.0}]}, "must be 1-64 characters"),
            ({"propagation": {"fading": "rician"}}, "fading must be"),
            ({"propagation": {"colour": "blue"}}, "unknown keys"),
            ({"transmitter": [{"name": "t", "x_m": 0.0, "y_m": 0.0, "eirp_dbm": 0.0, "channels": ["zz"],
                               "activity": {"kind": "markov", "mean_on_s": 1.0, "mean_off_s": 1.0}}]},
             "unknown channels"),
        ],
    )
    def test_input_validation(self, change, message):
        base = {"channel": [{"id": "a", "center_hz": 1e9, "bandwidth_hz": 1e6}],
                "node": [{"name": "n1", "x_m": 0.0, "y_m": 0.0}], "transmitter": []}
        with pytest.raises(ValueError, match=message):
            parse_scenario({**base, **change})


def test_exported_names():
    import sim_nodes

    assert set(sim_nodes.__all__) == {"DEMO_SCENARIO", "load_scenario", "run_scenario", "load_truth"}
    assert sim_nodes.DEMO_SCENARIO.exists()
