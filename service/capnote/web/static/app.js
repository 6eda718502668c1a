// The clinician's note form: wiring. The note lives in the form and on the server only;
// the browser keeps nothing but the sign-in token (sessionStorage, this tab).

import { call, token, explain, outcomeFindings } from "./api.js";
import { collect, fill, pathIndex, Rows, threeWay, syncShown } from "./noteform.js";
import { showFindings } from "./findings.js";
import { showDerived, showDue, showRiskReasons, num } from "./panel.js";
import { draw } from "./drawing.js";
import { renderPrint } from "./print.js";
import { formatMoment } from "./time.js";
import { readNumber, normalised } from "./numbers.js";

const $ = (id) => document.getElementById(id);
const form = $("note-form");
const CHECK_DELAY_MS = 400;

const state = {
  defaults: null,
  zone: "Europe/London",
  noteId: null,
  stored: null, // {id, version, status, reason} of the latest stored version
  pendingOpen: null, // the record id the address named at start, opened once signed in
  loaded: null, // the stored note last opened: what the form has no control for is kept from it
  dirty: false,
  touched: new Set(),
  showAll: false,
  view: null, // the last answer with findings, derived and due
  findings: [],
  refused: [], // what the server said when it last refused to store; kept until the next edit
  seq: 0,
  controller: null,
  timer: null,
};

// --- small helpers -----------------------------------------------------------------------

function uuid4() {
  const b = crypto.getRandomValues(new Uint8Array(16));
  b[6] = (b[6] & 0x0f) | 0x40;
  b[8] = (b[8] & 0x3f) | 0x80;
  const h = [...b].map((x) => x.toString(16).padStart(2, "0")).join("");
  return `${h.slice(0, 8)}-${h.slice(8, 12)}-${h.slice(12, 16)}-${h.slice(16, 20)}-${h.slice(20)}`;
}

function notice(text, kind = "info") {
  const box = $("notice");
  box.hidden = !text;
  box.textContent = text || "";
  box.className = `notice notice-${kind}`;
  box.setAttribute("role", kind === "error" ? "alert" : "status");
}

function checkStatus(text, kind = "info") {
  const p = $("check-status");
  // A live region: only a changed text is announced, so the same answer twice stays quiet.
  if (p.textContent !== text) p.textContent = text;
  p.className = `check-status status-${kind}`;
}

/** Units beside numbers are visual; say them in the label too, for screen readers. */
function unitsIntoLabels(root) {
  for (const wrap of root.querySelectorAll(".with-unit")) {
    const input = wrap.querySelector("input");
    const unit = wrap.querySelector(".unit");
    const label = input && input.labels && input.labels[0];
    if (!label || !unit || label.querySelector(".unit-said")) continue;
    const said = document.createElement("span");
    said.className = "vh unit-said";
    said.textContent = ` (${unit.textContent})`;
    label.append(said);
  }
}

// --- rows --------------------------------------------------------------------------------

function changed() {
  state.dirty = true;
  state.refused = [];
  refreshLocal();
  scheduleCheck();
}

const series = new Rows({ list: $("series-rows"), template: $("tpl-series"), noun: "Setting",
  base: "laser.series", idPrefix: "series", onChange: changed, setup: (li) => unitsIntoLabels(li) });
const readings = new Rows({ list: $("iop-rows"), template: $("tpl-iop"), noun: "Reading",
  base: "result.iop_after", idPrefix: "iop-after", onChange: changed, setup: (li) => unitsIntoLabels(li) });
const drops = new Rows({ list: $("prophylaxis-rows"), template: $("tpl-prophylaxis"), noun: "Drop given",
  base: "plan.prophylaxis", idPrefix: "prophylaxis", onChange: changed, setup: (li) => unitsIntoLabels(li) });
// The contract takes up to five dilating drops; the add button goes once there are five.
const MAX_DILATING = 5;
const dilating = new Rows({ list: $("dilating-rows"), template: $("tpl-dilating"), noun: "Dilating drop",
  base: "before.dilating_drops", idPrefix: "dilating", onChange: changed });
const takeHome = new Rows({ list: $("take-home-rows"), template: $("tpl-take-home"), noun: "Drops to take home",
  base: "plan.take_home", idPrefix: "take-home", onChange: changed, setup: (li) => unitsIntoLabels(li) });

