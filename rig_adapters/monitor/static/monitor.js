// placeloop live monitor: draws the packets the monitor server pushes over a WebSocket.
// Plain JS, Canvas 2D, no build step, nothing loaded from anywhere but this server.
"use strict";

// The colour map and the marks come from the server (rig_adapters/monitor/marks.py), the same table the
// offline report draws with: cividis for posteriors and occupancy, Okabe & Ito (2008) colours for the marks,
// each mark with a shape of its own.
const LUT = new Uint8ClampedArray(256 * 3);
let INK = "#1d2126", TRACKED = "#ffffff", DECODED = "#cc79a7", MEAN = "#e69f00", EVENT = "#d55e00";
let OUTSIDE = [217, 213, 204];
const ZONE = "#ffffff";
const GRID = "#d9d5cc";
const MUTED = "#5f6670";
const BLUE = "#0072b2";
const FONT = '12px system-ui, "DejaVu Sans", sans-serif';

function rgb(hex) { return [0, 2, 4].map((i) => parseInt(hex.replace("#", "").substr(i, 2), 16)); }

function takeMarks(m) {
  m.colour_map_hex.forEach((hex, i) => LUT.set(rgb(hex), i * 3));
  INK = m.ink; TRACKED = m.marks.tracked.colour; DECODED = m.marks.decoded.colour; MEAN = m.marks.mean.colour;
  EVENT = m.event; OUTSIDE = rgb(m.outside_map);
}

const STRIP_S = 20;           // data seconds shown in the track strip
const EVENT_FLASH_MS = 1200;
const STALE_AFTER_S = 2.0;

const ui = {};
const model = {
  env: null,
  frame: null,
  post: null,               // Uint8Array of the newest posterior, 0..255 of its peak
  trace: [],                // [t_s, median error cm] per trace bin
  events: [],
  latencyEdges: null,
  latencyCounts: null,
  strip: [],                // track: {t, post, lin} per packet
  lastEventAt: 0,
  lastEvent: null,
  packets: 0,
  dirty: false,
};

window.__monitorState = { packets: 0, ready: false };

function $(id) { return document.getElementById(id); }

// Errors on a heading ring are shortest turns in degrees (decoder/space/headings.py), elsewhere cm.
function errorUnit() { return model.env && model.env.kind === "ring" ? "deg" : "cm"; }

function fmt(x, digits = 1, unit = "") {
  if (x === null || x === undefined || !Number.isFinite(x)) return "—";
  return x.toFixed(digits) + (unit ? " " + unit : "");
}

// ---------------------------------------------------------------- canvas helpers

function setupCanvas(canvas) {
  const ratio = window.devicePixelRatio || 1;
  const w = canvas.width, h = canvas.height;
  canvas.width = Math.round(w * ratio);
  canvas.height = Math.round(h * ratio);
  const ctx = canvas.getContext("2d");
  ctx.scale(ratio, ratio);
  return { ctx, w, h };
}

function niceTicks(lo, hi, count) {
  const span = hi - lo;
  if (!(span > 0)) return [lo];
  const raw = span / count;
  const mag = Math.pow(10, Math.floor(Math.log10(raw)));
  const step = [1, 2, 5, 10].map((m) => m * mag).find((s) => span / s <= count) || 10 * mag;
  const ticks = [];
  for (let v = Math.ceil(lo / step) * step; v <= hi + 1e-9 * span; v += step) ticks.push(Number(v.toPrecision(12)));
  return ticks;
}

// Axes with a frame, ticks and a label carrying the unit. `sx`, `sy` map data to pixels.
function drawAxes(ctx, box, xr, yr, sx, sy, xlabel, ylabel, opts = {}) {
  ctx.save();
  ctx.strokeStyle = INK;
  ctx.fillStyle = INK;
  ctx.lineWidth = 1;
  ctx.font = FONT;
  ctx.strokeRect(box.x + 0.5, box.y + 0.5, box.w, box.h);
  ctx.textAlign = "center";
  ctx.textBaseline = "top";
  const xt = opts.xticks || niceTicks(xr[0], xr[1], Math.max(2, Math.floor(box.w / 70)));
  for (const v of xt) {
    const px = sx(v);
    if (px < box.x - 1 || px > box.x + box.w + 1) continue;
    ctx.beginPath(); ctx.moveTo(px, box.y + box.h); ctx.lineTo(px, box.y + box.h + 4); ctx.stroke();
    ctx.fillText(opts.xfmt ? opts.xfmt(v) : String(v), px, box.y + box.h + 6);
  }
  ctx.fillText(xlabel, box.x + box.w / 2, box.y + box.h + 22);
  ctx.textAlign = "right";
  ctx.textBaseline = "middle";
  for (const v of niceTicks(yr[0], yr[1], Math.max(2, Math.floor(box.h / 40)))) {
    const py = sy(v);
    if (py < box.y - 1 || py > box.y + box.h + 1) continue;
    ctx.beginPath(); ctx.moveTo(box.x, py); ctx.lineTo(box.x - 4, py); ctx.stroke();
    ctx.fillText(String(v), box.x - 6, py);
  }
  ctx.translate(box.x - 40, box.y + box.h / 2);
  ctx.rotate(-Math.PI / 2);
  ctx.textAlign = "center";
  ctx.textBaseline = "bottom";
  ctx.fillText(ylabel, 0, 0);
  ctx.restore();
}

