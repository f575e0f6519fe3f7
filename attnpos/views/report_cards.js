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

  const word = (name, i) => D.values[D[name][i]];      // repeated words are stored once (data.all_cards_payload)

  function state(i) {
    const info = { key: D.keys[i], role: word("roles", i) || null, tags: word("tags", i), evidence: D.evidence[i],
                   shift_kind: word("shift_kind", i), shift_verdict: word("shift_verdict", i),
                   shift_how: word("shift_how", i), anchor_like: D.anchor_like[i] };
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
  const start = decodeURIComponent(location.hash.slice(1));
  const first = D.keys.find((k) => "head-" + k.replace(/[:.]/g, "-") === start);
  if (first) show(first);
})();
