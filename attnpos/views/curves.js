// attnpos curves: probe R² per layer (with the shuffled-label control and the untrained copy) and the loss per
// position with its interval band and a vertical line at the training length. Absent measurements say so.

function curvesChart(series, x, opts) {
  const width = opts.width || 360, height = opts.height || 190, ml = 44, mr = 10, mt = 10, mb = 32;
  const svg = apSvg("svg", { width, height, role: "img", "aria-label": opts.ylabel + " by " + opts.xlabel, class: opts.cls || "" });
  let yLo = Infinity, yHi = -Infinity;
  for (const s of series) for (const arr of [s.y, s.lo, s.hi]) if (arr) for (const v of arr) if (Number.isFinite(v)) { yLo = Math.min(yLo, v); yHi = Math.max(yHi, v); }
  if (opts.ylim) { yLo = opts.ylim[0]; yHi = opts.ylim[1]; }
  if (!Number.isFinite(yLo)) { yLo = 0; yHi = 1; }
  if (yHi - yLo < 1e-9) { yLo -= 1; yHi += 1; }
  let xLo = Infinity, xHi = -Infinity;
  for (const v of x) if (Number.isFinite(v)) { xLo = Math.min(xLo, v); xHi = Math.max(xHi, v); }
  if (apFinite(opts.vline)) xHi = Math.max(xHi, opts.vline);
  if (!Number.isFinite(xLo)) { xLo = 0; xHi = 1; }
  if (xHi - xLo < 1e-9) { xLo -= 0.5; xHi += 0.5; }
  const X = (v) => ml + (width - ml - mr) * (v - xLo) / (xHi - xLo);
  const Y = (v) => mt + (height - mt - mb) * (1 - (v - yLo) / (yHi - yLo));
  svg.appendChild(apSvg("rect", { x: ml, y: mt, width: width - ml - mr, height: height - mt - mb, fill: "#FFFFFF", stroke: "#E3DED4" }));
  for (const s of series) {
    if (s.lo && s.hi) {
      const idx = [];
      for (let k = 0; k < x.length; k++) if (Number.isFinite(s.lo[k]) && Number.isFinite(s.hi[k]) && Number.isFinite(x[k])) idx.push(k);
      if (idx.length > 1) {
        const pts = idx.map((k) => X(x[k]).toFixed(1) + "," + Y(s.lo[k]).toFixed(1))
          .concat(idx.slice().reverse().map((k) => X(x[k]).toFixed(1) + "," + Y(s.hi[k]).toFixed(1)));
        svg.appendChild(apSvg("polygon", { points: pts.join(" "), fill: s.colour, "fill-opacity": 0.18, class: "ap-band" }));
      }
    }
    const pts = [];
    for (let k = 0; k < x.length; k++) if (Number.isFinite(s.y[k]) && Number.isFinite(x[k])) pts.push([X(x[k]), Y(s.y[k])]);
    const attrs = { points: pts.map((p) => p[0].toFixed(1) + "," + p[1].toFixed(1)).join(" "), fill: "none",
                    stroke: s.colour, "stroke-width": 1.6, class: "ap-series ap-series-" + s.name };
    if (s.dash) attrs["stroke-dasharray"] = s.dash;
    svg.appendChild(apSvg("polyline", attrs));
    if (s.dots) for (const p of pts) svg.appendChild(apSvg("circle", { cx: p[0], cy: p[1], r: 2.4, fill: s.colour }));
  }
  if (apFinite(opts.vline)) {
    const vx = X(opts.vline);
    svg.appendChild(apSvg("line", { x1: vx, x2: vx, y1: mt, y2: height - mb, stroke: AP_INK, "stroke-dasharray": "3,3", class: "ap-vline" }));
    svg.appendChild(apSvg("text", { x: vx + 3, y: mt + 10, "font-size": 10, fill: AP_INK }, opts.vlabel || ""));
  }
  const integer = x.every((v) => !Number.isFinite(v) || Number.isInteger(v)) && xHi - xLo <= 40;
  const ticks = [];
  if (integer) { const st = Math.max(1, Math.ceil((xHi - xLo) / 8)); for (let v = Math.ceil(xLo); v <= xHi; v += st) ticks.push(v); }
  else for (let k = 0; k < 5; k++) ticks.push(xLo + (xHi - xLo) * k / 4);
  for (const v of ticks) svg.appendChild(apSvg("text", { x: X(v), y: height - mb + 13, "font-size": 9.5, "text-anchor": "middle", fill: AP_MUTED }, v.toFixed(0)));
  for (let k = 0; k < 3; k++) { const v = yLo + (yHi - yLo) * k / 2; svg.appendChild(apSvg("text", { x: ml - 4, y: Y(v) + 3, "font-size": 9.5, "text-anchor": "end", fill: AP_MUTED }, apFmt(v, 2))); }
  svg.appendChild(apSvg("text", { x: (ml + width - mr) / 2, y: height - 4, "font-size": 10.5, "text-anchor": "middle", fill: AP_MUTED }, opts.xlabel));
  const cy = (mt + height - mb) / 2;
  svg.appendChild(apSvg("text", { x: 10, y: cy, "font-size": 10.5, "text-anchor": "middle", fill: AP_MUTED, transform: `rotate(-90 10 ${cy})` }, opts.ylabel));
  return svg;
}

