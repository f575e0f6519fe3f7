// attnpos stretch board: the loss of every context-extension variant by position (training length marked), the
// heads × variants break/keep grid, and the distance profiles of the head clicked in the grid. Self-contained: user
// strings (head keys, roles, reasons) only ever go through textContent.

const ST_NS = "http://www.w3.org/2000/svg";

function stSvg(tag, attrs, text) {
  const e = document.createElementNS(ST_NS, tag);
  for (const [k, v] of Object.entries(attrs || {})) e.setAttribute(k, String(v));
  if (text !== undefined) e.textContent = text;
  return e;
}

function stEl(tag, cls, text) {
  const e = document.createElement(tag);
  if (cls) e.className = cls;
  if (text !== undefined) e.textContent = text;
  return e;
}

function stFloats(v) {
  if (!v) return new Float32Array(0);
  let buf = v;
  if (ArrayBuffer.isView(v)) buf = v.buffer.slice(v.byteOffset, v.byteOffset + v.byteLength);
  return new Float32Array(buf);
}

function stSmooth(y, k) {
  if (k <= 1) return y;
  const out = new Float32Array(y.length), h = Math.floor(k / 2);
  for (let i = 0; i < y.length; i++) {
    let s = 0, n = 0;
    for (let j = Math.max(0, i - h); j <= Math.min(y.length - 1, i + h - (k % 2 ? 0 : 1)); j++) if (Number.isFinite(y[j])) { s += y[j]; n++; }
    out[i] = n ? s / n : NaN;
  }
  return out;
}

function stLossChart(meta, values) {
  const W = 640, H = 260, ml = 48, mr = 12, mt = 12, mb = 34, n = meta.n, x0 = meta.first_position, x1 = x0 + n - 1;
  const svg = stSvg("svg", { width: W, height: H, class: "st-loss", role: "img", "aria-label": "loss by position" });
  const k = Math.max(1, Math.floor(n / 64));
  const sm = meta.names.map((_, vi) => [0, 1, 2].map((j) => stSmooth(values.subarray((3 * vi + j) * n, (3 * vi + j + 1) * n), k)));
  let lo = 0, hi = -Infinity;
  for (const series of sm) for (const arr of series) for (const v of arr) if (Number.isFinite(v)) hi = Math.max(hi, v);
  if (!Number.isFinite(hi) || hi <= lo) hi = lo + 1;
  const X = (p) => ml + (W - ml - mr) * (p - x0) / Math.max(x1 - x0, 1e-9);
  const Y = (v) => mt + (H - mt - mb) * (1 - (v - lo) / (hi - lo));
  svg.appendChild(stSvg("rect", { x: ml, y: mt, width: W - ml - mr, height: H - mt - mb, fill: "#FFFFFF", stroke: "#DDD8CE" }));
  meta.names.forEach((name, vi) => {
    const [loss, l, h] = sm[vi], colour = meta.colours[vi];
    const top = [], bottom = [];
    for (let i = 0; i < n; i++) if (Number.isFinite(l[i]) && Number.isFinite(h[i])) { bottom.push(X(x0 + i).toFixed(1) + "," + Y(l[i]).toFixed(1)); top.push(X(x0 + i).toFixed(1) + "," + Y(h[i]).toFixed(1)); }
    if (top.length > 1) svg.appendChild(stSvg("polygon", { points: bottom.concat(top.reverse()).join(" "), fill: colour, "fill-opacity": 0.14 }));
    const pts = [];
    for (let i = 0; i < n; i++) if (Number.isFinite(loss[i])) pts.push(X(x0 + i).toFixed(1) + "," + Y(loss[i]).toFixed(1));
    const line = stSvg("polyline", { points: pts.join(" "), fill: "none", stroke: colour, "stroke-width": 1.7, class: "st-line", "data-variant": name });
    line.appendChild(stSvg("title", {}, name));
    svg.appendChild(line);
  });
  const L = meta.training_length;
  if (Number.isFinite(L)) {
    svg.appendChild(stSvg("line", { x1: X(L), x2: X(L), y1: mt, y2: H - mb, stroke: "#30343A", "stroke-dasharray": "4,3", class: "st-train" }));
    svg.appendChild(stSvg("text", { x: X(L) + 4, y: mt + 11, "font-size": 10.5, fill: "#30343A" }, "training length " + L));
  }
  for (let t = 0; t < 5; t++) { const p = x0 + (x1 - x0) * t / 4; svg.appendChild(stSvg("text", { x: X(p), y: H - mb + 14, "font-size": 10, "text-anchor": "middle", fill: "#6B6F75" }, p.toFixed(0))); }
  for (let t = 0; t < 3; t++) { const v = lo + (hi - lo) * t / 2; svg.appendChild(stSvg("text", { x: ml - 5, y: Y(v) + 3, "font-size": 10, "text-anchor": "end", fill: "#6B6F75" }, v.toPrecision(2))); }
  svg.appendChild(stSvg("text", { x: (ml + W - mr) / 2, y: H - 4, "font-size": 11, "text-anchor": "middle", fill: "#6B6F75" }, "position (tokens read)"));
  svg.appendChild(stSvg("text", { x: 12, y: (mt + H - mb) / 2, "font-size": 11, "text-anchor": "middle", fill: "#6B6F75", transform: `rotate(-90 12 ${(mt + H - mb) / 2})` }, "loss (nats)"));
  return svg;
}

