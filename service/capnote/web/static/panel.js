// The side panel: what capnote worked out from the note, and the follow-up it would book.

import { formatDay, formatMoment, formatCalendarDay } from "./time.js";

export function num(value, digits = 1) {
  if (value === null || value === undefined || Number.isNaN(value)) return "–";
  return new Intl.NumberFormat("en-GB", { maximumFractionDigits: digits }).format(value);
}

function signed(value, digits = 1) {
  return `${value > 0 ? "+" : value < 0 ? "−" : "±"}${num(Math.abs(value), digits)}`;
}

function el(tag, className, ...children) {
  const node = document.createElement(tag);
  if (className) node.className = className;
  for (const c of children) if (c !== null && c !== undefined) node.append(c);
  return node;
}

function item(key, value, note, name) {
  const div = el("div", null, el("dt", null, key), el("dd", null, value, note ? el("span", "sub", note) : null));
  if (name) div.dataset.derived = name;
  return div;
}

const GRADE_WORDS = { none: "none", mild: "mild", moderate: "moderate", severe: "severe" };

/** Derived values as a list of [name, term, value, note] rows (also used by the print view). */
export function derivedRows(d) {
  if (!d) return [];
  const rows = [];
  rows.push(["total-energy", "Total energy", `${num(d.total_energy_mj, 2)} mJ in ${d.total_pulses} pulses`,
    `mean ${num(d.mean_pulse_energy_mj, 2)} mJ, highest ${num(d.highest_pulse_energy_mj, 2)} mJ per pulse; band ${d.energy_band.label}`]);
  const c = d.cumulative;
  rows.push(["cumulative", "This eye so far", `${num(c.cumulative_energy_mj, 2)} mJ over ${c.session_number} ${c.session_number === 1 ? "session" : "sessions"}`,
    c.days_since_last_session === null ? "no earlier session stored" : `${c.days_since_last_session} days since the last session`]);
  const iop = d.iop;
  const h = iop.highest;
  rows.push(["spike", "IOP after the laser", h ? `highest change ${signed(h.change_mmhg)} mmHg` : "no reading after the laser yet",
    h ? `spike grade: ${GRADE_WORDS[iop.spike_grade] || iop.spike_grade}${h.minutes_after !== null ? `, ${num(h.minutes_after, 0)} min after the laser` : ""}` : null]);
  if (d.opening) {
    // ratio_to_optic is a diameter ratio (widest axis over the optic's diameter), absent or
    // null when the optic diameter is not recorded.
    const ratio = d.opening.ratio_to_optic;
    const round = d.opening.round_assumed ? "; one diameter measured, area as a round opening" : "";
    rows.push(["opening", "Opening", `${num(d.opening.area_mm2, 1)} mm²`,
      `widest diameter ${num(d.opening.largest_mm, 2)} mm; ${typeof ratio === "number"
        ? `diameter ratio ${num(ratio, 2)} of the optic diameter`
        : "diameter ratio not worked out: the optic diameter is not recorded"}${round}`]);
  }
  const a = d.acuity;
  if (a.before_logmar !== null || a.after_logmar !== null) {
    rows.push(["acuity", "Visual acuity (logMAR)", `${num(a.before_logmar, 2)} before, ${num(a.after_logmar, 2)} after`,
      a.change_logmar === null ? null : `change ${signed(a.change_logmar, 2)} (negative is better)`]);
  }
  if (d.days_since_cataract_surgery !== null && d.days_since_cataract_surgery !== undefined) {
    rows.push(["since-surgery", "Since cataract surgery", `${d.days_since_cataract_surgery} days`, null]);
  }
  const f = d.focal_spot;
  rows.push(["fluence", "Focal spot (idealised)", `about ${new Intl.NumberFormat("en-GB", { maximumSignificantDigits: 3 }).format(f.peak_fluence_j_cm2)} J/cm² peak fluence`,
    `idealised diffraction-limited estimate, not a measurement: spot ${num(f.airy_diameter_um, 1)} µm across at ${num(f.cone_angle_deg, 0)}° cone angle${f.cone_angle_assumed ? " (assumed)" : ""}`]);
  rows.push(["risk", "Risk level", d.risk.level === "raised" ? "raised" : "routine",
    d.risk.reasons.length ? d.risk.reasons.map((r) => r.text).join("; ") : "no raised-risk reason"]);
  return rows;
}

