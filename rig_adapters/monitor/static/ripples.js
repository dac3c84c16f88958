// placeloop live monitor: the ripple panel. The ripple-band envelope with its thresholds and the candidate
// events, and the decoded sequence of the newest events. Loaded before monitor.js, whose drawing helpers
// (setupCanvas, drawAxes, niceTicks, fmt, INK, FONT, model) it uses once packets arrive.
"use strict";

const ripples = {
  view: null,               // the packet's "ripples" part (rig_adapters/monitor/session_view.py)
  canvas: null,
  cards: [],                // one {el, canvas, caption} per sequence shown
  dirty: false,
};

// The colour of an event's decided content: its first decided rule's; grey when none decided.
function contentColour(e) {
  const m = model.env.marks;
  const first = e.decided.find((name) => m.content[name]);
  return first ? m.content[first] : m.undecided;
}

function positionAxis() {
  const env = model.env;
  if (env.kind === "arena") {
    const lo = Math.min(env.x_edges_cm[0], env.y_edges_cm[0]);
    const hi = Math.max(env.x_edges_cm[env.x_edges_cm.length - 1], env.y_edges_cm[env.y_edges_cm.length - 1]);
    return { lo, hi, label: "decoded x (filled), y (open), cm" };
  }
  if (env.kind === "ring") return { lo: 0, hi: 360, label: "decoded heading (deg)" };
  return { lo: 0, hi: env.total_length_cm, label: "decoded position along the track (cm)" };
}

function ripplesTake(view) {
  if (!view) return;
  const panel = $("ripple-panel");
  if (panel.hidden) {
    panel.hidden = false;
    ripples.canvas = setupCanvas($("rip-envelope"));
    ripplesLegend();
  }
  ripples.view = view;
  ripples.dirty = true;
  const n = view.events_seen;
  $("rip-count").textContent = n ? `${n} candidate event${n === 1 ? "" : "s"} seen` +
    (view.n_events !== n ? ` (the loop holds ${view.n_events})` : "") : "no candidate events yet";
  $("rip-axis").textContent = positionAxis().label + " against ms after the onset";
}

function ripplesLegend() {
  const m = model.env.marks;
  const keys = Object.entries(m.content).map(([name, colour]) => [name, colour, true]);
  keys.push(["no content rule fired", m.undecided, false]);
  $("rip-legend").replaceChildren(...keys.map(([name, colour, filled]) => {
    const span = document.createElement("span");
    span.className = "content-key";
    const c = document.createElement("canvas");
    c.width = 14; c.height = 14; c.className = "key-mark";
    const g = c.getContext("2d");
    g.beginPath(); g.arc(7, 7, 5, 0, 2 * Math.PI);
    g.lineWidth = 2; g.strokeStyle = filled ? INK : colour;
    if (filled) { g.fillStyle = colour; g.fill(); }
    g.stroke();
    span.append(c, document.createTextNode(filled ? `decided: ${name}` : name));
    return span;
  }));
}

function drawEnvelope() {
  const v = ripples.view, { ctx, w, h } = ripples.canvas;
  ctx.clearRect(0, 0, w, h);
  const box = { x: 52, y: 8, w: w - 52 - 110, h: h - 8 - 40 };
  const env = v.envelope_sd;
  const t0 = v.t0_s ?? 0, t1 = t0 + Math.max(env.length, 1) * v.step_s;
  let top = v.threshold_sd * 1.6;
  for (const z of env) if (z !== null) top = Math.max(top, z * 1.05);
  const bottom = Math.min(-1, ...env.filter((z) => z !== null));
  const sx = (t) => box.x + ((t - t0) / (t1 - t0)) * box.w;
  const sy = (z) => box.y + box.h - ((Math.min(z, top) - bottom) / (top - bottom)) * box.h;
  ctx.save();
  ctx.fillStyle = "rgba(86, 180, 233, 0.28)";
  for (const [onset, durationMs] of v.marks) {
    const end = durationMs === null ? t1 : onset + durationMs / 1e3;
    ctx.fillRect(sx(onset), box.y, Math.max(2, sx(Math.min(end, t1)) - sx(onset)), box.h);
    ctx.fillStyle = INK;
    ctx.beginPath(); ctx.moveTo(sx(onset), box.y + 9); ctx.lineTo(sx(onset) - 5, box.y); ctx.lineTo(sx(onset) + 5, box.y);
    ctx.closePath(); ctx.fill();
    ctx.fillStyle = "rgba(86, 180, 233, 0.28)";
  }
  ctx.strokeStyle = BLUE; ctx.lineWidth = 1.5;
  ctx.beginPath();
  let pen = false;
  env.forEach((z, i) => {
    if (z === null) { pen = false; return; }
    const px = sx(t0 + (i + 0.5) * v.step_s), py = sy(z);
    if (pen) ctx.lineTo(px, py); else ctx.moveTo(px, py);
    pen = true;
  });
  ctx.stroke();
  ctx.font = FONT; ctx.textAlign = "left"; ctx.textBaseline = "middle";
  for (const [z, dash, colour, text] of [[v.threshold_sd, [7, 4], EVENT, `onset ${v.threshold_sd} s.d.`],
                                          [v.end_sd, [2, 3], MUTED, `end ${v.end_sd} s.d.`]]) {
    ctx.setLineDash(dash); ctx.strokeStyle = colour; ctx.lineWidth = 1.5;
    ctx.beginPath(); ctx.moveTo(box.x, sy(z)); ctx.lineTo(box.x + box.w, sy(z)); ctx.stroke();
    ctx.setLineDash([]); ctx.fillStyle = colour;
    ctx.fillText(text, box.x + box.w + 6, sy(z));
  }
  if (!v.baseline_ready) {
    ctx.fillStyle = MUTED; ctx.textAlign = "center";
    ctx.fillText("learning the baseline: no detection yet", box.x + box.w / 2, box.y + box.h / 2);
  }
  ctx.restore();
  drawAxes(ctx, box, [t0, t1], [bottom, top], sx, sy, "data time (s)", "envelope (s.d.)",
    { xfmt: (t) => t.toFixed(0) });
}

