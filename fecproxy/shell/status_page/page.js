"use strict";
// Polls status.json, keeps the daemon's history window of reads, and draws the figures and SVG
// charts.  The first read asks for the daemon's history (status.json?history=1: its one-second
// samples and last events), so a page opened after an incident shows it; later reads ask only for
// events not yet seen.  Rates are differences between reads (a counter that went down means the
// daemon restarted: its new value is the increase), as `fecproxy watch` computes them.
(() => {
  let windowS = 900;               // the chart span: the daemon's history span (history.span_s)
  let maxReads = 901;              // reads kept: the span at one read per refresh, plus the first
  const MAX_EVENTS_SHOWN = 200;    // the daemon keeps as many
  const KPI_READS = 5;             // the figure cards cover the last few reads
  const FETCH_TIMEOUT_MS = 3000;   // a healthy daemon answers in milliseconds
  const CHART = { w: 420, h: 200, left: 50, right: 8, top: 10, bottom: 24 };  // the SVGs' viewBox
  const DROPS = "fecproxy_packets_dropped_total";
  const DELAY_BUCKET = "fecproxy_recovery_delay_seconds_bucket";
  const ORDER_WAIT_BUCKET = "fecproxy_delivery_wait_seconds_bucket";  // delivery.order: in_order
  const TOTALS = [
    ["source packets sent", "fecproxy_source_packets_sent_total"],
    ["repair packets sent", "fecproxy_repair_packets_sent_total"],
    ["source bytes sent", "fecproxy_source_bytes_sent_total"],
    ["repair bytes sent", "fecproxy_repair_bytes_sent_total"],
    ["blocks sent (short)", "fecproxy_blocks_sent_total", "fecproxy_short_blocks_sent_total"],
    ["source packets received", 'fecproxy_link_packets_received_total{kind="source"}'],
    ["repair packets received", 'fecproxy_link_packets_received_total{kind="repair"}'],
    ["source packets lost on the link", "fecproxy_source_packets_lost_total"],
    ["datagrams recovered", "fecproxy_datagrams_recovered_total"],
    ["datagrams unrecovered", "fecproxy_datagrams_unrecovered_total"],
    ["datagrams delivered", "fecproxy_datagrams_delivered_total"],
    ["datagrams that waited for order (now)", "fecproxy_delivery_held_total", "fecproxy_delivery_held_datagrams"],
    ["gaps skipped for order after max_wait", 'fecproxy_delivery_gaps_skipped_total{reason="max_wait"}'],
    ["gaps skipped for order, blocks given up", 'fecproxy_delivery_gaps_skipped_total{reason="given_up"}'],
    ["flows", "fecproxy_flows"],
    ["send errors", "fecproxy_send_errors_total"],
  ];

  const $ = (id) => document.getElementById(id);
  const reads = [];   // {t: daemon uptime in s, s: samples}
  const points = [];  // one per read after the first: the interval's figures
  const events = [];  // the daemon's events, oldest first: {seq, t, ts, level, event, fields}
  let refreshS = 1;
  let lastSeq = null; // null until the history was read

  // ---------------------------------------------------------------- arithmetic
  const get = (s, key) => s[key] ?? 0;
  function delta(now, before, key) {
    const value = get(now, key);
    if (!before) return value;
    const previous = get(before, key);
    return value >= previous ? value - previous : value;
  }
  const ratio = (a, b) => (b > 0 ? a / b : null);
  const labelled = (name, label) => new RegExp("^" + name + "\\{" + label + '="([^"]*)"\\}$');
  function keysOf(s, name, label) {
    const pattern = labelled(name, label);
    return Object.keys(s).map((key) => [key, (key.match(pattern) || [])[1]]).filter(([, v]) => v !== undefined);
  }
  // Prometheus' histogram_quantile: linear within a bucket; the highest finite bound above it.
  function quantile(q, buckets) {
    buckets.sort((a, b) => a[0] - b[0]);
    if (!buckets.length || buckets[buckets.length - 1][1] <= 0) return null;
    const rank = q * buckets[buckets.length - 1][1];
    let lowerBound = 0, lowerCount = 0;
    for (const [bound, count] of buckets) {
      if (count >= rank) {
        if (!isFinite(bound)) return lowerBound;
        if (count === lowerCount) return bound;
        return lowerBound + (bound - lowerBound) * (rank - lowerCount) / (count - lowerCount);
      }
      lowerBound = bound; lowerCount = count;
    }
    return null;
  }
  function figures(now, before) {
    const d = (key) => delta(now.s, before && before.s, key);
    const seconds = before ? now.t - before.t : null;
    const lost = d("fecproxy_source_packets_lost_total");
    const expected = lost + d('fecproxy_link_packets_received_total{kind="source"}');
    const buckets = keysOf(now.s, DELAY_BUCKET, "le").map(([key, le]) => [le === "+Inf" ? Infinity : parseFloat(le), d(key)]);
    const waits = keysOf(now.s, ORDER_WAIT_BUCKET, "le").map(([key, le]) => [le === "+Inf" ? Infinity : parseFloat(le), d(key)]);
    const drops = {};
    for (const [key, reason] of keysOf(now.s, DROPS, "reason")) drops[reason] = d(key);
    return {
      t: now.t, seconds, lost, expected,
      linkLoss: ratio(lost, expected),
      unrecovered: d("fecproxy_datagrams_unrecovered_total"),
      residualLoss: ratio(d("fecproxy_datagrams_unrecovered_total"), expected),
      recovered: d("fecproxy_datagrams_recovered_total"),
      overheadPackets: ratio(d("fecproxy_repair_packets_sent_total"), d("fecproxy_source_packets_sent_total")),
      overheadBytes: ratio(d("fecproxy_repair_bytes_sent_total"), d("fecproxy_source_bytes_sent_total")),
      p50: quantile(0.5, buckets.map((b) => b.slice())), p99: quantile(0.99, buckets.map((b) => b.slice())),
      drops, dropTotal: Object.values(drops).reduce((a, b) => a + b, 0),
      ordered: d("fecproxy_delivery_wait_seconds_count"), orderP99: quantile(0.99, waits),
    };
  }

  // ---------------------------------------------------------------- formatting
  const count = (v) => Math.round(v).toLocaleString("en-US");
  function percent(v) {
    if (v === null || v === undefined) return "–";
    if (v === 0) return "0 %";
    return (v * 100).toFixed(v >= 0.01 ? 2 : 3) + " %";
  }
  const perSecond = (v, seconds) => (seconds ? (v / seconds).toFixed(1) + "/s" : "–");
  const ms = (v) => (v === null ? "–" : (v * 1000).toFixed(v >= 0.1 ? 0 : 1) + " ms");
  function duration(s) {
    const d = Math.floor(s / 86400), h = Math.floor(s / 3600) % 24, m = Math.floor(s / 60) % 60;
    return d ? `${d} d ${h} h` : h ? `${h} h ${m} min` : m ? `${m} min ${Math.floor(s % 60)} s` : `${Math.floor(s)} s`;
  }
  function show(id, text, value, tone) {
    const el = $(id);
    el.textContent = text;
    el.dataset.value = value === null || value === undefined ? "" : String(value);
    if (tone !== undefined) el.className = "big " + tone;
  }
  const lossTone = (v) => (v === null ? "" : v > 0.01 ? "bad" : v > 0.001 ? "warn" : "good");

  // ---------------------------------------------------------------- charts (SVG)
  const SVG = "http://www.w3.org/2000/svg";
  function node(name, attrs, text) {
    const el = document.createElementNS(SVG, name);
    for (const [key, value] of Object.entries(attrs)) el.setAttribute(key, value);
    if (text !== undefined) el.textContent = text;
    return el;
  }
  function niceMax(v) {
    if (!(v > 0)) return 1;
    const step = Math.pow(10, Math.floor(Math.log10(v)));
    for (const f of [1, 2, 2.5, 5, 10]) if (f * step >= v) return f * step;
    return 10 * step;
  }
  // The charts' span: the shortest of one, five or fifteen minutes (at most the daemon's history)
  // that holds every read, so a young daemon's few seconds are not a sliver at the edge.
  const SPANS = [60, 300, 900];
  function chartSpan() {
    const age = reads.length ? reads[reads.length - 1].t - reads[0].t : 0;
    for (const span of SPANS) if (span >= age && span <= windowS) return span;
    return windowS;
  }
  function spanText(span) {
    return span % 60 === 0 ? (span === 60 ? "minute" : `${span / 60} minutes`) : `${span} s`;
  }
  function caption() {
    const fromHistory = lastSeq !== null && reads.length > 1 ? " (from the daemon's own history: they start before this page was opened)" : "";
    $("kpi-span").textContent = `Figures above: the last few seconds. Charts: the last ${spanText(chartSpan())}${fromHistory}, ` +
      `one point per second; dashed marks: the events listed below.`;
    $("kpi-span").dataset.span = String(chartSpan());
  }
  // series: [{name, color, values: [[t, v|null], ...]}]; format: tick label of a value
  function drawChart(id, legendName, series, format, step) {
    const svg = $(id), c = CHART;
    svg.replaceChildren();
    const legend = document.querySelector(`.legend[data-chart="${legendName}"]`);
    legend.replaceChildren(...series.map((s) => {
      const item = document.createElement("span");
      const swatch = document.createElement("span");
      swatch.className = "sw c" + s.color;
      item.append(swatch, s.name);
      return item;
    }));
    const now = reads.length ? reads[reads.length - 1].t : 0;
    const span = chartSpan();  // the caption names the same span (see caption())
    const x = (t) => c.left + (c.w - c.left - c.right) * (1 - (now - t) / span);
    let top = 0;
    for (const s of series) for (const [, v] of s.values) if (v !== null && v > top) top = v;
    top = niceMax(top * 1.05);
    const y = (v) => c.h - c.bottom - (c.h - c.top - c.bottom) * (v / top);
    for (let i = 0; i <= 4; i++) {
      const v = (top * i) / 4;
      svg.append(node("line", { class: i ? "grid" : "axis", x1: c.left, x2: c.w - c.right, y1: y(v), y2: y(v) }));
      svg.append(node("text", { x: c.left - 6, y: y(v) + 4, "text-anchor": "end" }, format(v)));
    }
    const ticks = span >= 600 ? 300 : span >= 240 ? 60 : 30;
    for (let ago = 0; ago <= span + 1e-9; ago += ticks) {
      const xt = x(now - ago);
      svg.append(node("text", { x: xt, y: c.h - 8, "text-anchor": ago === 0 ? "end" : "middle" },
        ago === 0 ? "now" : ago % 60 === 0 ? `−${ago / 60} min` : `−${ago} s`));
    }
    // Events as vertical marks (warnings and errors darker), so a loss spike sits beside its cause.
    let marks = 0;
    for (const e of events) {
      if (now - e.t > span || e.t > now) continue;
      const xe = x(e.t).toFixed(1);
      svg.append(node("line", { class: "mark " + e.level, x1: xe, x2: xe, y1: c.top, y2: c.h - c.bottom },));
      marks++;
    }
    svg.dataset.marks = String(marks);
    let drawn = false, shown = 0, highest = null;
    for (const s of series) {
      let d = "", open = false, last = null;
      for (const [t, v] of s.values) {
        if (now - t > span || v === null) { open = false; continue; }
        if (step && open && last !== null) d += `L${x(t).toFixed(1)},${y(last).toFixed(1)}`;
        d += `${open ? "L" : "M"}${x(t).toFixed(1)},${y(v).toFixed(1)}`;
        open = true; last = v; shown++;
        if (highest === null || v > highest) highest = v;
      }
      if (d) { svg.append(node("path", { class: "line c" + s.color, d })); drawn = true; }
    }
    svg.dataset.points = String(shown);
    svg.dataset.max = highest === null ? "" : String(highest);
    if (!drawn) {
      svg.append(node("text", { class: "empty", x: (c.left + c.w) / 2, y: c.h / 2, "text-anchor": "middle" },
        reads.length < 2 ? "collecting…" : "no data in this window"));
    }
  }
  const short = (v) => String(+v.toPrecision(3));  // 3 significant digits, no trailing zeros
  const pct = (v) => short(v * 100) + " %";
  const num = (v) => (v >= 1000 ? short(v / 1000) + " k" : short(v));
  const msTick = (v) => short(v * 1000) + " ms";
  const perS = (p, key) => (p.seconds ? p[key] / p.seconds : null);

  function drawCharts() {
    const series = (name, color, fn) => ({ name, color, values: points.map((p) => [p.t, fn(p)]) });
    drawChart("chart-loss", "loss", [
      series("link loss", 0, (p) => p.linkLoss),
      series("residual loss", 1, (p) => p.residualLoss),
    ], pct);
    drawChart("chart-recovered", "recovered", [series("recovered/s", 2, (p) => perS(p, "recovered"))], num);
    drawChart("chart-overhead", "overhead", [
      series("packets", 3, (p) => p.overheadPackets),
      series("bytes", 4, (p) => p.overheadBytes),
    ], pct);
    drawChart("chart-delay", "delay", [series("p50", 1, (p) => p.p50), series("p99", 5, (p) => p.p99)], msTick);
    const reasons = [...new Set(points.flatMap((p) => Object.keys(p.drops).filter((r) => p.drops[r] > 0)))].sort();
    drawChart("chart-drops", "drops", reasons.length
      ? reasons.map((r, i) => series(r, [5, 6, 3, 4, 0, 1, 2, 7][i % 8], (p) => (p.seconds ? (p.drops[r] || 0) / p.seconds : null)))
      : [series("none", 7, (p) => (p.seconds ? p.dropTotal / p.seconds : null))], num);
    const code = (key) => (r) => { const v = parseFloat(r.info[key]); return isFinite(v) ? v : null; };
    drawChart("chart-code", "code", [
      { name: "k", color: 1, values: reads.map((r) => [r.t, code("k")(r)]) },
      { name: "m", color: 0, values: reads.map((r) => [r.t, code("m")(r)]) },
    ], num, true);
  }

  // ---------------------------------------------------------------- panels
  function row(label, key, value, extra) {
    const tr = document.createElement("tr");
    const name = document.createElement("td");
    name.textContent = label;
    const cell = document.createElement("td");
    cell.className = "num";
    cell.dataset.metric = key;
    cell.dataset.value = String(value);
    cell.textContent = count(value) + (extra || "");
    tr.className = value ? "" : "zero";
    tr.append(name, cell);
    return tr;
  }
  function drawTotals(s) {
    $("totals").tBodies[0].replaceChildren(...TOTALS.filter(([, key]) => key in s).map(([label, key, inner]) =>
      row(label, key, s[key], inner && inner in s ? ` (${count(s[inner])})` : "")));
    const drops = keysOf(s, DROPS, "reason").sort((a, b) => (s[b[0]] - s[a[0]]) || a[1].localeCompare(b[1]));
    $("drops").tBodies[0].replaceChildren(...drops.map(([key, reason]) => row(reason, key, s[key])));
  }
  function drawEstimate(doc) {
    const s = doc.samples, loss = s.fecproxy_link_loss_ratio, burst = s.fecproxy_link_mean_burst_packets;
    const have = loss !== undefined && loss !== null;
    $("estimate-loss").textContent = have ? percent(loss) : "– (no block received from the peer yet)";
    $("estimate-loss").dataset.value = have ? String(loss) : "";
    $("estimate-burst").textContent = have && burst !== null && burst !== undefined ? burst.toFixed(2) + " packets" : "–";
    $("estimate-burst").dataset.value = have && burst !== null && burst !== undefined ? String(burst) : "";
    const rate = doc.source_rate;
    $("estimate-rate").textContent = rate === null ? "–" : rate.toFixed(1) + " datagrams/s from the peer";
    $("estimate-rate").dataset.value = rate === null ? "" : String(rate);
    const plan = doc.plan || {}, box = $("plan"), best = plan.recommended;
    box.replaceChildren();
    if (best) {
      const code = document.createElement("span");
      code.className = "code";
      code.id = "plan-code";
      code.dataset.k = best.k; code.dataset.m = best.m;
      code.textContent = `k=${best.k} m=${best.m}`;
      const short = best.k_effective < best.k ? ` (blocks close short: k'=${best.k_effective} m'=${best.m_effective})` : "";
      box.append(code, `overhead ${best.overhead.toFixed(3)}, residual loss ${best.residual_loss.toPrecision(3)}, ` +
        `block span ${best.block_span_ms.toFixed(0)} ms${short}`);
    } else {
      const note = document.createElement("span");
      note.className = "muted";
      note.textContent = plan.note || "–";
      box.append(note);
    }
    $("plan-command").textContent = plan.command ? "$ " + plan.command : "";
    const age = plan.computed_s_ago >= 1 ? `, planned ${Math.round(plan.computed_s_ago)} s ago` : "";
    $("plan-budgets").textContent = plan.command
      ? `Budgets: recovery wait ≤ ${plan.latency_budget_ms} ms, overhead ≤ ${plan.max_overhead}, residual loss ≤ ${plan.target}; ` +
        `inputs rounded to two digits${age}. Compare with the peer's fec.block_size and fec.repair.` : "";
  }
  // The direction this daemon sends (what matters to a sender): the loss its peer reports, whether
  // the peer is heard, and the share of link.rate used (README "Pacing a narrow link").
  function put(id, text, value, tone) {  // a figure in a list (show() is for the big cards)
    const el = $(id);
    el.textContent = text;
    el.dataset.value = value === null || value === undefined ? "" : String(value);
    el.className = tone || "";
  }
  // Where this daemon sends its link packets: configured (link.peer) or learned from the peer's
  // packets; a change shows here at the next poll and as a peer_changed event below.
  function drawPeerAddress(daemon) {
    if (!daemon) return;
    const from = daemon.peer_from === "learned" ? "learned from its packets" : "configured (link.peer)";
    put("far-address", daemon.peer ? `${daemon.peer} · ${from}` : "not learned yet (nothing valid from the peer)",
      daemon.peer || "", daemon.peer ? "" : "muted");
  }
  function drawFarEnd() {
    const last = reads.length - 1;
    if (last < 0) return;
    const s = reads[last].s, silent = s.fecproxy_peer_silent, heard = s.fecproxy_peer_last_heard_seconds;
    const have = (v) => v !== undefined && v !== null;
    const state = silent === 1 ? `SILENT for ${duration(heard)} (nothing valid from it)`
      : have(heard) ? `heard ${heard.toFixed(1)} s ago` : "not heard yet";
    put("far-heard", state, silent === 1 ? 1 : 0, silent === 1 ? "bad" : "");
    const loss = s.fecproxy_peer_link_loss_ratio, residual = s.fecproxy_peer_residual_loss_ratio;
    const reports = s.fecproxy_reports_received_total;  // reports come before their ratios mean something
    const noLoss = have(reports) && reports > 0 ? "– (loss reports arriving, under 200 datagrams so far)"
      : "– (no loss report yet)";
    put("far-loss", have(loss) ? percent(loss) : noLoss, loss, have(loss) ? lossTone(loss) : "");
    put("far-residual", have(residual) ? percent(residual) : "–", residual, have(residual) ? lossTone(residual) : "");
    const rate = s.fecproxy_link_rate_bytes_per_second;
    if (!have(rate) || rate <= 0) {
      put("air-use", "– (link.rate not set: not paced)", null, "");
      put("air-queue", "–", null, "");
      return;
    }
    const before = reads[Math.max(0, last - KPI_READS)], seconds = reads[last].t - before.t;
    const kinds = ["source", "repair", "control"];
    const used = kinds.map((kind) => {
      const key = `fecproxy_link_air_bytes_sent_total{kind="${kind}"}`;
      return seconds > 0 ? delta(s, before.s, key) / seconds / rate : 0;
    });
    const total = used.reduce((a, b) => a + b, 0);
    put("air-use", `${percent(total)} of ${(rate * 8 / 1000).toFixed(0)} kbit/s (` +
      kinds.map((kind, i) => `${kind} ${percent(used[i])}`).join(", ") + ")", total, total > 0.95 ? "warn" : "");
    const dropped = Object.keys(s).filter((key) => key.startsWith("fecproxy_link_queue_dropped_total{"))
      .reduce((sum, key) => sum + get(s, key), 0);
    put("air-queue", `${count(get(s, "fecproxy_link_queue_packets"))} packets, last wait ` +
      `${ms(get(s, "fecproxy_link_queue_delay_seconds"))}; ${count(dropped)} dropped since start`, dropped, dropped ? "warn" : "");
  }
  function drawKpis() {
    const last = reads.length - 1;
    const f = last >= 1 ? figures(reads[last], reads[Math.max(0, last - KPI_READS)]) : null;
    if (!f) return;
    const span = `last ${Math.max(1, Math.round(f.seconds))} s`;
    show("kpi-link-loss", percent(f.linkLoss), f.linkLoss, lossTone(f.linkLoss));
    $("kpi-link-loss-sub").textContent = `${count(f.lost)} of ${count(f.expected)} source packets, ${span}`;
    show("kpi-residual-loss", percent(f.residualLoss), f.residualLoss, lossTone(f.residualLoss));
    $("kpi-residual-loss-sub").textContent = `${count(f.unrecovered)} not rebuilt, ${span}`;
    show("kpi-recovered", perSecond(f.recovered, f.seconds), f.recovered / f.seconds, "");
    $("kpi-recovered-sub").textContent = `${count(f.recovered)} rebuilt, ${span}`;
    show("kpi-overhead", percent(f.overheadPackets), f.overheadPackets, "");
    $("kpi-overhead-sub").textContent = `packets; ${percent(f.overheadBytes)} in bytes`;
    show("kpi-delay", ms(f.p50), f.p50, "");
    $("kpi-delay-sub").textContent = `p99 ${ms(f.p99)}` + (f.ordered ? `; in-order wait p99 ${ms(f.orderP99)}` : "");
    show("kpi-drops", perSecond(f.dropTotal, f.seconds), f.dropTotal / f.seconds, f.dropTotal ? "warn" : "");
    const top = Object.entries(f.drops).filter(([, v]) => v > 0).sort((a, b) => b[1] - a[1]).map(([r, v]) => `${r} ${count(v)}`);
    $("kpi-drops-sub").textContent = top.length ? top.join(", ") : `none, ${span}`;
  }
  function fieldsText(fields) {
    return Object.entries(fields || {}).map(([k, v]) => `${k}=${v}`).join(" ");
  }
  function drawEvents() {
    const rows = events.slice(-MAX_EVENTS_SHOWN).reverse().map((e) => {
      const tr = document.createElement("tr");
      tr.className = "ev " + e.level;
      tr.dataset.event = e.event;
      const when = document.createElement("td");
      when.textContent = new Date(e.ts).toLocaleTimeString("en-GB");
      when.title = e.ts;
      const name = document.createElement("td");
      name.className = "name";
      name.textContent = e.event;
      const detail = document.createElement("td");
      detail.className = "detail";
      detail.textContent = fieldsText(e.fields);
      tr.append(when, name, detail);
      return tr;
    });
    $("events").tBodies[0].replaceChildren(...rows);
    $("events-none").hidden = rows.length > 0;
  }
  function takeHistory(doc) {
    const h = doc.history;
    if (!h) { lastSeq = 0; return; }
    if (h.span_s) { windowS = h.span_s; maxReads = Math.round(h.span_s / (h.interval_s || 1)) + 1; }
    for (const e of h.events || []) if (lastSeq === null || e.seq > lastSeq) events.push(e);
    while (events.length > MAX_EVENTS_SHOWN) events.shift();
    lastSeq = Math.max(lastSeq || 0, h.events_recorded || 0);
    if (!h.samples || reads.length) return;
    const send = (name) => `${name}{code="send"}`;
    for (const row of h.samples) {
      const s = {};
      h.series.forEach((key, i) => { if (row[i + 1] !== null) s[key] = row[i + 1]; });
      const k = s[send("fecproxy_code_source_symbols")], m = s[send("fecproxy_code_repair_symbols")];
      const read = { t: row[0], s, info: { k: k === undefined ? "" : String(k), m: m === undefined ? "" : String(m) } };
      if (reads.length) points.push(figures(read, reads[reads.length - 1]));
      reads.push(read);
    }
  }
  function connection(state, text) {
    const pill = $("conn");
    pill.className = "pill " + state;
    pill.textContent = text;
  }

  // ---------------------------------------------------------------- polling
  async function poll() {
    const abort = new AbortController();
    const timer = setTimeout(() => abort.abort(), FETCH_TIMEOUT_MS);
    try {
      const query = lastSeq === null ? "?history=1" : `?events_since=${lastSeq}`;
      const response = await fetch("status.json" + query, { cache: "no-store", signal: abort.signal });
      if (!response.ok) throw new Error(`HTTP ${response.status}`);
      const doc = await response.json();
      refreshS = doc.refresh_s || refreshS;
      const read = { t: doc.uptime_s, s: doc.samples, info: doc.info || {} };
      const previous = reads[reads.length - 1];
      if (previous && read.t < previous.t) {  // daemon restarted: its history starts afresh
        reads.length = 0; points.length = 0; events.length = 0; lastSeq = null;
      }
      takeHistory(doc);
      const before = reads[reads.length - 1];
      if (before && read.t > before.t) points.push(figures(read, before));
      if (!before || read.t > before.t) reads.push(read);
      while (reads.length > maxReads) reads.shift();
      while (points.length > maxReads - 1) points.shift();
      $("role").textContent = read.info.role || "?";
      $("version").textContent = read.info.version || "?";
      for (const key of ["k", "m"]) { $("code-" + key).textContent = read.info[key] || "?"; $("code-" + key).dataset.value = read.info[key] || ""; }
      const sliding = read.info.fec_code === "sliding";
      $("sliding-fact").hidden = !sliding;
      if (sliding) {
        $("sliding-window").textContent = read.s["fecproxy_sliding_window_packets"] ?? "?";
        $("sliding-interval").textContent = read.s["fecproxy_sliding_repair_interval_packets"] ?? "?";
      }
      $("uptime").textContent = duration(doc.uptime_s);
      drawKpis();
      caption();
      drawCharts();
      drawTotals(read.s);
      drawEstimate(doc);
      drawFarEnd();
      drawPeerAddress(doc.daemon);
      drawEvents();
      connection("ok", "live · " + new Date().toLocaleTimeString("en-GB"));
      document.body.dataset.refreshes = String(Number(document.body.dataset.refreshes) + 1);
    } catch (error) {
      connection("bad", "no answer from the daemon: " + (error.name === "AbortError" ? "timed out" : error.message) + " · retrying");
    } finally {
      clearTimeout(timer);
      setTimeout(poll, refreshS * 1000);
    }
  }
  poll();
})();