// The colour bar's gradient, drawn once the colour map has arrived: 256 rows, the top row the peak.
const BAR = new OffscreenCanvas(1, 256);
function drawBarGradient() {
  const img = new ImageData(1, 256);
  for (let i = 0; i < 256; i++) {
    const k = 255 - i;
    img.data.set([LUT[k * 3], LUT[k * 3 + 1], LUT[k * 3 + 2], 255], i * 4);
  }
  BAR.getContext("2d").putImageData(img, 0, 0);
}

function drawColourBar(ctx, x, y, w, h, peak, label) {
  ctx.save();
  ctx.imageSmoothingEnabled = false;
  ctx.drawImage(BAR, x, y, w, h);
  ctx.restore();
  ctx.save();
  ctx.strokeStyle = INK;
  ctx.strokeRect(x + 0.5, y + 0.5, w, h);
  ctx.fillStyle = INK;
  ctx.font = FONT;
  ctx.textAlign = "left";
  ctx.textBaseline = "middle";
  ctx.fillText(peak > 0 ? peak.toPrecision(2) : "—", x + w + 4, y + 4);
  ctx.fillText("0", x + w + 4, y + h - 2);
  ctx.translate(x + w + 40, y + h / 2);
  ctx.rotate(-Math.PI / 2);
  ctx.textAlign = "center";
  ctx.fillText(label, 0, 0);
  ctx.restore();
}

function marker(ctx, kind, px, py, size) {
  ctx.save();
  ctx.lineWidth = 2;
  ctx.strokeStyle = INK;
  ctx.beginPath();
  if (kind === "tracked") {
    ctx.fillStyle = TRACKED;
    ctx.arc(px, py, size, 0, 2 * Math.PI);
    ctx.fill(); ctx.stroke();
  } else if (kind === "decoded") {
    ctx.fillStyle = DECODED;
    ctx.moveTo(px, py - size * 1.3); ctx.lineTo(px + size * 1.3, py);
    ctx.lineTo(px, py + size * 1.3); ctx.lineTo(px - size * 1.3, py); ctx.closePath();
    ctx.fill(); ctx.stroke();
  } else {
    ctx.lineWidth = 4;
    ctx.moveTo(px - size, py - size); ctx.lineTo(px + size, py + size);
    ctx.moveTo(px + size, py - size); ctx.lineTo(px - size, py + size);
    ctx.stroke();
    ctx.strokeStyle = MEAN; ctx.lineWidth = 2;
    ctx.stroke();
  }
  ctx.restore();
}

// The legend's marks are drawn by the very function that draws them on the map.
function drawLegend(marks) {
  for (const kind of ["tracked", "decoded", "mean"]) {
    const c = setupCanvas($("key-" + kind));
    marker(c.ctx, kind, c.w / 2, c.h / 2, 5);
    $("key-" + kind).nextElementSibling.textContent =
      kind === "tracked" && model.env.kind === "track" ? "tracked position (line over time)" : marks[kind].label;
  }
}

function trail(ctx, points, map, colour) {
  const pts = points.filter((p) => p).map(map);
  if (pts.length < 2) return;
  ctx.save();
  ctx.lineJoin = "round";
  ctx.lineCap = "round";
  for (const [width, style] of [[5, INK], [2.5, colour]]) {
    ctx.lineWidth = width; ctx.strokeStyle = style;
    ctx.beginPath();
    pts.forEach(([x, y], i) => (i ? ctx.lineTo(x, y) : ctx.moveTo(x, y)));
    ctx.stroke();
  }
  ctx.restore();
}

// ---------------------------------------------------------------- the arena

function arenaGeometry(env, w, h) {
  const xe = env.x_edges_cm, ye = env.y_edges_cm;
  const x0 = xe[0], x1 = xe[xe.length - 1], y0 = ye[0], y1 = ye[ye.length - 1];
  const room = { x: 58, y: 12, w: w - 58 - 84, h: h - 12 - 44 };
  const scale = Math.min(room.w / (x1 - x0), room.h / (y1 - y0));
  const box = { x: room.x, y: room.y, w: (x1 - x0) * scale, h: (y1 - y0) * scale };
  return {
    box, x0, x1, y0, y1,
    sx: (x) => box.x + (x - x0) * scale,
    sy: (y) => box.y + box.h - (y - y0) * scale,     // y grows upwards, as in the arena's frame
    scale,
  };
}

