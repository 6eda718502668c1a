// Numbers as clinicians type them. The clinic may write a decimal comma ("0,8") as well as a
// decimal point ("0.8"); both mean eight tenths. The fields are plain text fields (a number
// field in some browser locales silently drops the comma and reads "0,8" as 8), so the form
// reads them here, and refuses anything it cannot read one way only.

const PLAIN = /^[+-]?(?:\d+(?:[.,]\d*)?|[.,]\d+)$/;
// "1,000" or "12,500": a comma before exactly three digits may be a thousands separator.
const GROUPED = /^[+-]?[1-9]\d{0,2},\d{3}$/;

/**
 * What a typed number means: {empty: true}, {value}, or {problem} with the words to show.
 * `whole` asks for a whole number (a count of pulses, days, minutes).
 */
export function readNumber(text, { whole = false } = {}) {
  const raw = String(text ?? "").trim().replace(/\u2212/g, "-");
  if (raw === "") return { empty: true };
  if (GROUPED.test(raw)) {
    return { problem: `“${raw}” could be read two ways (a thousands separator or a decimal comma): type it without the comma, or with a decimal point.` };
  }
  if (!PLAIN.test(raw)) {
    if (/\d[.,]\d*[.,]/.test(raw)) {
      return { problem: `“${raw}” has more than one decimal mark: type one decimal point or comma, and no thousands separators.` };
    }
    return { problem: `“${raw}” is not a number: type digits, with one decimal point or comma if needed.` };
  }
  const value = Number(raw.replace(",", "."));
  if (!Number.isFinite(value)) return { problem: `“${raw}” is not a number.` };
  if (whole && !Number.isInteger(value)) return { problem: `“${raw}”: a whole number is needed here.`, value };
  return { value };
}

/** The same number written with a decimal point, as the form shows it once read. */
export function normalised(text) {
  const raw = String(text ?? "").trim();
  const read = readNumber(raw);
  if (read.empty || read.problem) return raw;
  return raw.replace(/\u2212/g, "-").replace(",", ".").replace(/^([+-]?)[.]/, "$10.").replace(/[.]$/, "");
}
