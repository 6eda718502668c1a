// The form <-> the note contract (schemas/note.py). Every control carries data-bind, the JSON
// path of the note field it fills; repeated parts (series, readings, drops, ...) are rows whose
// paths are renumbered whenever a row is added or removed, so that a finding's location
// (e.g. laser.series[1].energy_mj) always names the control it concerns.

import { toInstant, fromInstant } from "./time.js";
import { readNumber } from "./numbers.js";

function tokens(path) {
  const out = [];
  for (const part of path.split(".")) {
    const m = /^([^[\]]+)((?:\[\d+\])*)$/.exec(part);
    if (!m) { out.push(part); continue; }
    out.push(m[1]);
    for (const idx of m[2].matchAll(/\[(\d+)\]/g)) out.push(Number(idx[1]));
  }
  return out;
}

export function getPath(obj, path) {
  let cur = obj;
  for (const key of tokens(path)) {
    if (cur === null || cur === undefined) return undefined;
    cur = cur[key];
  }
  return cur;
}

export function setPath(obj, path, value, onlyIfMissing = false) {
  const keys = tokens(path);
  let cur = obj;
  keys.forEach((key, i) => {
    if (i === keys.length - 1) {
      if (!(onlyIfMissing && cur[key] !== undefined)) cur[key] = value;
      return;
    }
    if (cur[key] === undefined || cur[key] === null) cur[key] = typeof keys[i + 1] === "number" ? [] : {};
    cur = cur[key];
  });
}

export function parentPath(path) {
  const keys = tokens(path);
  keys.pop();
  return keys.reduce((acc, k) => (typeof k === "number" ? `${acc}[${k}]` : acc ? `${acc}.${k}` : k), "");
}

/** A list of repeated rows (one <li> per item) built from a <template>. */
export class Rows {
  constructor({ list, template, noun, base, idPrefix, onChange, setup, onRenumber }) {
    this.list = list;
    this.template = template;
    this.noun = noun;
    this.base = typeof base === "function" ? base : () => base;
    this.idPrefix = typeof idPrefix === "function" ? idPrefix : () => idPrefix;
    this.onChange = onChange || (() => {});
    this.setup = setup || (() => {});
    this.onRenumber = onRenumber || (() => {});
  }

  rows() { return [...this.list.children]; }

  add({ focus = false } = {}) {
    const li = this.template.content.firstElementChild.cloneNode(true);
    this.list.append(li);
    li.querySelector(":scope > .remove").addEventListener("click", () => this.remove(li));
    this.setup(li, this);
    this.renumber();
    if (focus) li.querySelector("[data-sub]").focus();
    this.onChange();
    return li;
  }

  remove(li) {
    const index = this.rows().indexOf(li);
    li.remove();
    this.renumber();
    const rest = this.rows();
    const next = rest[Math.min(index, rest.length - 1)];
    // Keep the keyboard user where they were: the next row, else the add button.
    if (next) next.querySelector("[data-sub]").focus();
    else this.list.parentElement.querySelector(":scope > .row-actions .add, :scope > .add")?.focus();
    this.onChange();
  }

  setCount(n) {
    while (this.rows().length > n) this.rows().at(-1).remove();
    while (this.rows().length < n) {
      const li = this.template.content.firstElementChild.cloneNode(true);
      this.list.append(li);
      li.querySelector(":scope > .remove").addEventListener("click", () => this.remove(li));
      this.setup(li, this);
    }
    this.renumber();
  }

  renumber() {
    const base = this.base();
    const prefix = this.idPrefix();
    this.rows().forEach((li, i) => {
      const path = `${base}[${i}]`;
      li.dataset.row = path;
      const name = `${this.noun} ${i + 1}`;
      for (const el of li.querySelectorAll(":scope > [data-sub], :scope > .field [data-sub]")) {
        el.id = `${prefix}-${i}-${el.dataset.sub.replaceAll("_", "-")}`;
        el.dataset.bind = `${path}.${el.dataset.sub}`;
      }
      for (const label of li.querySelectorAll(":scope > .field label[data-for]")) {
        label.htmlFor = `${prefix}-${i}-${label.dataset.for.replaceAll("_", "-")}`;
        const hidden = label.querySelector(".row-label");
        if (hidden) hidden.textContent = `${name}: `;
      }
      const tag = li.querySelector(":scope > .row-name");
      tag.textContent = String(i + 1);
      tag.setAttribute("aria-hidden", "true");
      li.querySelector(":scope > .remove").setAttribute("aria-label", `Remove ${name.toLowerCase()}`);
      this.onRenumber(li, i);
    });
  }
}

/** One control's value for the note; undefined leaves the field out. */
function read(el, day, zone) {
  const kind = el.dataset.kind || "text";
  if (el.type === "radio") {
    // The empty choice is "Not recorded": the key is left out, never sent as false.
    if (!el.checked || el.value === "") return undefined;
    return kind === "bool" ? el.value === "true" : el.value;
  }
  if (kind === "bool-select") return el.value === "" ? undefined : el.value === "true";
  if (el.tagName === "SELECT") return el.value === "" ? undefined : el.value;
  if (kind === "number" || kind === "int") {
    // "0,8" is 0.8. Text that is not one number ("1,2,3", "1.000,5") reaches the server as
    // text, which answers where it is wrong; the form says why beside the field meanwhile.
    const n = readNumber(el.value, { whole: kind === "int" });
    if (n.empty) return undefined;
    if (n.value === undefined) return el.value.trim();
    return n.value;
  }
  if (kind === "session-date") return undefined;
  if (kind === "session-time" || kind === "time") {
    if (!el.value || !day) return undefined;
    return toInstant(day, el.value, zone) ?? undefined;
  }
  if (kind === "date") return el.value || undefined;
  const text = el.value.trim();
  return text === "" ? undefined : text;
}

