// Talking to the rwls API: every request carries the token the user typed (kept for this tab only).

const TOKEN_KEY = "rwls.token";

export function token() {
  return sessionStorage.getItem(TOKEN_KEY) || "";
}

export function setToken(value) {
  if (value) sessionStorage.setItem(TOKEN_KEY, value);
  else sessionStorage.removeItem(TOKEN_KEY);
}

export function headers(extra = {}) {
  const h = { Accept: "application/json", ...extra };
  const t = token();
  if (t) h.Authorization = `Bearer ${t}`;
  return h;
}

export class ApiError extends Error {
  constructor(status, detail) {
    super(detail);
    this.status = status;
  }
}

async function answer(response) {
  let body = null;
  try {
    body = await response.json();
  } catch {
    body = null;
  }
  if (!response.ok) {
    const detail = body && (body.message || body.detail) ? String(body.message || body.detail) : response.statusText;
    throw new ApiError(response.status, detail);
  }
  return body;
}

export async function get(path, params = {}) {
  const query = new URLSearchParams(Object.entries(params).filter(([, v]) => v !== null && v !== undefined));
  const url = query.toString() ? `${path}?${query}` : path;
  return answer(await fetch(url, { headers: headers(), cache: "no-store" }));
}

export async function post(path, body) {
  return answer(await fetch(path, {
    method: "POST",
    headers: headers({ "Content-Type": "application/json" }),
    body: JSON.stringify(body),
  }));
}

// What a refusal means to the person at the screen.
export function explain(error) {
  if (!(error instanceof ApiError)) return `The service did not answer (${error.message}).`;
  if (error.status === 401) return "Refused: this needs an API token (enter it at the top right).";
  if (error.status === 403) return `Refused: ${error.message}.`;
  if (error.status === 409) return `Not possible now: ${error.message}.`;
  return `Refused (${error.status}): ${error.message}.`;
}
