// attnpos head card: one head in depth — weight map on a canvas (hover labels, drag or double-click to zoom;
// the kernel cuts and downsamples the window), distance profile with interval band and slope line, the score
// split shares with intervals, shift test, induction, top keys, findings, caution.

function cardProfile(dist, val, lo, hi, info) {
  const width = 340, height = 170, ml = 52, mr = 8, mt = 10, mb = 28;
  const svg = apSvg("svg", { width, height, class: "ap-profile", role: "img", "aria-label": "distance profile" });
  const n = dist.length;
  const okv = [];
  for (let k = 0; k < n; k++) if (Number.isFinite(val[k])) okv.push(k);
  if (!okv.length) return null;
  let yLo = Infinity, yHi = -Infinity, xLo = Infinity, xHi = -Infinity;
  for (let k = 0; k < n; k++) {
    for (const a of [val[k], lo[k], hi[k]]) if (Number.isFinite(a)) { yLo = Math.min(yLo, a); yHi = Math.max(yHi, a); }
    const x = apSymlog(dist[k]); xLo = Math.min(xLo, x); xHi = Math.max(xHi, x);
  }
  if (yHi - yLo < 1e-9) { yLo -= 1; yHi += 1; }
  if (xHi - xLo < 1e-9) { xLo -= 1; xHi += 1; }
  const X = (x) => ml + (width - ml - mr) * (x - xLo) / (xHi - xLo);
  const Y = (y) => mt + (height - mt - mb) * (1 - (y - yLo) / (yHi - yLo));
  svg.appendChild(apSvg("rect", { x: ml, y: mt, width: width - ml - mr, height: height - mt - mb, fill: "#FFFFFF", stroke: "#E3DED4" }));
  const band = [];
  for (let k = 0; k < n; k++) if (Number.isFinite(lo[k]) && Number.isFinite(hi[k])) band.push(k);
  if (band.length > 1) {
    const pts = band.map((k) => X(apSymlog(dist[k])).toFixed(1) + "," + Y(lo[k]).toFixed(1))
      .concat(band.slice().reverse().map((k) => X(apSymlog(dist[k])).toFixed(1) + "," + Y(hi[k]).toFixed(1)));
    svg.appendChild(apSvg("polygon", { points: pts.join(" "), fill: "#3F6E9A", "fill-opacity": 0.32, stroke: "#3F6E9A",
                                       "stroke-opacity": 0.5, "stroke-width": 0.6, class: "ap-band" }));
  }
  let seg = [];
  const flush = (stroke, extra) => {
    if (seg.length > 1) svg.appendChild(apSvg("polyline", Object.assign({ points: seg.join(" "), fill: "none", stroke, "stroke-width": 1.6 }, extra || {})));
    seg = [];
  };
  for (let k = 0; k < n; k++) {
    if (Number.isFinite(val[k])) seg.push(X(apSymlog(dist[k])).toFixed(1) + "," + Y(val[k]).toFixed(1));
    else flush("#3F6E9A", { class: "ap-profile-line" });
  }
  flush("#3F6E9A", { class: "ap-profile-line" });
  // the slope line comes from Python (attnpos.views.data.slope_line: y = b − slope·δ, so it falls when the
  // slope is positive), the same points the static picture draws
  const line = info.slope_line || [];
  for (const [g, yv] of line) {
    const y = Y(yv);
    if (y >= mt - 0.5 && y <= height - mb + 0.5) seg.push(X(apSymlog(g)).toFixed(1) + "," + y.toFixed(1));
    else flush("#B8613F", { "stroke-dasharray": "4,3", "stroke-width": 1.4, class: "ap-slope" });
  }
  flush("#B8613F", { "stroke-dasharray": "4,3", "stroke-width": 1.4, class: "ap-slope" });
  for (const tk of [-256, -64, -16, -4, -1, 0, 1, 4, 16, 64, 256, 1024]) {
    if (tk < dist[0] || tk > dist[n - 1]) continue;
    const x = X(apSymlog(tk));
    svg.appendChild(apSvg("line", { x1: x, x2: x, y1: height - mb, y2: height - mb + 3, stroke: AP_MUTED }));
    svg.appendChild(apSvg("text", { x, y: height - mb + 13, "font-size": 9, "text-anchor": "middle", fill: AP_MUTED }, tk));
  }
  for (const yv of [yLo, (yLo + yHi) / 2, yHi])
    svg.appendChild(apSvg("text", { x: ml - 4, y: Y(yv) + 3, "font-size": 9, "text-anchor": "end", fill: AP_MUTED }, apFmt(yv, 1)));
  svg.appendChild(apSvg("text", { x: (ml + width - mr) / 2, y: height - 3, "font-size": 10, "text-anchor": "middle", fill: AP_MUTED },
                        "distance \u03b4 (log scale) \u00b7 band: 90% interval \u00b7 dashed: slope"));
  const cy = (mt + height - mb) / 2;
  svg.appendChild(apSvg("text", { x: 10, y: cy, "font-size": 9.5, "text-anchor": "middle", fill: AP_MUTED,
                                  transform: `rotate(-90 10 ${cy})` }, "score (logit), 0 at \u03b4 = 0"));
  return svg;
}

