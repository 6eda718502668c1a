// Clinic time: the form's dates and times are the clinic's wall-clock time (the zone named by
// /web/defaults), whatever zone the browser itself is set to.

const PARTS = { hourCycle: "h23", year: "numeric", month: "2-digit", day: "2-digit",
  hour: "2-digit", minute: "2-digit", second: "2-digit" };

function wallClock(zone, ms) {
  const out = {};
  for (const p of new Intl.DateTimeFormat("en-GB", { ...PARTS, timeZone: zone }).formatToParts(ms)) {
    out[p.type] = p.value;
  }
  return out;
}

/** Minutes the zone is ahead of UTC at this instant. */
function offsetMinutes(zone, ms) {
  const w = wallClock(zone, ms);
  const asUtc = Date.UTC(+w.year, +w.month - 1, +w.day, +w.hour % 24, +w.minute, +w.second);
  return Math.round((asUtc - Math.floor(ms / 1000) * 1000) / 60000);
}

function two(n) { return String(Math.abs(n)).padStart(2, "0"); }

/** "2026-11-27" + "10:05" in the zone -> "2026-11-27T10:05:00+00:00"; null when incomplete. */
export function toInstant(day, time, zone) {
  const d = /^(\d{4})-(\d{2})-(\d{2})$/.exec(day || "");
  const t = /^(\d{2}):(\d{2})(?::(\d{2}))?/.exec(time || "");
  if (!d || !t) return null;
  const guess = Date.UTC(+d[1], +d[2] - 1, +d[3], +t[1], +t[2], +(t[3] || 0));
  let offset = offsetMinutes(zone, guess);
  const second = offsetMinutes(zone, guess - offset * 60000);
  if (second !== offset) offset = second; // the guess sat on the other side of a clock change
  const sign = offset < 0 ? "-" : "+";
  const seconds = t[3] || "00";
  return `${day}T${t[1]}:${t[2]}:${seconds}${sign}${two(Math.trunc(offset / 60))}:${two(offset % 60)}`;
}

/** An ISO instant -> the clinic's {day: "YYYY-MM-DD", time: "HH:MM"}. */
export function fromInstant(iso, zone) {
  const ms = Date.parse(iso);
  if (Number.isNaN(ms)) return null;
  const w = wallClock(zone, ms);
  const seconds = w.second === "00" ? "" : `:${w.second}`;
  return { day: `${w.year}-${w.month}-${w.day}`, time: `${w.hour}:${w.minute}${seconds}` };
}

function pick(parts) {
  const out = {};
  for (const p of parts) out[p.type] = p.value;
  return out;
}

/** "Tue 29 Dec 2026" for a day (all-day items) in the zone. */
export function formatDay(iso, zone) {
  const p = pick(new Intl.DateTimeFormat("en-GB", { timeZone: zone, weekday: "short",
    day: "2-digit", month: "short", year: "numeric" }).formatToParts(Date.parse(iso)));
  return `${p.weekday} ${p.day} ${p.month} ${p.year}`;
}

/** "Fri 27 Nov 2026, 11:15 GMT" in the zone. */
export function formatMoment(iso, zone) {
  const p = pick(new Intl.DateTimeFormat("en-GB", { timeZone: zone, weekday: "short",
    day: "2-digit", month: "short", year: "numeric", hour: "2-digit", minute: "2-digit",
    hourCycle: "h23", timeZoneName: "short" }).formatToParts(Date.parse(iso)));
  return `${p.weekday} ${p.day} ${p.month} ${p.year}, ${p.hour}:${p.minute} ${p.timeZoneName}`;
}

/** A calendar date "2026-12-25" (no zone: it is already the clinic's day) -> "Fri 25 Dec". */
export function formatCalendarDay(day, withYear = false) {
  const m = /^(\d{4})-(\d{2})-(\d{2})$/.exec(day || "");
  if (!m) return day;
  const ms = Date.UTC(+m[1], +m[2] - 1, +m[3], 12);
  const p = pick(new Intl.DateTimeFormat("en-GB", { timeZone: "UTC", weekday: "short",
    day: "2-digit", month: "short", year: "numeric" }).formatToParts(ms));
  return withYear ? `${p.weekday} ${p.day} ${p.month} ${p.year}` : `${p.weekday} ${p.day} ${p.month}`;
}

/** Today's date in the zone, "YYYY-MM-DD". */
export function today(zone) {
  return fromInstant(new Date().toISOString(), zone).day;
}
