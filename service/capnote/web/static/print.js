// The one-page printed summary: what was done, what capnote found and what to book, with the
// caution. Built from the note in the form and the last answer of the server.

import { fromInstant, formatCalendarDay, formatMoment } from "./time.js";
import { derivedRows, dueWords, num, riskReasonWords } from "./panel.js";

const WORDS = {
  applanation: "applanation", rebound: "rebound", "non-contact": "non-contact", other: "other",
  "posterior-offset": "posterior offset", "manual-behind-capsule": "focused by hand behind the capsule",
  complete: "complete opening", partial: "partial opening", failed: "no opening made",
  bag: "in the bag", sulcus: "in the sulcus", before: "before", after: "after", both: "before and after",
  "iol-pit": "IOL pits or marks", "iris-bleeding": "iris bleeding", "iop-spike": "IOP spike",
  "vitreous-in-anterior-chamber": "vitreous in the anterior chamber",
  bleeding: "bleeding, not from the iris", "anterior-uveitis": "anterior uveitis",
  "cystoid-macular-oedema": "cystoid macular oedema", "retinal-detachment": "retinal detachment",
  "iol-decentration": "IOL decentred", "iol-dislocation": "IOL dislocated",
  fibrous: "fibrous", pearl: "pearls", mixed: "mixed fibrosis and pearls",
  "reduced-vision": "reduced vision", glare: "glare", "reduced-contrast": "reduced contrast",
  "monocular-diplopia": "double vision in this eye alone",
  "single-pulse": "single pulse", burst: "burst", written: "written", verbal: "verbal",
};
const RISKS = {
  high_myopia: "high myopia", uveitis: "uveitis", diabetic_macular_oedema: "diabetic macular oedema",
  retinal_detachment_this_eye: "RD before, this eye", retinal_detachment_fellow_eye: "RD, other eye",
  lattice_degeneration: "lattice degeneration", vitreous_loss_at_cataract_surgery: "vitreous loss at cataract surgery",
};

function el(tag, className, ...children) {
  const n = document.createElement(tag);
  if (className) n.className = className;
  for (const c of children) if (c !== null && c !== undefined) n.append(c);
  return n;
}

function dl(pairs) {
  const list = el("dl", "p-dl");
  for (const [k, v, note] of pairs) {
    if (v === null || v === undefined || v === "") continue;
    list.append(el("div", null, el("dt", null, k),
      el("dd", null, el("b", null, String(v)), note ? el("span", "p-note", ` ${note}`) : null)));
  }
  return list;
}

const NOTATIONS = { "snellen-metric": "Snellen, metres", "snellen-imperial": "Snellen, feet",
  decimal: "decimal", logmar: "logMAR", qualitative: "qualitative" };

function block(title, ...content) {
  return el("section", "p-block", el("h2", null, title), ...content);
}

const CORRECTIONS = { "best-corrected": "best corrected", habitual: "habitual correction",
  uncorrected: "uncorrected", pinhole: "pinhole" };
const ROUTES = { topical: "eye drop", oral: "by mouth", intravenous: "intravenous" };

/** Where a finding points, in words, for the places the print cannot show beside a field. */
function findingPlace(location) {
  const m = /^result\.iop_after\[(\d+)\]/.exec(location || "");
  if (m) return `IOP reading ${Number(m[1]) + 1} after the laser`;
  const t = /^result\.pressure_treatment\[(\d+)\]/.exec(location || "");
  if (t) return `treatment ${Number(t[1]) + 1} for raised IOP`;
  if ((location || "").startsWith("result.discharge")) return "discharge";
  if ((location || "").startsWith("before.risk_factors")) return "risk factors";
  return null;
}

const w = (code) => (code === undefined || code === null ? null : WORDS[code] || code);
const yes = (v) => (v === true ? "yes" : v === false ? "no" : null);
const said = (v) => yes(v) ?? "not recorded";
// A date of birth without the weekday: "12 Mar 1950".
const born = (day) => (day ? formatCalendarDay(day, true).replace(/^\S+ /, "") : null);

/** "Signed by ... at ...", and for a version after the first, which version and why. */
function signedLine(stored, zone) {
  if (!stored) return null;
  const parts = [];
  if (stored.signed) parts.push(`Signed by ${stored.signed.by}${stored.signed.staff_identifier ? ` (${stored.signed.staff_identifier.value})` : ""}${stored.signed.at ? ` at ${formatMoment(stored.signed.at, zone)}` : " (in the sending system; time not sent)"}`);
  else if (stored.status === "draft") parts.push("Not signed");
  if (stored.version > 1 && stored.reason) parts.push(`version ${stored.version}: ${stored.status === "void" ? "voided" : "amended"}, reason: ${stored.reason}`);
  return parts.length ? el("p", "p-signed", parts.join(" · ")) : null;
}