export function showDerived(dl, derived) {
  dl.replaceChildren();
  const rows = derivedRows(derived);
  if (!rows.length) {
    dl.append(item("Nothing yet", "Values appear once the note has no errors."));
    return;
  }
  for (const [name, term, value, note] of rows) {
    const row = item(term, value, note, name);
    if (name === "risk" && derived.risk.level === "raised") row.classList.add("raised");
    if (name === "spike" && ["moderate", "severe"].includes(derived.iop.spike_grade)) row.classList.add("raised");
    dl.append(row);
  }
}

/** One due item in words: [title, when, extra lines]. */
export function dueWords(d, zone) {
  const fmt = d.all_day ? (iso) => formatDay(iso, zone) : (iso) => formatMoment(iso, zone);
  const lines = [];
  lines.push(`Window ${fmt(d.earliest)} to ${fmt(d.latest)}`);
  if (d.moved_from) {
    const passed = (d.passed_over || []).map((p) => `${formatCalendarDay(p.day)} (${p.reason})`);
    // The server says which way it moved; nothing is assumed from what was passed over.
    const way = d.moved_direction === "earlier" ? "earlier" : "later";
    lines.push(passed.length
      ? `Moved ${way} from ${fmt(d.moved_from)}: the clinic is closed on ${passed.join(", ")}`
      : `Moved ${way} from ${fmt(d.moved_from)}: outside clinic hours`);
  }
  if (d.earliest_from) {
    lines.push(`Window starts at opening time; ${fmt(d.earliest_from)} is outside clinic hours`);
  }
  // The flag already says "book this by hand"; shown as the server wrote it.
  if (d.flag) lines.push(`${d.flag.charAt(0).toUpperCase()}${d.flag.slice(1)}`);
  if (d.done_by_reading !== null && d.done_by_reading !== undefined) {
    lines.push(`Already done: IOP reading ${d.done_by_reading + 1} after the laser covers it`);
  }
  if (d.reasons && d.reasons.length) lines.push(`Why: ${d.reasons.join("; ")}`);
  return { title: d.title, when: fmt(d.target), lines, source: d.source };
}

export function showDue(list, due, zone) {
  list.replaceChildren();
  if (!due || !due.length) {
    list.append(el("li", "muted", "Nothing to book until the note can be read."));
    return;
  }
  for (const d of due) {
    const w = dueWords(d, zone);
    const li = el("li", `due${d.moved_from ? " moved" : ""}${d.flag ? " flagged" : ""}`);
    li.dataset.kind = d.kind;
    li.append(el("p", "due-title", el("strong", null, w.title)), el("p", "due-when", w.when));
    for (const line of w.lines) {
      const p = el("p", line.startsWith("Moved") ? "due-moved" : "due-line", line);
      li.append(p);
    }
    if (w.source) li.append(el("p", "due-source", `Source: ${w.source}`));
    list.append(li);
  }
}

/**
 * Why the follow-up is what it is: each reason the risk is raised, with what it changes
 * (from the site policy) and where that comes from. Shown under the due dates.
 */
export function riskReasonWords(derived) {
  if (!derived || !derived.risk) return null;
  return (derived.risk.reasons || []).map((r) => ({
    code: r.code, text: r.text, changes: r.changes || "", source: r.source || "",
  }));
}

export function showRiskReasons(list, derived) {
  list.replaceChildren();
  const reasons = riskReasonWords(derived);
  const box = list.closest(".risk-why");
  if (box) box.hidden = reasons === null;
  if (reasons === null) return;
  if (!reasons.length) {
    // Routine follow-up: no recorded factor raises the risk (one not recorded is no reason).
    list.append(el("li", "muted", "Routine risk: nothing recorded in the note changes the follow-up."));
    return;
  }
  for (const r of reasons) {
    const li = el("li", "risk-why-item");
    li.dataset.code = r.code;
    li.append(el("p", "risk-why-text", el("strong", null, r.text), r.changes ? `: ${r.changes}` : ""));
    if (r.source) {
      li.append(el("p", "due-source", `Source: ${r.source}`));
    }
    list.append(li);
  }
}
