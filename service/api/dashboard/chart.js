// Time-series charts drawn as SVG: an estimate with its band, limits and references as dashed or dotted
// lines, points, and alarm markers on the time axis. Null values break a line; nothing is interpolated.

const NS = "http://www.w3.org/2000/svg";
const WIDTH = 640;
const HEIGHT = 220;
const PAD = { left: 64, right: 12, top: 12, bottom: 34 };

function svg(tag, attributes = {}) {
  const node = document.createElementNS(NS, tag);
  for (const [key, value] of Object.entries(attributes)) node.setAttribute(key, String(value));
  return node;
}

function finite(value) {
  return typeof value === "number" && Number.isFinite(value);
}

// Round tick positions covering [lo, hi]: 1, 2 or 5 times a power of ten apart.
export function ticks(lo, hi, count = 5) {
  if (!(hi > lo)) return [lo];
  const raw = (hi - lo) / count;
  const power = 10 ** Math.floor(Math.log10(raw));
  const step = [1, 2, 5, 10].map((m) => m * power).find((s) => s >= raw) || raw;
  const out = [];
  for (let v = Math.ceil(lo / step) * step; v <= hi + step * 1e-9; v += step) out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
  return out;
}

function label(value) {
  const magnitude = Math.abs(value);
  if (magnitude !== 0 && (magnitude >= 1e5 || magnitude < 1e-3)) return value.toExponential(1);
  return String(Number(value.toPrecision(6)));
}

function timeLabel(seconds, span) {
  const iso = new Date(seconds * 1000).toISOString();
  return span > 2 * 86400 ? iso.slice(5, 16) : iso.slice(11, 19);      // ISO 8601 parts: 06-11T00:56, 00:56:07
}

// series: [{type: "line"|"limit"|"reference"|"points", points: [[t, v], ...], name},
//          {type: "band", points: [[t, lo, hi], ...], name}]
// markers: [{t, label}]; range: [t0, t1] of the x axis.
export function timeChart({ series, markers = [], range, title }) {
  const [t0, t1] = range[1] > range[0] ? range : [range[0] - 1, range[0] + 1];
  const values = [];
  for (const s of series) {
    for (const p of s.points) {
      if (p[0] < t0 || p[0] > t1) continue;
      for (const v of p.slice(1)) if (finite(v)) values.push(v);
    }
  }
  let lo = values.length ? Math.min(...values) : 0;
  let hi = values.length ? Math.max(...values) : 1;
  if (hi - lo < 1e-12 * Math.max(1, Math.abs(hi))) {
    lo -= Math.max(1e-9, Math.abs(lo) * 0.05);
    hi += Math.max(1e-9, Math.abs(hi) * 0.05);
  }
  const margin = (hi - lo) * 0.05;
  lo -= margin;
  hi += margin;
  const x = (t) => PAD.left + ((t - t0) / (t1 - t0)) * (WIDTH - PAD.left - PAD.right);
  const y = (v) => HEIGHT - PAD.bottom - ((v - lo) / (hi - lo)) * (HEIGHT - PAD.top - PAD.bottom);

  // The value axis's ends ride along as data, so that a test can read what the scale was made of.
  const root = svg("svg", { viewBox: `0 0 ${WIDTH} ${HEIGHT}`, class: "chart", role: "img", "data-y-lo": lo, "data-y-hi": hi });
  const heading = svg("title");
  heading.textContent = title;
  root.append(heading);
  for (const v of ticks(lo, hi)) {
    root.append(svg("line", { class: "grid", x1: PAD.left, x2: WIDTH - PAD.right, y1: y(v), y2: y(v) }));
    const text = svg("text", { x: PAD.left - 6, y: y(v) + 4, "text-anchor": "end" });
    text.textContent = label(v);
    root.append(text);
  }
  const zone = svg("text", { x: 4, y: HEIGHT - 12 });
  zone.textContent = "UTC";                  // the time axis is sample time, in UTC like every time shown
  root.append(zone);
  for (const t of ticks(t0, t1, 4)) {
    const near = x(t) > WIDTH - PAD.right - 50 ? "end" : x(t) < PAD.left + 50 ? "start" : "middle";
    const text = svg("text", { x: x(t), y: HEIGHT - 12, "text-anchor": near });
    text.textContent = timeLabel(t, t1 - t0);
    root.append(text);
  }
  root.append(svg("line", { class: "axis", x1: PAD.left, x2: PAD.left, y1: PAD.top, y2: HEIGHT - PAD.bottom }));
  root.append(svg("line", { class: "axis", x1: PAD.left, x2: WIDTH - PAD.right, y1: HEIGHT - PAD.bottom,
    y2: HEIGHT - PAD.bottom }));

  const inside = (p) => p[0] >= t0 && p[0] <= t1;
  for (const s of series) {
    const points = s.points.filter(inside);
    if (s.type === "band") {
      for (const run of runs(points, (p) => finite(p[1]) && finite(p[2]))) {
        const upper = run.map((p) => `${x(p[0]).toFixed(1)},${y(p[2]).toFixed(1)}`);
        const lower = run.slice().reverse().map((p) => `${x(p[0]).toFixed(1)},${y(p[1]).toFixed(1)}`);
        root.append(svg("polygon", { class: "band", points: upper.concat(lower).join(" "), "data-series": s.name }));
      }
    } else if (s.type === "points") {
      const group = svg("g", { "data-series": s.name, "data-count": points.length });
      for (const p of points) {
        if (finite(p[1])) group.append(svg("circle", { class: "point", cx: x(p[0]).toFixed(1), cy: y(p[1]).toFixed(1), r: 2.5 }));
      }
      root.append(group);
    } else {
      for (const run of runs(points, (p) => finite(p[1]))) {
        const d = run.map((p) => `${x(p[0]).toFixed(1)},${y(p[1]).toFixed(1)}`).join(" ");
        root.append(svg("polyline", { class: s.type, points: d, "data-series": s.name, "data-count": run.length }));
      }
    }
  }
  for (const m of markers) {
    if (m.t < t0 || m.t > t1) continue;
    const marker = svg("line", { class: "marker", x1: x(m.t), x2: x(m.t), y1: PAD.top, y2: HEIGHT - PAD.bottom,
      "data-marker": m.label });
    const hint = svg("title");
    hint.textContent = m.label;
    marker.append(hint);
    root.append(marker);
    const text = svg("text", { class: "marker-label", x: x(m.t) + 3, y: PAD.top + 12 });
    text.textContent = m.short || m.label;
    root.append(text);
  }
  return root;
}

// Consecutive stretches of points that pass ``ok``.
function runs(points, ok) {
  const out = [];
  let current = [];
  for (const p of points) {
    if (ok(p)) current.push(p);
    else if (current.length) {
      out.push(current);
      current = [];
    }
  }
  if (current.length) out.push(current);
  return out;
}