function rowIndex(li) {
  return Number(/\[(\d+)\]$/.exec(li.dataset.row || "[0]")[1]);
}

function showPits(li) {
  const kind = li.querySelector("[data-sub=kind]").value;
  li.querySelector(".pits").hidden = !(kind === "iol-pit" || li.pits.rows().length > 0);
}

const pressure = new Rows({ list: $("pressure-rows"), template: $("tpl-pressure"), noun: "Treatment",
  base: "result.pressure_treatment", idPrefix: "pressure", onChange: changed, setup: (li) => unitsIntoLabels(li) });

const complications = new Rows({
  list: $("complication-rows"), template: $("tpl-complication"), noun: "Complication",
  base: "result.complications", idPrefix: "complication", onChange: changed,
  setup: (li) => {
    li.pits = new Rows({ list: li.querySelector(".pit-rows"), template: $("tpl-pit"), noun: "Pit",
      base: () => `${li.dataset.row}.positions`,
      idPrefix: () => `complication-${rowIndex(li)}-pit`, onChange: changed,
      setup: (pit) => {
        unitsIntoLabels(pit);
        // Say which complication a pit belongs to, when there are several.
        pit.dataset.owner = "complication";
      } });
    li.querySelector(".add-pit").addEventListener("click", () => li.pits.add({ focus: true }));
    li.querySelector("[data-sub=kind]").addEventListener("change", () => showPits(li));
  },
  onRenumber: (li, i) => {
    li.pits.renumber();
    li.querySelector(".add-pit").textContent = `Add a pit position (complication ${i + 1})`;
  },
});

$("add-series").addEventListener("click", () => series.add({ focus: true }));
$("add-iop").addEventListener("click", () => readings.add({ focus: true }));
$("add-pressure").addEventListener("click", () => pressure.add({ focus: true }));
$("add-complication").addEventListener("click", () => complications.add({ focus: true }));
$("add-prophylaxis").addEventListener("click", () => drops.add({ focus: true }));
$("add-dilating").addEventListener("click", () => dilating.add({ focus: true }));
$("add-take-home").addEventListener("click", () => takeHome.add({ focus: true }));

// --- what the form shows without asking the server --------------------------------------

function numberOf(el) {
  if (!el) return null;
  const n = readNumber(el.value);
  return n.value === undefined || n.problem ? null : n.value;
}

/** A plain-words note beside every number field the form cannot read as one number. */
function markNumbers() {
  for (const el of form.querySelectorAll("input[data-kind=number], input[data-kind=int]")) {
    const n = readNumber(el.value, { whole: el.dataset.kind === "int" });
    const box = el.closest(".field") || el.parentElement;
    let p = box.querySelector(":scope > .number-problem");
    const id = `${el.id}-number-problem`;
    const tokens = (v) => (v || "").split(/\s+/).filter((t) => t && t !== id);
    const base = el.hasAttribute("data-described-base") ? "describedBase" : null;
    if (n.problem) {
      if (!p) {
        p = document.createElement("p");
        p.className = "number-problem";
        box.append(p);
      }
      p.id = id;
      if (p.textContent !== n.problem) p.textContent = n.problem;
      el.setAttribute("aria-describedby", [...tokens(el.getAttribute("aria-describedby")), id].join(" "));
      if (base) el.dataset.describedBase = [...tokens(el.dataset.describedBase), id].join(" ");
      el.setAttribute("aria-invalid", "true");
      el.classList.add("number-bad");
    } else if (p || el.classList.contains("number-bad")) {
      p?.remove();
      const rest = tokens(el.getAttribute("aria-describedby")).join(" ");
      if (rest) el.setAttribute("aria-describedby", rest); else el.removeAttribute("aria-describedby");
      if (base) el.dataset.describedBase = tokens(el.dataset.describedBase).join(" ");
      if (!el.closest(".has-error")) el.removeAttribute("aria-invalid");
      el.classList.remove("number-bad");
    }
  }
}

function runningTotal() {
  let pulses = 0;
  let energy = 0;
  for (const li of series.rows()) {
    const e = numberOf(li.querySelector("[data-sub=energy_mj]"));
    const n = numberOf(li.querySelector("[data-sub=pulses]"));
    const out = li.querySelector(".row-energy");
    if (e !== null && n !== null) {
      pulses += n;
      energy += e * n;
      out.textContent = `= ${num(e * n, 2)} mJ`;
    } else {
      out.textContent = "";
    }
  }
  const total = $("laser-total");
  total.textContent = `${num(pulses, 0)} pulses · ${num(energy, 2)} mJ`;
  total.dataset.energy = String(Math.round(energy * 1000) / 1000);
  total.dataset.pulses = String(pulses);
}