function drawArena(ctx, w, h) {
  const env = model.env, f = model.frame;
  ctx.clearRect(0, 0, w, h);
  const g = arenaGeometry(env, w, h);
  const [ny, nx] = env.grid_shape;
  // Heat map: one pixel per bin, flipped so that row 0 (lowest y) is at the bottom.
  if (!ui.heat || ui.heat.width !== nx || ui.heat.height !== ny) {
    ui.heat = new OffscreenCanvas(nx, ny);
    ui.heatImg = new ImageData(nx, ny);
  }
  const img = ui.heatImg;
  const valid = env.valid_mask;
  for (let iy = 0; iy < ny; iy++) {
    for (let ix = 0; ix < nx; ix++) {
      const b = iy * nx + ix;
      const o = ((ny - 1 - iy) * nx + ix) * 4;
      if (!valid[b]) { img.data.set(OUTSIDE, o); img.data[o + 3] = 255; continue; }
      const q = model.post && model.post.length === nx * ny ? model.post[b] : 0;
      img.data[o] = LUT[q * 3]; img.data[o + 1] = LUT[q * 3 + 1]; img.data[o + 2] = LUT[q * 3 + 2]; img.data[o + 3] = 255;
    }
  }
  ui.heat.getContext("2d").putImageData(img, 0, 0);
  ctx.save();
  ctx.imageSmoothingEnabled = false;
  ctx.drawImage(ui.heat, g.box.x, g.box.y, g.box.w, g.box.h);
  ctx.restore();

  const map = (p) => [g.sx(p[0]), g.sy(p[1])];
  // Outline of the arena.
  ctx.save();
  ctx.lineWidth = 2; ctx.strokeStyle = INK;
  ctx.beginPath();
  env.outline_cm.forEach((p, i) => (i ? ctx.lineTo(...map(p)) : ctx.moveTo(...map(p))));
  ctx.stroke();
  ctx.restore();

  drawZones2d(ctx, env.zones, g);

  if (f) {
    trail(ctx, f.trails.decoded, map, DECODED);
    trail(ctx, f.trails.tracked, map, TRACKED);
    if (f.mean_xy_cm) marker(ctx, "mean", ...map(f.mean_xy_cm), 5);
    if (f.map_xy_cm && f.post_kind === "posterior") marker(ctx, "decoded", ...map(f.map_xy_cm), 7);
    if (f.tracked_xy_cm) marker(ctx, "tracked", ...map(f.tracked_xy_cm), 6);
  }
  drawEventRing(ctx, (p) => map(p));
  drawAxes(ctx, g.box, [g.x0, g.x1], [g.y0, g.y1], g.sx, g.sy, "x (cm)", "y (cm)");
  const label = f && f.post_kind === "occupancy" ? "occupancy, fraction of time per bin" : "posterior probability per bin";
  drawColourBar(ctx, g.box.x + g.box.w + 14, g.box.y, 14, Math.min(g.box.h, 260), f ? f.post_max || 0 : 0, label);
}

function drawZones2d(ctx, zones, g) {
  ctx.save();
  ctx.font = "bold " + FONT;
  for (const z of zones) {
    ctx.beginPath();
    let lx, ly;
    if (z.kind === "circle") {
      ctx.arc(g.sx(z.center_cm[0]), g.sy(z.center_cm[1]), z.radius_cm * g.scale, 0, 2 * Math.PI);
      lx = g.sx(z.center_cm[0]); ly = g.sy(z.center_cm[1] + z.radius_cm) - 4;
    } else if (z.kind === "rectangle") {
      ctx.rect(g.sx(z.x_min_cm), g.sy(z.y_max_cm), (z.x_max_cm - z.x_min_cm) * g.scale, (z.y_max_cm - z.y_min_cm) * g.scale);
      lx = g.sx((z.x_min_cm + z.x_max_cm) / 2); ly = g.sy(z.y_max_cm) - 4;
    } else if (z.kind === "polygon") {
      z.vertices_cm.forEach((p, i) => (i ? ctx.lineTo(g.sx(p[0]), g.sy(p[1])) : ctx.moveTo(g.sx(p[0]), g.sy(p[1]))));
      ctx.closePath();
      lx = g.sx(z.vertices_cm[0][0]); ly = g.sy(Math.max(...z.vertices_cm.map((p) => p[1]))) - 4;
    } else continue;
    ctx.setLineDash([]); ctx.lineWidth = 4; ctx.strokeStyle = INK; ctx.stroke();
    ctx.setLineDash([6, 4]); ctx.lineWidth = 2; ctx.strokeStyle = ZONE; ctx.stroke();
    ctx.setLineDash([]);
    ctx.textAlign = "center"; ctx.textBaseline = "bottom";
    ctx.lineWidth = 3; ctx.strokeStyle = INK; ctx.strokeText(z.name, lx, ly);
    ctx.fillStyle = "#fff"; ctx.fillText(z.name, lx, ly);
  }
  ctx.restore();
}

function drawEventRing(ctx, map) {
  const age = performance.now() - model.lastEventAt;
  if (!model.lastEvent || age > EVENT_FLASH_MS || !model.lastEvent.map_xy_cm) return;
  const [px, py] = map(model.lastEvent.map_xy_cm);
  const r = 10 + 30 * (age / EVENT_FLASH_MS);
  ctx.save();
  ctx.globalAlpha = 1 - age / EVENT_FLASH_MS;
  ctx.lineWidth = 4; ctx.strokeStyle = EVENT;
  ctx.beginPath(); ctx.arc(px, py, r, 0, 2 * Math.PI); ctx.stroke();
  ctx.restore();
}

// ---------------------------------------------------------------- the heading ring