function curvesKey(items) {
  const d = apEl("div", "ap-legend");
  for (const [name, colour, dash] of items) {
    const s = apEl("span");
    const sv = apSvg("svg", { width: 22, height: 8 });
    const attrs = { x1: 0, x2: 22, y1: 4, y2: 4, stroke: colour, "stroke-width": 2 };
    if (dash) attrs["stroke-dasharray"] = dash;
    sv.appendChild(apSvg("line", attrs));
    s.appendChild(sv);
    s.appendChild(document.createTextNode(name));
    d.appendChild(s);
  }
  return d;
}

function curvesRender({ model, el }) {
  const root = apEl("div", "ap-view ap-curves");
  el.appendChild(root);

  function columns(meta, buf) {
    const all = apF32(buf), out = {};
    if (!meta) return out;
    meta.fields.forEach((f, k) => { out[f] = Array.from(all.subarray(k * meta.n, (k + 1) * meta.n)); });
    return out;
  }

  function draw() {
    root.replaceChildren();
    root.appendChild(apEl("h3", null, "Curves \u2014 position probes and behaviour past the training length"));
    const meta = model.get("series") || {};
    const cols = apEl("div", "ap-cols");
    const left = apEl("div", "ap-probe");
    left.appendChild(apEl("h4", null, "Probe for absolute position, per layer"));
    const pm = meta.probe;
    const pr = columns(pm, model.get("probe_values"));
    if (pm && pr.r2 && pr.r2.some(Number.isFinite)) {
      const defs = [["r2", "probe R\u00b2", "#3F6E9A", ""], ["control_r2", "control (shuffled labels)", "#B8613F", "5,3"],
                    ["untrained_r2", "untrained copy", "#6C8C4F", "2,3"]];
      const use = defs.filter(([k]) => pr[k] && pr[k].some(Number.isFinite));
      let lo = 0;
      for (const [k] of use) for (const v of pr[k]) if (Number.isFinite(v)) lo = Math.min(lo, v);
      left.appendChild(curvesChart(use.map(([k, n, c, d]) => ({ name: k, y: pr[k], colour: c, dash: d, dots: true })), pr.layer,
                                   { xlabel: "layer", ylabel: "R\u00b2", ylim: [lo, 1], width: 340, cls: "ap-probe-chart" }));
      left.appendChild(curvesKey(use.map(([k, n, c, d]) => [n, c, d])));
    } else left.appendChild(apEl("p", "ap-none ap-probe-none", "Probe: not measured in this scan."));
    cols.appendChild(left);
    const right = apEl("div", "ap-length");
    right.appendChild(apEl("h4", null, "Loss per position"));
    const lm = meta.length;
    const ln = columns(lm, model.get("length_values"));
    if (lm && ln.loss && ln.loss.some(Number.isFinite)) {
      const tl = lm.training_length;
      right.appendChild(curvesChart([{ name: "loss", y: ln.loss, lo: ln.loss_lo, hi: ln.loss_hi, colour: "#3F6E9A" }], ln.position,
                                    { xlabel: "position", ylabel: "loss", vline: tl, vlabel: apFinite(tl) ? "training length " + tl : "",
                                      width: 380, cls: "ap-loss-chart" }));
    } else right.appendChild(apEl("p", "ap-none ap-length-none", "Length: not measured in this scan."));
    const em = meta.entropy;
    const en = columns(em, model.get("entropy_values"));
    if (em && en.entropy && en.entropy.some(Number.isFinite)) {
      right.appendChild(apEl("h4", null, "Attention entropy by query position (mean over heads; 1 = uniform)"));
      right.appendChild(curvesChart([{ name: "entropy", y: en.entropy, colour: "#6C8C4F", dots: true }], en.position,
                                    { xlabel: "query position", ylabel: "entropy ratio", vline: em.training_length,
                                      vlabel: "training length", width: 380, height: 160, cls: "ap-entropy-chart" }));
    }
    cols.appendChild(right);
    root.appendChild(cols);
    root.appendChild(apCaution(model.get("caution")));
  }
  draw();
  const names = ["series", "probe_values", "length_values", "entropy_values", "caution"];
  for (const n of names) model.on("change:" + n, draw);
  return () => { for (const n of names) model.off("change:" + n, draw); };
}

export default { render: curvesRender };