function redraw() {
  const pits = [];
  for (const li of complications.rows()) {
    for (const pit of li.pits.rows()) {
      const x = numberOf(pit.querySelector("[data-sub=x_mm]"));
      const y = numberOf(pit.querySelector("[data-sub=y_mm]"));
      if (x !== null && y !== null) pits.push({ x, y });
    }
  }
  // Not recorded: the optic is not drawn (no size is assumed for it).
  const optic = numberOf($("iol-optic"));
  const eye = form.querySelector("input[name=eye]:checked")?.value;
  const centred = form.querySelector("input[name=opening-centred]:checked")?.value;
  const text = draw($("drawing"), {
    optic: optic !== null && optic > 0 ? Math.min(Math.max(optic, 1), 12) : null,
    h: clampOpening(numberOf($("opening-h"))),
    v: clampOpening(numberOf($("opening-v"))),
    centred: centred === "true" ? true : centred === "false" ? false : null,
    pits: pits.filter((p) => Math.abs(p.x) <= 10 && Math.abs(p.y) <= 10),
    eye,
    guide: state.defaults?.opening_min_mm || 3,
  });
  $("drawing-caption").dataset.words = text;
  const guide = state.defaults?.opening_min_mm || 3;
  $("drawing-caption").textContent = `To scale, as seen facing the patient: the patient's right is on your left. Grey: the optic under the capsule${optic === null ? " (not drawn: its diameter is not recorded)" : ""}; white: the opening; dashed ring: ${num(guide, 1)} mm, the usual smallest opening; red dots: IOL pits.`;
}

function clampOpening(v) {
  return v !== null && v > 0 && v <= 12 ? v : null;
}

/** The magnification of the site lens chosen, beside the lens list. */
function lensHint() {
  const option = $("lens-choice").selectedOptions[0];
  const m = option?.dataset.magnification;
  $("lens-hint").textContent = option && option.hasAttribute("data-lens")
    ? (m ? `Magnification ${num(Number(m), 2)}× (site lens list).` : "The site lens list gives no magnification for this lens.")
    : "";
}

/** The site's lenses (from /web/defaults) as choices, before "another lens". */
function lensList(lenses) {
  const select = $("lens-choice");
  const another = select.querySelector("option[value=another]");
  (lenses || []).forEach((lens, i) => {
    const option = document.createElement("option");
    option.value = `listed-${i}`;
    option.textContent = lens.name;
    option.dataset.lens = lens.name;
    if (typeof lens.magnification === "number") option.dataset.magnification = String(lens.magnification);
    select.insertBefore(option, another);
  });
}

function refreshLocal() {
  syncShown(form);
  lensHint();
  $("add-dilating").hidden = dilating.rows().length >= MAX_DILATING;
  markNumbers();
  runningTotal();
  redraw();
  renderSummary();
}

// --- the note and the server -------------------------------------------------------------

function currentNote(status) {
  const wanted = status || (state.stored && state.stored.status === "final" ? "final" : "draft");
  return withSystems(collect(form, state.zone, state.noteId, wanted, state.loaded));
}

/**
 * Every number typed goes under the site's numbering system (from the site settings), so no
 * clinician types a URI; a note opened from the server keeps the system it was stored with
 * (changing it would move the note to another patient). A system the site has not set stays
 * out, and the check says so in words for the administrator.
 */
function withSystems(note) {
  const site = state.defaults?.identifier_systems || {};
  const loaded = state.loaded || {};
  const give = (part, stored, own) => {
    if (!part || part.value === undefined) return;
    const system = stored || own;
    if (system) part.system = system;
  };
  give(note.patient, loaded.patient?.system, site.patient);
  give(note.encounter, loaded.encounter?.system, site.visit);
  give(note.performer?.identifier, loaded.performer?.identifier?.system, site.staff);
  return note;
}

function renderFindings() {
  const index = pathIndex(form);
  const counts = showFindings({
    form, index, findings: state.findings, list: $("findings-list"), stillNeeded: $("still-needed"),
    quiet: (f, el) => !state.showAll && !state.touched.has(el.dataset.bind || el.dataset.path || el.dataset.row),
  });
  markNumbers(); // the findings were redrawn: put the form's own number notes back
  return counts;
}

