// The clinical audit page: the auditor's token (this tab only), a period, and the report
// the service computes (GET /audit/clinical), shown in a sandboxed frame that runs nothing.

const TOKEN_KEY = "capnote-audit-token";
const $ = (id) => document.getElementById(id);

function iso(day) {
  return day.toISOString().slice(0, 10);
}

function query(format) {
  const params = new URLSearchParams({ from: $("audit-from").value, to: $("audit-to").value });
  for (const [name, id] of [["site", "audit-site"], ["clinician", "audit-clinician"]]) {
    const value = $(id).value.trim();
    if (value) params.set(name, value);
  }
  if (format === "csv") params.set("format", "csv");
  return `/audit/clinical?${params}`;
}

function say(text, isError) {
  $("audit-status").textContent = isError ? "" : text;
  const message = $("audit-message");
  message.hidden = !isError;
  message.textContent = isError ? text : "";
}

function refused(status, body) {
  if (status === 401) return "Your token was not accepted (unknown, revoked or missing). Paste a valid auditor token.";
  if (status === 403) return "This token's role may not see the clinical audit: it is for the auditor role only.";
  let issues = [];
  try { issues = JSON.parse(body).issue || []; } catch { issues = []; }
  const said = issues.map((i) => i.diagnostics || (i.details && i.details.text) || "").filter(Boolean);
  return `The audit was refused (${status})${said.length ? ": " + said.join("; ") : "."}`;
}

async function fetchReport(format) {
  const secret = $("audit-token").value.trim() || sessionStorage.getItem(TOKEN_KEY) || "";
  if (!secret) {
    say("Paste your auditor token first.", true);
    $("audit-token").focus();
    return null;
  }
  if (!$("audit-from").value || !$("audit-to").value) {
    say("Give both days of the period (from and to).", true);
    return null;
  }
  sessionStorage.setItem(TOKEN_KEY, secret);
  say("Counting…", false);
  let response;
  try {
    response = await fetch(query(format), {
      headers: { Authorization: `Bearer ${secret}`, Accept: format === "csv" ? "text/csv" : "text/html" },
      cache: "no-store",
    });
  } catch {
    say("capnote could not be reached; nothing was changed.", true);
    return null;
  }
  const text = await response.text();
  if (!response.ok) {
    say(refused(response.status, text), true);
    return null;
  }
  return text;
}

async function show(event) {
  event.preventDefault();
  const html = await fetchReport("html");
  if (html === null) return;
  const frame = $("audit-report");
  frame.srcdoc = html;
  frame.hidden = false;
  say(`The audit of ${$("audit-from").value} to ${$("audit-to").value} is shown below.`, false);
}

async function download() {
  const csv = await fetchReport("csv");
  if (csv === null) return;
  const link = document.createElement("a");
  link.href = URL.createObjectURL(new Blob([csv], { type: "text/csv" }));
  link.download = `capnote-audit-${$("audit-from").value}-to-${$("audit-to").value}.csv`;
  document.body.append(link);
  link.click();
  link.remove();
  say("The CSV was downloaded.", false);
}

function start() {
  const today = new Date();
  const yearAgo = new Date(today);
  yearAgo.setFullYear(today.getFullYear() - 1);
  $("audit-from").value = iso(yearAgo);
  $("audit-to").value = iso(today);
  $("audit-form").addEventListener("submit", show);
  $("audit-csv").addEventListener("click", download);
}

start();
