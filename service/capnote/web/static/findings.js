// Findings from POST /notes/check (or a refused save) beside the controls they concern, and
// all of them in the summary list of the side panel.

import { elementFor, describe, pathIndex } from "./noteform.js";
import { clinical } from "./messages.js";

const WORDS = { error: "Error", warning: "Warning", information: "Note" };
let serial = 0;

function holder(el) {
  if (el.type === "radio") return el.closest("fieldset");
  // In a row the finding goes under the whole row, so the row's fields stay in line.
  const row = el.closest("li.row");
  if (row) return row;
  return el.closest(".field, .tick, fieldset") || el;
}

/** The element that carries aria-describedby / aria-invalid for this target. */
function described(el) {
  return el.type === "radio" ? el.closest("fieldset") : el;
}

function detailLine(f) {
  const bits = [];
  if (f.rule) bits.push(["Rule", f.rule]);
  if (f.allowed) bits.push(["Allowed", f.allowed]);
  if (f.source) bits.push(["Source", f.source]);
  const p = document.createElement("p");
  p.className = "finding-detail";
  bits.forEach(([k, v], i) => {
    if (i) p.append(" · ");
    const b = document.createElement("span");
    b.className = "k";
    b.textContent = `${k}: `;
    p.append(b, v);
  });
  return bits.length ? p : null;
}

function badge(severity) {
  const span = document.createElement("span");
  span.className = `badge sev-${severity}`;
  span.textContent = WORDS[severity] || severity;
  return span;
}

function clearInline(form) {
  for (const node of form.querySelectorAll(".finding-inline")) node.remove();
  for (const el of form.querySelectorAll("[data-described-base]")) {
    const base = el.dataset.describedBase;
    if (base) el.setAttribute("aria-describedby", base); else el.removeAttribute("aria-describedby");
    el.removeAttribute("data-described-base");
  }
  for (const el of form.querySelectorAll("[aria-invalid]")) el.removeAttribute("aria-invalid");
  for (const el of form.querySelectorAll(".has-error, .has-warning")) el.classList.remove("has-error", "has-warning");
}

function addDescribedBy(el, id) {
  if (!el.hasAttribute("data-described-base")) el.dataset.describedBase = el.getAttribute("aria-describedby") || "";
  const now = (el.getAttribute("aria-describedby") || "").split(/\s+/).filter(Boolean);
  now.push(id);
  el.setAttribute("aria-describedby", now.join(" "));
}

function summaryItem(raw, el, form) {
  const f = { ...raw, ...clinical(raw, el) };
  const li = document.createElement("li");
  li.className = `finding sev-${f.severity}`;
  li.dataset.code = f.code;
  li.dataset.location = f.location || "";
  const head = document.createElement("p");
  head.className = "finding-message";
  head.append(badge(f.severity), " ", f.message);
  li.append(head);
  const where = document.createElement("p");
  where.className = "finding-where";
  if (el) {
    const go = document.createElement("button");
    go.type = "button";
    go.className = "link";
    go.textContent = `Go to: ${describe(el) || f.location}`;
    go.addEventListener("click", () => {
      // Look the control up again: rows may have been rebuilt since this list was drawn.
      const now = elementFor(pathIndex(form), f.location) || el;
      const target = now.matches("input, select, textarea, button") ? now : now.querySelector("input, select, textarea, button");
      (target || now).focus();
      (target || now).scrollIntoView({ block: "center" });
    });
    where.append(go);
  } else {
    where.textContent = f.location ? "Not tied to one field of the form" : "About the whole note";
  }
  li.append(where);
  const detail = detailLine(f);
  if (detail) li.append(detail);
  return li;
}

/**
 * Show the findings. `quiet(f, el)` says whether a missing-field finding is held back
 * (the clinician has not reached that field yet); those are listed under "Still to fill".
 */
export function showFindings({ form, index, findings, list, stillNeeded, quiet }) {
  clearInline(form);
  const items = [];
  const waiting = [];
  const shown = [];
  for (const f of findings) {
    const el = elementFor(index, f.location);
    if (f.code === "missing-field" && el && quiet(f, el)) {
      waiting.push({ f, el });
      continue;
    }
    shown.push({ f, el });
  }
  const order = { error: 0, warning: 1, information: 2 };
  shown.sort((a, b) => (order[a.f.severity] ?? 3) - (order[b.f.severity] ?? 3));
  for (const { f: raw, el } of shown) {
    const id = `finding-${++serial}`;
    const f = { ...raw, ...clinical(raw, el) };
    if (el) {
      const box = document.createElement("div");
      box.className = `finding-inline sev-${f.severity}`;
      box.id = id;
      box.dataset.code = f.code;
      box.dataset.location = f.location;
      const msg = document.createElement("p");
      msg.className = "finding-message";
      msg.append(badge(f.severity), " ", f.message);
      box.append(msg);
      const detail = detailLine(f);
      if (detail) box.append(detail);
      holder(el).append(box);
      const target = described(el);
      addDescribedBy(target, id);
      if (f.severity === "error") target.setAttribute("aria-invalid", "true");
      holder(el).classList.add(f.severity === "error" ? "has-error" : "has-warning");
    }
    items.push({ f: raw, el });
  }
  // The summary is a live region: rebuild it only when what it says has changed, so that
  // screen readers hear new findings, not the same list after every pause in typing.
  const signature = JSON.stringify([
    shown.map(({ f, el }) => [f.severity, f.code, f.location, f.message, Boolean(el)]),
    waiting.map(({ f }) => f.location),
  ]);
  if (list.dataset.signature !== signature) {
    list.dataset.signature = signature;
    list.replaceChildren(...items.map(({ f, el }) => summaryItem(f, el, form)));
    const needList = stillNeeded.querySelector("ul");
    needList.replaceChildren(...waiting.map(({ el }) => {
      const li = document.createElement("li");
      li.textContent = describe(el);
      return li;
    }));
  }
  stillNeeded.hidden = waiting.length === 0;
  stillNeeded.querySelector("summary").textContent =
    `Still to fill before saving: ${waiting.length} ${waiting.length === 1 ? "entry" : "entries"}`;
  const count = (s) => shown.filter((x) => x.f.severity === s).length;
  return { errors: count("error"), warnings: count("warning"), notes: count("information"), waiting: waiting.length };
}