function summaryText(counts) {
  const parts = [];
  const n = (k, one, many) => `${k} ${k === 1 ? one : many}`;
  parts.push(n(counts.errors, "error", "errors"), n(counts.warnings, "warning", "warnings"));
  if (counts.notes) parts.push(n(counts.notes, "note", "notes"));
  let text = parts.join(", ");
  if (counts.waiting) text += `; ${n(counts.waiting, "entry", "entries")} still to fill`;
  return text;
}

function showView(view, when) {
  state.view = view;
  // A refusal (e.g. "a signed note needs a reason") stays shown until the next edit, even
  // when a check that knows nothing of it answers meanwhile.
  const seen = new Set((view.findings || []).map((f) => `${f.code} ${f.location}`));
  state.findings = [...(view.findings || []), ...state.refused.filter((f) => !seen.has(`${f.code} ${f.location}`))];
  const counts = renderFindings();
  showDerived($("derived"), view.derived);
  showDue($("due-list"), view.due, state.zone);
  showRiskReasons($("risk-why-list"), view.derived);
  for (const li of readings.rows()) li.querySelector(".row-change").textContent = "";
  for (const c of view.derived?.iop?.changes || []) {
    const li = readings.rows()[c.reading_index];
    if (li) {
      const sign = c.change_mmhg > 0 ? "+" : c.change_mmhg < 0 ? "−" : "±";
      li.querySelector(".row-change").textContent = `${sign}${num(Math.abs(c.change_mmhg))} mmHg`;
    }
  }
  const time = new Intl.DateTimeFormat("en-GB", { timeZone: state.zone, hour: "2-digit", minute: "2-digit", second: "2-digit", hourCycle: "h23" }).format(new Date());
  const kind = counts.errors ? "error" : counts.warnings ? "warning" : counts.waiting ? "info" : "ok";
  checkStatus(`${when}: ${summaryText(counts)}. Errors block saving; warnings do not.`, kind);
  $("check-time").textContent = `Last checked at ${time}, clinic time.`;
  state.counts = counts;
  renderSummary();
}

function scheduleCheck() {
  clearTimeout(state.timer);
  state.timer = setTimeout(runCheck, CHECK_DELAY_MS);
}

async function runCheck() {
  if (!token.get()) {
    checkStatus("Sign in to have the note checked as you type.");
    return;
  }
  const body = currentNote();
  if (state.controller) state.controller.abort();
  const controller = new AbortController();
  state.controller = controller;
  const mine = ++state.seq;
  $("check-time").textContent = "Checking…";
  $("check-again").hidden = true;
  try {
    const answer = await call("POST", "/notes/check", { body, signal: controller.signal });
    if (mine !== state.seq) return;
    showView(answer.body, "Checked");
  } catch (err) {
    if (err.name === "AbortError" || mine !== state.seq) return;
    checkStatus(explain(err, "Checking the note"), "error");
    // Never "Checking…" for ever: say when the check failed and that it runs again.
    $("check-time").textContent = err.kind === "network"
      ? `Not checked: capnote could not be reached at ${clock()}, clinic time. The check runs again after the next change, or press "Check again".`
      : `Not checked at ${clock()}, clinic time.`;
    $("check-again").hidden = false;
    if (err.kind === "signed-out") signedOut();
  }
}

function clock() {
  return new Intl.DateTimeFormat("en-GB", { timeZone: state.zone, hour: "2-digit", minute: "2-digit", hourCycle: "h23" }).format(new Date());
}

$("check-again").addEventListener("click", () => runCheck());

// --- stored note state --------------------------------------------------------------------