// A heading ring (decoder/space/headings.py): each heading bin a sector of a wheel coloured by its
// posterior, the arcs of the zones outside it, and the tracked, decoded (MAP) and mean headings as
// markers on it. Points arrive as ring points in cm (radius ring_radius_cm); the page scales them.
function drawRing(ctx, w, h) {
  const env = model.env, f = model.frame;
  ctx.clearRect(0, 0, w, h);
  const cx = 58 + (w - 58 - 84) / 2, cy = h / 2, outer = Math.max(40, Math.min(w - 58 - 84, h - 40) / 2 - 20);
  const inner = outer * 0.62, R = env.ring_radius_cm;
  // Headings run counter-clockwise from +x (east), as the tracker sends them; the canvas's y grows downwards.
  const at = (deg, r) => [cx + r * Math.cos(deg * Math.PI / 180), cy - r * Math.sin(deg * Math.PI / 180)];
  const edges = env.bin_edges_deg, n = edges.length - 1;
  for (let b = 0; b < n; b++) {
    const q = model.post && model.post.length === n ? model.post[b] : 0;
    ctx.beginPath();
    ctx.arc(cx, cy, outer, -edges[b] * Math.PI / 180, -edges[b + 1] * Math.PI / 180, true);
    ctx.arc(cx, cy, inner, -edges[b + 1] * Math.PI / 180, -edges[b] * Math.PI / 180, false);
    ctx.closePath();
    ctx.fillStyle = `rgb(${LUT[q * 3]},${LUT[q * 3 + 1]},${LUT[q * 3 + 2]})`;
    ctx.fill();
  }
  ctx.save();
  ctx.lineWidth = 2; ctx.strokeStyle = INK;
  for (const r of [inner, outer]) { ctx.beginPath(); ctx.arc(cx, cy, r, 0, 2 * Math.PI); ctx.stroke(); }
  ctx.font = FONT; ctx.fillStyle = MUTED; ctx.textAlign = "center"; ctx.textBaseline = "middle";
  for (const deg of [0, 90, 180, 270]) ctx.fillText(deg + "°", ...at(deg, inner - 14));
  ctx.font = "bold " + FONT;
  for (const z of env.zones) {
    if (z.kind !== "arc") continue;
    const a0 = z.center_deg - z.half_width_deg, a1 = z.center_deg + z.half_width_deg;
    ctx.beginPath();
    ctx.arc(cx, cy, outer + 5, -a0 * Math.PI / 180, -a1 * Math.PI / 180, true);
    ctx.lineWidth = 6; ctx.strokeStyle = EVENT; ctx.stroke();
    const [lx, ly] = at(z.center_deg, outer + 30);
    ctx.lineWidth = 3; ctx.strokeStyle = "#fff"; ctx.strokeText(z.name, lx, ly);
    ctx.fillStyle = INK; ctx.fillText(z.name, lx, ly);
  }
  ctx.restore();
  const map = (p) => [cx + (p[0] / R) * (inner + outer) / 2, cy - (p[1] / R) * (inner + outer) / 2];
  if (f) {
    // The posterior mean lies inside the ring: its distance from the centre is the mean resultant length.
    if (f.mean_xy_cm) {
      const [mx, my] = [cx + (f.mean_xy_cm[0] / R) * inner, cy - (f.mean_xy_cm[1] / R) * inner];
      ctx.save(); ctx.lineWidth = 3; ctx.strokeStyle = MEAN;
      ctx.beginPath(); ctx.moveTo(cx, cy); ctx.lineTo(mx, my); ctx.stroke(); ctx.restore();
      marker(ctx, "mean", mx, my, 5);
    }
    if (f.map_xy_cm && f.post_kind === "posterior") marker(ctx, "decoded", ...map(f.map_xy_cm), 7);
    if (f.tracked_xy_cm && f.tracked_xy_cm[0] !== null) marker(ctx, "tracked", ...map(f.tracked_xy_cm), 6);
  }
  drawEventRing(ctx, map);
  const label = f && f.post_kind === "occupancy" ? "occupancy, fraction of time per bin" : "posterior probability per bin";
  drawColourBar(ctx, w - 70, 12, 14, Math.min(h - 56, 260), f ? f.post_max || 0 : 0, label);
}

// ---------------------------------------------------------------- the track strip

