// Findings in the clinic's words. The API keeps the precise technical finding (code, JSON
// path, the contract's rule); the form says what to do in words of the trade: "Enter the time
// the laser started", not "started_at: Field required". Only the words shown change: the
// finding's code and location still tie it to its field.

import { describe } from "./noteform.js";

// What a field is, said as the object of "Enter ..." or "Choose ...". Paths of repeated
// items are written with [] for any row.
const FIELD_WORDS = {
  "note_id": "the note number",
  "patient": "the patient ID",
  "patient.value": "the patient ID",
  "patient_details.name": "the patient's name",
  "patient_details.birth_date": "the date of birth",
  "encounter.value": "the visit number",
  "eye": "which eye was treated",
  "started_at": "the time the laser started",
  "ended_at": "the time the laser finished",
  "consent": "whether consent was given",
  "consent.given": "whether consent was given",
  "consent.recorded_at": "the time consent was recorded",
  "performer": "the treating clinician and their staff ID",
  "performer.name": "the treating clinician",
  "performer.identifier": "the clinician's staff ID",
  "performer.identifier.value": "the clinician's staff ID",
  "location": "the place (unit and room)",
  "location.name": "the place (unit and room)",
  "before": "the findings before the laser",
  "before.iop": "the IOP before the laser",
  "before.iop.value_mmhg": "the IOP before the laser",
  "before.iop.method": "the tonometry used before the laser",
  "before.iop.measured_at": "the time the IOP was measured",
  "before.iol": "the IOL details",
  "before.risk_factors": "the risk factors",
  "before.risk_factors.glaucoma": "the glaucoma status",
  "laser": "the laser settings",
  "laser.series": "at least one laser setting",
  "laser.series[].energy_mj": "the energy per pulse",
  "laser.series[].pulses": "the number of pulses",
  "laser.pattern": "the opening pattern",
  "laser.focus": "the focus",
  "laser.contact_lens": "whether a contact lens was used",
  "result": "the result",
  "result.outcome": "the outcome of the laser",
  "result.opening": "the size of the opening",
  "result.iop_after[].value_mmhg": "the IOP after the laser",
  "result.iop_after[].measured_at": "the time of the IOP reading",
  "result.iop_after[].method": "the tonometry of the reading",
  "plan": "the plan",
  "plan.rd_warning_given": "whether the warning signs of retinal detachment were explained",
  "reason": "the reason for the change",
};

// Whole messages where the field alone does not say why it is needed.
const WHOLE = {
  "missing-field reason": "Enter the reason for the change: a signed note is changed only with a reason, and every version is kept.",
};

// Numbering systems are the site's, never typed: a missing one is for the administrator.
const SYSTEMS = {
  "patient.system": ["patient IDs", "CAPNOTE_PATIENT_ID_SYSTEM"],
  "encounter.system": ["visit numbers", "CAPNOTE_VISIT_ID_SYSTEM"],
  "performer.identifier.system": ["staff IDs", "CAPNOTE_STAFF_ID_SYSTEM"],
};

// Codes of the contract's own findings (capnote.rules.contract): their rule names the schema
// file, which means nothing at the laser, so the form shows what to do instead.
const CONTRACT = new Set(["missing-field", "unknown-field", "json-invalid", "wrong-type",
  "code-not-allowed", "date-invalid", "datetime-invalid", "datetime-no-offset",
  "number-not-finite", "wrong-length", "wrong-format", "invalid-value"]);

function generic(path) {
  return (path || "").replace(/\[\d+\]/g, "[]");
}

function capital(text) {
  return text ? text.charAt(0).toUpperCase() + text.slice(1) : text;
}

/** The date pattern the browser shows in its date fields (its locale), e.g. dd/mm/yyyy. */
export function datePattern() {
  const parts = new Intl.DateTimeFormat(undefined, { day: "2-digit", month: "2-digit", year: "numeric" })
    .formatToParts(new Date(2026, 10, 27));
  const pattern = parts.map((p) => ({ day: "dd", month: "mm", year: "yyyy" }[p.type] || p.value)).join("");
  const example = parts.map((p) => p.value).join("");
  return { pattern, example };
}

