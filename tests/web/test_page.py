"""The dashboard page as served (Flask test client, no browser): first render, token handling, assets."""

from __future__ import annotations

import json
import re
from html.parser import HTMLParser

import numpy as np
import pytest

from fusion.web.dashboard import SECURITY_HEADERS
from tests.conftest import ADMIN
from tests.test_engine import epoch, feed

READER = "reader-secret-for-page-tests"


class Page(HTMLParser):
    """Collects the band cells (data-channel, data-state, visible text), the node rows and every URL."""

    def __init__(self):
        super().__init__()
        self.cells, self.nodes, self.urls, self.initial = [], [], [], None
        self._cell = None
        self._script = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.urls += [a[k] for k in ("src", "href", "action") if k in a]
        if tag == "li" and "data-channel" in a:
            self._cell = {"id": a["data-channel"], "state": a["data-state"], "text": ""}
            self.cells.append(self._cell)
        if tag == "tr" and "data-node" in a:
            self.nodes.append(a["data-node"])
        self._script = tag == "script" and a.get("id") == "initial-data"

    def handle_endtag(self, tag):
        if tag == "li":
            self._cell = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell["text"] += data
        if self._script:
            self.initial = json.loads(data)
            self._script = False


def parse(response) -> Page:
    page = Page()
    page.feed(response.get_data(as_text=True))
    return page


def test_first_render_shows_every_channel_with_its_state_and_confidence_as_text(app, net, client):
    names = [f"n{i}" for i in range(4)]
    for name in names:
        net.register(name)
    rng = np.random.default_rng(8)
    for _ in range(2):
        feed(net, names, {"ch2"}, rng=rng, snr=1.0)  # SNR 0 dB on ch2 with 1000 samples: plainly occupied
        epoch(app, rule="egc", min_nodes=2)
    api = client.get("/api/v1/channels").json
    page = parse(client.get("/"))
    assert [(c["id"], c["state"]) for c in page.cells] == [(c["id"], c["state"]) for c in api["channels"]]
    assert {c["state"] for c in page.cells} == {"free", "occupied"}
    for cell, ch in zip(page.cells, api["channels"]):
        text = " ".join(cell["text"].split())
        assert ch["state"] in text  # the state is written out, not only coloured
        conf = ch["confidence"] * 100
        assert ("≥ 99.9 %" if conf >= 99.95 else f"{conf:.1f} %") in text
    assert page.nodes == names
    # The script starts from the same JSON the API serves.
    assert page.initial["channels"] == api
    assert page.initial["fusion"] == client.get("/api/v1/fusion").json
    assert [n["name"] for n in page.initial["nodes"]["nodes"]] == names


def test_page_before_any_plan_or_epoch_says_so(client):
    html = client.get("/").get_data(as_text=True)
    assert "No band plan loaded yet" in html and "waiting for the first fusion epoch" in html


def test_page_is_public_and_sends_a_same_origin_content_security_policy(client):
    response = client.get("/")
    assert response.status_code == 200 and response.mimetype == "text/html"
    for key, value in SECURITY_HEADERS.items():
        assert response.headers[key] == value
    assert "script-src 'self'" in response.headers["Content-Security-Policy"]
    assert response.headers["Cache-Control"] == "no-store"
    # Nothing from another origin: no network beyond this server (no CDN, no fonts).
    urls = parse(response).urls
    assert urls and all(u.startswith("/") and not u.startswith("//") for u in urls), urls


def test_with_a_read_token_the_page_carries_no_data_and_no_token(make_app):
    app = make_app(READ_TOKEN=READER)
    client = app.test_client()
    assert client.put("/api/v1/plan", json={"channels": [{"id": "secret-ch", "center_hz": 470e6,
                                                          "bandwidth_hz": 6e6}]},
                      headers={"Authorization": f"Bearer {ADMIN}"}).status_code == 200
    response = client.get("/")
    assert response.status_code == 200  # the shell is public; its data is not
    html = response.get_data(as_text=True)
    page = parse(response)
    assert page.cells == [] and page.initial is None
    assert "secret-ch" not in html and READER not in html and ADMIN not in html
    assert 'data-locked="true"' in html and 'id="auth-form"' in html
    assert client.get("/api/v1/channels").status_code == 401  # what the script meets without the token
    assert client.get("/api/v1/channels", headers={"Authorization": f"Bearer {READER}"}).status_code == 200


def test_reads_open_page_never_contains_the_admin_token(client, net):
    assert ADMIN not in client.get("/").get_data(as_text=True)


@pytest.mark.parametrize("name, mimetype", [("dashboard.js", "text/javascript"), ("dashboard.css", "text/css"),
                                            ("favicon.svg", "image/svg+xml")])
def test_assets_are_served_with_their_types(client, name, mimetype):
    with client.get(f"/dashboard/{name}") as response:  # closes the served file
        assert response.status_code == 200 and response.mimetype == mimetype
        assert response.headers["X-Content-Type-Options"] == "nosniff"
        assert response.get_data()


@pytest.mark.parametrize("path", ["/dashboard/other.js", "/dashboard/../__init__.py", "/dashboard/"])
def test_only_the_known_assets_are_served(client, path):
    response = client.get(path)
    assert response.status_code == 404
    assert response.mimetype == "application/problem+json"


def test_script_and_template_agree_on_the_cell_markup():
    """dashboard.js rebuilds the cells the template first renders; both must use the same classes."""
    from pathlib import Path

    web = Path(__file__).resolve().parents[2] / "fusion" / "web"
    js = (web / "static" / "dashboard.js").read_text()
    html = (web / "templates" / "dashboard.html").read_text()
    for cls in ("cell-id", "cell-freq", "cell-state", "cell-conf", "cell-nodes", "glyph", "cell-label"):
        assert f'class="{cls}"' in html and f'class: "{cls}"' in js, cls
    for glyph in re.findall(r'"(\w+)": "(.)"', html.split("GLYPH = ", 1)[1].split("}", 1)[0]):
        assert f'{glyph[0]}: "{glyph[1]}"' in js
