// The public JSON API of this daemon (README "HTTP API"); nothing else.

const TIMEOUT_MS = 5000;

export class ApiError extends Error {}

export async function getJSON(path) {
  const ctl = new AbortController();
  const timer = setTimeout(() => ctl.abort(), TIMEOUT_MS);
  try {
    const r = await fetch(path, { signal: ctl.signal, headers: { Accept: "application/json" } });
    const body = await r.json().catch(() => null);
    if (!r.ok) {
      throw new ApiError(`${path}: ${r.status} ${body && body.error ? body.error : r.statusText}`);
    }
    return body;
  } catch (e) {
    if (e instanceof ApiError) throw e;
    throw new ApiError(`${path}: ${e.name === "AbortError" ? "no answer within 5 s" : e.message}`);
  } finally {
    clearTimeout(timer);
  }
}

export const channels = () => getJSON("/api/v1/channels");
export const channel = (name) => getJSON(`/api/v1/channels/${encodeURIComponent(name)}`);
export const spectrum = (name) => getJSON(`/api/v1/channels/${encodeURIComponent(name)}/spectrum`);
