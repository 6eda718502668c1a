// The note API, as the form uses it. Only the token is kept in the browser (sessionStorage,
// this tab only); notes go to the server and nowhere else.

const TOKEN_KEY = "capnote-token";

export const token = {
  get() { return sessionStorage.getItem(TOKEN_KEY); },
  set(value) { sessionStorage.setItem(TOKEN_KEY, value); },
  clear() { sessionStorage.removeItem(TOKEN_KEY); },
};

/** A request that did not succeed; kind says which way, for the plain-words message. */
export class ApiError extends Error {
  constructor(kind, status, detail, body) {
    super(detail || kind);
    this.kind = kind;
    this.status = status;
    this.detail = detail;
    this.body = body;
  }
}

// Tests may shorten it (globalThis.capnoteAnswerWithinMs, set before the page loads).
const ANSWER_WITHIN_MS = 15_000;

const KINDS = { 401: "signed-out", 403: "forbidden", 404: "missing", 409: "conflict",
  412: "stale", 413: "too-large", 422: "refused" };

function diagnostics(body) {
  const issues = body && Array.isArray(body.issue) ? body.issue : [];
  return issues.map((i) => i.diagnostics || (i.details && i.details.text) || "").filter(Boolean)
    .join("; ");
}

/** Call the API; resolves with {status, body, etag} on 2xx, rejects with ApiError otherwise. */
export async function call(method, path, { body, ifMatch, signal, bearer } = {}) {
  const headers = { Accept: "application/json" };
  // bearer: a token to try (signing in), null for the token-free routes, else the tab's token.
  const secret = bearer === null ? null : bearer || token.get();
  if (secret) headers.Authorization = `Bearer ${secret}`;
  if (body !== undefined) headers["Content-Type"] = "application/json";
  if (ifMatch) headers["If-Match"] = ifMatch;
  // A server that never answers is as unreachable as one that refuses the connection: after
  // ANSWER_WITHIN_MS the request is given up and said so, never left "Checking…".
  const late = AbortSignal.timeout(globalThis.capnoteAnswerWithinMs || ANSWER_WITHIN_MS);
  const both = signal ? AbortSignal.any([signal, late]) : late;
  let response;
  try {
    response = await fetch(path, { method, headers, signal: both, cache: "no-store",
      body: body === undefined ? undefined : JSON.stringify(body) });
  } catch (err) {
    if (late.aborted) throw new ApiError("network", 0, "capnote did not answer in time");
    if (err && err.name === "AbortError") throw err;
    throw new ApiError("network", 0, "capnote could not be reached");
  }
  let parsed = null;
  const text = await response.text().catch(() => "");
  if (text) {
    try { parsed = JSON.parse(text); } catch { parsed = null; }
  }
  if (response.ok) return { status: response.status, body: parsed, etag: response.headers.get("ETag") };
  const kind = KINDS[response.status] || (response.status >= 500 ? "server" : "other");
  throw new ApiError(kind, response.status, diagnostics(parsed), parsed);
}

/** The errors of a refused note (an OperationOutcome) as findings the form can show. */
export function outcomeFindings(body) {
  const issues = body && Array.isArray(body.issue) ? body.issue : [];
  return issues.map((i) => ({
    severity: i.severity === "fatal" ? "error" : i.severity,
    code: (i.details && i.details.coding && i.details.coding[0] && i.details.coding[0].code) || i.code,
    location: (i.expression && i.expression[0]) || "",
    message: (i.details && i.details.text) || i.diagnostics || "",
    rule: null,
    allowed: null,
    source: null,
  }));
}

/** What went wrong, in plain words; always says that the typed note is still there. */
export function explain(err, doing) {
  const kept = "Everything typed is still in the form.";
  switch (err.kind) {
    case "network":
      return `${doing} failed: ${err.detail || "capnote could not be reached"} (network or server down). ${kept} Try again when the connection is back.`;
    case "signed-out":
      return `${doing} failed: your token was not accepted (it is unknown, revoked or missing). Sign in again with a valid clinician token. ${kept}`;
    case "forbidden":
      return `${doing} failed: your token's role may not do this; saving and signing need a clinician token. ${kept}`;
    case "missing":
      return `${doing} failed: there is no stored note with this record id.`;
    case "conflict":
      return `${doing} failed: a different note is already stored under this note number. ${err.detail || ""} ${kept}`;
    case "stale":
      return `${doing} failed: someone saved a newer version of this note meanwhile. Open the note again to see it; ${kept.toLowerCase()}`;
    case "too-large":
      return `${doing} failed: the note is too large for the server. ${kept}`;
    case "refused":
      return `${doing} failed: the server refused the note; the problems are shown beside the fields. ${kept}`;
    case "server":
      return `${doing} failed: the server had a problem (${err.detail || `HTTP ${err.status}`}). ${kept} Try again; if it persists, give the incident id to support.`;
    default:
      return `${doing} failed (HTTP ${err.status}): ${err.detail || "no details"}. ${kept}`;
  }
}
