"""The dashboard in a real browser: headless Chromium (Debian's package) driven by Playwright, against a live
server with a running simulation. Under CI=true a missing browser fails the test; elsewhere it skips."""

from __future__ import annotations

import os
import threading
from pathlib import Path

import pytest

from fusion.server import LiveServer
from tests.conftest import ADMIN, PLAN

pytestmark = pytest.mark.http

CHROMIUM = Path("/usr/bin/chromium")
# Playwright adds --no-sandbox and the usual automation switches itself; these keep a headless run offline.
ARGS = ["--disable-gpu", "--disable-sync", "--disable-quic", "--no-first-run"]
READER = "reader-secret-for-browser-tests"


def _unavailable(reason: str):
    if os.environ.get("CI") == "true":
        pytest.fail(f"{reason}; CI must run the browser test (.ci/run installs chromium)")
    pytest.skip(f"{reason} (apt-get install chromium chromium-driver; pip install -e '.[test]')")


@pytest.fixture(scope="module")
def browser():
    try:
        from playwright.sync_api import sync_playwright
    except ImportError:
        _unavailable("Playwright for Python is not installed")
    if not CHROMIUM.exists():
        _unavailable(f"no Chromium at {CHROMIUM}")
    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=str(CHROMIUM), headless=True, args=ARGS)
        yield b
        b.close()


@pytest.fixture
def page(browser):
    context = browser.new_context(viewport={"width": 1280, "height": 900})
    pg = context.new_page()
    errors: list[str] = []
    pg.on("pageerror", lambda exc: errors.append(str(exc)))
    pg.on("console", lambda msg: errors.append(msg.text) if msg.type == "error" else None)
    pg.expected_statuses = ()  # a test that provokes refusals lists them here
    yield pg
    context.close()
    expected = [f"status of {code} " for code in pg.expected_statuses]
    errors = [e for e in errors if not (e.startswith("Failed to load resource") and any(x in e for x in expected))]
    assert errors == [], errors  # no script errors, no CSP violations (Chromium logs those as console errors)


@pytest.fixture
def artifacts(tmp_path) -> Path:
    """Where screenshots go: $OCCFUSE_TEST_ARTIFACTS (CI keeps it) or the test's temp dir."""
    out = Path(os.environ.get("OCCFUSE_TEST_ARTIFACTS") or tmp_path)
    out.mkdir(parents=True, exist_ok=True)
    return out


def pct(x):
    """The page's confidence format (dashboard.js `pct`)."""
    if x is None:
        return "–"
    return "≥ 99.9 %" if x * 100 >= 99.95 else f"{x * 100:.1f} %"


CELLS_JS = "() => [...document.querySelectorAll('#band .cell')].map(c => [c.dataset.channel, c.dataset.state])"


