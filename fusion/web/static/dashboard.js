// occfuse dashboard: poll the read API and redraw the band, the occupancy chart, the nodes and the rule.
// No build step and no dependencies. The markup built here mirrors templates/dashboard.html.
(() => {
  "use strict";

  const body = document.body;
  const URLS = {
    channels: body.dataset.channelsUrl,
    history: body.dataset.historyUrl,
    nodes: body.dataset.nodesUrl,
    fusion: body.dataset.fusionUrl,
  };
  const TOKEN_KEY = "occfuse.readToken";
  const GLYPH = { free: "○", occupied: "●", unknown: "?" };
  const HOUR_MS = 3600e3;
  const SVG = "http://www.w3.org/2000/svg";

  const view = {
    token: sessionStorage.getItem(TOKEN_KEY),
    locked: body.dataset.locked === "true",
    intervalS: 2,
    maxAgeS: 30,
    clockOffsetMs: 0,         // server clock minus ours, from the Date header
    asOf: null,
    channels: [],
    history: new Map(),       // channel id -> [{t, state}], oldest first, the last hour
    minutes: 60,
    timer: null,
    busy: false,
    polls: 0,
  };

  class AuthError extends Error {}

  // ---- formatting (same rules as the template's macros)
  const pct = (x) => (x == null ? "–" : x * 100 >= 99.95 ? "≥ 99.9 %" : `${(x * 100).toFixed(1)} %`);
  const num = (x, digits, unit = "") => (x == null ? "–" : `${x.toFixed(digits)}${unit}`);
  const hms = (ms) => new Date(ms).toISOString().slice(11, 19);
  const hm = (ms) => new Date(ms).toISOString().slice(11, 16);
  const serverNow = () => Date.now() + view.clockOffsetMs;

  function ago(ms) {
    const s = Math.max(0, Math.round((serverNow() - ms) / 1000));
    if (s < 90) return `${s} s ago`;
    if (s < 5400) return `${Math.round(s / 60)} min ago`;
    return `${Math.round(s / 3600)} h ago`;
  }

  function el(tag, attrs = {}, ...children) {
    const node = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs)) {
      if (v == null || v === false) continue;
      if (k === "class") node.className = v;
      else if (k === "text") node.textContent = v;
      else node.setAttribute(k, v === true ? "" : v);
    }
    for (const c of children) if (c != null) node.append(c);
    return node;
  }

  function svg(tag, attrs = {}, text) {
    const node = document.createElementNS(SVG, tag);
    for (const [k, v] of Object.entries(attrs)) node.setAttribute(k, v);
    if (text != null) node.textContent = text;
    return node;
  }

  // ---- HTTP
  async function getJSON(url) {
    const headers = { Accept: "application/json" };
    if (view.token) headers.Authorization = `Bearer ${view.token}`;
    const response = await fetch(url, { headers, cache: "no-store", credentials: "omit" });
    const date = response.headers.get("Date");
    if (date) view.clockOffsetMs = Date.parse(date) + 500 - Date.now(); // the header has 1 s resolution
    if (response.status === 401 || response.status === 403) {
      let detail = "the server refused the token";
      try { detail = (await response.json()).detail || detail; } catch (_) { /* not JSON */ }
      throw new AuthError(detail);
    }
    if (!response.ok) throw new Error(`${url}: HTTP ${response.status}`);
    return response.json();
  }

  // ---- band plan
  function cell(c, previous) {
    const node = el("li", {
      class: `cell state-${c.state}`, "data-channel": c.id, "data-state": c.state,
      title: `${c.id}: ${c.state}, confidence ${pct(c.confidence)}, ${c.nodes} fresh nodes`,
    },
    el("span", { class: "cell-id", text: c.id }),
    el("span", { class: "cell-freq", text: `${(c.center_hz / 1e6).toFixed(3)} MHz` }),
    el("span", { class: "cell-state" }, el("span", { class: "glyph", "aria-hidden": "true", text: GLYPH[c.state] }),
      ` ${c.state}`),
    el("span", { class: "cell-conf" }, el("span", { class: "cell-label", text: "conf." }), ` ${pct(c.confidence)}`),
    el("span", { class: "cell-nodes", text: `${c.nodes} node${c.nodes === 1 ? "" : "s"}` }));
    if (previous && previous !== c.state) node.classList.add("changed");
    return node;
  }

  function renderBand(data) {
    const band = document.getElementById("band");
    const before = new Map([...band.querySelectorAll(".cell")].map((n) => [n.dataset.channel, n.dataset.state]));
    band.replaceChildren(...data.channels.map((c) => cell(c, before.get(c.id))));
    band.dataset.asOf = data.as_of || "";
    document.getElementById("band-empty").hidden = data.channels.length > 0;
    document.getElementById("as-of").textContent = data.as_of ? `${hms(Date.parse(data.as_of))} UTC` : "–";
    document.getElementById("band-rule").textContent = data.rule || "–";
    view.asOf = data.as_of ? Date.parse(data.as_of) : null;
    view.channels = data.channels;
  }

  // ---- nodes
  function nodeRow(n) {
    const seen = n.last_seen ? Date.parse(n.last_seen) : null;
    const stale = seen != null && serverNow() - seen > view.maxAgeS * 1000;
    const flags = el("td");
    if (n.disabled) flags.append(el("span", { class: "flag flag-off", text: "disabled" }), " ");
    if (n.pinned) flags.append(el("span", { class: "flag flag-pin", text: n.pinned }), " ");
    for (const f of n.flags) flags.append(el("span", { class: "flag", text: f }), " ");
    return el("tr", { "data-node": n.name, class: stale ? "stale" : null },
      el("th", { scope: "row", text: n.name }),
      el("td", {}, el("time", {
        datetime: n.last_seen || "", title: seen ? `${new Date(seen).toISOString()}` : null,
        text: seen ? ago(seen) + (stale ? " (no fresh report)" : "") : "never",
      })),
      el("td", { class: "n", text: num(n.trust, 2) }),
      el("td", { class: "n", text: num(n.pd, 3) }),
      el("td", { class: "n", text: num(n.pf, 3) }),
      el("td", { class: "n", text: num(n.noise_dbm, 1, " dBm") }),
      flags);
  }

  function renderNodes(data) {
    document.getElementById("nodes-body").replaceChildren(...data.nodes.map(nodeRow));
    document.getElementById("nodes-empty").hidden = data.nodes.length > 0;
  }

  // ---- fusion rule
  function renderRule(f) {
    view.intervalS = f.interval_s;
    view.maxAgeS = f.max_age_s;
    document.getElementById("rule-name").textContent = f.rule;
    const rows = [];
    const add = (term, value) => rows.push(el("dt", {}, ...term), el("dd", { text: String(value) }));
    if (f.rule === "k_of_n") add(["k (votes for occupied)"], f.k);
    add(["target P", el("sub", { text: "f" })], f.target_pf);
    add(["confidence to publish"], f.confidence);
    add(["min. fresh nodes for free"], f.min_nodes);
    add(["report max. age"], `${f.max_age_s} s`);
    add(["pooling window"], `${f.window_s} s`);
    add(["epoch interval"], `${f.interval_s} s`);
    add(["prior P(occupied)"], f.prior);
    add(["assumed SNR"], `${f.snr_db} dB`);
    add(["changed"], `${f.updated_at.slice(0, 19).replace("T", " ")} UTC`);
    document.getElementById("rule-params").replaceChildren(...rows);
  }

  // ---- history: fetched incrementally per channel, kept for one hour
  async function updateHistory() {
    const now = serverNow();
    const ids = view.channels.map((c) => c.id);
    for (const id of [...view.history.keys()]) if (!ids.includes(id)) view.history.delete(id);
    const queue = [...ids];
    const worker = async () => {
      for (let id = queue.shift(); id !== undefined; id = queue.shift()) {
        const points = view.history.get(id) || [];
        const last = points.length ? points[points.length - 1].t : null;
        const since = new Date(last ?? now - HOUR_MS).toISOString();
        const url = `${URLS.history.replace("CHANNEL", encodeURIComponent(id))}?since=${encodeURIComponent(since)}&limit=20000`;
        const data = await getJSON(url);
        for (const d of data.decisions) {
          const t = Date.parse(d.decided_at);
          if (last == null || t > last) points.push({ t, state: d.state });
        }
        const cut = now - HOUR_MS;
        while (points.length && points[0].t < cut) points.shift();
        view.history.set(id, points);
      }
    };
    await Promise.all(Array.from({ length: Math.min(4, ids.length) }, worker));
  }

  // Segments [start, end) of one state; a decision lasts until the next one, or about one interval when the
  // next is missing (no epoch ran).
  function segments(points, now) {
    const gapMs = Math.max(3 * view.intervalS * 1000, 1500);
    const out = [];
    points.forEach((p, i) => {
      const next = i + 1 < points.length ? points[i + 1].t : now;
      const end = next - p.t > gapMs ? p.t + view.intervalS * 1000 : next;
      const prev = out[out.length - 1];
      if (prev && prev.state === p.state && prev.end >= p.t) prev.end = end;
      else out.push({ start: p.t, end, state: p.state });
    });
    return out;
  }

  function patterns() {
    const defs = svg("defs");
    const free = svg("pattern", { id: "pat-free", width: 8, height: 8, patternUnits: "userSpaceOnUse" });
    free.append(svg("rect", { width: 8, height: 8, class: "fill-free" }));
    const occ = svg("pattern", { id: "pat-occupied", width: 6, height: 6, patternUnits: "userSpaceOnUse",
      patternTransform: "rotate(45)" });
    occ.append(svg("rect", { width: 6, height: 6, class: "fill-occupied-bg" }),
      svg("rect", { width: 3, height: 6, class: "fill-occupied" }));
    const unk = svg("pattern", { id: "pat-unknown", width: 5, height: 5, patternUnits: "userSpaceOnUse" });
    unk.append(svg("rect", { width: 5, height: 5, class: "fill-unknown-bg" }),
      svg("circle", { cx: 2.5, cy: 2.5, r: 1.1, class: "fill-unknown" }));
    defs.append(free, occ, unk);
    return defs;
  }

  function renderChart() {
    const box = document.getElementById("chart");
    if (!view.channels.length) {
      box.replaceChildren(el("p", { class: "empty", text: "No channels to chart yet." }));
      return;
    }
    const latest = Math.max(0, ...[...view.history.values()].map((p) => (p.length ? p[p.length - 1].t : 0)));
    const now = Math.max(serverNow(), latest);
    const t0 = now - view.minutes * 60e3;
    const left = 84, right = 64, top = 22, rowH = 16, gap = 5;
    const width = Math.max(360, box.clientWidth);
    const plotW = width - left - right;
    const height = top + view.channels.length * (rowH + gap) + 4;
    const x = (t) => left + ((Math.max(t, t0) - t0) / (now - t0)) * plotW;
    const chart = svg("svg", { width, height, viewBox: `0 0 ${width} ${height}`, role: "img",
      "aria-label": `occupancy per channel over the last ${view.minutes} minutes` });
    chart.append(patterns());
    // time axis: a tick every 10 / 3 / 1 minutes
    const stepMs = { 60: 10, 15: 3, 5: 1 }[view.minutes] * 60e3;
    for (let t = Math.ceil(t0 / stepMs) * stepMs; t <= now; t += stepMs) {
      chart.append(svg("line", { x1: x(t), x2: x(t), y1: top - 4, y2: height, class: "tick" }),
        svg("text", { x: x(t), y: top - 8, class: "tick-label", "text-anchor": "middle" }, hm(t)));
    }
    chart.append(svg("text", { x: width - 4, y: top - 8, class: "tick-label", "text-anchor": "end" }, "occ."));
    view.channels.forEach((c, row) => {
      const y = top + row * (rowH + gap);
      chart.append(svg("text", { x: left - 8, y: y + rowH - 4, class: "row-label", "text-anchor": "end" }, c.id),
        svg("rect", { x: left, y, width: plotW, height: rowH, class: "row-bg" }));
      const points = view.history.get(c.id) || [];
      const shown = points.filter((p) => p.t >= t0);
      for (const s of segments(points, now)) {
        if (s.end <= t0) continue;
        const r = svg("rect", { x: x(s.start), y, width: Math.max(1, x(s.end) - x(s.start)), height: rowH,
          fill: `url(#pat-${s.state})`, class: `seg seg-${s.state}`, "data-state": s.state });
        r.append(svg("title", {}, `${c.id} ${s.state} ${hms(s.start)}–${hms(s.end)} UTC`));
        chart.append(r);
      }
      const decided = shown.filter((p) => p.state !== "unknown");
      const occ = decided.length ? decided.filter((p) => p.state === "occupied").length / decided.length : null;
      chart.append(svg("text", { x: width - 4, y: y + rowH - 4, class: "row-value", "text-anchor": "end" },
        occ == null ? "–" : `${Math.round(occ * 100)} %`));
    });
    box.replaceChildren(chart);
  }

  // ---- status line and the poll loop
  function setStatus(kind, text) {
    const status = document.getElementById("status");
    status.dataset.status = kind;
    status.textContent = text;
  }

  function showAuth(message) {
    document.getElementById("auth").hidden = false;
    document.getElementById("content").hidden = true;
    document.getElementById("auth-message").textContent = message || "";
    setStatus("locked", "read token needed");
  }

  function freshness() {
    if (view.asOf == null) return setStatus("waiting", "waiting for the first fusion epoch");
    const age = (serverNow() - view.asOf) / 1000;
    if (age > 3 * view.intervalS + 5) return setStatus("stale", `stale: last epoch ${ago(view.asOf)}`);
    return setStatus("live", `live · epoch ${hms(view.asOf)} UTC`);
  }

  const pollPeriodMs = () => Math.min(5, Math.max(1, view.intervalS)) * 1000;

  async function poll() {
    clearTimeout(view.timer);
    if (view.busy) return;  // one poll loop at a time (a token submit can come in mid-poll)
    if (view.locked && !view.token) return showAuth();
    view.busy = true;
    try {
      const [channels, nodes, fusion] = await Promise.all([
        getJSON(URLS.channels), getJSON(URLS.nodes), getJSON(URLS.fusion)]);
      document.getElementById("auth").hidden = true;
      document.getElementById("content").hidden = false;
      renderRule(fusion);
      renderBand(channels);
      renderNodes(nodes);
      freshness();
      await updateHistory();
      renderChart();
      body.dataset.polls = String(++view.polls);
    } catch (err) {
      if (err instanceof AuthError) {
        sessionStorage.removeItem(TOKEN_KEY);
        view.token = null;
        if (view.locked) return showAuth(`Not accepted: ${err.message}`);
        setStatus("error", `refused: ${err.message}`);
      } else {
        setStatus("error", "connection lost · retrying");
      }
    } finally {
      view.busy = false;
    }
    view.timer = setTimeout(poll, pollPeriodMs());
  }

  function start() {
    const initial = JSON.parse(document.getElementById("initial-data").textContent);
    if (initial) {  // first render came from the server; take over its data, then poll
      renderRule(initial.fusion);
      view.asOf = initial.channels.as_of ? Date.parse(initial.channels.as_of) : null;
      view.channels = initial.channels.channels;
    }
    document.getElementById("auth-form").addEventListener("submit", (event) => {
      event.preventDefault();
      const input = document.getElementById("token");
      view.token = input.value.trim();
      input.value = "";
      if (view.token) sessionStorage.setItem(TOKEN_KEY, view.token);
      poll();
    });
    for (const button of document.querySelectorAll(".range button")) {
      button.addEventListener("click", () => {
        view.minutes = Number(button.dataset.minutes);
        for (const b of document.querySelectorAll(".range button")) b.setAttribute("aria-pressed", String(b === button));
        renderChart();
      });
    }
    let resize = null;
    window.addEventListener("resize", () => { clearTimeout(resize); resize = setTimeout(renderChart, 150); });
    poll();
  }

  start();
})();