function cardShares(info, partColours) {
  const parts = Object.keys(partColours);      // the split's parts, in the core's order (views.common.part_colours)
  const width = 360, rowh = 20, ml = 64, mr = 132, height = rowh * parts.length + 16, bw = width - ml - mr;
  const svg = apSvg("svg", { width, height, class: "ap-shares", role: "img", "aria-label": "shares of the score split" });
  const clamp = (v) => Math.min(Math.max(v, 0), 1);
  parts.forEach((p, k) => {
    const y = 4 + k * rowh;
    const v = info["share_" + p], lo = info["share_" + p + "_lo"], hi = info["share_" + p + "_hi"];
    svg.appendChild(apSvg("text", { x: ml - 6, y: y + 12, "font-size": 11, "text-anchor": "end", fill: AP_INK }, p));
    svg.appendChild(apSvg("rect", { x: ml, y: y + 2, width: bw, height: 12, fill: "#EFEBE3" }));
    if (apFinite(v)) svg.appendChild(apSvg("rect", { x: ml, y: y + 2, width: bw * clamp(v), height: 12, fill: partColours[p], class: "ap-share-" + p }));
    if (apFinite(lo) && apFinite(hi)) {
      const a = ml + bw * clamp(lo), b = ml + bw * clamp(hi);
      svg.appendChild(apSvg("line", { x1: a, x2: b, y1: y + 8, y2: y + 8, stroke: AP_INK, "stroke-width": 1.2 }));
      svg.appendChild(apSvg("line", { x1: a, x2: a, y1: y + 4, y2: y + 12, stroke: AP_INK }));
      svg.appendChild(apSvg("line", { x1: b, x2: b, y1: y + 4, y2: y + 12, stroke: AP_INK }));
    }
    // three decimals, never scientific notation: the text must fit beside its bar
    const fix = (x) => (apFinite(x) ? x.toFixed(3) : "\u2014");
    const t = apSvg("text", { x: ml + bw + 5, y: y + 12, "font-size": 10.5, fill: AP_INK }, fix(v));
    if (apFinite(lo) && apFinite(hi)) t.appendChild(apSvg("tspan", { fill: AP_MUTED }, " [" + fix(lo) + ", " + fix(hi) + "]"));
    svg.appendChild(t);
  });
  svg.appendChild(apSvg("text", { x: 2, y: height - 1, "font-size": 9.5, fill: AP_MUTED },
                        "share of within-row score variance; whiskers: 90% bootstrap interval"));
  return svg;
}

