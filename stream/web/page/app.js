// breathd's bedside page: one card per device, fed by Server-Sent Events
// from /live. Plain JavaScript of our own; charts by uPlot.
"use strict";

const STRIP_S = 20;          // the strip shows the last 20 s
const WAVE_KEEP_S = 30;      // and keeps 30 s
const BREATHS_KEEP_S = 86400; // the trends keep 24 h
const EVENTS_KEEP = 50;

const devices = new Map();
let canAck = false;
let trendFields = [];

const fmt = (v, d) => (v === null || v === undefined || Number.isNaN(v)) ? "–" : Number(v).toFixed(d);
const ie = (v) => (v === null || v === undefined) ? "–" : (v >= 1 ? "1:" + v.toFixed(1) : (1 / v).toFixed(1) + ":1");
const clock = (iso) => iso ? new Date(iso).toLocaleTimeString() : "";

function card(id) {
  let d = devices.get(id);
  if (d) return d;
  const el = document.getElementById("device").content.firstElementChild.cloneNode(true);
  el.dataset.device = id;
  el.querySelector(".name").textContent = id;
  document.getElementById("devices").appendChild(el);
  d = { id, el, wave: { t: [], paw: [], flow: [], vol: [] }, rows: [], events: [], starts: [], strip: [], trend: null, active: [] };
  devices.set(id, d);
  makeCharts(d);
  el.querySelector(".trend-field").addEventListener("change", () => drawTrend(d));
  el.querySelector(".trend-range").addEventListener("change", () => drawTrend(d));
  return d;
}

function width(el) { return Math.max(240, el.clientWidth || 400); }

// a vertical line at each x of xs (in the chart's x unit), labelled
function marks(xsOf, color) {
  return {
    hooks: {
      draw: [u => {
        const ctx = u.ctx, top = u.bbox.top, h = u.bbox.height;
        ctx.save();
        ctx.strokeStyle = color; ctx.fillStyle = color; ctx.lineWidth = 1;
        ctx.setLineDash([3, 3]);
        ctx.font = "11px system-ui, sans-serif";
        for (const m of xsOf()) {
          if (m.x < u.scales.x.min || m.x > u.scales.x.max) continue;
          const x = Math.round(u.valToPos(m.x, "x", true));
          ctx.beginPath(); ctx.moveTo(x, top); ctx.lineTo(x, top + h); ctx.stroke();
          if (m.label) ctx.fillText(m.label, x + 3, top + 12);
        }
        ctx.restore();
      }],
    },
  };
}

function makeCharts(d) {
  const strip = d.el.querySelector(".strip");
  const specs = [["Paw", "cmH2O", "#2f4f7f"], ["Flow", "L/min", "#3d7a4a"], ["Volume", "mL", "#6b5b95"]];
  d.strip = specs.map(([label, unit, color], i) => new uPlot({
    // the last chart carries the time axis, so it is taller
    width: width(strip), height: i === 2 ? 130 : 90, legend: { show: false }, cursor: { show: false },
    scales: { x: { time: false } },
    axes: [{ show: i === 2, label: i === 2 ? "s before the latest sample" : undefined, size: i === 2 ? 40 : 0,
             values: (u, vals) => vals.map(v => (v - (d.wave.t.at(-1) || 0)).toFixed(0)) },
           { label: label + " " + unit, size: 50, labelSize: 14, font: "11px system-ui, sans-serif", labelFont: "11px system-ui, sans-serif" }],
    series: [{}, { stroke: color, width: 1.2 }],
    plugins: [marks(() => d.starts.map(t => ({ x: t })), "#b0b6bf")],
  }, [[], []], strip));
  const trend = d.el.querySelector(".trend");
  d.trend = new uPlot({
    width: width(trend), height: 160, legend: { show: false },
    scales: { x: { time: false } },
    axes: [{ label: "minutes before the latest breath", size: 40 }, { size: 55, labelSize: 14, label: "" }],
    series: [{}, { stroke: "#2f4f7f", width: 1.2, points: { show: false } }],
    plugins: [marks(() => d.trendMarks || [], "#8a6d3b")],
  }, [[], []], trend);
}

