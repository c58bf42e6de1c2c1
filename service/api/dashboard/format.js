// Numbers, times and state badges as the pages show them.

export function number(value, digits = 4) {
  if (value === null || value === undefined || !Number.isFinite(value)) return "\u2014";
  const magnitude = Math.abs(value);
  if (magnitude !== 0 && (magnitude >= 1e6 || magnitude < 1e-3)) return value.toExponential(digits - 1);
  return value.toPrecision(digits).replace(/\.?0+$/, (m) => (m.includes(".") ? "" : m));
}

// Every time the pages show is ISO 8601 in UTC, to the second: 2026-06-11T00:56:07Z (never the browser's locale).
export function time(seconds) {
  if (seconds === null || seconds === undefined || !Number.isFinite(seconds)) return "\u2014";
  return new Date(seconds * 1000).toISOString().slice(0, 19) + "Z";
}

// What a person types for a time: ISO 8601 in UTC, minutes or seconds, the Z required (a time without a zone
// would be read in some local zone, which is what these fields exist to avoid).
export const UTC_PATTERN = "\\d{4}-\\d{2}-\\d{2}T\\d{2}:\\d{2}(:\\d{2})?Z";
export const UTC_EXAMPLE = "2026-06-11T00:56Z";
const UTC_TEXT = new RegExp(`^${UTC_PATTERN}$`);

// Epoch seconds of such a text, or null when it is not one or names no real time (2026-02-30T00:00Z).
export function parseUtc(text) {
  const value = String(text).trim();
  if (!UTC_TEXT.test(value)) return null;
  const ms = Date.parse(value);
  if (!Number.isFinite(ms)) return null;
  const back = new Date(ms).toISOString();                  // the same fields back: the date exists
  if (back.slice(0, 16) !== value.slice(0, 16)) return null;
  return ms / 1000;
}

export function element(tag, attributes = {}, ...children) {
  const node = document.createElement(tag);
  for (const [key, value] of Object.entries(attributes)) {
    if (value === null || value === undefined || value === false) continue;
    if (key === "class") node.className = value;
    else if (key.startsWith("on")) node.addEventListener(key.slice(2), value);
    else node.setAttribute(key, value === true ? "" : String(value));
  }
  for (const child of children.flat()) {
    if (child === null || child === undefined) continue;
    node.append(child instanceof Node ? child : document.createTextNode(String(child)));
  }
  return node;
}

// Replace a node's children, leaving out the null placeholders of optional parts.
export function fill(root, ...children) {
  root.replaceChildren(...children.flat().filter((c) => c !== null && c !== undefined));
}

export function qualityBadge(quality, reason) {
  return element("span", { class: `badge q-${quality}`, title: reason || null }, quality);
}

export function stateBadge(state) {
  return element("span", { class: `badge a-${state.replace(/ /g, "-")}` }, state);
}

// A channel's raised alarms grouped by state: "Unacknowledged offset (high), drift (medium)".
export function alarmGroups(raised) {
  const byState = new Map();
  for (const a of raised) {
    if (!byState.has(a.state)) byState.set(a.state, []);
    byState.get(a.state).push(`${a.kind} (${a.priority})`);
  }
  return [...byState].map(([state, kinds]) => element("span", { class: "alarm-group" }, stateBadge(state), ` ${kinds.join(", ")} `));
}