function drawTrack(ctx, w, h) {
  const env = model.env;
  ctx.clearRect(0, 0, w, h);
  const box = { x: 58, y: 12, w: w - 58 - 84, h: h - 12 - 44 };
  const L = env.total_length_cm;
  const tNow = model.frame ? model.frame.t_s : 0;
  const t0 = tNow - STRIP_S;
  const sx = (t) => box.x + ((t - t0) / STRIP_S) * box.w;
  const sy = (lin) => box.y + box.h - (lin / L) * box.h;
  ctx.fillStyle = "#d9d5cc";
  ctx.fillRect(box.x, box.y, box.w, box.h);
  // One column per packet, from its time to the next packet's.
  const cols = model.strip;
  const n = env.n_bins;
  const col = new OffscreenCanvas(1, n);
  const cctx = col.getContext("2d");
  const img = new ImageData(1, n);
  ctx.save();
  ctx.imageSmoothingEnabled = false;
  ctx.beginPath(); ctx.rect(box.x, box.y, box.w, box.h); ctx.clip();
  for (let i = 0; i < cols.length; i++) {
    const c = cols[i];
    if (!c.post || c.post.length !== n) continue;
    const tEnd = i + 1 < cols.length ? cols[i + 1].t : c.t + 0.05;
    for (let b = 0; b < n; b++) {
      const q = c.post[b], o = (n - 1 - b) * 4;  // bin 0 (linear position 0) at the bottom
      img.data[o] = LUT[q * 3]; img.data[o + 1] = LUT[q * 3 + 1]; img.data[o + 2] = LUT[q * 3 + 2]; img.data[o + 3] = 255;
    }
    cctx.putImageData(img, 0, 0);
    const xa = sx(c.t), xb = sx(tEnd);
    ctx.drawImage(col, xa, sy(env.linear_edges_cm[n]), Math.max(1, xb - xa), box.h);
  }
  // Edge boundaries of a graph, then the zones as bands.
  ctx.strokeStyle = "#fff"; ctx.setLineDash([3, 5]); ctx.lineWidth = 1;
  for (const s of env.edge_starts_cm.slice(1)) {
    ctx.beginPath(); ctx.moveTo(box.x, sy(s)); ctx.lineTo(box.x + box.w, sy(s)); ctx.stroke();
  }
  ctx.setLineDash([]);
  ctx.font = "bold " + FONT;
  for (const z of env.zones) {
    if (z.kind !== "interval") continue;
    const ya = sy(z.end_cm), yb = sy(z.start_cm);
    ctx.lineWidth = 4; ctx.strokeStyle = INK; ctx.strokeRect(box.x, ya, box.w, yb - ya);
    ctx.setLineDash([6, 4]); ctx.lineWidth = 2; ctx.strokeStyle = ZONE; ctx.strokeRect(box.x, ya, box.w, yb - ya);
    ctx.setLineDash([]);
    ctx.textAlign = "left"; ctx.textBaseline = "top";
    ctx.lineWidth = 3; ctx.strokeStyle = INK; ctx.strokeText(z.name, box.x + 6, ya + 3);
    ctx.fillStyle = "#fff"; ctx.fillText(z.name, box.x + 6, ya + 3);
  }
  // Positions over time: the tracked one as a line, the decoded one as diamonds.
  const tracked = cols.filter((c) => c.lin && c.lin.tracked !== null).map((c) => [sx(c.t), sy(c.lin.tracked)]);
  trail(ctx, tracked.map((p) => p), (p) => p, TRACKED);
  for (const c of cols) {
    if (c.lin && c.lin.map !== null && c.kind === "posterior") marker(ctx, "decoded", sx(c.t), sy(c.lin.map), 3);
  }
  for (const e of model.events) {
    if (e.t_s < t0) continue;
    ctx.strokeStyle = EVENT; ctx.lineWidth = 2;
    ctx.beginPath(); ctx.moveTo(sx(e.t_s), box.y); ctx.lineTo(sx(e.t_s), box.y + box.h); ctx.stroke();
  }
  ctx.restore();
  drawAxes(ctx, box, [t0, tNow], [0, L], sx, sy, "data time (s)", "position along the track (cm)",
    { xfmt: (v) => v.toFixed(0) });
  const f = model.frame;
  const label = f && f.post_kind === "occupancy" ? "occupancy, fraction per bin" : "posterior probability per bin";
  drawColourBar(ctx, box.x + box.w + 14, box.y, 14, Math.min(box.h, 260), f ? f.post_max || 0 : 0, label);
}

// ---------------------------------------------------------------- error trace and latency

function drawErrorTrace(ctx, w, h) {
  ctx.clearRect(0, 0, w, h);
  const box = { x: 52, y: 8, w: w - 52 - 10, h: h - 8 - 40 };
  const tr = model.trace;
  const tMin = tr.length ? tr[0][0] : 0;
  const tMax = tr.length ? Math.max(tr[tr.length - 1][0], tMin + 10) : 10;
  let eMax = 10;
  for (const [, e] of tr) eMax = Math.max(eMax, e);
  const cv = model.readiness && model.readiness.cv_error_cm;
  if (Number.isFinite(cv)) eMax = Math.max(eMax, cv);
  eMax *= 1.1;
  const sx = (t) => box.x + ((t - tMin) / (tMax - tMin)) * box.w;
  const sy = (e) => box.y + box.h - (e / eMax) * box.h;
  ctx.save();
  ctx.strokeStyle = GRID; ctx.lineWidth = 1;
  for (const v of niceTicks(0, eMax, 4)) { ctx.beginPath(); ctx.moveTo(box.x, sy(v)); ctx.lineTo(box.x + box.w, sy(v)); ctx.stroke(); }
  if (Number.isFinite(cv)) {
    ctx.setLineDash([5, 4]); ctx.strokeStyle = MUTED; ctx.lineWidth = 1.5;
    ctx.beginPath(); ctx.moveTo(box.x, sy(cv)); ctx.lineTo(box.x + box.w, sy(cv)); ctx.stroke();
    ctx.setLineDash([]); ctx.fillStyle = MUTED; ctx.font = FONT; ctx.textAlign = "right"; ctx.textBaseline = "bottom";
    ctx.fillText("cross-validated", box.x + box.w - 4, sy(cv) - 2);
  }
  ctx.strokeStyle = BLUE; ctx.lineWidth = 2;
  ctx.beginPath();
  tr.forEach(([t, e], i) => (i ? ctx.lineTo(sx(t), sy(e)) : ctx.moveTo(sx(t), sy(e))));
  ctx.stroke();
  ctx.restore();
  drawAxes(ctx, box, [tMin, tMax], [0, eMax], sx, sy, "data time (s), median per second", `error (${errorUnit()})`,
    { xfmt: (v) => v.toFixed(0) });
}