function stProfileChart(meta, prof, hi_) {
  const W = 420, H = 210, ml = 48, mr = 8, mt = 8, mb = 32, V = meta.names.length + 1, B = meta.bucket_labels.length;
  const row = (s) => prof.subarray((hi_ * V + s) * B, (hi_ * V + s + 1) * B);
  let lo = Infinity, hi = -Infinity;
  for (let s = 0; s < V; s++) for (const v of row(s)) if (Number.isFinite(v) && v > 0) { lo = Math.min(lo, Math.log10(v)); hi = Math.max(hi, Math.log10(v)); }
  const svg = stSvg("svg", { width: W, height: H, class: "st-profile", role: "img", "aria-label": "distance profile" });
  if (!Number.isFinite(lo)) return svg;
  if (hi - lo < 1e-6) lo -= 1;
  const X = (b) => ml + (W - ml - mr) * b / Math.max(B - 1, 1);
  const Y = (v) => mt + (H - mt - mb) * (1 - (Math.log10(Math.max(v, 1e-6)) - lo) / (hi - lo));
  svg.appendChild(stSvg("rect", { x: ml, y: mt, width: W - ml - mr, height: H - mt - mb, fill: "#FFFFFF", stroke: "#DDD8CE" }));
  for (let s = 0; s < V; s++) {
    const y = row(s), pts = [];
    for (let b = 0; b < B; b++) if (Number.isFinite(y[b]) && y[b] > 0) pts.push(X(b).toFixed(1) + "," + Y(y[b]).toFixed(1));
    const attrs = { points: pts.join(" "), fill: "none", stroke: s === 0 ? meta.reference_colour : meta.colours[s - 1], "stroke-width": 1.7 };
    if (s === 0) attrs["stroke-dasharray"] = "4,3";
    const line = stSvg("polyline", attrs);
    line.appendChild(stSvg("title", {}, s === 0 ? "unscaled, inside the training length" : meta.names[s - 1]));
    svg.appendChild(line);
  }
  for (let b = 0; b < B; b += Math.max(1, Math.floor(B / 6))) svg.appendChild(stSvg("text", { x: X(b), y: H - mb + 13, "font-size": 9.5, "text-anchor": "middle", fill: "#6B6F75" }, meta.bucket_ticks[b]));
  for (const v of [lo, hi]) svg.appendChild(stSvg("text", { x: ml - 4, y: Y(10 ** v) + 3, "font-size": 9.5, "text-anchor": "end", fill: "#6B6F75" }, (10 ** v).toPrecision(2)));
  svg.appendChild(stSvg("text", { x: (ml + W - mr) / 2, y: H - 3, "font-size": 10, "text-anchor": "middle", fill: "#6B6F75" }, "distance (tokens, bucket start); weight per key, log scale"));
  return svg;
}