export function renderPrint(section, { note, view, findings: open, zone, stored, svg, caution }) {
  const time = (iso) => (iso ? fromInstant(iso, zone)?.time : null);
  const start = note.started_at ? fromInstant(note.started_at, zone) : null;
  const b = note.before || {};
  const l = note.laser || {};
  const r = note.result || {};
  const p = note.plan || {};
  const d = view && view.derived;
  const va = (x) => (x ? `${x.value || "?"} (${NOTATIONS[x.notation] || "notation?"}, ${x.correction ? CORRECTIONS[x.correction] || x.correction : "correction not recorded"})` : null);

  const who = note.patient_details || {};
  // The treated eye, large at the top: the first thing anyone reading the print sees.
  const eye = el("p", "p-eye", note.eye ? `${note.eye.toUpperCase()} EYE` : "EYE NOT RECORDED");
  const head = el("header", "p-head",
    el("div", "p-head-text",
      el("h1", null, "Nd:YAG posterior capsulotomy: session summary"),
      who.name ? el("p", "p-patient", el("b", null, who.name),
        who.birth_date ? `, born ${born(who.birth_date)}` : "",
        note.patient?.value ? ` · patient ID ${note.patient.value}` : "") : null,
      el("p", null, [
        stored ? `${stored.status === "final" ? "Signed final" : stored.status === "void" ? "VOID (entered in error)" : "Draft"}, version ${stored.version}, record ${stored.id}` : "Not stored yet: this print is not a record",
        `printed ${formatMoment(new Date().toISOString(), zone)}`,
      ].join(" · ")),
      signedLine(stored, zone)),
    eye);
  const voided = stored?.status === "void";

  const consent = note.consent?.given === undefined ? null
    : `${yes(note.consent.given)}${note.consent.kind ? `, ${w(note.consent.kind)}` : ""}`;
  const patient = block("Patient and eye", dl([
    ["Name", who.name], ["Date of birth", born(who.birth_date)],
    ["Patient ID", note.patient?.value], ["Visit", note.encounter?.value],
    ["Eye", note.eye ? `${note.eye} eye` : null],
    ["Session", start ? `${formatCalendarDay(start.day, true)}, ${start.time}${note.ended_at ? `–${time(note.ended_at)}` : ""}` : null],
    ["Clinician", note.performer?.name], ["Assistant", note.assistant], ["Place", note.location?.name],
    ["Consent", consent],
  ]));

  // Three ways: present, recorded absent, not recorded (never read as absent).
  const rf = b.risk_factors || {};
  const risks = Object.entries(RISKS).filter(([k]) => rf[k] === true).map(([, v]) => v);
  const unknown = Object.entries(RISKS).filter(([k]) => rf[k] === undefined || rf[k] === null).map(([, v]) => v);
  if (rf.glaucoma && rf.glaucoma !== "none") risks.unshift(`glaucoma (${rf.glaucoma})`);
  if (rf.glaucoma === undefined || rf.glaucoma === null) unknown.unshift("glaucoma");
  const optic = b.iol?.optic_diameter_mm;
  const ind = note.indication || {};
  const symptoms = (ind.symptoms || []).map(w);
  const before = block("Before the laser", dl([
    ["Opacification", w(ind.opacification)],
    ["Symptoms", symptoms.length || ind.symptoms_text ? `${symptoms.join(", ")}${ind.symptoms_text ? `${symptoms.length ? "; " : ""}${ind.symptoms_text}` : ""}` : null],
    ["IOP", b.iop?.value_mmhg !== undefined ? `${num(b.iop.value_mmhg)} mmHg (${w(b.iop.method) || "method?"})` : null],
    ["Visual acuity", va(b.visual_acuity)], ["Pupil dilated", yes(b.pupil_dilated)],
    ["Dilating drops", (b.dilating_drops || []).length ? b.dilating_drops.join("; ") : null],
    ["Anaesthetic", b.topical_anaesthetic],
    ["IOL", `${typeof optic === "number" ? `${num(optic, 2)} mm optic` : "optic diameter not recorded"}${b.iol?.optic_material ? `, ${b.iol.optic_material}` : ""}, ${b.iol?.position ? w(b.iol.position) : "position not recorded"}`],
    ["Cataract surgery", b.cataract_surgery_date ? formatCalendarDay(b.cataract_surgery_date, true) : null],
    ["Risk factors", risks.length ? risks.join(", ") : unknown.length ? "none recorded as present" : "none"],
    ["Not recorded", unknown.length ? unknown.join(", ") : null],
    ["Axial length", b.risk_factors?.axial_length_mm !== undefined ? `${num(b.risk_factors.axial_length_mm, 2)} mm` : null],
  ]));

  const series = el("table", "p-table");
  series.append(el("thead", null, el("tr", null, el("th", null, "Setting"), el("th", null, "Energy per pulse"), el("th", null, "Pulses"), el("th", null, "Energy"))));
  const body = el("tbody");
  (l.series || []).forEach((s, i) => {
    const e = typeof s.energy_mj === "number" && typeof s.pulses === "number" ? `${num(s.energy_mj * s.pulses, 2)} mJ` : "–";
    body.append(el("tr", null, el("td", null, String(i + 1)), el("td", null, typeof s.energy_mj === "number" ? `${num(s.energy_mj, 2)} mJ` : "–"), el("td", null, typeof s.pulses === "number" ? String(s.pulses) : "–"), el("td", null, e)));
  });
  series.append(body);
  const laser = block("Laser settings", series, dl([
    ["Total", d ? `${num(d.total_energy_mj, 2)} mJ in ${d.total_pulses} pulses` : null],
    ["Laser counter", l.reported_total_energy_mj !== undefined ? `${num(l.reported_total_energy_mj, 2)} mJ` : null],
    ["Wavelength", typeof l.wavelength_nm === "number" ? `${l.wavelength_nm} nm` : null],
    ["Pattern", l.pattern ? `${l.pattern}${l.pattern_text ? ` (${l.pattern_text})` : ""}` : null],
    ["Pulse mode", l.mode ? `${w(l.mode)}${l.mode === "burst" && l.pulses_per_burst !== undefined ? `, ${l.pulses_per_burst} pulses per burst` : ""}` : null],
    // Micrometres, as the laser shows the offset (the note stores millimetres).
    ["Focus", l.focus ? `${w(l.focus.method)}${typeof l.focus.distance_mm === "number" ? `, ${num(l.focus.distance_mm * 1000, 1)} µm` : ""}` : null],
    ["Contact lens", l.contact_lens?.used === true ? ["used", l.contact_lens.lens,
      typeof l.contact_lens.magnification === "number" ? `${num(l.contact_lens.magnification, 2)}×` : null,
      l.contact_lens.cone_angle_deg !== undefined ? `cone ${num(l.contact_lens.cone_angle_deg, 0)}°` : null].filter(Boolean).join(", ")
      : yes(l.contact_lens?.used) === "no" ? "not used" : null],
  ]));

  const changes = new Map((d?.iop?.changes || []).map((c) => [c.reading_index, c.change_mmhg]));
  const readings = (r.iop_after || []).map((x, i) => `${time(x.measured_at) || "?"}: ${num(x.value_mmhg)} mmHg${changes.has(i) ? ` (${changes.get(i) >= 0 ? "+" : "−"}${num(Math.abs(changes.get(i)))})` : ""}`);
  const comps = (r.complications || []).map((c) => `${w(c.kind) || "?"}${c.on_visual_axis === true ? ", on the visual axis" : ""}${c.positions?.length ? `, ${c.positions.length} position(s)` : ""}${c.text ? ` (${c.text})` : ""}`);
  const treated = (r.pressure_treatment || []).map((x) => `${x.agent || "?"}${x.strength_percent !== undefined ? ` ${num(x.strength_percent, 2)} %` : ""} ${x.dose !== undefined ? num(x.dose, 2) : "?"} ${x.dose_unit === "drop" ? (x.dose === 1 ? "drop" : "drops") : x.dose_unit || ""}${x.route ? `, ${ROUTES[x.route] || x.route}` : ""} at ${time(x.given_at) || "?"}`);
  const result = block("Result", dl([
    ["Outcome", w(r.outcome)],
    ["Opening", r.opening?.horizontal_mm !== undefined ? `${num(r.opening.horizontal_mm, 2)}${r.opening.vertical_mm !== undefined ? ` × ${num(r.opening.vertical_mm, 2)} mm` : " mm round"}, ${r.opening.centred === false ? "not centred" : r.opening.centred === true ? "centred" : "centring not recorded"}` : null],
    ["IOP after", readings.length ? readings.join("; ") : "no reading"],
    ["IOP treatment", treated.length ? treated.join("; ") : null],
    ["Discharge", r.discharge ? `${time(r.discharge.at) || "?"}, cleared by ${r.discharge.cleared_by || "?"}${r.discharge.reason ? ` (${r.discharge.reason})` : ""}` : null],
    ["Complications", comps.length ? comps.join("; ") : "none recorded"],
    ["Visual acuity after", va(r.visual_acuity_after)],
  ]));

  const drops = (p.prophylaxis || []).map((x) => `${x.agent || "?"}${x.strength_percent !== undefined ? ` ${num(x.strength_percent, 2)} %` : ""} ${w(x.timing) || ""}`.trim());
  const home = (p.take_home || []).map((x) => `${x.agent || "?"}${x.strength_percent !== undefined ? ` ${num(x.strength_percent, 2)} %` : ""}, ${x.times_per_day ?? "?"}×/day for ${x.days ?? "?"} days`);
  const plan = block("Plan", dl([
    ["Drops in clinic", drops.length ? drops.join("; ") : "none"],
    ["Drops to take home", home.length ? home.join("; ") : "none"],
    ["RD warning signs explained", yes(p.rd_warning_given)],
    ["Further session planned", said(p.further_session_planned)],
  ]));

  const worked = block("Worked out", dl(derivedRows(d).map(([, k, v, n]) => [k, v, n])));
  const figure = el("figure", "p-figure");
  if (svg) {
    const copy = svg.cloneNode(true);
    for (const n of copy.querySelectorAll("[id]")) n.removeAttribute("id");
    copy.removeAttribute("id");
    copy.removeAttribute("aria-labelledby");
    copy.setAttribute("aria-hidden", "true");
    figure.append(copy, el("figcaption", null, "Optic, opening and pits to scale, facing the patient (patient's right on the left)."));
  }

  const findings = el("ul", "p-list");
  for (const f of open || view?.findings || []) {
    const place = findingPlace(f.location);
    const item = el("li", `sev-${f.severity}`, el("strong", null, `${f.severity}: `), f.message,
      place ? el("span", "p-note", ` (${place})`) : null,
      f.source ? el("span", "p-src", ` (source: ${f.source})`) : null);
    item.dataset.code = f.code;
    findings.append(item);
  }
  if (!findings.children.length) findings.append(el("li", null, view ? "No open findings." : "Not checked."));

  const due = el("ul", "p-list");
  for (const item of view?.due || []) {
    const words = dueWords(item, zone);
    const moved = words.lines.find((x) => x.startsWith("Moved"));
    due.append(el("li", null, el("strong", null, `${words.title}: `), words.when,
      moved ? el("span", "p-note", `. ${moved}.`) : null,
      item.flag ? el("span", "p-note", `. ${item.flag}.`) : null));
  }
  if (!due.children.length) due.append(el("li", null, "Nothing scheduled."));
  // Beside the dates: each reason the risk is raised and what it changes in them.
  const why = el("ul", "p-list p-why");
  for (const r of riskReasonWords(d) || []) {
    const item = el("li", null, el("strong", null, r.text), r.changes ? `: ${r.changes}` : "",
      r.source ? el("span", "p-src", ` (source: ${r.source})`) : null);
    item.dataset.code = r.code;
    why.append(item);
  }
  // A voided note books nothing: its follow-up belonged to a record entered in error.
  const dueBlock = voided
    ? block("Follow-up", el("p", "p-void-note", "Nothing to book: this note was entered in error."))
    : why.children.length
      ? block("Follow-up to book", due, el("p", "p-why-title", "Raised risk, which sets these dates:"), why)
      : block("Follow-up to book", due);

  section.classList.toggle("p-voided", voided);
  section.replaceChildren(
    ...(voided ? [el("p", "p-void", "ENTERED IN ERROR — NOT FOR CLINICAL USE"),
      el("p", "p-void-page", "ENTERED IN ERROR — NOT FOR CLINICAL USE")] : []),
    head,
    el("div", "p-grid", patient, before, laser, result, plan, el("div", "p-side", worked, figure)),
    el("div", "p-bottom", block("Findings", findings), dueBlock),
    el("p", "p-caution", caution));
}