function drawLatencyHist(ctx, w, h) {
  ctx.clearRect(0, 0, w, h);
  const box = { x: 52, y: 8, w: w - 52 - 10, h: h - 8 - 40 };
  const edges = model.latencyEdges, counts = model.latencyCounts;
  if (!edges || !counts) { drawAxes(ctx, box, [0, 1], [0, 1], (x) => box.x, (y) => box.y, "added latency (ms)", "steps"); return; }
  const lo = Math.log10(edges[0]), hi = Math.log10(edges[edges.length - 1]);
  const sx = (ms) => box.x + ((Math.log10(Math.max(ms, edges[0])) - lo) / (hi - lo)) * box.w;
  const cMax = Math.max(1, ...counts) * 1.1;
  const sy = (c) => box.y + box.h - (c / cMax) * box.h;
  ctx.save();
  ctx.fillStyle = "#56b4e9"; ctx.strokeStyle = BLUE; ctx.lineWidth = 1;
  counts.forEach((c, i) => {
    if (!c) return;
    const xa = sx(edges[i]), xb = sx(edges[i + 1]);
    ctx.fillRect(xa, sy(c), xb - xa - 1, box.y + box.h - sy(c));
    ctx.strokeRect(xa + 0.5, sy(c) + 0.5, xb - xa - 2, box.y + box.h - sy(c) - 1);
  });
  const st = (model.frame && model.frame.stats) || {};
  for (const [key, name, dash] of [["latency_p50_ms", "p50", [2, 3]], ["latency_p99_ms", "p99", [7, 3]]]) {
    const v = st[key];
    if (!Number.isFinite(v)) continue;
    ctx.setLineDash(dash); ctx.strokeStyle = INK; ctx.lineWidth = 1.5;
    ctx.beginPath(); ctx.moveTo(sx(v), box.y); ctx.lineTo(sx(v), box.y + box.h); ctx.stroke();
    ctx.setLineDash([]); ctx.fillStyle = INK; ctx.font = FONT; ctx.textAlign = "left"; ctx.textBaseline = "top";
    ctx.fillText(name, sx(v) + 3, box.y + (name === "p50" ? 2 : 16));
  }
  ctx.restore();
  const decades = [];
  for (let d = Math.ceil(lo); d <= Math.floor(hi); d++) decades.push(Math.pow(10, d));
  drawAxes(ctx, box, [edges[0], edges[edges.length - 1]], [0, cMax], sx, sy, "added latency (ms, log scale)", "steps",
    { xticks: decades, xfmt: (v) => (v < 1 ? v.toString() : v.toFixed(0)) });
}

// ---------------------------------------------------------------- panels

function setChip(el, text, cls) {
  el.textContent = text;
  el.className = "chip " + cls;
}

function cell(id, value, alarm) {
  const el = $(id);
  el.textContent = value;
  el.classList.toggle("alarm", !!alarm);
}