function setStored(view) {
  state.stored = view ? { id: view.id, version: view.version, status: view.status, reason: view.reason, signed: view.signed || null } : null;
  const s = state.stored;
  $("record-id").textContent = s ? s.id : "none yet";
  $("record-state").textContent = s
    ? `${s.status === "final" ? "signed final" : s.status === "void" ? "void (entered in error)" : "draft"}, version ${s.version}`
    : "not stored yet";
  // The address names the stored note (its record id, no patient data), so a reload or
  // another tab opens it again from the server; nothing of the note is kept in the browser.
  const want = s ? `#note=${s.id}` : "";
  if (window.location.hash !== want) history.replaceState(null, "", want || window.location.pathname);
  const final = s && s.status === "final";
  const voided = s && s.status === "void";
  $("save-draft").hidden = Boolean(final || voided);
  $("sign").hidden = Boolean(final || voided);
  $("amend").hidden = !final;
  $("reason-field").hidden = !final;
  $("void").hidden = !s || voided;
  $("show-versions").hidden = !s;
  document.body.classList.toggle("is-void", Boolean(voided));
  voidBanner(Boolean(voided));
  for (const el of form.querySelectorAll("input, select, textarea, button")) {
    if (["print", "show-versions"].includes(el.id)) continue;
    el.disabled = Boolean(voided);
  }
}

/** A voided note says so above everything, in words no one can miss: notes are usually voided
 * because they were filed against the wrong patient. */
function voidBanner(show) {
  let banner = document.getElementById("void-banner");
  if (!show) {
    if (banner) banner.remove();
    return;
  }
  if (!banner) {
    banner = document.createElement("p");
    banner.id = "void-banner";
    banner.className = "void-banner";
    banner.setAttribute("role", "alert");
    form.before(banner);
  }
  banner.textContent = "ENTERED IN ERROR — NOT FOR CLINICAL USE. This note was voided"
    + (state.stored?.reason ? ` (${state.stored.reason})` : "") + "; nothing in it is to be acted on or booked.";
}

function newNote() {
  form.reset();
  state.loaded = null; // nothing of another note is ever carried into a new one
  state.noteId = { system: state.defaults?.note_id_system || "urn:ietf:rfc:3986", value: `urn:uuid:${uuid4()}` };
  series.setCount(1);
  readings.setCount(0);
  pressure.setCount(0);
  complications.setCount(0);
  drops.setCount(0);
  takeHome.setCount(0);
  dilating.setCount(0);
  for (const el of form.querySelectorAll("[data-default]")) {
    const value = state.defaults?.[el.dataset.default];
    if (value !== undefined && value !== null) el.value = String(value);
  }
  state.touched.clear();
  state.showAll = false;
  state.findings = [];
  state.view = null;
  $("versions").hidden = true;
  $("amend-reason").value = "";
  setStored(null);
  state.dirty = false;
  notice("");
  renderFindings();
  showDerived($("derived"), null);
  showDue($("due-list"), [], state.zone);
  showRiskReasons($("risk-why-list"), null);
  refreshLocal();
  scheduleCheck();
}

function loadStored(view) {
  const note = view.note;
  state.loaded = note;
  state.noteId = { ...note.note_id };
  series.setCount((note.laser?.series || []).length);
  readings.setCount((note.result?.iop_after || []).length);
  pressure.setCount((note.result?.pressure_treatment || []).length);
  complications.setCount((note.result?.complications || []).length);
  (note.result?.complications || []).forEach((c, i) => {
    const li = complications.rows()[i];
    li.pits.setCount((c.positions || []).length);
  });
  drops.setCount((note.plan?.prophylaxis || []).length);
  takeHome.setCount((note.plan?.take_home || []).length);
  dilating.setCount((note.before?.dilating_drops || []).length);
  const otherDay = fill(form, note, state.zone);
  for (const li of complications.rows()) showPits(li);
  state.showAll = true;
  setStored(view);
  state.dirty = false;
  refreshLocal();
  showView(view, "Stored version checked");
  scheduleCheck();
  if (otherDay.length) {
    notice(`Some times in this note fall on another day than the session (${otherDay.length}); the form shows times of the session day only, so check them before saving.`, "warning");
  }
}

// --- saving ------------------------------------------------------------------------------