function sequenceCard(i) {
  while (ripples.cards.length <= i) {
    const el = document.createElement("div");
    el.className = "sequence";
    const c = document.createElement("canvas");
    c.width = 240; c.height = 150;
    const caption = document.createElement("div");
    caption.className = "caption";
    el.append(c, caption);
    $("rip-sequences").append(el);
    ripples.cards.push({ el, canvas: setupCanvas(c), caption });
  }
  return ripples.cards[i];
}

function drawSequence(card, e) {
  const { ctx, w, h } = card.canvas;
  ctx.clearRect(0, 0, w, h);
  const box = { x: 44, y: 6, w: w - 44 - 8, h: h - 6 - 38 };
  const ax = positionAxis();
  const times = e.bin_ms.filter((t) => t !== null);
  const tMax = Math.max(60, ...times, e.duration_ms || 0);
  // The first bins may end before the onset: the event starts where its population burst began.
  const tMin = Math.min(0, 10 * Math.floor(Math.min(...times, 0) / 10));
  const sx = (t) => box.x + ((t - tMin) / (tMax - tMin)) * box.w;
  const sy = (p) => box.y + box.h - ((p - ax.lo) / (ax.hi - ax.lo)) * box.h;
  const colour = contentColour(e);
  const decided = e.decided.length > 0;
  ctx.save();
  if (e.decision_ms !== null) {
    ctx.setLineDash([3, 3]); ctx.strokeStyle = INK; ctx.lineWidth = 1;
    ctx.beginPath(); ctx.moveTo(sx(e.decision_ms), box.y); ctx.lineTo(sx(e.decision_ms), box.y + box.h); ctx.stroke();
    ctx.setLineDash([]);
  }
  e.positions.forEach((series, k) => {
    series.forEach((p, j) => {
      const t = e.bin_ms[j];
      if (p === null || t === null) return;
      const r = e.n_spikes[j] > 0 ? 4 : 2.5;
      ctx.beginPath(); ctx.arc(sx(t), sy(p), r, 0, 2 * Math.PI);
      ctx.lineWidth = 1.5;
      if (decided && k === 0) { ctx.fillStyle = colour; ctx.fill(); ctx.strokeStyle = INK; }
      else ctx.strokeStyle = colour === model.env.marks.undecided || k > 0 ? colour : INK;
      ctx.stroke();
    });
  });
  ctx.restore();
  drawAxes(ctx, box, [tMin, tMax], [ax.lo, ax.hi], sx, sy, "ms after onset", "", { xfmt: (t) => t.toFixed(0) });
  const what = decided ? `decided: ${e.decided.join(", ")} at ${fmt(e.decision_ms, 0, "ms")}` : "no content rule fired";
  card.caption.replaceChildren();
  const b = document.createElement("b");
  b.textContent = `t = ${e.onset_s.toFixed(2)} s`;
  card.caption.append(b, document.createTextNode(` · ${e.bin_ms.length} bins · ` +
    `${e.duration_ms === null ? "ongoing" : e.duration_ms.toFixed(0) + " ms"} · ${what}`));
}

function ripplesDraw() {
  if (!ripples.dirty || !ripples.view) return;
  ripples.dirty = false;
  drawEnvelope();
  const seqs = ripples.view.sequences;
  seqs.forEach((e, i) => drawSequence(sequenceCard(i), e));
  ripples.cards.forEach((card, i) => { card.el.hidden = i >= seqs.length; });
}

// What the page shows of the ripples, for tests (window.__monitorState.ripples).
function ripplesState() {
  const v = ripples.view;
  if (!v) return null;
  return {
    events_seen: v.events_seen,
    n_events: v.n_events,
    envelope_points: v.envelope_sd.filter((z) => z !== null).length,
    threshold_sd: v.threshold_sd,
    marks: v.marks.length,
    sequences: v.sequences.map((e) => ({ onset_s: e.onset_s, bins: e.bin_ms.length, decided: e.decided })),
    cards_shown: ripples.cards.filter((c) => !c.el.hidden).length,
    count_text: $("rip-count").textContent,
  };
}
