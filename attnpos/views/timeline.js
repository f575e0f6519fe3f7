// attnpos timeline: heads × checkpoint steps coloured by role, the training loss curve above on the same step
// axis, and the selected head's statistics over the steps below. Numbers arrive as binary buffers; every text
// (head keys, names, errors) is set with textContent.

// apEl / apSvg come from the shared helpers (_shared.js) put in front of this module
const APT = { left: 86, right: 16, row: 16, lossH: 92, top: 8, pad: 14 };

function aptBuf(v, Kind) {
  if (!v) return new Kind(0);
  const b = v.buffer ? v.buffer.slice(v.byteOffset, v.byteOffset + v.byteLength) : v;
  return new Kind(b);
}

function aptFmt(x, d = 3) {
  return Number.isFinite(x) ? x.toFixed(d) : "\u2014";
}

function aptRender({ model, el }) {
  const root = apEl("div", "apt-timeline apt-live");
  el.appendChild(root);
  let rows = [];

  function data() {
    const meta = model.get("meta") || {};
    const heads = meta.heads || [], steps = meta.steps || [];
    const roles = aptBuf(model.get("roles"), Uint8Array);
    const nums = aptBuf(model.get("numbers"), Float32Array);
    const lossBuf = aptBuf(model.get("loss_values"), Float32Array);
    const nl = meta.n_loss || 0;
    return { meta, heads, steps, roles, nums, S: (meta.stat_names || []).length,
             loss: { step: Array.from(lossBuf.slice(0, nl)), value: Array.from(lossBuf.slice(nl, 2 * nl)) } };
  }

  function draw() {
    root.replaceChildren();
    const d = data();
    const { heads, steps, meta } = d;
    const width = 760, inner = width - APT.left - APT.right - 2 * APT.pad;
    // the step axis: each checkpoint's column spans half-way to its neighbours; the first and last columns are
    // as wide as their one gap, so the axis runs from half a gap before the first step to half a gap after the last
    const n = steps.length;
    const g0 = n > 1 ? steps[1] - steps[0] : 1, g1 = n > 1 ? steps[n - 1] - steps[n - 2] : 1;
    const lo = n ? steps[0] - g0 / 2 : 0, hi = n ? steps[n - 1] + g1 / 2 : 1;
    const x = (s) => APT.left + APT.pad + ((s - lo) / ((hi - lo) || 1)) * inner;
    const cols = steps.map((s, j) => [x(j ? (steps[j - 1] + s) / 2 : lo), x(j + 1 < n ? (steps[j + 1] + s) / 2 : hi)]);
    const hasLoss = d.loss.step.length > 0;
    const top = APT.top + (hasLoss ? APT.lossH + 18 : 0);
    const height = top + APT.row * heads.length + 34;
    root.appendChild(apEl("div", "apt-title", meta.title || ""));
    const svg = apSvg("svg", { class: "apt-svg", width, height, viewBox: `0 0 ${width} ${height}`, tabindex: 0,
                                role: "grid", "aria-label": meta.title || "timeline" });
    if (hasLoss) {
      const fin = d.loss.value.filter(Number.isFinite);
      const l0 = Math.min(...fin), l1 = Math.max(...fin), span = (l1 - l0) || 1;
      const y = (v) => APT.top + 4 + ((l1 - v) / span) * (APT.lossH - 8);
      svg.appendChild(apSvg("rect", { x: APT.left + APT.pad, y: APT.top, width: inner, height: APT.lossH,
                                       fill: "#F7F5F0", stroke: "#D6D2C8" }));
      svg.appendChild(apSvg("text", { x: APT.left + APT.pad - 6, y: APT.top + 10, "text-anchor": "end",
                                       "font-size": 10 }, l1.toPrecision(3)));
      svg.appendChild(apSvg("text", { x: APT.left + APT.pad - 6, y: APT.top + APT.lossH, "text-anchor": "end",
                                       "font-size": 10 }, l0.toPrecision(3)));
      svg.appendChild(apSvg("text", { x: APT.pad, y: APT.top + APT.lossH / 2, "font-size": 11 }, "training loss"));
      const pts = [];
      d.loss.step.forEach((s, k) => {
        const v = d.loss.value[k];
        if (Number.isFinite(v) && s >= lo && s <= hi) pts.push(`${x(s).toFixed(1)},${y(v).toFixed(1)}`);
      });
      if (pts.length) svg.appendChild(apSvg("polyline", { class: "apt-loss", points: pts.join(" "), fill: "none",
                                                            stroke: "#1B1F24", "stroke-width": 1.5 }));
    }
    rows = heads.map((key, i) => {
      const g = apSvg("g", { class: "apt-row", "data-head": key, role: "row" });
      const yy = top + i * APT.row;
      g.appendChild(apSvg("text", { class: "apt-label", x: APT.left + APT.pad - 6, y: yy + APT.row - 4,
                                     "text-anchor": "end", "font-size": 11 }, key));
      cols.forEach(([a, b], j) => {
        const p = meta.palette[d.roles[i * steps.length + j]] || meta.palette[0];
        const r = apSvg("rect", { class: "apt-cell", x: a.toFixed(1), y: yy, width: Math.max(1, b - a - 1).toFixed(1),
                                   height: APT.row - 1, fill: p.colour, stroke: "#D6D2C8", "stroke-width": 0.5 });
        r.appendChild(apSvg("title", {}, `${key} at step ${steps[j]}: ${p.role || "not scanned"}`));
        g.appendChild(r);
        if (b - a >= 14) g.appendChild(apSvg("text", { x: ((a + b) / 2).toFixed(1), y: yy + APT.row - 4,
                                                        "text-anchor": "middle", "font-size": 9, fill: p.ink }, p.code));
      });
      g.addEventListener("click", () => { model.set("selected", key); model.save_changes(); });
      svg.appendChild(g);
      return g;
    });
    const yb = top + APT.row * heads.length + 14;
    const every = steps.length <= 12 ? 1 : Math.max(1, Math.floor(steps.length / 12));
    steps.forEach((s, j) => {
      if (j % every === 0) svg.appendChild(apSvg("text", { x: x(s).toFixed(1), y: yb, "text-anchor": "middle",
                                                            "font-size": 10 }, s));
    });
    svg.appendChild(apSvg("text", { x: (APT.left + width) / 2, y: yb + 16, "text-anchor": "middle",
                                     "font-size": 11 }, "training step"));
    svg.addEventListener("keydown", (ev) => {
      const i = heads.indexOf(model.get("selected"));
      const k = ev.key === "ArrowDown" ? 1 : ev.key === "ArrowUp" ? -1 : 0;
      if (!k || !heads.length) return;
      ev.preventDefault();
      model.set("selected", heads[Math.min(heads.length - 1, Math.max(0, i + k))]);
      model.save_changes();
    });
    root.appendChild(svg);

    const legend = apEl("div", "apt-legend");
    const used = new Set(d.roles);
    meta.palette.forEach((p, i) => {
      if (!used.has(i)) return;
      const k = apEl("span", "apt-key");
      const sw = apEl("span", "apt-swatch", p.code);
      sw.style.background = p.colour; sw.style.color = p.ink;
      k.appendChild(sw); k.appendChild(document.createTextNode(p.role || "not scanned"));
      legend.appendChild(k);
    });
    root.appendChild(legend);
    root.appendChild(apEl("p", "apt-note", hasLoss ? `Loss: ${meta.loss.unit || ""} \u2014 from ${meta.loss.source || ""}`
                                                    : "No training loss curve was found."));
    const re = meta.role_emergence || {};
    if (Object.keys(re).length) {
      const t = apEl("table", "apt-table apt-emergence");
      const h = apEl("tr");
      ["role", "holds from step", "heads (earliest first)"].forEach((c) => h.appendChild(apEl("th", null, c)));
      t.appendChild(h);
      for (const role in re) {
        const tr = apEl("tr");
        [role, re[role].step, re[role].heads.join(", ")].forEach((c) => tr.appendChild(apEl("td", null, c)));
        t.appendChild(tr);
      }
      root.appendChild(t);
    } else {
      root.appendChild(apEl("p", null, "No role but 'mixed' holds at the last step."));
    }
    if ((meta.failed || []).length) {
      const ul = apEl("ul", "apt-failed");
      meta.failed.forEach((f) => ul.appendChild(apEl("li", null, `${f.name} (step ${f.step}): ${f.error}`)));
      root.appendChild(ul);
    }
    const panel = apEl("div", "apt-panel");
    root.appendChild(panel);
    const caution = apEl("p", "apt-caution");
    caution.appendChild(apEl("b", null, "Caution. "));
    caution.appendChild(document.createTextNode(meta.caution || ""));
    root.appendChild(caution);
    root._panel = panel;
    root._d = d;
    paintSelection();
  }

  function chart(d, i, k, label) {
    const w = 240, h = 86, l = 34, r = 6, t = 14, b = 16;
    const steps = d.steps, lo = Math.min(...steps), hi = Math.max(...steps);
    const vals = steps.map((_, j) => d.nums[(i * steps.length + j) * d.S + k]);
    const fin = vals.filter(Number.isFinite);
    const svg = apSvg("svg", { class: "apt-chart", width: w, height: h, "data-stat": d.meta.stat_names[k] });
    svg.appendChild(apSvg("text", { x: 2, y: 10, "font-size": 10 }, label));
    if (!fin.length) {
      svg.appendChild(apSvg("text", { x: l, y: h / 2, "font-size": 10, fill: "#5A5F66" }, "not measured"));
      return svg;
    }
    let v0 = Math.min(0, ...fin), v1 = Math.max(...fin);
    if (v1 - v0 < 1e-9) v1 = v0 + 1;
    const x = (s) => l + ((s - lo) / ((hi - lo) || 1)) * (w - l - r);
    const y = (v) => t + ((v1 - v) / (v1 - v0)) * (h - t - b);
    svg.appendChild(apSvg("line", { x1: l, x2: w - r, y1: y(v0), y2: y(v0), stroke: "#D6D2C8" }));
    svg.appendChild(apSvg("text", { x: l - 3, y: y(v1) + 4, "text-anchor": "end", "font-size": 9 }, v1.toPrecision(2)));
    svg.appendChild(apSvg("text", { x: l - 3, y: y(v0), "text-anchor": "end", "font-size": 9 }, v0.toPrecision(2)));
    const pts = [];
    steps.forEach((s, j) => { if (Number.isFinite(vals[j])) pts.push(`${x(s).toFixed(1)},${y(vals[j]).toFixed(1)}`); });
    svg.appendChild(apSvg("polyline", { points: pts.join(" "), fill: "none", stroke: "#3F6E9A", "stroke-width": 1.5 }));
    steps.forEach((s, j) => {
      if (!Number.isFinite(vals[j])) return;
      const c = apSvg("circle", { cx: x(s).toFixed(1), cy: y(vals[j]).toFixed(1), r: 2.2, fill: "#3F6E9A" });
      c.appendChild(apSvg("title", {}, `step ${s}: ${aptFmt(vals[j])}`));
      svg.appendChild(c);
    });
    svg.appendChild(apSvg("text", { x: l, y: h - 3, "font-size": 9 }, lo));
    svg.appendChild(apSvg("text", { x: w - r, y: h - 3, "font-size": 9, "text-anchor": "end" }, hi));
    return svg;
  }

  function paintSelection() {
    const d = root._d, panel = root._panel;
    if (!d || !panel) return;
    const key = model.get("selected");
    rows.forEach((g) => g.classList.toggle("apt-selected", g.getAttribute("data-head") === key));
    panel.replaceChildren();
    const i = d.heads.indexOf(key);
    if (i < 0) { panel.appendChild(apEl("p", null, "Click a row to see a head's statistics over the steps.")); return; }
    const em = (d.meta.emerged || {})[key] || {};
    const since = Object.keys(em).map((r) => `${r} from step ${em[r]}`).join(", ") || "no role but 'mixed' at the end";
    const title = apEl("div", "apt-panel-title");
    title.appendChild(apEl("b", null, key));
    title.appendChild(document.createTextNode(` over the steps \u2014 ${since}`));
    panel.appendChild(title);
    const charts = apEl("div", "apt-charts");
    (d.meta.stat_labels || []).forEach((lab, k) => charts.appendChild(chart(d, i, k, lab)));
    panel.appendChild(charts);
  }

  model.on("change:selected", paintSelection);
  model.on("change:meta", draw);
  model.on("change:roles", draw);
  draw();
  return () => { model.off("change:selected", paintSelection); model.off("change:meta", draw);
                 model.off("change:roles", draw); };
}

export default { render: aptRender };
