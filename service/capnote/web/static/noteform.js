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
      // An empty data-sub is the item itself: a list of texts (dilating drops) has no parts.
      const idOf = (sub) => (sub ? `${prefix}-${i}-${sub.replaceAll("_", "-")}` : `${prefix}-${i}`);
      for (const el of li.querySelectorAll(":scope > [data-sub], :scope > .field [data-sub]")) {
        el.id = idOf(el.dataset.sub);
        el.dataset.bind = el.dataset.sub ? `${path}.${el.dataset.sub}` : path;
      }
      for (const label of li.querySelectorAll(":scope > .field label[data-for]")) {
        label.htmlFor = idOf(label.dataset.for);
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

/**
 * Yes / No / Not recorded radios for every <fieldset data-three="NAME" data-path="PATH">,
 * built once at start-up so the page spells each group out only once. Not recorded is the
 * default choice (what form.reset() goes back to); data-weak on the fieldset goes to the radios.
 */
export function threeWay(root) {
  for (const set of root.querySelectorAll("fieldset[data-three]")) {
    if (set.querySelector(".choices")) continue;
    const name = set.dataset.three;
    const box = document.createElement("div");
    box.className = "choices";
    for (const [value, words, id] of [["true", "Yes", "yes"], ["false", "No", "no"], ["", "Not recorded", "not-recorded"]]) {
      const input = document.createElement("input");
      input.type = "radio";
      input.name = name;
      input.id = `${name}-${id}`;
      input.value = value;
      input.dataset.bind = set.dataset.path;
      input.dataset.kind = "bool";
      if (set.hasAttribute("data-weak")) input.dataset.weak = "";
      if (value === "") input.defaultChecked = true;
      const label = document.createElement("label");
      label.append(input, ` ${words}`);
      box.append(label);
    }
    set.append(box);
  }
}

/** The value a condition of data-when looks at: a control by id, else a radio group by name. */
function conditionValue(form, name) {
  const el = form.querySelector(`#${CSS.escape(name)}`);
  if (el) return el.value;
  return form.querySelector(`input[type=radio][name="${CSS.escape(name)}"]:checked`)?.value ?? "";
}

/**
 * Whether a control is shown now: every data-when="id=value ..." around it holds. A control
 * that is not shown sends nothing (pulses per burst without burst mode, a lens name without
 * a lens used).
 */
export function shownNow(form, el) {
  for (let node = el.closest("[data-when]"); node; node = node.parentElement?.closest("[data-when]")) {
    for (const cond of node.dataset.when.split(/\s+/).filter(Boolean)) {
      const [name, want] = cond.split("=");
      if (conditionValue(form, name) !== want) return false;
    }
  }
  return true;
}

/** Show and hide the conditional parts to match the controls they depend on. */
export function syncShown(form) {
  for (const node of form.querySelectorAll("[data-when]")) {
    const shown = shownNow(form, node);
    if (node.hidden === shown) node.hidden = !shown;
  }
}

/** Round to 4 decimals without float noise (0.15000000000000002 -> 0.15). */
function round4(v) {
  return Math.round(v * 1e4) / 1e4;
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
    // data-scale: the field shows scale x the note's unit (micrometres for millimetres).
    if (el.dataset.scale && !n.problem) return round4(n.value / Number(el.dataset.scale));
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
const KEPT = ["result.discharge.cleared_by_identifier"];

/** The site lens chosen in a lens list, as {lens, magnification}; null for none or another. */
function listedLens(select) {
  const option = select.selectedOptions[0];
  if (!option || !option.hasAttribute("data-lens")) return null;
  const m = option.dataset.magnification;
  return { lens: option.dataset.lens, magnification: m === undefined || m === "" ? undefined : Number(m) };
}

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
  // An empty row still goes in (as {} or, for a list of texts, ""), so the server can say
  // beside it what it lacks.
  for (const li of form.querySelectorAll("[data-row]")) {
    setPath(note, li.dataset.row, li.hasAttribute("data-scalar") ? "" : {}, true);
  }
  const weak = [];
  for (const el of form.querySelectorAll("[data-bind]")) {
    if (!shownNow(form, el)) continue;
    if (el.hasAttribute("data-weak")) { weak.push(el); continue; }
    if (el.type === "checkbox") {
      // A list of choices: the ticked ones, in the page's order; none ticked sends nothing.
      if (el.checked) setPath(note, el.dataset.bind, [...(getPath(note, el.dataset.bind) || []), el.value]);
      continue;
    }
    const value = read(el, day, zone);
    if (value !== undefined) setPath(note, el.dataset.bind, value);
  }
  for (const select of form.querySelectorAll("select[data-lens-list]")) {
    const lens = shownNow(form, select) ? listedLens(select) : null;
    if (!lens) continue;
    note.laser.contact_lens.lens = lens.lens;
    if (lens.magnification !== undefined) note.laser.contact_lens.magnification = lens.magnification;
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
    } else if (el.type === "checkbox") {
      el.checked = Array.isArray(value) && value.includes(el.value);
    } else if (kind === "number" && el.dataset.scale && typeof value === "number") {
      // 0.2 mm shows as 200 µm; toPrecision drops the float noise of the multiplication.
      el.value = String(Number((value * Number(el.dataset.scale)).toPrecision(12)));
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
  for (const select of form.querySelectorAll("select[data-lens-list]")) fillLens(form, select, note);
  return otherDay;
}

/**
 * A stored lens: the listed lens with the same name and magnification, else "another lens"
 * with the stored name and magnification in its own fields (a lens no longer on the site's
 * list, or one with other figures, is kept as it was recorded).
 */
function fillLens(form, select, note) {
  const stored = note.laser?.contact_lens || {};
  const name = stored.lens ?? null;
  const mag = stored.magnification ?? null;
  const listed = [...select.options].find((o) => o.hasAttribute("data-lens")
    && o.dataset.lens === name
    && (o.dataset.magnification === undefined || o.dataset.magnification === "" ? mag === null : Number(o.dataset.magnification) === mag));
  if (listed) {
    select.value = listed.value;
    for (const el of form.querySelectorAll('[data-bind="laser.contact_lens.lens"], [data-bind="laser.contact_lens.magnification"]')) el.value = "";
  } else {
    select.value = name !== null || mag !== null ? "another" : "";
  }
}

/** Every control, row and group that a finding can point at, by JSON path (first one wins). */
export function pathIndex(form) {
  const index = new Map();
  for (const el of form.querySelectorAll("[data-bind], [data-path], [data-row]")) {
    const path = el.dataset.bind || el.dataset.path || el.dataset.row;
    // A row whose item is one text (a dilating drop) has the path of its control: the
    // control, not the row, carries the finding.
    if (!index.has(path) || (el.dataset.bind && index.get(path).hasAttribute("data-row"))) index.set(path, el);
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
    // A whole section ("before", "result") is no place for a finding: the summary holds it;
    // a top-level part the form shows as one field (the patient) is.
    if (!/[.[]/.test(path)) return index.get(path)?.matches(".field[data-path]") ? index.get(path) : null;
  }
  return null;
}

/** The words a person sees for a control: its label or its group's legend. */
export function describe(el) {
  if (!el) return "";
  let source = null;
  if (el.type !== "radio" && el.labels && el.labels.length) source = el.labels[0];
  // A field's box (data-path on a .field) is named by its own label.
  else if (el.matches(".field") && el.querySelector(":scope > label")) source = el.querySelector(":scope > label");
  else source = el.closest("fieldset")?.querySelector(":scope > legend") || null;
  if (!source) return el.getAttribute("aria-label") || "";
  const copy = source.cloneNode(true);
  for (const n of copy.querySelectorAll(".opt, .unit-said, input")) n.remove();
  return copy.textContent.replace(/\s+/g, " ").trim();
}