@pytest.mark.parametrize("db_url", ["sqlite"], indirect=True)  # one backend is enough for the page
def test_dashboard_follows_a_live_simulation(make_app, page, artifacts):
    import httpx

    from sim_nodes.client import run_scenario
    from sim_nodes.scenario import DEMO_SCENARIO, load_scenario

    scenario = load_scenario(DEMO_SCENARIO)
    speedup = 4.0  # 40 simulated seconds in 10 wall seconds; reports every 0.25 s of wall time
    app = make_app(TESTING=False, INTERVAL_S=0.5, RULE="weighted_llr", MIN_NODES=2, MAX_AGE_S=1.5)
    with LiveServer(app, "127.0.0.1", 0) as server, httpx.Client(base_url=server.url, timeout=10) as http:
        outcome = {}
        # Put the plan first so the page opens on a full band of unknown cells, before any report.
        assert http.put("/api/v1/plan", json={"channels": [
            {"id": c.id, "center_hz": c.center_hz, "bandwidth_hz": c.bandwidth_hz} for c in scenario.channels]},
            headers={"Authorization": f"Bearer {ADMIN}"}).status_code == 200
        page.goto(server.url + "/")
        first = page.evaluate(CELLS_JS)
        assert [cid for cid, _ in first] == [c.id for c in scenario.channels]
        assert {state for _, state in first} == {"unknown"}  # no evidence yet is never "free"

        page.click(".range button[data-minutes='5']")  # zoom the chart: the run is seconds long
        sim = threading.Thread(target=lambda: outcome.update(summary=run_scenario(
            scenario, server.url, ADMIN, duration_s=40, speedup=speedup, seed=11, drain_s=2)), daemon=True)
        sim.start()
        seen: dict[str, list[str]] = {cid: [state] for cid, state in first}
        polls, shot = 0, artifacts / "dashboard.png"
        shot.unlink(missing_ok=True)
        while sim.is_alive():
            # Wait for the page's own next poll (it polls every max(1 s, interval_s)), then read its cells.
            page.wait_for_function(f"() => Number(document.body.dataset.polls) > {polls}", timeout=10_000)
            polls = int(page.evaluate("document.body.dataset.polls"))
            cells = page.evaluate(CELLS_JS)
            for cid, state in cells:
                if seen[cid][-1] != state:
                    seen[cid].append(state)
            if not shot.exists() and {"free", "occupied"} <= {state for _, state in cells}:
                page.screenshot(path=str(shot), full_page=True)  # a moment with both states on screen
        sim.join()
        assert outcome["summary"].delivered > 0
        # The cells changed state while the page stayed open: every channel left "unknown", and at least one
        # went both ways between free and occupied as its transmitter came and went (demo.toml's schedules).
        assert all(len(states) > 1 for states in seen.values()), seen
        assert any({"free", "occupied"} <= set(states) for states in seen.values()), seen

        # Freeze the service, then the page must converge to exactly what the API says.
        server.scheduler.shutdown()
        api = http.get("/api/v1/channels").json()
        page.wait_for_function("asOf => document.getElementById('band').dataset.asOf === asOf",
                               arg=api["as_of"], timeout=10_000)
        cells = page.evaluate("""() => [...document.querySelectorAll('#band .cell')].map(c => ({
            id: c.dataset.channel, state: c.dataset.state,
            text: c.querySelector('.cell-state').textContent.trim(),
            conf: c.querySelector('.cell-conf').textContent.replace('conf.', '').trim(),
            pattern: getComputedStyle(c).backgroundImage, border: getComputedStyle(c).borderTopStyle}))""")
        assert [(c["id"], c["state"], c["conf"]) for c in cells] == [
            (c["id"], c["state"], pct(c["confidence"])) for c in api["channels"]]
        for c in cells:
            # State is readable without colour: a word, and a pattern (hatching / dots / plain, dashed border).
            assert c["text"].endswith(c["state"])
            assert ("gradient" in c["pattern"]) == (c["state"] != "free"), c
            assert (c["border"] == "dashed") == (c["state"] == "unknown"), c

        nodes = http.get("/api/v1/nodes").json()["nodes"]
        rows = page.evaluate("() => [...document.querySelectorAll('#nodes-body tr')].map(r => r.dataset.node)")
        assert rows == [n["name"] for n in nodes] and len(rows) == len(scenario.nodes)
        assert page.text_content("#rule-name") == "weighted_llr"
        chart_states = set(page.evaluate(
            "() => [...document.querySelectorAll('#chart .seg')].map(s => s.dataset.state)"))
        assert {"free", "occupied"} <= chart_states
        if not shot.exists():
            page.screenshot(path=str(shot), full_page=True)
        page.goto("about:blank")  # stop the page's polling before the server goes (else a poll may be reset)


@pytest.mark.parametrize("db_url", ["sqlite"], indirect=True)
def test_with_a_read_token_the_page_asks_for_it_and_keeps_it_in_session_storage(make_app, page):
    import httpx

    app = make_app(TESTING=False, READ_TOKEN=READER)
    with LiveServer(app, "127.0.0.1", 0, scheduler=False) as server:
        assert httpx.put(server.url + "/api/v1/plan", json=PLAN,
                         headers={"Authorization": f"Bearer {ADMIN}"}).status_code == 200
        page.goto(server.url + "/")
        assert page.is_visible("#auth-form") and not page.is_visible("#band")
        assert page.locator("#band .cell").count() == 0

        page.expected_statuses = (401,)  # the wrong token below is refused, and Chromium logs that
        page.fill("#token", "not-the-token")
        page.click("#auth-form button")
        page.wait_for_selector("#auth-message:has-text('Not accepted')")
        assert page.evaluate("sessionStorage.getItem('occfuse.readToken')") is None

        page.fill("#token", READER)
        page.click("#auth-form button")
        page.wait_for_selector("#band .cell")
        assert page.locator("#band .cell").count() == len(PLAN["channels"])
        assert page.evaluate("sessionStorage.getItem('occfuse.readToken')") == READER

        page.reload()  # the same tab keeps the token; the page source never contains it
        page.wait_for_selector("#band .cell")
        assert READER not in page.evaluate("document.documentElement.outerHTML")
        assert ADMIN not in page.evaluate("document.documentElement.outerHTML")
        page.goto("about:blank")  # stop the page's polling before the server goes (else a poll may be reset)


@pytest.mark.parametrize("ci, outcome", [("true", pytest.fail.Exception), ("", pytest.skip.Exception)])
def test_a_missing_browser_fails_under_ci_and_skips_elsewhere(monkeypatch, ci, outcome):
    monkeypatch.setenv("CI", ci)
    with pytest.raises(outcome, match="no Chromium"):
        _unavailable("no Chromium at /nowhere")