function stRender({ model, el }) {
  const root = stEl("div", "st-board");
  el.appendChild(root);
  function draw() {
    root.replaceChildren();
    const meta = model.get("meta") || {};
    if (!meta.names) { root.appendChild(stEl("p", "st-none", "Nothing measured.")); return; }
    const legend = stEl("div", "st-legend");
    meta.names.forEach((n, i) => { const s = stEl("span", "st-key"); const sw = stEl("i"); sw.style.background = meta.colours[i]; s.appendChild(sw); s.appendChild(document.createTextNode(n)); legend.appendChild(s); });
    root.appendChild(stEl("div", "st-title", "per-position loss, every variant (lines and 90% bands as running means)"));
    root.appendChild(legend);
    root.appendChild(stLossChart(meta, stFloats(model.get("loss_values"))));
    root.appendChild(stEl("div", "st-title", "heads × variants past the training length (click a head)"));
    const table = stEl("table", "st-grid"), tr0 = stEl("tr");
    for (const h of ["head", "band", "role at L", "broken"]) tr0.appendChild(stEl("th", null, h));
    meta.names.forEach((n, i) => { const th = stEl("th"); const sw = stEl("span", "st-swatch"); sw.style.background = meta.colours[i]; th.appendChild(sw); th.appendChild(document.createTextNode(n)); tr0.appendChild(th); });
    table.appendChild(tr0);
    const sel = model.get("selected");
    meta.heads.forEach((h) => {
      const tr = stEl("tr", h.key === sel ? "st-sel" : "");
      const td = stEl("td", "st-head", h.key);
      td.tabIndex = 0;
      const pick = () => { model.set("selected", h.key); model.save_changes(); };
      td.addEventListener("click", pick);
      td.addEventListener("keydown", (e) => { if (e.key === "Enter") pick(); });
      tr.appendChild(td);
      tr.appendChild(stEl("td", null, h.band));
      tr.appendChild(stEl("td", null, h.role));
      tr.appendChild(stEl("td", "st-n", String(h.n_broken)));
      for (const c of h.cells) {
        const cell = stEl("td", c.broken ? "st-break" : "st-keep", c.broken ? "break" : "keep");
        cell.title = c.broken ? c.reasons.join("; ") : "keeps its job (role " + c.role + ")";
        cell.addEventListener("click", pick);
        tr.appendChild(cell);
      }
      table.appendChild(tr);
    });
    root.appendChild(table);
    const hi = Math.max(0, meta.heads.findIndex((h) => h.key === sel));
    const h = meta.heads[hi];
    if (h) {
      const card = stEl("div", "st-card st-live");
      const title = stEl("h4", null, h.key + " ");
      title.appendChild(stEl("small", null, h.role + " at the training length · band " + h.band + " · broken by " + h.n_broken));
      card.appendChild(title);
      card.appendChild(stProfileChart(meta, stFloats(model.get("profile_values")), hi));
      const ul = stEl("ul", "st-why");
      h.cells.forEach((c, i) => { const li = stEl("li"); li.appendChild(stEl("b", null, meta.names[i] + ": ")); li.appendChild(document.createTextNode(c.broken ? c.reasons.join("; ") : "keeps")); ul.appendChild(li); });
      card.appendChild(ul);
      root.appendChild(stEl("div", "st-title", "distance profile of the selected head (dashed grey: unscaled, inside the training length)"));
      root.appendChild(card);
    }
    const caution = stEl("p", "st-caution");
    caution.appendChild(stEl("b", null, "Caution. "));
    caution.appendChild(document.createTextNode(model.get("caution") || ""));
    root.appendChild(caution);
  }
  draw();
  const names = ["meta", "loss_values", "profile_values", "selected", "caution"];
  for (const n of names) model.on("change:" + n, draw);
  return () => { for (const n of names) model.off("change:" + n, draw); };
}

export default { render: stRender };