async function save(kind) {
  if (!token.get()) {
    notice("Sign in first: saving needs a clinician token. Everything typed is still in the form.", "error");
    $("token").focus();
    return;
  }
  const status = kind === "draft" ? "draft" : "final";
  const note = currentNote(status);
  const s = state.stored;
  const reason = $("amend-reason").value.trim();
  state.showAll = true;
  const doing = kind === "draft" ? "Saving the draft" : kind === "final" ? "Signing" : "Saving the amendment";
  notice(`${doing}…`);
  try {
    let answer;
    if (!s) {
      answer = await call("POST", "/notes", { body: note });
    } else {
      const body = reason ? { reason, note } : { note };
      answer = await call("PUT", `/notes/${encodeURIComponent(s.id)}`, { body, ifMatch: `W/"${s.version}"` });
    }
    const view = answer.body;
    setStored(view);
    state.dirty = false;
    state.refused = [];
    $("amend-reason").value = "";
    state.loaded = view.note;
    showView(view, "Saved and checked");
    const what = view.status === "final" ? (kind === "amend" ? "Amendment saved" : "Signed as final") : "Saved as draft";
    const errors = (view.findings || []).filter((f) => f.severity === "error").length;
    const still = view.status === "draft" && errors
      ? ` It is kept on the server as typed; ${errors} ${errors === 1 ? "entry needs" : "entries need"} attention before it can be signed.`
      : "";
    notice(`${what}: version ${view.version}.${still}`, "ok");
    showVersions();
    loadWorklist();
  } catch (err) {
    if (err.kind === "refused") {
      state.refused = outcomeFindings(err.body);
      state.findings = state.refused;
      const counts = renderFindings();
      checkStatus(`Not saved: ${summaryText(counts)}.`, "error");
    }
    notice(explain(err, doing), "error");
    if (err.kind === "signed-out") signedOut();
  }
}

$("save-draft").addEventListener("click", () => save("draft"));
$("amend").addEventListener("click", () => save("amend"));

$("sign").addEventListener("click", () => {
  const c = state.counts;
  const p = $("sign-findings");
  const plural = (n, word) => `${n} ${word}${n === 1 ? "" : "s"}`;
  p.textContent = c
    ? c.errors
      ? `The last check found ${plural(c.errors, "error")}: the server will refuse to sign until they are fixed.`
      : `The last check found no errors and ${plural(c.warnings, "warning")}.`
    : "The note has not been checked yet.";
  p.className = c && !c.errors ? "message calm" : "message";
  $("sign-dialog").showModal();
});
$("sign-dialog").addEventListener("close", () => {
  if ($("sign-dialog").returnValue === "sign") save("final");
  else $("sign").focus();
});

$("void").addEventListener("click", () => {
  $("void-reason").value = "";
  $("void-message").hidden = true;
  $("void-dialog").showModal();
});
$("void-form").addEventListener("submit", (event) => {
  if (event.submitter && event.submitter.value === "void" && !$("void-reason").value.trim()) {
    event.preventDefault();
    const m = $("void-message");
    m.textContent = "Give the reason for voiding.";
    m.hidden = false;
    $("void-reason").focus();
  }
});
$("void-dialog").addEventListener("close", async () => {
  if ($("void-dialog").returnValue !== "void") return;
  const s = state.stored;
  try {
    const answer = await call("POST", `/notes/${encodeURIComponent(s.id)}/void`,
      { body: { reason: $("void-reason").value.trim() }, ifMatch: `W/"${s.version}"` });
    setStored(answer.body);
    state.dirty = false;
    notice(`Voided: version ${answer.body.version} records the note as entered in error.`, "ok");
    showVersions();
    loadWorklist();
  } catch (err) {
    notice(explain(err, "Voiding"), "error");
    if (err.kind === "signed-out") signedOut();
  }
});

async function showVersions() {
  const s = state.stored;
  if (!s) return;
  try {
    const answer = await call("GET", `/notes/${encodeURIComponent(s.id)}/versions`);
    const list = $("versions-list");
    list.replaceChildren();
    for (const v of answer.body.versions) {
      const li = document.createElement("li");
      li.dataset.version = String(v.version);
      const when = v.recorded_at ? formatMoment(v.recorded_at, state.zone) : "";
      li.textContent = `Version ${v.version}: ${v.status}, ${when}${v.recorded_by ? `, by ${v.recorded_by}` : ""}${v.reason ? `. Reason: ${v.reason}` : ""}`;
      list.append(li);
    }
    $("versions-status").textContent = `As stored at ${clock()}, clinic time.`;
    $("versions").hidden = false;
  } catch (err) {
    // The panel says it could not be read, never an old list as if it were current.
    $("versions-list").replaceChildren();
    $("versions-status").textContent = err.kind === "network"
      ? `The versions could not be read: capnote could not be reached (${clock()}, clinic time). Press "Show versions" to try again.`
      : explain(err, "Reading the versions");
    $("versions").hidden = false;
    if (err.kind === "signed-out") signedOut();
  }
}
$("show-versions").addEventListener("click", showVersions);