function drawStrip(d) {
  const w = d.wave, n = w.t.length;
  if (!n) return;
  const tmax = w.t[n - 1], from = tmax - STRIP_S;
  let i = 0;
  while (i < n && w.t[i] < from) i++;
  const xs = w.t.slice(i);
  [w.paw, w.flow, w.vol].forEach((ys, k) => {
    d.strip[k].batch(() => {
      d.strip[k].setData([xs, ys.slice(i)]);
      d.strip[k].setScale("x", { min: from, max: tmax });
    });
  });
}

function drawTrend(d) {
  const field = d.el.querySelector(".trend-field").value;
  const range = Number(d.el.querySelector(".trend-range").value);
  const col = 2 + trendFields.indexOf(field);
  const rows = d.rows;
  if (!rows.length || col < 2) return;
  const tmax = rows[rows.length - 1][0];
  const xs = [], ys = [];
  for (const r of rows) {
    if (r[0] < tmax - range) continue;
    xs.push((r[0] - tmax) / 60); ys.push(r[col]);
  }
  const unit = { cstat: "mL/cmH2O", dp: "cmH2O", fit_r: "cmH2O·s/L", mp: "J/min", rr: "/min", asynchrony_index: "%" }[field];
  d.trend.axes[1].label = d.el.querySelector(".trend-field").selectedOptions[0].text + ", " + unit;
  d.trendMarks = d.events.filter(e => e.t >= tmax - range && e.transition !== "acknowledged")
    .map(e => ({ x: (e.t - tmax) / 60, label: e.rule + " " + e.transition }));
  d.trend.setData([xs, ys]);
  d.trend.setScale("x", { min: -range / 60, max: 0 });
}

const valueSpec = [
  ["VT", "vti", 0, "mL"], ["VT/kg PBW", "vt_pbw", 1, "mL/kg"], ["rate", "rr", 1, "/min"], ["I:E", "ie", -1, ""],
  ["peak", "ppeak", 1, "cmH2O"], ["plateau", "pplat", 1, "cmH2O"], ["PEEP", "peep", 1, "cmH2O"], ["intrinsic PEEP", "peepi", 1, "cmH2O"],
  ["driving pressure", "dp", 1, "cmH2O"], ["compliance", "cstat", 1, "mL/cmH2O"], ["compliance (fit)", "fit_c", 1, "mL/cmH2O"],
  ["resistance (fit)", "fit_r", 1, "cmH2O·s/L"], ["mechanical power", "mp", 1, "J/min"],
];

function showBreath(d, b) {
  const dl = d.el.querySelector(".values");
  dl.dataset.seq = b.seq;
  dl.replaceChildren(...valueSpec.map(([label, key, dec, unit]) => {
    const div = document.createElement("div");
    const dt = document.createElement("dt"); dt.textContent = label;
    const dd = document.createElement("dd");
    dd.textContent = dec < 0 ? ie(b[key]) : fmt(b[key], dec);
    if (unit) { const s = document.createElement("small"); s.textContent = unit; dd.appendChild(s); }
    div.append(dt, dd);
    return div;
  }));
  const words = (b.asynchrony || []).map(w => w.replaceAll("_", " "));
  d.el.querySelector(".flags").textContent = [
    (b.flags && b.flags.length) ? "breath " + b.seq + " flags: " + b.flags.join(", ") : "",
    words.length ? "asynchrony: " + words.join(", ") + (b.ineffective_efforts > 1 ? " (" + b.ineffective_efforts + " ineffective efforts)" : "") : "",
  ].filter(Boolean).join(" · ");
}

function showActive(d) {
  const ul = d.el.querySelector(".active");
  if (!d.active.length) { const li = document.createElement("li"); li.textContent = "none"; ul.replaceChildren(li); return; }
  ul.replaceChildren(...d.active.map(a => {
    const li = document.createElement("li");
    li.textContent = `${a.rule} (${a.level}): ${a.field} ${fmt(a.value, 2)}` + (a.since_at ? `, since ${clock(a.since_at)}` : `, since t ${fmt(a.since_t, 0)} s`) +
      (a.acknowledged ? ", acknowledged" : "");
    if (canAck && a.latching && !a.acknowledged) {
      const btn = document.createElement("button");
      btn.textContent = "acknowledge";
      btn.addEventListener("click", async () => {
        btn.disabled = true;
        const r = await fetch("/ack", { method: "POST", headers: { "Content-Type": "application/json" }, body: JSON.stringify({ device: d.id, id: a.event_id }) });
        if (!r.ok) { btn.disabled = false; btn.textContent = "refused: " + (await r.text()).trim(); }
      });
      li.appendChild(btn);
    }
    return li;
  }));
}

