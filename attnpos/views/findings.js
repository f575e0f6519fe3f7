// attnpos findings panel: write a note on the selected head, its layer or the model, with a status; list all
// notes as a table (stale ones marked); edit or remove. Every change goes to the kernel, which writes the store.

function findingsRender({ model, el }) {
  const root = apEl("div", "ap-view ap-findings");
  el.appendChild(root);
  let editing = null;      // id of the finding being edited
  let armed = null;        // id whose remove button was pressed once
  let draft = { body: "", status: null, scope: "head" };

  function send(msg) { model.send(msg); }

  function form() {
    const f = apEl("div", "ap-form");
    const head = model.get("head") || "";
    const statuses = model.get("statuses") || [];
    const scopeRow = apEl("div", "ap-scope");
    scopeRow.appendChild(apEl("span", "ap-sub", editing ? "editing a finding on " : "new finding on "));
    const targets = model.get("targets") || {};
    if (editing) {
      const row = (model.get("rows") || []).find((r) => r.id === editing);
      scopeRow.appendChild(apEl("b", null, row ? row.target : "?"));
    } else {
      for (const [scope, label] of [["head", "head"], ["layer", "layer"], ["model", "model"]]) {
        const t = targets[scope];
        const lab = apEl("label", "ap-radio");
        const r = apEl("input");
        r.type = "radio"; r.name = "ap-scope-" + model.cid; r.value = scope;
        r.checked = draft.scope === scope;
        r.disabled = !t;
        r.addEventListener("change", () => { draft.scope = scope; });
        lab.appendChild(r);
        // "head L2.H1", "layer L2", and just "model" (its target is the word itself)
        lab.appendChild(document.createTextNode(" " + label + (t && t !== label ? " " + t : "")));
        scopeRow.appendChild(lab);
      }
    }
    f.appendChild(scopeRow);
    const row2 = apEl("div", "ap-formrow");
    const sel = apEl("select", "ap-statussel");
    sel.setAttribute("aria-label", "status");
    for (const s of statuses) {
      const o = apEl("option", null, s);
      o.value = s;
      if (s === (draft.status || statuses[0])) o.selected = true;
      sel.appendChild(o);
    }
    sel.addEventListener("change", () => { draft.status = sel.value; });
    const ta = apEl("textarea", "ap-body");
    ta.rows = 3;
    ta.placeholder = "what you concluded, and on what evidence (e.g. shift test stays, ablation drops copy accuracy)";
    ta.setAttribute("aria-label", "finding text");
    ta.value = draft.body;
    ta.addEventListener("input", () => { draft.body = ta.value; });
    row2.appendChild(sel);
    row2.appendChild(ta);
    f.appendChild(row2);
    const btns = apEl("div", "ap-formrow");
    const save = apEl("button", "ap-save", editing ? "save changes" : "add finding");
    save.addEventListener("click", () => {
      const body = draft.body.trim();
      if (!body) { msgLine.textContent = "write something first"; return; }
      const status = draft.status || statuses[0];
      if (editing) send({ action: "edit", id: editing, body, status });
      else send({ action: "add", scope: draft.scope, body, status });
      draft = { body: "", status: null, scope: draft.scope };
      editing = null;
      draw();
    });
    btns.appendChild(save);
    if (editing) {
      const cancel = apEl("button", "ap-cancel", "cancel");
      cancel.addEventListener("click", () => { editing = null; draft = { body: "", status: null, scope: draft.scope }; draw(); });
      btns.appendChild(cancel);
    }
    const reload = apEl("button", "ap-reload", "re-read file");
    reload.addEventListener("click", () => send({ action: "refresh" }));
    btns.appendChild(reload);
    f.appendChild(btns);
    return f;
  }

  const msgLine = apEl("div", "ap-msg");

  function table() {
    const rows = model.get("rows") || [];
    if (!rows.length) return apEl("p", "ap-none", "No findings recorded yet.");
    const t = apEl("table", "ap-ftable");
    const h = apEl("tr");
    for (const s of ["target", "status", "against this scan", "note", "updated", ""]) h.appendChild(apEl("th", null, s));
    t.appendChild(h);
    const head = model.get("head") || "";
    for (const r of rows) {
      const tr = apEl("tr", r.stale ? "ap-row-stale" : null);
      tr.dataset.id = r.id;
      if (r.target === head) tr.classList.add("ap-row-here");
      tr.appendChild(apEl("td", "ap-target", r.target));
      const st = apEl("td");
      st.appendChild(apEl("span", "ap-status", r.status));
      tr.appendChild(st);
      tr.appendChild(apEl("td", r.stale ? "ap-stale" : null, r.stale ? "stale" : "current"));
      tr.appendChild(apEl("td", "ap-fbody", apPlain(r.body)));
      tr.appendChild(apEl("td", "ap-sub", r.updated || r.created || ""));
      const act = apEl("td", "ap-actions");
      const ed = apEl("button", "ap-edit", "edit");
      ed.addEventListener("click", () => { editing = r.id; draft = { body: r.body, status: r.status, scope: draft.scope }; draw(); });
      const rm = apEl("button", "ap-remove", armed === r.id ? "confirm remove" : "remove");
      rm.addEventListener("click", () => {
        if (armed === r.id) { armed = null; send({ action: "remove", id: r.id }); }
        else { armed = r.id; draw(); }
      });
      act.appendChild(ed);
      act.appendChild(rm);
      tr.appendChild(act);
      t.appendChild(tr);
    }
    return t;
  }

  function draw() {
    root.replaceChildren();
    root.appendChild(apEl("h3", null, "Findings"));
    const p = model.get("path");
    root.appendChild(apEl("p", "ap-sub", (p ? "store: " + p + " \u00b7 " : "") +
      "stale = made on another checkpoint or other texts: shown, not applied."));
    root.appendChild(form());
    msgLine.textContent = model.get("message") || "";
    root.appendChild(msgLine);
    root.appendChild(table());
  }
  draw();
  const names = ["rows", "head", "targets", "statuses", "message", "path"];
  for (const n of names) model.on("change:" + n, draw);
  return () => { for (const n of names) model.off("change:" + n, draw); };
}

export default { render: findingsRender };
