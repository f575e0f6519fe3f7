// attnpos report: the card of any head, drawn in the page when its atlas cell is clicked. The numbers come from
// the JSON block #rp-heads (written by attnpos.views.data.all_cards_payload); the drawing is the card widget's
// own cardRender (card.js, included before this), fed by a small read-only stand-in for the widget model.
// User strings (tokens, evidence, finding bodies) only ever reach the page through textContent.

(function () {
  const block = document.getElementById("rp-heads");
  const panel = document.getElementById("rp-card");
  if (!block || !panel) return;
  const D = JSON.parse(block.textContent);
  const b64 = (s) => { const bin = atob(s || ""); const a = new Uint8Array(bin.length); for (let i = 0; i < bin.length; i++) a[i] = bin.charCodeAt(i); return a.buffer; };
  const numbers = new Float32Array(b64(D.numbers));
  const prof = new Uint8Array(b64(D.profile));
  const plo = new Float32Array(b64(D.profile_low)), pspan = new Float32Array(b64(D.profile_span));
  const K = D.fields.length, nb = D.nb;
  const index = new Map(D.keys.map((k, i) => [k, i]));

  // repeated words are stored once (data.all_cards_payload); a word every head shares is one index, not a list
  const word = (name, i) => D.values[typeof D[name] === "number" ? D[name] : D[name][i]];

  function state(i) {
    const info = { key: D.keys[i], role: word("roles", i) || null, tags: word("tags", i), evidence: D.evidence[i],
                   shift_kind: word("shift_kind", i), shift_verdict: word("shift_verdict", i),
                   shift_how: word("shift_how", i), anchor_like: D.anchor_like[i] === 1 };
    D.fields.forEach((f, k) => { const v = numbers[i * K + k]; info[f] = Number.isFinite(v) ? v : null; });
    // the profile, decoded from its uint8 codes (255 = not measured)
    const arr = new Float32Array(4 * nb);
    for (let k = 0; k < nb; k++) arr[k] = D.distance[k];
    for (let part = 0; part < 3; part++)
      for (let k = 0; k < nb; k++) {
        const c = prof[(i * 3 + part) * nb + k];
        arr[(part + 1) * nb + k] = c === 255 ? NaN : plo[i] + (c / 254) * pspan[i];
      }
    // the slope line y = b − slope·δ over the profile's δ ≥ 0 points (attnpos.views.data.slope_line's rule)
    const line = [];
    if (info.slope !== null && info.intercept !== null)
      for (let k = 0; k < nb; k++) if (D.distance[k] >= 0 && Number.isFinite(arr[nb + k])) line.push([D.distance[k], info.intercept - info.slope * D.distance[k]]);
    info.slope_line = line;
    const findings = (D.findings || []).filter((r) => r.target === info.key);
    return { info, profile: arr.buffer, texts: [], text: -1, map_codes: new ArrayBuffer(0), map_meta: {}, top_keys: [],
             findings, caution: "", colours: { palette: D.palette, parts: D.parts }, head: info.key, lut: new ArrayBuffer(0) };
  }

  function show(key) {
    const i = index.get(key);
    if (i === undefined) return false;
    const s = state(i);
    const model = { get: (k) => s[k], set() {}, save_changes() {}, send() {}, on() {}, off() {} };
    const el = document.createElement("div");
    panel.replaceChildren(el);
    cardRender({ model, el });
    panel.hidden = false;
    return true;
  }

  document.addEventListener("click", (e) => {
    const a = e.target.closest && e.target.closest("a[data-head]");
    if (!a) return;
    if (show(a.getAttribute("data-head"))) {
      e.preventDefault();
      panel.scrollIntoView({ block: "nearest" });
    }
  });
  // ---- filters over the static atlas: role (click the legend), layer range, strength (the role's own strength
  // column); the rule of attnpos.views.data.atlas_keep, on the numbers the atlas widget gets
  const strength = new Float32Array(b64(D.strength));
  const view = document.querySelector("#atlas .apx-atlas-view");
  if (view) {
    const cells = new Map([...view.querySelectorAll("a[data-head] > g.apx-cell")]
      .map((g) => [g.parentNode.getAttribute("data-head"), g]));
    const f = { roles: null, lo: null, hi: null, strength: 0 };
    const shown = apEl("span", "apx-sub");
    const paint = () => {
      let n = 0;
      D.keys.forEach((k, i) => {
        const role = word("roles", i);
        let keep = !f.roles || f.roles.has(role);
        if (f.lo !== null && D.layer[i] < f.lo) keep = false;
        if (f.hi !== null && D.layer[i] > f.hi) keep = false;
        if (f.strength > 0 && Number.isFinite(strength[i]) && strength[i] < f.strength) keep = false;
        const g = cells.get(k);
        if (g) g.classList.toggle("apx-out", !keep);
        if (keep) n++;
      });
      shown.textContent = n === D.keys.length ? "showing all " + n + " heads" : "showing " + n + " of " + D.keys.length + " heads";
      view.querySelectorAll(".apx-legend span[data-role]").forEach((s) => s.classList.toggle("apx-off", !!f.roles && !f.roles.has(s.dataset.role)));
    };
    const allRoles = D.palette.slice(1).map((p) => p.role);
    view.querySelectorAll(".apx-legend span[data-role]").forEach((s) => {
      s.style.cursor = "pointer";
      s.title = "show or hide these heads";
      s.addEventListener("click", () => {
        const r = s.dataset.role;
        const set = f.roles ? new Set(f.roles) : new Set(allRoles);
        if (set.has(r)) set.delete(r); else set.add(r);
        f.roles = set.size === allRoles.length ? null : set;
        paint();
      });
    });
    const bar = apEl("div", "apx-filters");
    const num = (label) => { const e = apEl("input"); e.type = "number"; e.step = 1; e.placeholder = label; e.setAttribute("aria-label", label); e.style.width = "5em"; return e; };
    const lo = num("first"), hi = num("last");
    const onLayers = () => { f.lo = lo.value === "" ? null : parseInt(lo.value, 10); f.hi = hi.value === "" ? null : parseInt(hi.value, 10); paint(); };
    lo.addEventListener("change", onLayers); hi.addEventListener("change", onLayers);
    const st = apEl("input"); st.type = "range"; st.min = 0; st.max = 1; st.step = 0.05; st.value = 0;
    st.setAttribute("aria-label", "least strength of the role");
    const stOut = apEl("span", "apx-sub", "any");
    st.addEventListener("input", () => { f.strength = parseFloat(st.value); stOut.textContent = f.strength > 0 ? "\u2265 " + f.strength.toFixed(2) : "any"; paint(); });
    const clear = apEl("button", null, "show all");
    clear.type = "button";
    clear.addEventListener("click", () => { f.roles = null; f.lo = f.hi = null; f.strength = 0; lo.value = hi.value = ""; st.value = 0; stOut.textContent = "any"; paint(); });
    for (const e of [apEl("span", "apx-sub", "filter: layers"), lo, apEl("span", "apx-sub", "to"), hi,
                     apEl("span", "apx-sub", "\u00b7 role strength"), st, stOut, clear, shown]) bar.appendChild(e);
    const legend = view.querySelector(".apx-legend");
    if (legend) legend.after(bar);
    paint();
  }

  const start = decodeURIComponent(location.hash.slice(1));
  const first = D.keys.find((k) => "head-" + k.replace(/[:.]/g, "-") === start);
  if (first) show(first);
})();
