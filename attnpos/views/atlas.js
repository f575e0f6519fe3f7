// attnpos atlas: every head of the subject as a layers × heads grid (role colour + written role, profile
// sparkline, finding marks). Numbers arrive as binary buffers. Click or arrows + Enter select a head.

function atlasRender({ model, el }) {
  const root = apEl("div", "ap-view ap-atlas");
  el.appendChild(root);
  let cursor = -1;           // index into heads (keyboard position)
  let cellNodes = [];        // per head: <g>
  let cellOf = new Map();    // cell number -> head index
  let data = null;

  function decode() {
    const grid = model.get("grid") || {};
    const roles = apU8(model.get("roles"));
    const cells = apI32(model.get("cells"));
    const nums = apF32(model.get("numbers"));
    const spark = apU8(model.get("spark"));
    const n = roles.length;
    const K = (grid.fields || []).length;
    const S = n ? Math.round(spark.length / n) : 0;
    const rows = grid.rows || [];
    const keys = model.get("cell_keys") || [];   // formatted in Python (attnpos.core.keys): one grammar everywhere
    const strength = apF32(model.get("strength")), layerOf = apI32(model.get("layer_of"));
    return { grid, roles, cells, nums, spark, n, K, S, rows, keys, strength, layerOf,
             evidence: model.get("evidence") || [], tags: model.get("tags") || [],
             verdicts: model.get("verdicts") || [] };
  }

  function field(i, name) {
    const k = data.grid.fields.indexOf(name);
    return k < 0 ? NaN : data.nums[i * data.K + k];
  }

  function tipLines(i) {
    const pal = data.grid.palette;
    const role = pal[data.roles[i]].role || "\u2014";
    const f = (n, d) => apFmt(field(i, n), d);
    const lines = [data.keys[i] + " \u00b7 " + role];
    if (data.tags[i]) lines.push("tags: " + data.tags[i]);
    if (data.evidence[i]) lines.push("evidence: " + apPlain(data.evidence[i]));
    lines.push("shares  distance " + f("share_distance") + " \u00b7 slot " + f("share_slot") +
               " \u00b7 content " + f("share_content") + " \u00b7 residual " + f("share_residual"));
    lines.push("slope " + f("slope", 3) + " " + apInterval(field(i, "slope_lo"), field(i, "slope_hi"), 3));
    lines.push("mass  prev " + f("mass_previous") + " \u00b7 next " + f("mass_next") + " \u00b7 first " +
               f("mass_first") + " \u00b7 self " + f("mass_self"));
    lines.push("entropy ratio " + f("entropy_ratio") + " \u00b7 induction " + f("induction"));
    lines.push("shift: " + (data.verdicts[i] || "\u2014") + " (change " + f("shift_change", 3) + ")");
    lines.push("role holds in " + f("role_support", 2) + " of resamples" + (field(i, "faded") === 1 ? " (uncertain)" : ""));
    const m = (model.get("marks") || {})[data.keys[i]];
    if (m) lines.push("findings: " + m.n + " (" + m.statuses.join(", ") + ")" + (m.stale ? ", " + m.stale + " stale" : ""));
    return lines;
  }

  const tip = apEl("div", "ap-tip");
  tip.setAttribute("role", "tooltip");
  const live = apEl("div", "ap-vh");
  live.setAttribute("aria-live", "polite");

  function showTip(i, evt) {
    tip.replaceChildren();
    tipLines(i).forEach((t, k) => tip.appendChild(apEl("div", k === 0 ? "ap-tip-title" : null, t)));
    tip.style.display = "block";
    const box = root.getBoundingClientRect();
    let x = evt ? evt.clientX - box.left + root.scrollLeft + 14 : 10;
    let y = evt ? evt.clientY - box.top + root.scrollTop + 14 : 10;
    if (evt && x + 330 > root.clientWidth + root.scrollLeft) x = Math.max(4, x - 350);
    tip.style.left = x + "px";
    tip.style.top = y + "px";
  }

  function select(i) {
    if (i < 0 || i >= data.n) return;
    model.set("selected", data.keys[i]);
    model.save_changes();
  }

  function moveCursor(i) {
    if (cursor >= 0 && cellNodes[cursor]) cellNodes[cursor].classList.remove("ap-cursor");
    cursor = i;
    if (i >= 0 && cellNodes[i]) {
      cellNodes[i].classList.add("ap-cursor");
      live.textContent = tipLines(i)[0];
    }
  }

  function paintSelection() {
    const sel = model.get("selected");
    cellNodes.forEach((g, i) => g.classList.toggle("ap-selected", data.keys[i] === sel));
    const i = data.keys.indexOf(sel);
    selInfo.textContent = sel ? "selected: " + sel + (i >= 0 ? " (" + (data.grid.palette[data.roles[i]].role || "no role") + ")" : "") : "no head selected";
  }

  function paintMarks() {
    const marks = model.get("marks") || {};
    cellNodes.forEach((g, i) => {
      const old = g.querySelector(".ap-mark");
      if (old) old.remove();
      const m = marks[data.keys[i]];
      if (!m) return;
      const cw = data.grid.layout.cw, tx = cw - 1;
      const p = m.fresh
        ? apSvg("path", { d: `M${tx - 11},1 L${tx},1 L${tx},12 Z`, fill: AP_INK, class: "ap-mark" })
        : apSvg("path", { d: `M${tx - 11},1.5 L${tx - 0.5},1.5 L${tx - 0.5},12 Z`, fill: "#FBFAF7", stroke: AP_INK,
                          "stroke-dasharray": "2,1.5", class: "ap-mark ap-mark-stale" });
      g.appendChild(p);
    });
    rowLabels.forEach(([t, key]) => {
      const m = marks[key];
      t.textContent = t.dataset.label + (m ? " \u25C6" : "");
    });
    const mm = marks["model"];
    modelMark.textContent = mm ? "model findings: " + mm.n + (mm.stale ? " (" + mm.stale + " stale)" : "") : "";
  }

  // ---- filters: role (legend), layer range, strength (the role's own strength column, sent from Python);
  // the same rule as attnpos.views.data.atlas_keep
  function filters() { return Object.assign({}, model.get("filters") || {}); }
  function setFilters(f) { model.set("filters", f); model.save_changes(); }
  function toggleRole(role) {
    const f = filters();
    const all = data.grid.palette.slice(1).map((p) => p.role);
    let keep = f.roles ? f.roles.slice() : all.slice();
    keep = keep.includes(role) ? keep.filter((r) => r !== role) : keep.concat([role]);
    if (keep.length === all.length) delete f.roles; else f.roles = keep;
    setFilters(f);
  }
  function keeps(i) {
    const f = model.get("filters") || {};
    if (f.roles) { const r = data.grid.palette[data.roles[i]].role; if (!r || !f.roles.includes(r)) return false; }
    if (f.layers && f.layers.length === 2) { const L = data.layerOf[i]; if (L < f.layers[0] || L > f.layers[1]) return false; }
    if (apFinite(f.strength) && Number.isFinite(data.strength[i]) && data.strength[i] < f.strength) return false;
    return true;
  }
  const shown = apEl("span", "ap-shown");
  function paintFilter() {
    const f = model.get("filters") || {};
    let n = 0;
    cellNodes.forEach((g, i) => { const k = keeps(i); g.classList.toggle("ap-out", !k); if (k) n++; });
    shown.textContent = n === data.n ? "showing all " + data.n + " heads" : "showing " + n + " of " + data.n + " heads";
    root.querySelectorAll(".ap-legend-item").forEach((b) => b.classList.toggle("ap-off", !!f.roles && !f.roles.includes(b.dataset.role)));
    // the inputs show a filter set elsewhere (Python's atlas.filter(), "show all"), never overwrite what is typed
    if (!typing && layerLo) {
      layerLo.value = f.layers ? f.layers[0] : "";
      layerHi.value = f.layers ? f.layers[1] : "";
      strengthIn.value = apFinite(f.strength) ? f.strength : 0;
    }
    typing = false;
    if (strengthOut) strengthOut.textContent = apFinite(f.strength) ? "\u2265 " + f.strength.toFixed(2) : "any";
  }
  let layerLo = null, layerHi = null, strengthIn = null, strengthOut = null, typing = false;
  function filterBar() {
    const bar = apEl("div", "ap-filters");
    const layers = Array.from(data.layerOf);
    const lmin = layers.length ? Math.min(...layers) : 0, lmax = layers.length ? Math.max(...layers) : 0;
    const num = (cls, label) => {
      const e = apEl("input", cls); e.type = "number"; e.min = lmin; e.max = lmax; e.step = 1;
      e.placeholder = label; e.setAttribute("aria-label", label); return e;
    };
    layerLo = num("ap-layer-lo", "first layer"); layerHi = num("ap-layer-hi", "last layer");
    layerLo.placeholder = String(lmin); layerHi.placeholder = String(lmax);
    const onLayers = () => {
      const f = filters();
      const a = layerLo.value === "" ? lmin : parseInt(layerLo.value, 10), b = layerHi.value === "" ? lmax : parseInt(layerHi.value, 10);
      if (a <= lmin && b >= lmax) delete f.layers; else f.layers = [Math.min(a, b), Math.max(a, b)];
      typing = true;
      setFilters(f);          // the change event runs now (synchronously), while typing is set
      typing = false;
    };
    layerLo.addEventListener("change", onLayers); layerHi.addEventListener("change", onLayers);
    strengthIn = apEl("input", "ap-strength"); strengthIn.type = "range"; strengthIn.min = 0; strengthIn.max = 1; strengthIn.step = 0.05;
    strengthIn.setAttribute("aria-label", "least strength of the role");
    strengthOut = apEl("span", "ap-sub");
    strengthIn.addEventListener("input", () => {
      const f = filters(); const v = parseFloat(strengthIn.value);
      if (v > 0) f.strength = v; else delete f.strength;
      typing = true;
      setFilters(f);          // the change event runs now (synchronously), while typing is set
      typing = false;
    });
    const clear = apEl("button", "ap-clear", "show all");
    clear.type = "button";
    clear.addEventListener("click", () => setFilters({}));
    bar.appendChild(apEl("span", "ap-sub", "layers"));
    bar.appendChild(layerLo); bar.appendChild(apEl("span", "ap-sub", "to")); bar.appendChild(layerHi);
    bar.appendChild(apEl("span", "ap-sub", "\u00b7 role strength")); bar.appendChild(strengthIn); bar.appendChild(strengthOut);
    bar.appendChild(clear); bar.appendChild(shown);
    return bar;
  }

  let rowLabels = [];
  const selInfo = apEl("span", "ap-selinfo");
  const modelMark = apEl("span", "ap-modelmark");

  function draw() {
    data = decode();
    root.replaceChildren();
    const g = data.grid, lay = g.layout || { cw: 34, ch: 32, gap: 2, left: 74, top: 20, label: "code" };
    root.appendChild(apEl("h3", null, "Atlas \u2014 role of every head"));
    const counts = {};
    for (let i = 0; i < data.n; i++) counts[data.roles[i]] = (counts[data.roles[i]] || 0) + 1;
    root.appendChild(apEl("p", "ap-sub", (g.title || "") + " \u00b7 " + data.rows.length + " layer rows \u00d7 " +
      g.n_cols + " heads. Click a cell, or focus the grid and use the arrow keys + Enter. Hover for evidence; click a role " +
      "in the legend to show or hide it."));
    // the legend writes each role with the word its cells write (attnpos.views.data.cell_label); clicking an
    // entry shows or hides that role (the role filter)
    const legend = apEl("div", "ap-legend");
    const word = (p) => (lay.label === "short" ? p.short : p.code);
    g.palette.slice(1).forEach((p, k) => {
      const s = apEl("button", "ap-legend-item");
      s.type = "button";
      s.dataset.role = p.role;
      s.title = "show or hide the " + p.role + " heads";
      const sw = apEl("i", "ap-sw"); sw.style.background = p.fill; sw.style.borderColor = p.colour;
      s.appendChild(sw); s.appendChild(apEl("b", null, word(p)));
      s.appendChild(document.createTextNode(" = " + p.role + " (" + (counts[k + 1] || 0) + ")"));
      s.addEventListener("click", () => toggleRole(p.role));
      legend.appendChild(s);
    });
    root.appendChild(legend);
    root.appendChild(filterBar());
    const bar = apEl("div", "ap-bar");
    bar.appendChild(selInfo); bar.appendChild(modelMark);
    root.appendChild(bar);

    const W = lay.left + g.n_cols * (lay.cw + lay.gap) + 4;
    const H = lay.top + data.rows.length * (lay.ch + lay.gap) + 4;
    const svg = apSvg("svg", { width: W, height: H, viewBox: `0 0 ${W} ${H}`, tabindex: 0, role: "grid",
                               "aria-label": "atlas of " + data.n + " heads; arrow keys move, Enter selects",
                               class: "ap-grid" });
    const step = g.n_cols <= 16 ? 1 : 4;
    for (let c = 0; c < g.n_cols; c += step)
      svg.appendChild(apSvg("text", { x: lay.left + c * (lay.cw + lay.gap) + lay.cw / 2, y: lay.top - 6,
                                      "font-size": 10, "text-anchor": "middle", fill: AP_MUTED }, "H" + c));
    rowLabels = [];
    data.rows.forEach((row, r) => {
      const t = apSvg("text", { x: lay.left - 6, y: lay.top + r * (lay.ch + lay.gap) + lay.ch / 2 + 4,
                                "font-size": 11, "text-anchor": "end", fill: AP_INK }, row.label);
      t.dataset.label = row.label;
      rowLabels.push([t, row.key]);
      svg.appendChild(t);
    });
    cellNodes = [];
    cellOf = new Map();
    const fs = lay.label === "short" ? 11 : 9.5;
    for (let i = 0; i < data.n; i++) {
      const cell = data.cells[i];
      cellOf.set(cell, i);
      const r = Math.floor(cell / g.n_cols), c = cell % g.n_cols;
      const x = lay.left + c * (lay.cw + lay.gap), y = lay.top + r * (lay.ch + lay.gap);
      const p = g.palette[data.roles[i]];
      const cg = apSvg("g", { class: "ap-cell", transform: `translate(${x},${y})`, "data-key": data.keys[i],
                              "data-role": p.role || "unknown", role: "gridcell",
                              "aria-label": data.keys[i] + " " + (p.role || "no role") });
      if (field(i, "faded") === 1) cg.setAttribute("opacity", "0.45");   // role not sure across resamples
      cg.appendChild(apSvg("rect", { width: lay.cw, height: lay.ch, rx: 3, fill: p.fill, stroke: p.colour,
                                     "stroke-width": 1, class: "ap-cellbox" }));
      cg.appendChild(apSvg("rect", { width: lay.cw, height: 3, fill: p.colour }));
      const spark = lay.spark !== false;
      cg.appendChild(apSvg("text", { x: 3, y: spark ? 3 + fs : (lay.ch + 3) / 2 + fs * 0.36, "font-size": fs, fill: p.ink,
                                     "font-weight": 600 }, word(p)));
      if (data.S && spark) {
        const y0 = 5 + fs + 2, y1 = lay.ch - 3;
        let d = "", pen = false;
        for (let k = 0; k < data.S; k++) {
          const v = data.spark[i * data.S + k];
          if (v === 255) { pen = false; continue; }
          const px = 3 + (lay.cw - 6) * (k / Math.max(1, data.S - 1));
          const py = y1 - (y1 - y0) * v / 254;
          d += (pen ? "L" : "M") + px.toFixed(1) + " " + py.toFixed(1);
          pen = true;
        }
        if (d) cg.appendChild(apSvg("path", { d, fill: "none", stroke: p.ink, "stroke-width": 1.1, "stroke-opacity": 0.8 }));
      }
      cg.addEventListener("mouseenter", (e) => showTip(i, e));
      cg.addEventListener("mousemove", (e) => showTip(i, e));
      cg.addEventListener("mouseleave", () => { tip.style.display = "none"; });
      cg.addEventListener("click", () => { moveCursor(i); select(i); });
      cellNodes.push(cg);
      svg.appendChild(cg);
    }
    svg.addEventListener("keydown", (e) => {
      if (!data.n) return;
      let i = cursor < 0 ? 0 : cursor;
      const cell = data.cells[i];
      let r = Math.floor(cell / g.n_cols), c = cell % g.n_cols;
      const moves = { ArrowLeft: [0, -1], ArrowRight: [0, 1], ArrowUp: [-1, 0], ArrowDown: [1, 0] };
      if (e.key in moves) {
        e.preventDefault();
        if (cursor < 0) { moveCursor(0); showTip(0, null); return; }
        const [dr, dc] = moves[e.key];
        for (let s = 0; s < Math.max(g.n_cols, data.rows.length); s++) {
          r += dr; c += dc;
          if (r < 0 || c < 0 || r >= data.rows.length || c >= g.n_cols) return;
          const j = cellOf.get(r * g.n_cols + c);
          if (j !== undefined) { moveCursor(j); showTip(j, null); return; }
        }
      } else if (e.key === "Enter" || e.key === " ") {
        e.preventDefault();
        if (cursor < 0) moveCursor(0);
        select(cursor);
      } else if (e.key === "Escape") {
        tip.style.display = "none";
      }
    });
    svg.addEventListener("focus", () => { if (cursor < 0 && data.n) moveCursor(Math.max(0, data.keys.indexOf(model.get("selected")))); });
    svg.addEventListener("blur", () => { tip.style.display = "none"; });
    const wrap = apEl("div", "ap-gridwrap");
    wrap.appendChild(svg);
    root.appendChild(wrap);
    root.appendChild(tip);
    root.appendChild(live);
    root.appendChild(apCaution(model.get("caution")));
    paintSelection();
    paintMarks();
    paintFilter();
  }

  draw();
  const redraw = () => draw();
  model.on("change:grid", redraw);
  model.on("change:roles", redraw);
  model.on("change:numbers", redraw);
  model.on("change:spark", redraw);
  model.on("change:selected", paintSelection);
  model.on("change:marks", paintMarks);
  model.on("change:filters", paintFilter);
  return () => {
    model.off("change:filters", paintFilter);
    model.off("change:grid", redraw); model.off("change:roles", redraw);
    model.off("change:numbers", redraw); model.off("change:spark", redraw);
    model.off("change:selected", paintSelection); model.off("change:marks", paintMarks);
  };
}

export default { render: atlasRender };
