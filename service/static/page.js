// mistake-ledger live page: polls the JSON API and draws each learner's ledger with plain SVG.
// No library, no network beyond this service's own origin. Data from the service is only ever
// put into the page as text (textContent / attribute values), never parsed as HTML.
"use strict";

(() => {
  const POLL_MS = 1500;
  const REFUSED_POLL_MS = 10000;
  const TOKEN_KEY = "mistake-ledger.token";
  const SVG = "http://www.w3.org/2000/svg";
  const STATES = {
    within: { mark: "\u2713", text: "within" },
    near: { mark: "\u25B2", text: "near" },
    exceeded: { mark: "\u2715", text: "exceeded" },
    contradicted: { mark: "\u2298", text: "contradicted" },
  };
  const EVIDENCE_SHOWN = 12;
  const MAX_ALERTS_SHOWN = 50;

  const view = {
    streams: [],
    chosen: null,
    ledger: null,
    ledgerText: null,
    streamsText: null,
    xaxis: "time",
    token: sessionStorage.getItem(TOKEN_KEY) || "",
    timer: null,
    refused: false,
    inflight: false,
    again: false,
  };

  const $ = (id) => document.getElementById(id);

  // -- small DOM helpers -------------------------------------------------------------------

  function el(tag, attrs, ...children) {
    const node = document.createElement(tag);
    setAttrs(node, attrs);
    for (const child of children.flat()) {
      if (child === null || child === undefined || child === false) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  function svg(tag, attrs, ...children) {
    const node = document.createElementNS(SVG, tag);
    setAttrs(node, attrs);
    for (const child of children.flat()) {
      if (child === null || child === undefined || child === false) continue;
      node.append(child instanceof Node ? child : document.createTextNode(String(child)));
    }
    return node;
  }

  function setAttrs(node, attrs) {
    for (const [key, value] of Object.entries(attrs || {})) {
      if (value === null || value === undefined || value === false) continue;
      node.setAttribute(key, value === true ? "" : String(value));
    }
  }

  function badge(stateName) {
    const s = STATES[stateName] || { mark: "?", text: String(stateName || "unknown") };
    return el("span", { class: `badge state-${stateName}`, "data-state": stateName }, `${s.mark} ${s.text}`);
  }

  // -- numbers and times -------------------------------------------------------------------

  function fmtNum(v) {
    if (v === null || v === undefined || Number.isNaN(v)) return "\u2013";
    if (typeof v !== "number") return String(v);
    if (Number.isInteger(v)) return v.toLocaleString("en");
    return v.toLocaleString("en", { maximumFractionDigits: Math.abs(v) < 10 ? 2 : 1 });
  }

  // A time from the service: epoch seconds, epoch milliseconds or an ISO 8601 string.
  function toMillis(t) {
    if (typeof t === "number") return t > 1e11 ? t : t * 1000;
    if (typeof t === "string") {
      const ms = Date.parse(t);
      return Number.isNaN(ms) ? null : ms;
    }
    return null;
  }

  const pad = (n) => String(n).padStart(2, "0");

  function fmtClock(ms, withDate) {
    const d = new Date(ms);
    const clock = `${pad(d.getHours())}:${pad(d.getMinutes())}:${pad(d.getSeconds())}`;
    return withDate ? `${d.getFullYear()}-${pad(d.getMonth() + 1)}-${pad(d.getDate())} ${clock}` : clock;
  }

  function fmtTime(t) {
    const ms = toMillis(t);
    return ms === null ? String(t ?? "\u2013") : fmtClock(ms, true);
  }

  // -- talking to the service --------------------------------------------------------------

  class ApiError extends Error {
    constructor(status, message) {
      super(message);
      this.status = status;
    }
  }

  async function getJSON(path) {
    const headers = { Accept: "application/json" };
    if (view.token) headers.Authorization = `Bearer ${view.token}`;
    let response;
    try {
      response = await fetch(path, { headers, cache: "no-store" });
    } catch (err) {
      throw new ApiError(0, "cannot reach the service");
    }
    const text = await response.text();
    if (!response.ok) {
      let message = `${response.status} ${response.statusText}`;
      try {
        const body = JSON.parse(text);
        if (body && body.error && body.error.message) message = body.error.message;
      } catch (_) {
        // not JSON: keep the status line
      }
      throw new ApiError(response.status, message);
    }
    return { text, data: JSON.parse(text) };
  }

  function setStatus(message, bad) {
    const node = $("status");
    node.className = bad ? "status bad" : "status";
    node.replaceChildren(el("span", { class: "dot", "aria-hidden": "true" }), message);
  }

  // One refresh at a time: a click during a refresh asks for another one right after it.
  async function poll() {
    if (view.inflight) {
      view.again = true;
      return;
    }
    view.inflight = true;
    clearTimeout(view.timer);
    let wait = POLL_MS;
    try {
      await refresh();
      view.refused = false;
      setStatus(`live \u00b7 updated ${fmtClock(Date.now(), false)}`, false);
    } catch (err) {
      if (err instanceof ApiError && (err.status === 401 || err.status === 403)) {
        // Ask once, then check back slowly until a token is entered.
        if (!view.refused) $("token").focus({ preventScroll: true });
        view.refused = true;
        wait = REFUSED_POLL_MS;
        setStatus(
          view.token ? "the access token was refused" : "this service needs an access token (left)",
          true,
        );
      } else {
        setStatus(`not updated: ${err.message}`, true);
      }
    } finally {
      view.inflight = false;
    }
    if (view.again) {
      view.again = false;
      wait = 0;
    }
    view.timer = setTimeout(poll, wait);
  }

  async function refresh() {
    const streams = await getJSON("/v1/streams");
    if (streams.text !== view.streamsText) {
      view.streamsText = streams.text;
      view.streams = (streams.data.streams || []).map(describeStream);
      renderStreams();
    }
    if (!view.chosen && view.streams.length > 0) choose(view.streams[0].name, false);
    if (view.chosen && !view.streams.some((s) => s.name === view.chosen)) choose(null, false);
    const name = view.chosen;
    if (!name) return;
    const ledger = await getJSON(`/v1/streams/${encodeURIComponent(name)}/ledger`);
    // Drop an answer for a stream that is no longer the chosen one.
    if (name === view.chosen && ledger.text !== view.ledgerText) {
      view.ledgerText = ledger.text;
      view.ledger = ledger.data;
      renderLedger();
    }
  }

  function describeStream(d) {
    return {
      name: String(d.stream ?? d.name ?? "?"),
      learners: Array.isArray(d.learners) ? d.learners.length : null,
      near: typeof d.near === "number" ? d.near : null,
    };
  }

  function choose(name, push) {
    view.chosen = name;
    view.ledger = null;
    view.ledgerText = null;
    const hash = name ? `#stream=${encodeURIComponent(name)}` : "";
    if (push && location.hash !== hash) history.replaceState(null, "", hash || location.pathname);
    renderStreams();
    renderLedger();
  }

  // -- streams list ------------------------------------------------------------------------

  function renderStreams() {
    const list = $("streams");
    if (view.streams.length === 0) {
      list.replaceChildren(el("li", { class: "muted" }, "No streams yet."));
      return;
    }
    list.replaceChildren(
      ...view.streams.map((s) => {
        const button = el(
          "button",
          { type: "button", "aria-current": s.name === view.chosen ? "true" : "false", "data-stream": s.name },
          el("span", null, s.name),
          s.learners === null
            ? null
            : el("span", { class: "stream-count" }, `${s.learners} learner${s.learners === 1 ? "" : "s"}`),
        );
        button.addEventListener("click", () => {
          choose(s.name, true);
          poll();
        });
        return el("li", null, button);
      }),
    );
  }

  // -- one stream's ledger -----------------------------------------------------------------

  function renderLedger() {
    const ledger = view.ledger;
    $("empty").hidden = Boolean(view.chosen);
    $("stream").hidden = !ledger;
    if (!ledger) return;
    const learners = Array.isArray(ledger.learners) ? ledger.learners : [];
    const stream = view.streams.find((s) => s.name === view.chosen);
    const near = stream && stream.near !== null ? stream.near : 0.8;

    $("stream-name").textContent = ledger.stream ?? view.chosen;
    const facts = [
      ["serving", ledger.serve],
      ["awaiting labels", ledger.pending],
      ["expired", ledger.expired],
      ["most outstanding at an update", ledger.max_outstanding],
      ["near line", `${Math.round(near * 100)}% of ceiling`],
      ["alerts", collectAlerts(ledger, learners).length],
    ];
    $("stream-facts").replaceChildren(
      ...facts
        .filter(([, v]) => v !== undefined && v !== null)
        .map(([k, v]) => el("div", null, el("dt", null, k), el("dd", null, typeof v === "number" ? fmtNum(v) : v))),
    );

    $("learner-rows").replaceChildren(...learners.map((l) => learnerRow(l, ledger.serve)));
    renderCharts(learners, near, ledger.serve);
    renderAlerts(ledger, learners);
  }

  function learnerRow(l, serve) {
    const ceiling = l.ceiling || {};
    const cap = typeof ceiling.value === "number" ? ceiling.value : null;
    const counted = ceiling.counts === "mistakes" ? l.mistakes : l.updates;
    const share = cap ? Math.min(1, counted / cap) : 0;
    const implied = Object.entries(ceiling.implied || {}).filter(([, v]) => v !== null && v !== undefined);
    const epochs = Array.isArray(l.epochs) ? l.epochs.length : 0;
    return el(
      "tr",
      { "data-learner": l.name },
      el(
        "td",
        null,
        el("div", null, el("span", { class: "learner-name" }, l.name), l.name === serve ? el("span", { class: "serving" }, "serving") : null),
        el("div", { class: "kind" }, l.kind, l.epoch !== undefined ? ` \u00b7 epoch ${l.epoch}` : "", epochs ? ` (${epochs} earlier kept)` : ""),
      ),
      el("td", null, badge(l.state)),
      el(
        "td",
        { class: "num" },
        `${fmtNum(counted)} / ${cap === null ? "none claimed" : fmtNum(cap)}`,
        ceiling.counts === "mistakes" ? el("div", { class: "kind" }, "ceiling counts mistakes") : null,
        cap ? el("div", { class: `bar${counted > cap ? " over" : ""}`, "aria-hidden": "true" }, barFill(share)) : null,
      ),
      el("td", { class: "num" }, `${fmtNum(l.served_mistakes)} / ${l.served_ceiling === null || l.served_ceiling === undefined ? "none" : fmtNum(l.served_ceiling)}`),
      el("td", { class: "num" }, fmtNum(l.examples)),
      el(
        "td",
        null,
        ceiling.formula ? el("div", { class: "formula" }, ceiling.formula) : null,
        ceiling.assumption ? el("div", { class: "assumption" }, `if: ${ceiling.assumption}`) : null,
        implied.length
          ? el("div", { class: "assumption" }, "implied: ", implied.map(([k, v]) => `${k} ${fmtNum(v)}`).join(", "))
          : null,
        ceiling.source ? el("div", { class: "assumption" }, `source: ${ceiling.source}`) : null,
      ),
    );
  }

  function barFill(share) {
    const span = el("span");
    span.style.width = `${(share * 100).toFixed(1)}%`;
    return span;
  }

  // -- the chart: one small panel per learner, each with its own scale ---------------------

  // The panels are drawn at the size they are shown, so text in them is never scaled.
  let W = 440;
  const H = 220;
  const M = { left: 42, right: 14, top: 12, bottom: 34 };
  const MIN_PANEL = 320;
  const GAP = 16;

  function panelWidth(count) {
    const room = $("charts").clientWidth || 900;
    const columns = Math.max(1, Math.min(count, Math.floor((room + GAP) / (MIN_PANEL + GAP))));
    // 2 * (padding + border) of a panel: see .chart in page.css
    return Math.max(260, Math.floor((room - GAP * (columns - 1)) / columns) - 22);
  }

  // One learner's current epoch as points { t, labels, updates, served, ceiling }: a start at
  // zero, the recorded history (a point is recorded whenever a count or the ceiling changes),
  // and the counts now, which hold since the last recorded change.
  function series(l) {
    const ceilingNow = l.ceiling && typeof l.ceiling.value === "number" ? l.ceiling.value : null;
    const recorded = (Array.isArray(l.history) ? l.history : []).map((p) => ({
      t: toMillis(p.t),
      labels: Number(p.labels),
      updates: Number(p.updates),
      served: Number(p.served_mistakes),
      ceiling: typeof p.ceiling === "number" ? p.ceiling : null,
    }));
    const started = toMillis(l.started);
    const first = recorded.length ? recorded[0] : null;
    const start = {
      t: started ?? (first ? first.t : null),
      labels: 0,
      updates: 0,
      served: 0,
      ceiling: first ? first.ceiling : ceilingNow,
    };
    const now = {
      t: null, // the stream's latest moment, filled in by the caller
      labels: Number(l.examples),
      updates: Number(l.updates),
      served: Number(l.served_mistakes),
      ceiling: ceilingNow,
    };
    const epoch = l.epoch;
    const alerts = (Array.isArray(l.alerts) ? l.alerts : [])
      .filter((a) => a.epoch === undefined || epoch === undefined || a.epoch === epoch)
      .map((a) => ({ ...a, ms: toMillis(a.at) }));
    return { points: [start, ...recorded, now], alerts, started, epoch };
  }

  // One x range for every panel of the stream, so that a moment lines up across panels.
  function domain(all) {
    if (view.xaxis === "labels") {
      const most = Math.max(0, ...all.map((s) => s.points[s.points.length - 1].labels).filter(Number.isFinite));
      return [0, Math.max(1, most)];
    }
    const times = all.flatMap((s) => [...s.points.map((p) => p.t), ...s.alerts.map((a) => a.ms)]);
    const known = times.filter((t) => t !== null && Number.isFinite(t));
    if (known.length === 0) return null;
    const lo = Math.min(...known);
    const hi = Math.max(...known);
    return hi > lo ? [lo, hi] : [lo - 1000, hi + 1000];
  }

  function renderCharts(learners, near, serve) {
    W = panelWidth(learners.length);
    const all = learners.map(series);
    const range = domain(all);
    $("charts").replaceChildren(...learners.map((l, i) => learnerChart(l, all[i], range, near, serve)));
  }

  function learnerChart(l, data, range, near, serve) {
    const ceiling = l.ceiling || {};
    const label =
      `${l.name}: ${fmtNum(l.updates)} updates against a ceiling of ` +
      `${typeof ceiling.value === "number" ? fmtNum(ceiling.value) : "none"}, ` +
      `${fmtNum(l.served_mistakes)} served mistakes; state ${l.state}.`;
    const plot = svg("svg", {
      class: "plot",
      viewBox: `0 0 ${W} ${H}`,
      width: W,
      height: H,
      role: "img",
      "aria-label": label,
      "data-learner": l.name,
    });
    plot.append(svg("title", null, label));
    if (!range || !(Number(l.examples) > 0)) {
      plot.append(svg("text", { class: "nodata", x: W / 2, y: H / 2, "text-anchor": "middle" }, "no labels yet"));
    } else {
      drawPanel(plot, data, range, near);
    }
    return el(
      "figure",
      { class: "chart", "data-learner": l.name, "data-state": l.state },
      el(
        "figcaption",
        null,
        el("span", null, el("span", { class: "learner-name" }, l.name), l.name === serve ? el("span", { class: "serving" }, "serving") : null),
        badge(l.state),
      ),
      plot,
    );
  }

  function drawPanel(plot, data, range, near) {
    const [x0, x1] = range;
    const byLabels = view.xaxis === "labels";
    const points = data.points
      .map((p, i) => ({ ...p, x: byLabels ? p.labels : i === data.points.length - 1 ? x1 : p.t }))
      .filter((p) => p.x !== null && Number.isFinite(p.x));
    const ys = points.flatMap((p) => [p.updates, p.served, p.ceiling ?? 0]);
    const y1 = niceMax(Math.max(1, ...ys.filter(Number.isFinite)) * 1.08);
    const px = (x) => M.left + ((x - x0) / (x1 - x0)) * (W - M.left - M.right);
    const py = (y) => H - M.bottom - (y / y1) * (H - M.top - M.bottom);

    // grid and axes
    const grid = svg("g", { class: "grid" });
    const axis = svg("g", { class: "axis" });
    for (const v of ticks(0, y1, 4)) {
      grid.append(svg("line", { x1: M.left, x2: W - M.right, y1: py(v), y2: py(v) }));
      axis.append(svg("text", { x: M.left - 6, y: py(v) + 4, "text-anchor": "end" }, fmtNum(v)));
    }
    const xt = byLabels ? ticks(x0, x1, 4) : timeTicks(x0, x1, 4);
    for (const v of xt) {
      axis.append(svg("line", { x1: px(v), x2: px(v), y1: H - M.bottom, y2: H - M.bottom + 4 }));
      axis.append(
        svg("text", { x: px(v), y: H - M.bottom + 16, "text-anchor": "middle" }, byLabels ? fmtNum(v) : fmtClock(v, false)),
      );
    }
    axis.append(svg("line", { x1: M.left, x2: W - M.right, y1: H - M.bottom, y2: H - M.bottom }));
    const title = byLabels ? `labels received${data.epoch ? ` in epoch ${data.epoch}` : ""}` : "time";
    axis.append(svg("text", { class: "axis-title", x: W - M.right, y: H - 2, "text-anchor": "end" }, title));
    plot.append(grid);

    // the region above the ceiling, where the updates prove the assumption false
    const withCeiling = points.filter((p) => p.ceiling !== null);
    if (withCeiling.length === points.length) {
      const d = stepPath(points, (p) => p.ceiling, px, py);
      const first = px(points[0].x);
      const last = px(points[points.length - 1].x);
      plot.append(svg("path", { class: "over-band", d: `${d} L${last},${M.top} L${first},${M.top} Z` }));
      plot.append(svg("path", { class: "ln-near", d: stepPath(points, (p) => p.ceiling * near, px, py) }));
      plot.append(svg("path", { class: "ln-ceiling", "data-series": "ceiling", d }));
    } else if (withCeiling.length > 0) {
      plot.append(svg("path", { class: "ln-ceiling", "data-series": "ceiling", d: stepPath(points, (p) => p.ceiling, px, py, true) }));
    }
    // a restarted learner: where its current epoch began
    if (!byLabels && data.epoch && data.started !== null && data.started >= x0) {
      const x = px(data.started);
      plot.append(svg("line", { class: "ln-epoch", x1: x, x2: x, y1: M.top, y2: H - M.bottom }));
      plot.append(svg("text", { class: "epoch-note", x: x + 4, y: M.top + 11 }, `epoch ${data.epoch}`));
    }
    plot.append(axis);
    plot.append(svg("path", { class: "ln-served", "data-series": "served", d: stepPath(points, (p) => p.served, px, py) }));
    plot.append(svg("path", { class: "ln-updates", "data-series": "updates", d: stepPath(points, (p) => p.updates, px, py) }));

    // alerts of this epoch: where the count was when the alert was raised
    for (const a of data.alerts) {
      let x = null;
      if (!byLabels) x = a.ms;
      else if (a.ms !== null) {
        const before = points.filter((p) => p.t !== null && p.t <= a.ms);
        x = before.length ? before[before.length - 1].labels : null;
      }
      if (x === null || typeof a.count !== "number") continue;
      const cx = px(Math.min(Math.max(x, x0), x1));
      const cy = py(a.count);
      plot.append(
        svg(
          "path",
          { class: "mk-alert", "data-series": "alert", d: `M${cx},${cy - 7} L${cx + 6},${cy + 4} L${cx - 6},${cy + 4} Z` },
          svg("title", null, `${a.state} at ${fmtTime(a.at)}: ${fmtNum(a.count)} against ${fmtNum(a.ceiling)}`),
        ),
      );
    }
  }

  // A step line: each count holds until the next point. With gaps, missing values break the line.
  function stepPath(points, value, px, py, gaps) {
    let d = "";
    let prev = null;
    for (const p of points) {
      const v = value(p);
      if (v === null || !Number.isFinite(v)) {
        if (gaps) prev = null;
        continue;
      }
      const x = px(p.x).toFixed(1);
      const y = py(v).toFixed(1);
      if (prev === null) d += `M${x},${y}`;
      else d += ` L${x},${prev} L${x},${y}`;
      prev = y;
    }
    return d;
  }

  function niceStep(span, count) {
    const raw = span / Math.max(1, count);
    const mag = 10 ** Math.floor(Math.log10(raw));
    const norm = raw / mag;
    return (norm <= 1 ? 1 : norm <= 2 ? 2 : norm <= 5 ? 5 : 10) * mag;
  }

  function niceMax(v) {
    const step = niceStep(v, 4);
    return Math.ceil(v / step) * step;
  }

  function ticks(a, b, count) {
    const step = Math.max(niceStep(b - a, count), 1);
    const out = [];
    for (let v = Math.ceil(a / step) * step; v <= b + 1e-9; v += step) out.push(v);
    return out;
  }

  function timeTicks(a, b, count) {
    const steps = [1, 2, 5, 10, 15, 30, 60, 120, 300, 600, 900, 1800, 3600, 7200, 21600, 43200, 86400].map((s) => s * 1000);
    const step = steps.find((s) => (b - a) / s <= count) || 86400000 * Math.ceil((b - a) / 86400000 / count);
    const out = [];
    for (let v = Math.ceil(a / step) * step; v <= b; v += step) out.push(v);
    return out;
  }

  // -- alerts ------------------------------------------------------------------------------

  function collectAlerts(ledger, learners) {
    const seen = new Set();
    const out = [];
    const add = (a, learner, epoch) => {
      const key = JSON.stringify([learner, epoch, a.state, a.at, a.count]);
      if (seen.has(key)) return;
      seen.add(key);
      out.push({ ...a, learner, epoch, ms: toMillis(a.at) });
    };
    for (const l of learners) {
      for (const a of l.alerts || []) add(a, a.learner ?? l.name, a.epoch ?? l.epoch);
      for (const past of l.epochs || []) {
        for (const a of past.alerts || []) add(a, a.learner ?? l.name, a.epoch ?? past.epoch);
      }
    }
    for (const a of ledger.alerts || []) add(a, a.learner ?? "?", a.epoch);
    return out.sort((p, q) => (q.ms ?? 0) - (p.ms ?? 0));
  }

  function renderAlerts(ledger, learners) {
    const alerts = collectAlerts(ledger, learners);
    const box = $("alerts");
    if (alerts.length === 0) {
      box.replaceChildren(el("p", { class: "none" }, "No alerts: every learner is within what its assumption allows."));
      return;
    }
    const hidden = alerts.length - MAX_ALERTS_SHOWN;
    box.replaceChildren(
      ...[
      el(
        "ul",
        { class: "alerts" },
        alerts.slice(0, MAX_ALERTS_SHOWN).map((a) => {
          const evidence = Array.isArray(a.evidence) ? a.evidence : [];
          const shown = evidence.slice(0, EVIDENCE_SHOWN);
          const rest = evidence.slice(EVIDENCE_SHOWN);
          return el(
            "li",
            { class: `alert state-${a.state}`, "data-learner": a.learner, "data-state": a.state },
            el(
              "div",
              { class: "line1" },
              badge(a.state),
              el("strong", null, a.learner),
              a.epoch !== undefined && a.epoch !== null ? el("span", { class: "kind" }, `epoch ${a.epoch}`) : null,
              el("time", { class: "when", datetime: a.ms !== null ? new Date(a.ms).toISOString() : null }, fmtTime(a.at)),
              el("span", null, `${fmtNum(a.count)} against a ceiling of ${a.ceiling === null || a.ceiling === undefined ? "none" : fmtNum(a.ceiling)}`),
              a.policy === "restart" ? el("span", { class: "kind" }, "learner restarted as a new epoch") : null,
              a.policy === "keep" ? el("span", { class: "kind" }, "learner kept learning") : null,
            ),
            el(
              "div",
              { class: "evidence" },
              evidence.length ? "Evidence items: " : "No evidence items recorded.",
              shown.map((id) => el("code", null, id)),
              rest.length
                ? el("details", null, el("summary", null, `${rest.length} more`), rest.map((id) => el("code", null, id)))
                : null,
            ),
          );
        }),
      ),
      hidden > 0 ? el("p", { class: "none" }, `${hidden} older alert${hidden === 1 ? "" : "s"} not shown; the ledger API lists them all.`) : null,
      ].filter(Boolean),
    );
  }

  // -- token and controls ------------------------------------------------------------------

  function renderTokenState() {
    $("token-state").textContent = view.token ? "A token is set for this tab." : "No token set.";
  }

  function start() {
    const match = /^#stream=(.+)$/.exec(location.hash);
    if (match) view.chosen = decodeURIComponent(match[1]);
    $("token-form").addEventListener("submit", (event) => {
      event.preventDefault();
      view.token = $("token").value.trim();
      $("token").value = "";
      if (view.token) sessionStorage.setItem(TOKEN_KEY, view.token);
      else sessionStorage.removeItem(TOKEN_KEY);
      view.streamsText = null;
      view.ledgerText = null;
      renderTokenState();
      poll();
    });
    $("token-clear").addEventListener("click", () => {
      view.token = "";
      sessionStorage.removeItem(TOKEN_KEY);
      renderTokenState();
      poll();
    });
    for (const radio of document.querySelectorAll('input[name="xaxis"]')) {
      radio.addEventListener("change", () => {
        view.xaxis = radio.value;
        renderLedger();
      });
    }
    let resizing = null;
    window.addEventListener("resize", () => {
      clearTimeout(resizing);
      resizing = setTimeout(renderLedger, 150);
    });
    document.addEventListener("visibilitychange", () => {
      if (!document.hidden) poll();
    });
    renderTokenState();
    poll();
  }

  start();
})();