async function openNote(id) {
  if (state.dirty && !window.confirm("The note in the form has unsaved changes. Open another note and discard them?")) return;
  try {
    const answer = await call("GET", `/notes/${encodeURIComponent(id)}`);
    loadStored(answer.body);
    notice(`Opened version ${answer.body.version} (${answer.body.status}).`, "ok");
    await showVersions();
    $("step-patient").scrollIntoView({ block: "start" });
  } catch (err) {
    notice(explain(err, "Opening the note"), "error");
    if (err.kind === "signed-out") signedOut();
  }
}

$("open-form").addEventListener("submit", (event) => {
  event.preventDefault();
  const id = $("open-id").value.trim();
  if (id) openNote(id);
});

function noteInAddress() {
  const m = /^#note=([0-9a-f-]{36})$/.exec(window.location.hash);
  return m ? m[1] : null;
}

// --- the worklist: today's notes, my drafts, the follow-ups due ---------------------------

const EYE_WORDS = { right: "right eye", left: "left eye" };

function workItem(text, sub, id) {
  const li = document.createElement("li");
  const open = document.createElement("button");
  open.type = "button";
  open.className = "link work-open";
  open.textContent = text;
  open.dataset.note = id;
  open.addEventListener("click", () => openNote(id));
  li.append(open);
  if (sub) {
    const p = document.createElement("p");
    p.className = "work-sub";
    p.textContent = sub;
    li.append(p);
  }
  return li;
}

function noteLine(n) {
  const when = formatMoment(n.started_at, state.zone);
  const stateWords = n.status === "final" ? "signed" : n.status === "void" ? "void (entered in error)"
    : n.accepted ? "draft" : "draft, not complete yet";
  return workItem(`${n.patient.value}, ${EYE_WORDS[n.eye] || n.eye}, ${when}`, `${stateWords}; version ${n.version}`, n.id);
}

function fillList(list, items, empty) {
  list.replaceChildren(...(items.length ? items : [Object.assign(document.createElement("li"), { className: "muted", textContent: empty })]));
}

async function loadWorklist() {
  const status = $("worklist-status");
  if (!token.get()) {
    status.textContent = "Sign in to see today's notes, your drafts and the follow-ups due.";
    return;
  }
  status.textContent = "Reading the worklist…";
  try {
    // The day is the server's (its clock, the clinic's zone), never the browser's.
    const w = (await call("GET", "/notes/worklist")).body;
    const due = await call("GET", `/fhir/ServiceRequest?status=active&occurrence=le${encodeURIComponent(w.day)}&_count=50`);
    fillList($("today-list"), w.today.map(noteLine), "No notes for today yet.");
    fillList($("drafts-list"), w.drafts.map(noteLine), "No drafts of yours.");
    const followups = (due.body.entry || []).map((e) => e.resource).map((r) => {
      const ref = (r.supportingInfo || []).map((x) => x.reference || "").find((x) => x.startsWith("Procedure/"));
      const id = ref ? ref.slice("Procedure/".length) : r.id.slice(0, 36);
      const at = r.occurrenceTiming?.event?.[0];
      const who = r.subject?.identifier?.value || "";
      return workItem(`${r.code?.text || "Follow-up"}: ${who}`, at ? `due ${formatMoment(at, state.zone)}` : null, id);
    });
    fillList($("followups-list"), followups, "No follow-ups due today.");
    status.textContent = `Day ${w.day}, as read at ${clock()}, clinic time.`;
  } catch (err) {
    status.textContent = err.kind === "network"
      ? `The worklist could not be read: capnote could not be reached (${clock()}, clinic time). Press "Refresh the list" to try again.`
      : explain(err, "Reading the worklist");
    if (err.kind === "signed-out") signedOut();
  }
}
$("refresh-worklist").addEventListener("click", loadWorklist);

$("new-note").addEventListener("click", () => {
  if (state.dirty && !window.confirm("The note in the form has unsaved changes. Start a new note and discard them?")) return;
  newNote();
});

$("print").addEventListener("click", () => {
  renderSummary();
  window.print();
});

// --- sign-in -----------------------------------------------------------------------------

function signedIn() {
  $("signin").hidden = true;
  $("signed-in-as").textContent = "Signed in (token kept for this tab only)";
  $("sign-out").hidden = false;
  loadWorklist();
}