function updatePanels(h) {
  const f = model.frame;
  const mon = h.monitor || {};
  const age = mon.frame_age_s;
  if (age === null || age === undefined) setChip(ui.link, "waiting for the loop", "chip-stale");
  else if (age > STALE_AFTER_S) setChip(ui.link, `no state for ${age.toFixed(1)} s`, "chip-stale");
  else setChip(ui.link, "live", "chip-plain");
  const silent = age !== null && age !== undefined && age > STALE_AFTER_S;
  $("link-next").hidden = !silent;
  if (silent) {
    $("link-next").textContent = `No state from the loop for ${age.toFixed(0)} s. Next: check that placeloop run is ` +
      "still running (its console says why it stopped); this page reconnects by itself. If in doubt, " +
      "disarm: placeloop control disarm --config <your config>, or cut the hardware.";
  }
  if (h.keepalive || !f) return;
  setChip(ui.state, "state: " + f.state, "chip-" + (["idle", "learning", "decoding"].includes(f.state) ? f.state : "idle"));
  if (f.armed) setChip(ui.armed, "triggers armed", "chip-armed");
  else setChip(ui.armed, "triggers disarmed", "chip-safe");
  const v = h.verdict || { ready: false, reasons: [], checked: [] };
  const passed = "ready: " + v.checked.join(", ") + " pass" +
    (v.checked.includes("likelihood temperature") ? "" : " (the loop reports no fitted temperature)");
  setChip(ui.verdict, v.ready ? "ready" : "not ready", v.ready ? "chip-ready" : "chip-notready");
  ui.verdict.title = v.ready ? passed : v.reasons.join("; ");
  $("verdict-why").textContent = v.ready ? passed : "not ready: " + v.reasons.join("; ");
  const warn = f.armed && !v.ready;
  $("armed-warning").hidden = !warn;
  if (warn) {
    $("armed-warning").textContent = "Triggers are armed but the readiness verdict fails (" + v.reasons.join("; ") +
      "). Disarm (placeloop control disarm --config <your config>) and learn longer, unless this is a dry run.";
  }
  ui.time.textContent = `t = ${f.t_s.toFixed(2)} s`;

  const occ = f.post_kind === "occupancy";
  $("map-title").textContent = occ ? "Occupancy while learning" : (model.env.kind === "track" ? "Posterior over time" : "Posterior");
  $("map-sub").textContent = occ ? "where the animal has been; fills in as it explores"
    : `${model.env.kind === "track" ? "last " + STRIP_S + " s of data time" : "newest decoding step"}, colour scaled to its peak`;
  $("fig-nspk").textContent = String(f.n_spikes);
  $("fig-peak").textContent = fmt(f.peak_prob, 3);
  $("fig-hpd").textContent = fmt(f.hpd95_size, 0, model.env.hpd_unit);

  const zm = $("zone-masses");
  zm.replaceChildren(...Object.entries(f.zone_masses).map(([name, m]) => {
    const tr = document.createElement("tr");
    const a = document.createElement("td"); a.textContent = name;
    const b = document.createElement("td"); b.textContent = "mass " + fmt(m, 2);
    const c = document.createElement("td"); c.className = "zbar-cell";
    const bar = document.createElement("div"); bar.className = "zbar";
    bar.style.width = `${Math.round(100 * Math.min(1, Math.max(0, m || 0)))}%`;
    c.appendChild(bar);
    tr.append(a, b, c);
    return tr;
  }));

  const st = f.stats;
  $("fig-err-roll").textContent = fmt(h.rolling_error_cm, 1, errorUnit());
  $("fig-err-session").textContent = fmt(h.session_error_cm, 1, errorUnit());
  $("fig-err-now").textContent = fmt(st.error_cm, 1, errorUnit());
  $("fig-lat-p50").textContent = fmt(st.latency_p50_ms, 2, "ms");
  $("fig-lat-p99").textContent = fmt(st.latency_p99_ms, 2, "ms");
  $("fig-lat-now").textContent = fmt(st.added_ms, 2, "ms");

  const rates = f.rates_per_data_s || {};
  cell("h-rate-spikes", fmt(rates.spikes, 0, "per s of data"), rates.spikes === 0);
  cell("h-rate-tracker", fmt(rates.tracker, 1, "per s of data"), rates.tracker === 0);
  $("h-speed").textContent = fmt(rates.data_speed, 2, "s of data per s of wall clock");
  cell("h-bad", fmt(st.bad_messages, 0), st.bad_messages > 0);
  cell("h-gaps", fmt(st.gaps, 0), st.gaps > 0);
  cell("h-stale", fmt(st.stale_messages, 0), st.stale_messages > 0);
  cell("h-stalled", st.stalled ? "yes" : (st.stalled === 0 ? "no" : "—"), st.stalled > 0);
  cell("h-monitor", `${mon.frames_received} / ${mon.frames_missed}` + (mon.bad_frames ? ` (${mon.bad_frames} bad)` : ""),
    mon.bad_frames > 0);
  const trouble = st.stalled > 0 || st.bad_messages > 0 || st.gaps > 0;
  $("health-verdict").textContent = st.stalled > 0 ? "input stalled: triggers disarmed by the loop"
    : trouble ? "input problems counted; see the table" : "inputs flowing";
  $("stall-next").hidden = !(st.stalled > 0);
  if (st.stalled > 0) {
    $("stall-next").textContent = "Next: find the silent input (a rate of 0 above): check the acquisition and " +
      "tracker processes and their cables. The loop stays disarmed; once data flows again, check the picture " +
      "here, then re-arm with placeloop control arm --config <your config>.";
  }

  const r = model.readiness || {};
  $("fig-coverage").textContent = Number.isFinite(r.coverage) ? `${r.coverage.toFixed(2)} of bins` : "—";
  $("fig-temp").textContent = fmt(r.likelihood_temperature, 2);
  $("fig-units").textContent = fmt(r.n_spatial_units, 0);
  $("fig-cv").textContent = fmt(r.cv_error_cm, 1, errorUnit());
  $("fig-learn-t").textContent = fmt(r.learn_elapsed_s, 0, "s");
  $("coverage-bar").style.width = `${Math.round(100 * Math.min(1, r.coverage || 0))}%`;
  $("learn-status").textContent = f.state === "learning" ? "learning now" : (Number.isFinite(r.cv_error_cm) ? "model fitted" : "—");
  // The loop refreshes events_total once a second; the list may be ahead of it.
  const nEvents = Math.max(st.events_total || 0, model.events.length);
  const withheld = st.dry_run ? ` · dry run: ${st.events_withheld || 0} withheld, none sent` : "";
  // A PUB socket drops what it sends to nobody: say so, the stimulator may not be connected.
  const unheard = !st.dry_run && Number.isFinite(st.events_listeners)
    ? ` · ${st.events_listeners} listening` + (st.events_unheard ? ` · ${st.events_unheard} sent to nobody` : "")
    : "";
  $("events-count").textContent = (nEvents ? `${nEvents} in the session` : "none yet") + withheld + unheard;
}

function addEvents(list) {
  const ol = $("events");
  for (const e of list) {
    model.events.push(e);
    const li = document.createElement("li");
    li.className = "fresh";
    const id = document.createElement("span"); id.className = "eid"; id.textContent = `#${e.id}`;
    const what = document.createElement("b");
    what.textContent = e.ripple ? `ripple rule ${e.rule}` : `rule ${e.rule} · zone ${e.zone} · mass ${fmt(e.mass, 2)}`;
    const pos = e.ripple ? "sharp-wave ripple detected" : (e.map_xy_cm
      ? `decoded (${e.map_xy_cm[0].toFixed(1)}, ${e.map_xy_cm[1].toFixed(1)}) cm` : "decoded —");
    if (e.ripple) li.classList.add("ripple");
    li.append(id, what, document.createTextNode(` · t = ${e.t_s.toFixed(2)} s · ${pos}`));
    ol.prepend(li);
  }
  while (ol.children.length > 200) ol.lastChild.remove();
  if (model.events.length > 500) model.events.splice(0, model.events.length - 500);
  if (list.length) {
    const last = list[list.length - 1];
    model.lastEvent = last;
    model.lastEventAt = performance.now();
    const panel = $("events-panel");
    panel.classList.remove("flash"); void panel.offsetWidth; panel.classList.add("flash");
    ui.flash.textContent = last.ripple ? `RIPPLE EVENT #${last.id}` : `EVENT #${last.id} · ${last.rule} · ${last.zone}`;
    ui.flash.hidden = false;
    clearTimeout(ui.flashTimer);
    ui.flashTimer = setTimeout(() => { ui.flash.hidden = true; }, EVENT_FLASH_MS);
  }
}