/** What the finding's field is, in words. */
function what(f, el) {
  const known = FIELD_WORDS[generic(f.location)];
  if (known) return known;
  const label = el ? describe(el) : "";
  if (label) return `“${label}”`;
  return "this entry";
}

function isChoice(el) {
  return Boolean(el && (el.tagName === "SELECT" || el.type === "radio" || el.type === "checkbox"
    || el.tagName === "FIELDSET"));
}

function isTime(el) {
  return Boolean(el && (el.type === "time"));
}

/** Paths inside a rule's message ("started_at lies in the future") said as words. */
function wordsForPaths(text) {
  return text.replace(/\b[a-z_]+(?:\[\d+\])?(?:\.[a-z_]+(?:\[\d+\])?)*\b/g, (token) => {
    if (!/[._]/.test(token)) return token;
    const words = FIELD_WORDS[generic(token)];
    return words || token;
  });
}

/**
 * A finding as the form shows it: {message, rule, allowed, source}. Contract findings get
 * an instruction instead of the schema's words; rule findings keep their clinical text, with
 * any field path said as words.
 */
export function clinical(f, el) {
  const path = generic(f.location);
  const system = SYSTEMS[path];
  if (system) {
    return { message: `This site has not set the numbering system for ${system[0]}, so the note cannot name them. Ask the administrator to set ${system[1]}.`, rule: null, allowed: null, source: null };
  }
  const whole = WHOLE[`${f.code} ${path}`];
  if (whole) return { message: whole, rule: null, allowed: null, source: null };
  if (!CONTRACT.has(f.code)) {
    return { message: wordsForPaths(f.message || ""), rule: f.rule ? wordsForPaths(f.rule) : null, allowed: f.allowed, source: f.source };
  }
  const thing = what(f, el);
  if (path === "started_at" && f.code === "missing-field") {
    // One instant from two fields: name the one that is empty.
    const root = el?.closest("form");
    const day = root?.querySelector("[data-kind=session-date]")?.value;
    const time = root?.querySelector("[data-kind=session-time]")?.value;
    const message = day && !time ? "Enter the time the laser started."
      : time && !day ? "Enter the session date." : "Enter the session date and the time the laser started.";
    return { message, rule: null, allowed: null, source: null };
  }
  let message;
  switch (f.code) {
    case "missing-field":
      message = isChoice(el) ? `Choose ${thing}.` : `Enter ${thing}.`;
      break;
    case "date-invalid": {
      const { pattern, example } = datePattern();
      message = `Enter ${thing} as a date that exists, ${pattern} (for example ${example}).`;
      break;
    }
    case "datetime-invalid":
    case "datetime-no-offset":
      message = isTime(el) || path === "started_at"
        ? `Enter ${thing} as a time of the session day, hh:mm (for example 10:05).`
        : `Enter ${thing} as a date and time that exist.`;
      break;
    case "code-not-allowed":
      message = `Choose ${thing} from the options offered.`;
      break;
    case "wrong-type":
    case "number-not-finite":
      message = /whole number/.test(f.rule || "")
        ? `Enter ${thing} as a whole number.`
        : /number/.test(f.rule || "")
          ? `Enter ${thing} as a number.`
          : /true or false/.test(f.rule || "")
            ? `Choose yes or no for ${thing}.`
            : `Check ${thing}: it is not in the form the note needs.`;
      break;
    case "wrong-length": {
      const most = /to (\d+)/.exec(f.allowed || "");
      message = most ? `Shorten ${thing} to at most ${most[1]} characters.` : `Check the length of ${thing}.`;
      break;
    }
    case "wrong-format":
      message = `Check ${thing}: no line breaks or control characters, and no spaces in numbers or IDs.`;
      break;
    case "unknown-field":
      message = "The note holds a part this form does not know; it cannot be saved from here. Ask the integration team.";
      break;
    default:
      message = `Check ${thing}.`;
  }
  return { message: capital(message), rule: null, allowed: null, source: null };
}