function signedOut(message) {
  token.clear();
  $("signin").hidden = false;
  $("signed-in-as").textContent = "Not signed in";
  $("sign-out").hidden = true;
  const m = $("signin-message");
  m.textContent = message || "Your token was not accepted (unknown, revoked or missing). Sign in again; everything typed is still in the form.";
  m.hidden = false;
}

$("signin-form").addEventListener("submit", async (event) => {
  event.preventDefault();
  const value = $("token").value.trim();
  const m = $("signin-message");
  if (!value) {
    m.textContent = "Paste your clinician token first.";
    m.hidden = false;
    return;
  }
  try {
    // Any answer but 401/403 proves the token: an empty note is simply not accepted.
    await call("POST", "/notes/check", { body: {}, bearer: value });
    token.set(value);
    $("token").value = "";
    m.hidden = true;
    signedIn();
    const id = state.pendingOpen;
    state.pendingOpen = null;
    if (id && !state.stored) await openNote(id); else runCheck();
  } catch (err) {
    m.textContent = err.kind === "signed-out"
      ? "That token was not accepted: it is unknown or has been revoked. Check it and try again."
      : err.kind === "forbidden"
        ? "That token belongs to a role that may not check or save notes (for example an auditor's). Use a clinician token."
        : explain(err, "Signing in");
    m.hidden = false;
  }
});

$("sign-out").addEventListener("click", () => {
  signedOut("Signed out. The token is forgotten; the form still holds what was typed.");
  checkStatus("Sign in to have the note checked as you type.");
});

// --- the print view ----------------------------------------------------------------------

function renderSummary() {
  if (!state.noteId) return;
  renderPrint($("print-summary"), {
    note: currentNote(), view: state.view, findings: state.findings, zone: state.zone, stored: state.stored,
    svg: $("drawing"), caution: state.defaults?.caution || $("caution").textContent,
  });
}
window.addEventListener("beforeprint", renderSummary);

// --- events and start --------------------------------------------------------------------

form.addEventListener("input", changed);
form.addEventListener("change", (event) => {
  const t = event.target;
  if (t.type === "radio" || t.type === "checkbox" || t.tagName === "SELECT") {
    state.touched.add(t.dataset.bind || "");
  }
  // A number typed with a decimal comma is shown with a point once read: "0,8" becomes "0.8".
  if (t.matches && t.matches("input[data-kind=number], input[data-kind=int]")) {
    const shown = normalised(t.value);
    if (shown !== t.value) t.value = shown;
  }
  changed();
});
form.addEventListener("focusout", (event) => {
  const el = event.target;
  const path = el.dataset && el.dataset.bind;
  if (path && !state.touched.has(path)) {
    state.touched.add(path);
    renderFindings();
  }
});
form.addEventListener("submit", (event) => event.preventDefault());

window.addEventListener("beforeunload", (event) => {
  if (!state.dirty) return;
  event.preventDefault();
  event.returnValue = "";
});

async function start() {
  threeWay(form);
  unitsIntoLabels(document);
  try {
    const answer = await call("GET", "/web/defaults", { bearer: null });
    state.defaults = answer.body;
    state.zone = answer.body.timezone;
  } catch (err) {
    notice(`The clinic's settings could not be read (${explain(err, "Loading")}); dates are shown in ${state.zone}.`, "error");
  }
  const d = state.defaults;
  lensList(d?.contact_lenses);
  if (d) {
    $("caution").textContent = d.caution;
    $("recheck-hint").textContent = `Leave empty for the site default: ${d.iop_recheck_minutes} min after the laser.`;
    $("review-hint").textContent = `Leave empty for the site default: ${num(d.review_days_routine, 0)} days, or ${num(d.review_days_raised, 0)} when the risk is raised.`;
    $("zone-hint").textContent = `Dates and times are the clinic's (${d.timezone}), on open clinic days.`;
  }
  // Read before the empty form replaces the address.
  state.pendingOpen = noteInAddress();
  newNote();
  if (token.get()) {
    signedIn();
    // After a reload (or a link from another tab) the note comes back from the server.
    const id = state.pendingOpen;
    state.pendingOpen = null;
    if (id) await openNote(id); else runCheck();
  } else {
    $("signin").hidden = false;
  }
  window.addEventListener("hashchange", () => {
    const id = noteInAddress();
    if (id && token.get() && (!state.stored || state.stored.id !== id)) openNote(id);
  });
  document.body.dataset.ready = "true";
}

start();