// ---------------------------------------------------------------- packets

function readPacket(buf) {
  const view = new DataView(buf);
  const n = view.getUint32(0, true);
  const header = JSON.parse(new TextDecoder().decode(new Uint8Array(buf, 4, n)));
  const post = new Uint8Array(buf, 4 + n);
  return [header, post];
}

function onPacket(buf) {
  const [h, post] = readPacket(buf);
  model.packets += 1;
  if (!h.keepalive) {
    if (h.trace_from !== undefined) {
      if (h.trace_from < model.trace.length) model.trace.length = h.trace_from;
      model.trace.push(...h.trace);
    }
    if (h.latency_edges_ms) model.latencyEdges = h.latency_edges_ms;
    model.latencyCounts = h.latency_counts;
    model.readiness = h.readiness;
    if (h.events && h.events.length) addEvents(h.events);
    if (h.ripples) ripplesTake(h.ripples);
    if (h.frame) {
      model.frame = h.frame;
      model.post = post.length ? post.slice() : null;
      if (model.env.kind === "track") {
        model.strip.push({ t: h.frame.t_s, post: model.post, lin: h.frame.linear, kind: h.frame.post_kind });
        const cut = h.frame.t_s - STRIP_S - 1;
        while (model.strip.length && (model.strip[0].t < cut || model.strip[0].t > h.frame.t_s)) model.strip.shift();
      }
    }
  }
  updatePanels(h);
  publishHook(h);
  model.dirty = true;
}

function publishHook(h) {
  const f = model.frame;
  let postSum = 0, argmax = -1, best = -1;
  if (model.post) {
    for (let i = 0; i < model.post.length; i++) {
      postSum += model.post[i];
      if (model.post[i] > best) { best = model.post[i]; argmax = i; }
    }
  }
  window.__monitorState = {
    ready: true,
    packets: model.packets,
    envKind: model.env.kind,
    t_s: f ? f.t_s : null,
    state: f ? f.state : null,
    armed: f ? f.armed : null,
    map_xy_cm: f ? f.map_xy_cm : null,
    tracked_xy_cm: f ? f.tracked_xy_cm : null,
    post_kind: f ? f.post_kind : null,
    post_max: f ? f.post_max : null,
    post_len: model.post ? model.post.length : 0,
    post_sum: postSum,
    post_argmax: argmax,
    rolling_error_cm: h.keepalive ? window.__monitorState.rolling_error_cm : h.rolling_error_cm,
    session_error_cm: h.keepalive ? window.__monitorState.session_error_cm : h.session_error_cm,
    error_cm: f ? f.stats.error_cm : null,
    latency_p99_ms: f ? f.stats.latency_p99_ms : null,
    trace_points: model.trace.length,
    events_seen: model.events.length,
    frames_received: (h.monitor || {}).frames_received,
    readiness: model.readiness || {},
    verdict: h.keepalive ? window.__monitorState.verdict : h.verdict,
    rates: f ? f.rates_per_data_s : null,
    events: model.events.slice(-5),
    ripples: ripplesState(),
  };
}

function render() {
  if (model.dirty || performance.now() - model.lastEventAt < EVENT_FLASH_MS + 100) {
    model.dirty = false;
    if (model.env.kind === "arena") drawArena(ui.map.ctx, ui.map.w, ui.map.h);
    else if (model.env.kind === "ring") drawRing(ui.map.ctx, ui.map.w, ui.map.h);
    else drawTrack(ui.map.ctx, ui.map.w, ui.map.h);
    drawErrorTrace(ui.err.ctx, ui.err.w, ui.err.h);
    drawLatencyHist(ui.lat.ctx, ui.lat.w, ui.lat.h);
  }
  ripplesDraw();
  requestAnimationFrame(render);
}

function connect() {
  const ws = new WebSocket(`ws://${location.host}/ws`);
  ws.binaryType = "arraybuffer";
  ws.onmessage = (msg) => onPacket(msg.data);
  ws.onclose = () => {
    setChip(ui.link, "monitor server gone; retrying", "chip-stale");
    setTimeout(connect, 1000);
  };
}

async function start() {
  ui.state = $("chip-state"); ui.armed = $("chip-armed"); ui.time = $("chip-time"); ui.link = $("chip-link");
  ui.verdict = $("chip-verdict");
  ui.flash = $("event-flash");
  ui.map = setupCanvas($("map"));
  ui.err = setupCanvas($("error-trace"));
  ui.lat = setupCanvas($("latency-hist"));
  const res = await fetch("/api/environment");
  model.env = await res.json();
  takeMarks(model.env.marks);
  drawBarGradient();
  drawLegend(model.env.marks.marks);
  model.dirty = true;
  requestAnimationFrame(render);
  connect();
}

start();
