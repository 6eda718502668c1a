// A to-scale drawing of the IOL optic, the capsule opening and any IOL pits, as seen facing
// the patient (the examiner's view at the slit lamp): the patient's right is on the left of
// the drawing. One SVG user unit is one millimetre; lines keep their width at any size.

const NS = "http://www.w3.org/2000/svg";

function node(tag, attrs = {}, text) {
  const n = document.createElementNS(NS, tag);
  for (const [k, v] of Object.entries(attrs)) n.setAttribute(k, String(v));
  if (text !== undefined) n.textContent = text;
  return n;
}

function mm(value) {
  return new Intl.NumberFormat("en-GB", { maximumFractionDigits: 2 }).format(value);
}

function inside(p, h, v) {
  if (!h) return false;
  const a = h / 2;
  const b = (v || h) / 2;
  return (p.x * p.x) / (a * a) + (p.y * p.y) / (b * b) <= 1;
}

/** Redraw; returns the words that describe the drawing (also its <desc>). */
export function draw(svg, { optic, h, v, centred, pits, eye, guide }) {
  const title = svg.querySelector("title");
  const desc = svg.querySelector("desc");
  svg.replaceChildren(title, desc);
  // optic: the optic's diameter, or null when not recorded (then it is not drawn at all).
  const reach = Math.max((optic || 0) / 2, (h || 0) / 2, (v || 0) / 2, guide / 2,
    ...pits.map((p) => Math.max(Math.abs(p.x), Math.abs(p.y))));
  const e = Math.ceil((reach + 1.3) * 2) / 2; // half-width of the view, in mm
  svg.setAttribute("viewBox", `${-e} ${-e} ${2 * e} ${2 * e}`);
  const fs = e * 0.085;

  // The optic, with the opacified capsule over it.
  if (optic) svg.append(node("circle", { cx: 0, cy: 0, r: optic / 2, class: "d-optic" }));
  if (h) {
    svg.append(node("ellipse", { cx: 0, cy: 0, rx: h / 2, ry: (v || h) / 2,
      class: centred === false ? "d-opening d-uncentred" : "d-opening" }));
  }
  // The optic's edge again on top, so an opening larger than the optic shows its overhang.
  if (optic) svg.append(node("circle", { cx: 0, cy: 0, r: optic / 2, class: "d-optic-edge" }));
  svg.append(node("circle", { cx: 0, cy: 0, r: guide / 2, class: "d-guide" }));
  const t = 0.35;
  svg.append(node("line", { x1: -t, y1: 0, x2: t, y2: 0, class: "d-axis" }));
  svg.append(node("line", { x1: 0, y1: -t, x2: 0, y2: t, class: "d-axis" }));

  pits.forEach((p, i) => {
    const g = node("g", { class: "d-pit" });
    // x is to the patient's right, which is the drawing's left; y is up, SVG's y is down.
    g.append(node("circle", { cx: -p.x, cy: -p.y, r: Math.max(0.1, e * 0.022) }));
    g.append(node("text", { x: -p.x + fs * 0.6, y: -p.y - fs * 0.4, "font-size": fs }, String(i + 1)));
    svg.append(g);
  });

  const sideRight = eye === "right" ? "temporal" : eye === "left" ? "nasal" : "";
  const sideLeft = eye === "right" ? "nasal" : eye === "left" ? "temporal" : "";
  const label = (x, y, text, anchor) =>
    svg.append(node("text", { x, y, "font-size": fs, "text-anchor": anchor, class: "d-label" }, text));
  label(-e + fs * 0.4, -e + fs * 1.3, "patient's R", "start");
  label(e - fs * 0.4, -e + fs * 1.3, "patient's L", "end");
  if (sideRight) {
    label(-e + fs * 0.4, -e + fs * 2.5, sideRight, "start");
    label(e - fs * 0.4, -e + fs * 2.5, sideLeft, "end");
  }
  label(0, -e + fs * 1.3, "up", "middle");
  // Scale bar: 1 mm.
  const y = e - fs * 1.1;
  const x0 = -e + fs * 0.5;
  svg.append(node("line", { x1: x0, y1: y, x2: x0 + 1, y2: y, class: "d-scale" }));
  svg.append(node("line", { x1: x0, y1: y - 0.12, x2: x0, y2: y + 0.12, class: "d-scale" }));
  svg.append(node("line", { x1: x0 + 1, y1: y - 0.12, x2: x0 + 1, y2: y + 0.12, class: "d-scale" }));
  svg.append(node("text", { x: x0 + 1 + fs * 0.4, y: y + fs * 0.35, "font-size": fs, class: "d-label" }, "1 mm"));

  const words = [optic ? `IOL optic ${mm(optic)} mm across.` : "The size of the IOL optic is not recorded: the optic is not drawn."];
  if (h) {
    const shape = v && v !== h ? `${mm(h)} mm wide and ${mm(v)} mm high` : `${mm(h)} mm round`;
    const ratio = optic ? `, widest diameter ${mm(Math.max(h, v || 0) / optic)} of the optic diameter (diameter ratio)` : "";
    const where = centred === true ? "recorded as centred"
      : centred === false ? "recorded as not centred (drawn at the centre: its offset is not recorded)"
        : "centring not recorded (drawn at the centre)";
    words.push(`Opening ${shape}${ratio}, ${where}.`);
  } else {
    words.push("No opening size entered yet.");
  }
  if (pits.length) {
    for (const [i, p] of pits.entries()) {
      const where = inside(p, h, v) ? "inside the opening" : "outside the opening";
      words.push(`Pit ${i + 1}: ${mm(Math.abs(p.x))} mm to the patient's ${p.x >= 0 ? "right" : "left"}, ${mm(Math.abs(p.y))} mm ${p.y >= 0 ? "up" : "down"}, ${where}.`);
    }
  } else {
    words.push("No IOL pits recorded.");
  }
  desc.textContent = words.join(" ");
  return words.join(" ");
}
