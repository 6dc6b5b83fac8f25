// The public JSON API of this daemon (README "HTTP API"); nothing else.

const TIMEOUT_MS = 5000;

export class ApiError extends Error {
  constructor(message, status) {
    super(message);
    this.status = status;
  }
}

async function call(path, init = {}, read = (r) => r.json()) {
  const ctl = new AbortController();
  const timer = setTimeout(() => ctl.abort(), TIMEOUT_MS);
  try {
    const r = await fetch(path, { ...init, signal: ctl.signal });
    if (!r.ok) {
      const body = await r.json().catch(() => null);
      throw new ApiError(`${path}: ${r.status} ${body && body.error ? body.error : r.statusText}`, r.status);
    }
    return await read(r);
  } catch (e) {
    if (e instanceof ApiError) throw e;
    throw new ApiError(`${path}: ${e.name === "AbortError" ? "no answer within 5 s" : e.message}`, 0);
  } finally {
    clearTimeout(timer);
  }
}

export const getJSON = (path) => call(path, { headers: { Accept: "application/json" } });
export const getText = (path) => call(path, {}, (r) => r.text());

const q = (params) => {
  const u = new URLSearchParams();
  for (const [k, v] of Object.entries(params || {})) if (v !== undefined && v !== null && v !== "") u.set(k, v);
  const s = u.toString();
  return s ? `?${s}` : "";
};
const ch = (name) => `/api/v1/channels/${encodeURIComponent(name)}`;

export const overview = () => getJSON("/api/v1/overview");
export const channel = (name) => getJSON(ch(name));
export const spectrumUrl = (name, params) => `${ch(name)}/spectrum${q(params)}`;
export const spectrum = (name, params) => getJSON(spectrumUrl(name, params));
export const waveformUrl = (name, params) => `${ch(name)}/waveform${q(params)}`;
export const waveform = (name, params) => getJSON(waveformUrl(name, params));
export const trend = (name, seconds) => getJSON(`${ch(name)}/trend${q({ seconds })}`);
export const alarms = () => getJSON("/api/v1/alarms");
export const events = () => getJSON("/api/v1/events");
export const eventUrl = (id, params) => `/api/v1/events/${encodeURIComponent(id)}${q(params)}`;
export const event = (id) => getJSON(eventUrl(id));
export const eventWaveformUrl = (id, params) => `/api/v1/events/${encodeURIComponent(id)}/waveform${q(params)}`;

// A token-guarded POST (acknowledge, re-learn). The token goes in the
// Authorization header only, never in an address.
export function post(path, token) {
  return call(path, { method: "POST", headers: { Accept: "application/json", Authorization: `Bearer ${token}` } },
    (r) => r.json().catch(() => ({})));
}
export const ack = (channelName, band, token) =>
  post(`/api/v1/alarms/${encodeURIComponent(channelName)}/${encodeURIComponent(band)}/ack`, token);
export const relearn = (channelName, band, token) =>
  post(`/api/v1/alarms/${encodeURIComponent(channelName)}/${encodeURIComponent(band)}/relearn`, token);

// The stored history (README "HTTP API", docs/history.md "Queries").
const hist = (name) => `/api/v1/history/channels/${encodeURIComponent(name)}`;
export const historyTrend = (name, params) => getJSON(`${hist(name)}/trend${q(params)}`);
export const historyTrendUrl = (name, params) => `${hist(name)}/trend${q(params)}`;
export const storedSpectra = (name, params) => getJSON(`${hist(name)}/spectra${q(params)}`);
export const waterfall = (name, params) => getJSON(`${hist(name)}/waterfall${q(params)}`);
export const waterfallUrl = (name, params) => `${hist(name)}/waterfall${q(params)}`;
export const storedSpectrumUrl = (id, params) => `/api/v1/history/spectra/${encodeURIComponent(id)}${q(params)}`;
export const storedSpectrum = (id, params) => getJSON(storedSpectrumUrl(id, params));
export const compare = (name, params) => getJSON(`${hist(name)}/compare${q(params)}`);
export const projection = (name) => getJSON(`${ch(name)}/projection`);
export const storeNow = (name, token) => post(`${hist(name)}/spectra`, token);
export const markReference = (id, token) => post(`/api/v1/history/spectra/${encodeURIComponent(id)}/reference`, token);
