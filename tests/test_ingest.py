"""fusion.ingest without a database: both report forms pack to the same row, and `same_content` across plans."""

from __future__ import annotations

import json
from datetime import datetime, timedelta, timezone

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from fusion.api.schemas import ReportBatchIn, ReportIn
from fusion.errors import Unprocessable
from fusion.ingest import NodeRef, fingerprint, prepare_reports, same_content
from fusion.plan import PlanIndex

NOW = datetime(2026, 6, 1, 12, 0, tzinfo=timezone.utc)
IDS = [f"c{j}" for j in range(6)]
PLAN = PlanIndex(1, NOW - timedelta(days=1), {c: j for j, c in enumerate(IDS)},
                 tuple((c, 4.7e8 + 8e6 * j, 6e6) for j, c in enumerate(IDS)))
NODE = NodeRef(3, "roof-a")
CHECK = dict(now=NOW, max_skew_s=30.0, max_measurements=4096)

_power = st.floats(-300, 100) | st.integers(-200, 50)
_report = st.fixed_dictionaries({
    "seq": st.integers(0, 2**63 - 1),
    "n_samples": st.integers(1, 10**12),
    "noise_dbm": st.none() | st.floats(-130, -50),
    "values": st.dictionaries(st.sampled_from(IDS), _power, min_size=1, max_size=len(IDS)),
    "skipped": st.lists(st.sampled_from(IDS), max_size=3, unique=True),  # listed in `channels` as null
})


def _objects(r) -> dict:
    return {"seq": r["seq"], "measured_at": NOW.isoformat(), "n_samples": r["n_samples"],
            "noise_dbm": r["noise_dbm"],
            "measurements": [{"channel": c, "power_dbm": p} for c, p in r["values"].items()]}


def _compact(r, *, own_channels: bool) -> dict:
    ids = list(r["values"]) + [c for c in r["skipped"] if c not in r["values"]]
    body = {"seq": r["seq"], "measured_at": NOW.isoformat(), "n_samples": r["n_samples"],
            "noise_dbm": r["noise_dbm"], "powers_dbm": [r["values"].get(c) for c in ids]}
    if own_channels:
        body["channels"] = ids
    return body, ids


class TestBothForms:
    @settings(max_examples=200, deadline=None, derandomize=True, database=None)
    @given(r=_report)
    def test_a_report_packs_to_the_same_row_in_either_form(self, r):
        objects = ReportIn.model_validate_json(json.dumps(_objects(r)))
        compact = ReportIn.model_validate_json(json.dumps(_compact(r, own_channels=True)[0]))
        a = prepare_reports(NODE, [objects], PLAN, prefix="", **CHECK)[r["seq"]]
        b = prepare_reports(NODE, [compact], PLAN, prefix="", **CHECK)[r["seq"]]
        assert a == b
        expected = np.full(len(IDS), np.nan, np.float32)
        for c, p in r["values"].items():
            expected[IDS.index(c)] = p  # stored as float32 (DESIGN.md "reports")
        np.testing.assert_array_equal(np.frombuffer(b["powers"], "<f4"), expected)
        assert b["content_hash"] == fingerprint(b["seq"], b["measured_at"], b["n_samples"], b["powers"], b["noise"])

    @settings(max_examples=50, deadline=None, derandomize=True, database=None)
    @given(reports=st.lists(_report, min_size=1, max_size=5, unique_by=lambda r: r["seq"]))
    def test_a_batch_sharing_one_channel_list_packs_like_single_reports(self, reports):
        """The batch path packs every report of a channel list at once; it must match one report at a time."""
        ids = IDS[::-1]  # one list for all: every channel, in an order unlike the plan's
        items = [{k: v for k, v in _compact(r, own_channels=False)[0].items() if k != "powers_dbm"}
                 | {"powers_dbm": [r["values"].get(c) for c in ids]} for r in reports]
        batch = ReportBatchIn.model_validate_json(json.dumps({"channels": ids, "reports": items}))
        together = prepare_reports(NODE, batch.reports, PLAN, channels=batch.channels, prefix="reports", **CHECK)
        for rep in batch.reports:
            alone = prepare_reports(NODE, [rep], PLAN, channels=batch.channels, prefix="", **CHECK)
            assert alone[rep.seq] == together[rep.seq]


class TestSameContent:
    def _row(self, revision, powers, noise=None):
        return {"measured_at": NOW, "n_samples": 100, "plan_revision": revision,
                "powers": np.asarray(powers, "<f4").tobytes(),
                "noise": None if noise is None else np.asarray(noise, "<f4").tobytes()}

    def test_same_plan_compares_the_packed_bytes(self):
        a = self._row(1, [-90.0, np.nan])
        assert same_content(a, dict(a), None, ("x", "y"))
        assert not same_content(a, self._row(1, [-91.0, np.nan]), None, ("x", "y"))
        assert not same_content(a, {**a, "n_samples": 101}, None, ("x", "y"))

    def test_across_plans_compares_channel_by_channel(self):
        old = self._row(1, [-90.0, -80.0, np.nan], [-100.0, -100.0, np.nan])
        moved = self._row(2, [np.nan, -80.0, -90.0, np.nan], [np.nan, -100.0, -100.0, np.nan])
        assert same_content(old, moved, ("a", "b", "c"), ("new", "b", "a", "c"))
        other = self._row(2, [np.nan, -80.0, -91.0, np.nan], [np.nan, -100.0, -100.0, np.nan])
        assert not same_content(old, other, ("a", "b", "c"), ("new", "b", "a", "c"))
        # a channel measured in one and not the other is other content
        extra = self._row(2, [-70.0, -80.0, -90.0, np.nan], [-100.0, -100.0, -100.0, np.nan])
        assert not same_content(old, extra, ("a", "b", "c"), ("new", "b", "a", "c"))


def test_remembered_channel_positions_follow_the_plan():
    """Positions of a channel list are remembered per plan revision: the same list sent after a plan that
    reorders the channels lands on the new positions, and an invalid list is never remembered."""
    body = {"seq": 1, "measured_at": NOW.isoformat(), "n_samples": 10, "channels": ["c0", "c5"],
            "powers_dbm": [-90.0, -80.0]}
    rep = ReportIn.model_validate_json(json.dumps(body))
    reordered = list(reversed(IDS))
    plan2 = PlanIndex(2, NOW, {c: j for j, c in enumerate(reordered)},
                      tuple((c, 4.7e8 + 8e6 * j, 6e6) for j, c in enumerate(reordered)))
    for plan, order in ((PLAN, IDS), (plan2, reordered), (PLAN, IDS)):
        powers = np.frombuffer(prepare_reports(NODE, [rep], plan, prefix="", **CHECK)[1]["powers"], "<f4")
        assert powers[order.index("c0")] == -90.0 and powers[order.index("c5")] == -80.0
        assert np.isnan(powers).sum() == len(IDS) - 2
    bad = ReportIn.model_validate_json(json.dumps({**body, "channels": ["c0", "nope"]}))
    for _ in range(2):  # refused both times, with the same path
        with pytest.raises(Unprocessable) as refused:
            prepare_reports(NODE, [bad], PLAN, prefix="", **CHECK)
        assert refused.value.errors[0]["path"] == "channels[1]"