function showEvents(d) {
  const ol = d.el.querySelector(".events");
  ol.replaceChildren(...d.events.slice(-8).reverse().map(e => {
    const li = document.createElement("li");
    li.textContent = `${e.at ? clock(e.at) : "t " + fmt(e.t, 0) + " s"} ${e.rule} ${e.transition}` + (e.value !== null ? ` (${e.field} ${fmt(e.value, 2)})` : "");
    return li;
  }));
}

const es = new EventSource("/live");
const on = (kind, f) => es.addEventListener(kind, m => f(JSON.parse(m.data)));
es.onopen = () => { document.getElementById("conn").textContent = "live"; };
es.onerror = () => { document.getElementById("conn").textContent = "connection lost: retrying…"; };
on("hello", m => {
  canAck = m.can_ack;
  document.getElementById("notice").textContent = m.advisory;
  [...m.devices].sort().forEach(card);
});
on("wave", m => {
  const d = card(m.device), w = d.wave;
  for (const [t, p, f, v] of m.points) { w.t.push(t); w.paw.push(p); w.flow.push(f); w.vol.push(v); }
  const cut = w.t.findIndex(t => t >= w.t[w.t.length - 1] - WAVE_KEEP_S);
  if (cut > 0) for (const k of ["t", "paw", "flow", "vol"]) w[k].splice(0, cut);
  drawStrip(d);
});
on("breaths", m => {
  const d = card(m.device);
  trendFields = m.fields;
  for (const r of m.rows) { d.rows.push(r); d.starts.push(r[0]); }
  const tmax = d.rows[d.rows.length - 1][0];
  const cut = d.rows.findIndex(r => r[0] >= tmax - BREATHS_KEEP_S);
  if (cut > 0) d.rows.splice(0, cut);
  d.starts = d.starts.filter(t => t >= tmax - WAVE_KEEP_S);
  drawTrend(d);
});
on("breath", m => showBreath(card(m.device), m.breath));
on("rise", m => { card(m.device).el.querySelector(".rise").textContent = m.text ? "Why the pressure rose: " + m.text : ""; });
on("asynchrony", m => { card(m.device).el.querySelector(".asynchrony").textContent = m.text ? "Asynchrony index " + m.text : ""; });
on("events", m => {
  const d = card(m.device);
  d.events.push(...m.events);
  if (d.events.length > EVENTS_KEEP) d.events.splice(0, d.events.length - EVENTS_KEEP);
  showEvents(d); drawTrend(d);
});
on("active", m => { const d = card(m.device); d.active = m.active; showActive(d); });
on("status", m => {
  const d = card(m.device);
  d.el.querySelector(".state").textContent = m.reading ? "reading" : "not reading";
  d.el.querySelector(".status").textContent = `${m.samples} samples at ${fmt(m.rate_hz, 1)} Hz · bad lines ${m.bad_lines} · gaps ${m.gaps} · breaths ${m.breaths}` +
    (m.last_sample_age !== null ? ` · last sample ${fmt(m.last_sample_age, 1)} s ago` : "") +
    (m.publisher_connected === undefined ? "" : m.publisher_connected ? " · MQTT connected" : " · MQTT not connected");
  d.el.querySelector(".hint").textContent = m.format_hint ? "Check: " + m.format_hint : "";
});
window.addEventListener("resize", () => {
  for (const d of devices.values()) {
    d.strip.forEach((u, i) => u.setSize({ width: width(d.el.querySelector(".strip")), height: i === 2 ? 130 : 90 }));
    d.trend.setSize({ width: width(d.el.querySelector(".trend")), height: 160 });
  }
});