// Parts of the contract the form has no control for yet: an opened note keeps what the
// sender recorded there, so opening and saving from the form never drops it.
const KEPT = [
  "patient_details", "assistant", "indication",
  "before.topical_anaesthetic", "before.dilating_drops",
  "laser.mode", "laser.pulses_per_burst",
  "laser.contact_lens.lens", "laser.contact_lens.magnification",
  "consent.kind", "result.discharge.cleared_by_identifier",
];

/** The note as the contract wants it, from what is in the form now (and, for the parts the
 * form does not show, from the stored note it was opened from). */
export function collect(form, zone, noteId, status, loaded = null) {
  const note = {
    note_id: { ...noteId },
    patient: {},
    performer: { identifier: {} },
    location: {},
    consent: {},
    before: { iop: {}, iol: {}, risk_factors: {} },
    laser: { series: [], contact_lens: {} },
    result: { complications: [], iop_after: [] },
    plan: { prophylaxis: [], take_home: [] },
  };
  const day = form.querySelector("[data-kind=session-date]").value;
  for (const li of form.querySelectorAll("[data-row]")) setPath(note, li.dataset.row, {}, true);
  const weak = [];
  for (const el of form.querySelectorAll("[data-bind]")) {
    if (el.hasAttribute("data-weak")) { weak.push(el); continue; }
    const value = read(el, day, zone);
    if (value !== undefined) setPath(note, el.dataset.bind, value);
  }
  // Weak controls (such as "centred" or "best corrected") only count inside a part
  // that something else put there; alone they would invent a part nobody recorded.
  for (const el of weak) {
    if (getPath(note, parentPath(el.dataset.bind)) === undefined) continue;
    const value = read(el, day, zone);
    if (value !== undefined) setPath(note, el.dataset.bind, value);
  }
  if (note.encounter && Object.keys(note.encounter).length === 0) delete note.encounter;
  if (loaded) {
    for (const path of KEPT) {
      const value = getPath(loaded, path);
      if (value === undefined || value === null) continue;
      // A nested part is kept only where the form still has its parent (a discharge).
      const parent = parentPath(path);
      if (parent && getPath(note, parent) === undefined) continue;
      setPath(note, path, value);
    }
  }
  note.status = status;
  return note;
}

/** Put a stored note into the form; returns the controls whose stored day is not the session's. */
export function fill(form, note, zone) {
  const start = note.started_at ? fromInstant(note.started_at, zone) : null;
  const otherDay = [];
  for (const el of form.querySelectorAll("[data-bind]")) {
    const value = getPath(note, el.dataset.bind);
    const kind = el.dataset.kind || "text";
    if (el.type === "radio") {
      // Not recorded (absent or null) checks the group's empty choice, where it has one;
      // a recorded false checks "No".
      el.checked = value === undefined || value === null ? el.value === "" : String(value) === el.value;
    } else if (kind === "bool-select") {
      el.value = value === undefined || value === null ? "" : String(value);
    } else if (el.tagName === "SELECT") {
      el.value = value === undefined || value === null ? el.options[0].value : String(value);
    } else if (kind === "session-date") {
      el.value = start ? start.day : "";
    } else if (kind === "session-time") {
      el.value = start ? start.time : "";
    } else if (kind === "time") {
      const local = value ? fromInstant(value, zone) : null;
      el.value = local ? local.time : "";
      if (local && start && local.day !== start.day) otherDay.push(el);
    } else {
      el.value = value === undefined || value === null ? "" : String(value);
    }
  }
  return otherDay;
}

/** Every control, row and group that a finding can point at, by JSON path (first one wins). */
export function pathIndex(form) {
  const index = new Map();
  for (const el of form.querySelectorAll("[data-bind], [data-path], [data-row]")) {
    const path = el.dataset.bind || el.dataset.path || el.dataset.row;
    if (!index.has(path)) index.set(path, el);
  }
  return index;
}

/** The control for a finding's location, or the nearest row or group that holds it. */
export function elementFor(index, location) {
  let path = location || "";
  while (path) {
    const el = index.get(path);
    if (el) return el;
    path = parentPath(path);
    // A whole section ("before", "result") is no place for a finding: the summary holds it.
    if (!/[.[]/.test(path)) return null;
  }
  return null;
}

/** The words a person sees for a control: its label or its group's legend. */
export function describe(el) {
  if (!el) return "";
  let source = null;
  if (el.type !== "radio" && el.labels && el.labels.length) source = el.labels[0];
  else source = el.closest("fieldset")?.querySelector(":scope > legend") || null;
  if (!source) return el.getAttribute("aria-label") || "";
  const copy = source.cloneNode(true);
  for (const n of copy.querySelectorAll(".opt, .unit-said, input")) n.remove();
  return copy.textContent.replace(/\s+/g, " ").trim();
}
