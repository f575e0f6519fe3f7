// attnpos views — helpers shared by every widget module (prepended to each module by the Python side).
// Rule: user strings (tokens, text names, finding bodies, evidence) only ever go through textContent,
// setAttribute or canvas fillText — never innerHTML.

const AP_SVG = "http://www.w3.org/2000/svg";
const AP_INK = "#1B1F24";
const AP_MUTED = "#5A5F66";

function apShowToken(s) {
  // Same mapping as attnpos.views.common.show_token: control characters become backslash escapes.
  if (s === null || s === undefined) return "\u2014";
  let out = "";
  for (const ch of String(s)) {
    const o = ch.codePointAt(0);
    if (ch === "\n") out += "\\n";
    else if (ch === "\t") out += "\\t";
    else if (ch === "\r") out += "\\r";
    else if (o < 0x20 || o === 0x7f || (o >= 0x80 && o < 0xa0)) out += "\\x" + o.toString(16).padStart(2, "0");
    else if ((o >= 0x200b && o <= 0x200f) || (o >= 0x202a && o <= 0x202e) || (o >= 0x2066 && o <= 0x2069) ||
             o === 0xfeff || (o >= 0xd800 && o <= 0xdfff) || o === 0xfffe || o === 0xffff)
      out += "\\u" + o.toString(16).padStart(4, "0");
    else out += ch;
  }
  if (out.length && out.replace(/ /g, "") === "") out = "\u2423".repeat(out.length);
  return out;
}

function apPlain(s) {
  // Free text (bodies, evidence): keep newlines/tabs, make other control characters visible.
  if (s === null || s === undefined) return "\u2014";
  let out = "";
  for (const ch of String(s)) {
    const o = ch.codePointAt(0);
    if (ch === "\n" || ch === "\t") out += ch;
    else if (o < 0x20 || o === 0x7f || (o >= 0x80 && o < 0xa0)) out += "\\x" + o.toString(16).padStart(2, "0");
    else if ((o >= 0x202a && o <= 0x202e) || (o >= 0x2066 && o <= 0x2069)) out += "\\u" + o.toString(16).padStart(4, "0");
    else out += ch;
  }
  return out;
}

function apEl(tag, cls, text) {
  const e = document.createElement(tag);
  if (cls) e.className = cls;
  if (text !== undefined && text !== null) e.textContent = String(text);
  return e;
}

function apSvg(tag, attrs, text) {
  const e = document.createElementNS(AP_SVG, tag);
  for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, String(v));
  if (text !== undefined && text !== null) e.textContent = String(text);
  return e;
}

function apFinite(x) {
  return x !== null && x !== undefined && typeof x === "number" && Number.isFinite(x);
}

function apFmt(x, digits = 2) {
  if (!apFinite(x)) return "\u2014";
  if (x !== 0 && Math.abs(x) < Math.pow(10, -digits)) return x.toExponential(1).replace("e-", "e-0").replace(/e-0(\d\d)/, "e-$1");
  return x.toFixed(digits);
}

function apInterval(lo, hi, digits = 2) {
  if (!apFinite(lo) || !apFinite(hi)) return "";
  return "[" + apFmt(lo, digits) + ", " + apFmt(hi, digits) + "]";
}

function apBytes(v) {
  // anywidget hands binary traitlets over as DataView (or ArrayBuffer); copy to an aligned ArrayBuffer.
  if (!v) return new ArrayBuffer(0);
  if (v instanceof ArrayBuffer) return v;
  if (ArrayBuffer.isView(v)) return v.buffer.slice(v.byteOffset, v.byteOffset + v.byteLength);
  return new ArrayBuffer(0);
}
const apF32 = (v) => new Float32Array(apBytes(v));
const apU8 = (v) => new Uint8Array(apBytes(v));
const apI32 = (v) => new Int32Array(apBytes(v));

function apCaution(text) {
  const d = apEl("div", "ap-caution");
  d.appendChild(apEl("b", null, "Caution. "));
  d.appendChild(document.createTextNode(apPlain(text)));
  return d;
}

function apRoleBadge(palette, role) {
  let p = palette[0];
  for (const q of palette) if (q.role === role) p = q;
  const b = apEl("span", "ap-badge", role || "no role");
  b.style.background = p.fill;
  b.style.borderColor = p.colour;
  b.style.color = p.ink;
  return b;
}

function apSymlog(d) {
  return Math.sign(d) * Math.log2(1 + Math.abs(d));
}