function cardRender({ model, el }) {
  const root = apEl("div", "ap-view ap-card");
  el.appendChild(root);
  let drag = null;

  function facts(info) {
    const t = apEl("table", "ap-facts");
    const rows = [
      ["slope", apFmt(info.slope, 3) + " " + apInterval(info.slope_lo, info.slope_hi, 3) +
                " score/token (positive: falls with distance)"],
      ["shift test", (info.shift_verdict || "\u2014") + " \u00b7 change " + apFmt(info.shift_change, 3) +
                     " \u00b7 " + (info.shift_how || "\u2014")],
      ["role support", apFmt(info.role_support) + (info.role_between ? " \u00b7 between " + info.role_between : "")],
      ["induction score", apFmt(info.induction)],
    ];
    // the most-weighted slot means something only for a head the anchor criterion holds for
    if (info.anchor_like) rows.push(["anchor", "slot " + apFmt(info.anchor_slot, 0) + " \u00b7 weight " + apFmt(info.anchor_weight)]);
    rows.push(
      ["entropy ratio", apFmt(info.entropy_ratio)],
      ["mass", "prev " + apFmt(info.mass_previous) + " \u00b7 next " + apFmt(info.mass_next) + " \u00b7 first " +
               apFmt(info.mass_first) + " \u00b7 self " + apFmt(info.mass_self)]);
    if (info.evidence) rows.push(["evidence", apPlain(info.evidence)]);
    for (const [k, v] of rows) {
      const tr = apEl("tr");
      tr.appendChild(apEl("th", null, k));
      tr.appendChild(apEl("td", "ap-fact-" + k.replace(/ /g, "-"), v));
      t.appendChild(tr);
    }
    return t;
  }

  function topKeys() {
    const tk = model.get("top_keys") || [];
    if (!tk.length) return apEl("p", "ap-none", "\u2014");
    const t = apEl("table", "ap-topkeys");
    const h = apEl("tr");
    for (const s of ["slot", "token", "mean weight"]) h.appendChild(apEl("th", null, s));
    t.appendChild(h);
    for (const k of tk) {
      const tr = apEl("tr");
      tr.appendChild(apEl("td", "ap-num", k.slot));
      const td = apEl("td");
      td.appendChild(apEl("span", "ap-tok", apShowToken(k.token)));
      tr.appendChild(td);
      tr.appendChild(apEl("td", "ap-num", apFmt(k.weight, 3)));
      t.appendChild(tr);
    }
    return t;
  }

  function findingsList() {
    const rows = model.get("findings") || [];
    if (!rows.length) return apEl("p", "ap-none", "No findings on this head yet.");
    const ul = apEl("ul", "ap-card-findings");
    for (const r of rows) {
      const li = apEl("li");
      li.appendChild(apEl("span", "ap-status", r.status));
      li.appendChild(document.createTextNode(" "));
      if (r.target !== model.get("head")) li.appendChild(apEl("span", "ap-sub", "(" + r.target + ") "));
      if (r.stale) li.appendChild(apEl("span", "ap-stale", "stale "));
      li.appendChild(document.createTextNode(apPlain(r.body)));
      ul.appendChild(li);
    }
    return ul;
  }

  function mapPanel() {
    const box = apEl("div", "ap-mapbox");
    const texts = model.get("texts") || [];
    const head = apEl("h4", null, "Weight map");
    box.appendChild(head);
    if (!texts.length) {
      box.appendChild(apEl("p", "ap-none", "No weight map was kept for this head (the scan keeps maps for some heads only)."));
      return box;
    }
    const ctl = apEl("div", "ap-mapctl");
    const sel = apEl("select", "ap-textsel");
    sel.setAttribute("aria-label", "text");
    for (const tx of texts) {
      const o = apEl("option", null, apShowToken(tx.name));
      o.value = String(tx.index);
      if (tx.index === model.get("text")) o.selected = true;
      sel.appendChild(o);
    }
    sel.addEventListener("change", () => { model.set("text", parseInt(sel.value, 10)); model.save_changes(); });
    ctl.appendChild(sel);
    const out = apEl("button", "ap-zoomout", "zoom out");
    out.addEventListener("click", () => zoomAround(null, 2));
    const reset = apEl("button", "ap-reset", "full text");
    reset.addEventListener("click", () => { model.set("window", []); model.save_changes(); });
    ctl.appendChild(out);
    ctl.appendChild(reset);
    box.appendChild(ctl);

    const meta = model.get("map_meta") || {};
    const codes = apU8(model.get("map_codes"));
    const lut = apU8(model.get("lut"));
    const rows = meta.rows || 0, cols = meta.cols || 0;
    if (!rows || !cols || codes.length !== rows * cols) {
      box.appendChild(apEl("p", "ap-none", "No map for this text."));
      return box;
    }
    const px = Math.max(1, Math.min(12, 300 / Math.max(rows, cols)));
    const W = Math.round(cols * px), H = Math.round(rows * px);
    const wrap = apEl("div", "ap-canvaswrap");
    wrap.style.width = W + "px";
    wrap.style.height = H + "px";
    const canvas = apEl("canvas", "ap-map");
    const dpr = window.devicePixelRatio || 1;
    canvas.width = Math.round(W * dpr);
    canvas.height = Math.round(H * dpr);
    canvas.style.width = W + "px";
    canvas.style.height = H + "px";
    canvas.setAttribute("role", "img");
    canvas.setAttribute("aria-label", "weight map, queries by keys");
    const off = document.createElement("canvas");
    off.width = cols; off.height = rows;
    const octx = off.getContext("2d");
    const img = octx.createImageData(cols, rows);
    for (let i = 0; i < rows * cols; i++) {
      const c = codes[i];
      let r, g, b;
      if (c === 255) { r = 226; g = 222; b = 214; }
      else { const k = Math.round(c * 255 / 254) * 3; r = lut[k]; g = lut[k + 1]; b = lut[k + 2]; }
      img.data[4 * i] = r; img.data[4 * i + 1] = g; img.data[4 * i + 2] = b; img.data[4 * i + 3] = 255;
    }
    octx.putImageData(img, 0, 0);
    const ctx = canvas.getContext("2d");
    ctx.imageSmoothingEnabled = false;
    ctx.drawImage(off, 0, 0, canvas.width, canvas.height);
    wrap.appendChild(canvas);
    const band = apEl("div", "ap-rubber");
    wrap.appendChild(band);
    const axes = apEl("div", "ap-sub ap-axes", "keys #" + meta.k0 + "\u2013" + (meta.k1 - 1) + " \u2192 \u00b7 queries #" +
                      meta.q0 + "\u2013" + (meta.q1 - 1) + " \u2193");
    box.appendChild(axes);
    box.appendChild(wrap);
    const hover = apEl("div", "ap-hover", "hover the map for tokens; drag to zoom into a window, double-click to zoom 2\u00d7");
    box.appendChild(hover);
    const rl = model.get("row_labels") || [], cl = model.get("col_labels") || [];
    const scaleNote = apEl("div", "ap-sub ap-mapnote",
      "colour 0 \u2026 " + apFmt(meta.vmax, 3) + " (weight, dark \u2192 bright" +
      (meta.clipped ? "; brightest = 99th percentile, max " + apFmt(meta.max, 3) : "") + ")" +
      (meta.step_q > 1 || meta.step_k > 1 ? " \u00b7 each pixel averages " + meta.step_q + "\u00d7" + meta.step_k + " pairs" : "") +
      " \u00b7 text length " + meta.T);
    box.appendChild(scaleNote);
    // legend ramp
    const ramp = document.createElement("canvas");
    ramp.width = 128; ramp.height = 8; ramp.className = "ap-ramp";
    const rctx = ramp.getContext("2d");
    for (let x = 0; x < 128; x++) { const k = Math.round(x * 255 / 127) * 3; rctx.fillStyle = `rgb(${lut[k]},${lut[k + 1]},${lut[k + 2]})`; rctx.fillRect(x, 0, 1, 8); }
    box.appendChild(ramp);

    const at = (e) => {
      const b = canvas.getBoundingClientRect();
      const x = Math.min(Math.max(e.clientX - b.left, 0), W - 0.01), y = Math.min(Math.max(e.clientY - b.top, 0), H - 0.01);
      return { x, y, r: Math.floor(y / H * rows), c: Math.floor(x / W * cols) };
    };
    canvas.addEventListener("mousemove", (e) => {
      const p = at(e);
      const code = codes[p.r * cols + p.c];
      const w = code === 255 ? "\u2014" : (code === 254 && meta.clipped ? "\u2265 " : "") + apFmt(code / 254 * meta.vmax, 3);
      hover.textContent = "query " + apShowToken(rl[p.r]) + "  \u2192  key " + apShowToken(cl[p.c]) + "  \u00b7 weight \u2248 " + w;
      if (drag) {
        const x0 = Math.min(drag.x, p.x), y0 = Math.min(drag.y, p.y);
        band.style.display = "block";
        band.style.left = x0 + "px"; band.style.top = y0 + "px";
        band.style.width = Math.abs(p.x - drag.x) + "px"; band.style.height = Math.abs(p.y - drag.y) + "px";
      }
    });
    canvas.addEventListener("mousedown", (e) => { e.preventDefault(); drag = at(e); });
    const finish = (e) => {
      if (!drag) return;
      const p = at(e), d = drag;
      drag = null;
      band.style.display = "none";
      if (Math.abs(p.x - d.x) < 4 || Math.abs(p.y - d.y) < 4) return;
      const r0 = Math.min(d.r, p.r), r1 = Math.max(d.r, p.r) + 1, c0 = Math.min(d.c, p.c), c1 = Math.max(d.c, p.c) + 1;
      const win = [meta.q0 + r0 * meta.step_q, Math.min(meta.q1, meta.q0 + r1 * meta.step_q),
                   meta.k0 + c0 * meta.step_k, Math.min(meta.k1, meta.k0 + c1 * meta.step_k)];
      model.set("window", win);
      model.save_changes();
    };
    canvas.addEventListener("mouseup", finish);
    canvas.addEventListener("mouseleave", (e) => { if (drag) finish(e); });
    canvas.addEventListener("dblclick", (e) => {
      const p = at(e);
      zoomAround([meta.q0 + p.r * meta.step_q, meta.k0 + p.c * meta.step_k], 0.5);
    });
    return box;
  }

  function zoomAround(centre, factor) {
    const m = model.get("map_meta") || {};
    if (!m.T) return;
    const nq = m.q1 - m.q0, nk = m.k1 - m.k0;
    const cq = centre ? centre[0] : (m.q0 + m.q1) / 2, ck = centre ? centre[1] : (m.k0 + m.k1) / 2;
    const hq = Math.max(2, Math.round(nq * factor / 2)), hk = Math.max(2, Math.round(nk * factor / 2));
    const q0 = Math.max(0, Math.round(cq - hq)), k0 = Math.max(0, Math.round(ck - hk));
    const win = [q0, Math.min(m.T, q0 + 2 * hq), k0, Math.min(m.T, k0 + 2 * hk)];
    if (win[0] === 0 && win[2] === 0 && win[1] >= m.T && win[3] >= m.T) model.set("window", []);
    else model.set("window", win);
    model.save_changes();
  }

  function draw() {
    const info = model.get("info") || {};
    const style = model.get("colours") || {};
    root.replaceChildren();
    if (!info.key) {
      root.appendChild(apEl("h3", null, "Head card"));
      root.appendChild(apEl("p", "ap-none", "Select a head in the atlas."));
      root.appendChild(apCaution(model.get("caution")));
      return;
    }
    const h = apEl("h3", "ap-card-title");
    h.appendChild(document.createTextNode("Head " + info.key + " \u00b7 "));
    h.appendChild(apRoleBadge(style.palette || [{ role: "", fill: "#D9D6CF", colour: "#D9D6CF", ink: AP_INK }], info.role));
    if (info.tags && info.tags.length) h.appendChild(apEl("span", "ap-sub", "  tags: " + info.tags.join(", ")));
    root.appendChild(h);
    const cols = apEl("div", "ap-cols");
    cols.appendChild(mapPanel());
    const mid = apEl("div");
    mid.appendChild(apEl("h4", null, "Distance profile"));
    const prof = apF32(model.get("profile"));
    const nb = Math.floor(prof.length / 4);
    const p = nb ? cardProfile(prof.subarray(0, nb), prof.subarray(nb, 2 * nb), prof.subarray(2 * nb, 3 * nb), prof.subarray(3 * nb), info) : null;
    mid.appendChild(p || apEl("p", "ap-none", "No distance profile was measured for this head."));
    mid.appendChild(apEl("h4", null, "Score split"));
    mid.appendChild(cardShares(info, style.parts || {}));
    cols.appendChild(mid);
    const right = apEl("div");
    right.appendChild(apEl("h4", null, "Evidence"));
    right.appendChild(facts(info));
    right.appendChild(apEl("h4", null, "Top keys (mean weight received per query)"));
    right.appendChild(topKeys());
    cols.appendChild(right);
    root.appendChild(cols);
    root.appendChild(apEl("h4", null, "Findings"));
    root.appendChild(findingsList());
    // an empty caution: the page around the card shows it once already (the report)
    if (model.get("caution")) root.appendChild(apCaution(model.get("caution")));
  }

  draw();
  // several traits change together when a head is selected: draw once per batch
  let queued = false;
  const later = () => { if (queued) return; queued = true; queueMicrotask(() => { queued = false; draw(); }); };
  const names = ["info", "profile", "map_codes", "map_meta", "texts", "text", "top_keys", "findings", "caution", "colours"];
  for (const n of names) model.on("change:" + n, later);
  return () => { for (const n of names) model.off("change:" + n, later); };
}

export default { render: cardRender };
