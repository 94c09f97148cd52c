/* The service's page: token, earlier work, upload, design form, run, progress, report.
   No libraries. */
"use strict";

(function () {
  const TOKEN_KEY = "samesource.token";
  const ROLES = [["substantive", "Substantive"], ["marker", "Marker"], ["method", "Method"]];
  const $ = (id) => document.getElementById(id);

  const state = {
    dataset: null,        // the POST /v1/datasets answer (columns, numeric_columns, draft_design)
    analysisId: null,
    pollTimer: null,
    reportUrl: null,
    jsonUrl: null,
    nextKey: 1,
    sources: new Map(),   // second sources: name -> {dataset, box}
    pendingSources: {},   // a loaded design's settings for sources not uploaded yet
  };
  const MAIN_SOURCE = "";  // a construct's source select: "" is the survey file itself
  const SOURCE_KINDS = [["other_rater", "Another rater (a manager, a colleague)"],
                        ["later_wave", "A later wave of the same people"], ["records", "Records"]];

  // ---- messages --------------------------------------------------------------------------

  function say(text) {
    const s = $("status");
    s.textContent = "";
    // a fresh text node so that repeated messages are announced again
    window.setTimeout(() => { s.textContent = text; }, 30);
  }

  function clearError() {
    const a = $("alert");
    a.hidden = true;
    a.textContent = "";
    document.querySelectorAll("[aria-invalid='true']").forEach((el) => el.removeAttribute("aria-invalid"));
  }

  // focusEl false: the field names no control of the form as it is now (an earlier analysis)
  function showError(message, field, focusEl) {
    const a = $("alert");
    a.textContent = "";
    const p = document.createElement("p");
    p.textContent = message;
    a.appendChild(p);
    if (field) {
      const f = document.createElement("p");
      f.className = "field-name";
      f.textContent = "Field: " + field;
      a.appendChild(f);
    }
    a.hidden = false;
    const target = focusEl === false ? null : (focusEl || elementForField(field));
    if (target) {
      target.setAttribute("aria-invalid", "true");
      const go = el("button", { type: "button", class: "secondary go" }, "Go to this field");
      go.addEventListener("click", () => {
        const focusable = target.matches("input, select, textarea, button") ? target
          : target.querySelector("input, select, textarea, button");
        target.scrollIntoView({ block: "center" });
        if (focusable) focusable.focus();
      });
      a.appendChild(go);
    }
    a.focus();
  }

  class ApiFailure extends Error {
    constructor(status, code, message, field) {
      super(message);
      this.status = status;
      this.code = code;
      this.field = field;
    }
  }

  function reportFailure(e, fallbackField) {
    if (e instanceof ApiFailure) {
      showError(e.message, e.field || fallbackField || null);
    } else {
      showError("The service could not be reached (" + (e && e.message ? e.message : e) + ").", null);
    }
  }

  // ---- the API ---------------------------------------------------------------------------

  function token() { return sessionStorage.getItem(TOKEN_KEY) || ""; }

  async function api(method, path, body, { raw = false } = {}) {
    if (!token()) {
      throw new ApiFailure(401, "no_token", "Enter your API token first (step 1).", "token");
    }
    const headers = { Authorization: "Bearer " + token() };
    let payload = body;
    if (body !== undefined && !(body instanceof FormData)) {
      headers["Content-Type"] = "application/json";
      payload = JSON.stringify(body);
    }
    const resp = await fetch(path, { method, headers, body: payload, cache: "no-store" });
    if (!resp.ok) {
      let err = null;
      try { err = (await resp.json()).error; } catch (_) { /* not JSON */ }
      const msg = err && err.message ? err.message : "The service answered " + resp.status + ".";
      throw new ApiFailure(resp.status, err ? err.code : "http_" + resp.status, msg,
                           err ? err.field : null);
    }
    if (raw) return resp;
    return resp.status === 204 ? null : resp.json();
  }

  // ---- step 1: token ---------------------------------------------------------------------

  function showTokenState() {
    const has = !!token();
    $("token-state").textContent = has ? "A token is in use for this tab." : "No token yet.";
    $("token-state").className = "state" + (has ? " ok" : "");
    $("token-forget").hidden = !has;
    $("history-step").hidden = !has;
  }

  $("token-form").addEventListener("submit", (ev) => {
    ev.preventDefault();
    clearError();
    const value = $("token").value.trim();
    if (!value) {
      showError("Enter a token: it is the line `samesource token create` printed.", "token", $("token"));
      return;
    }
    sessionStorage.setItem(TOKEN_KEY, value);
    $("token").value = "";
    showTokenState();
    say("Token kept for this tab.");
    refreshHistory("Token kept for this tab.");
  });

  $("token-forget").addEventListener("click", () => {
    sessionStorage.removeItem(TOKEN_KEY);
    forgetHistory();
    showTokenState();
    say("Token forgotten.");
    $("token").focus();
  });

  // ---- step 2: upload --------------------------------------------------------------------

  $("upload-form").addEventListener("submit", async (ev) => {
    ev.preventDefault();
    clearError();
    const f = $("file").files[0];
    if (!f) {
      showError("Choose a survey file to upload.", "file", $("file"));
      return;
    }
    const fd = new FormData();
    fd.append("file", f, f.name);
    $("upload-btn").disabled = true;
    say("Uploading " + f.name + "…");
    try {
      const ds = await api("POST", "/v1/datasets", fd);
      showDataset(ds);
      say("Uploaded " + ds.name + ": " + ds.rows + " rows, " + ds.columns.length +
          " columns. The draft design is in step 3.");
      refreshHistory();
    } catch (e) {
      reportFailure(e, "file");
      if (e.field === "file" || !e.field) $("file").setAttribute("aria-invalid", "true");
    } finally {
      $("upload-btn").disabled = false;
    }
  });

  function showDataset(ds) {
    state.dataset = ds;
    $("dataset").hidden = false;
    const warn = (ds.warnings || []).length ? " " + ds.warnings.length + " warning(s) while reading." : "";
    $("dataset-summary").textContent = "“" + ds.name + "”: " + ds.rows + " rows, " +
      ds.columns.length + " columns (" + ds.format + ")." + warn;
    const numeric = new Set(ds.numeric_columns || ds.columns);
    const texts = new Set((ds.warnings || []).filter((w) => w.code === "text_answers").map((w) => w.column));
    const ul = $("columns");
    ul.textContent = "";
    ds.columns.forEach((c) => {
      const li = document.createElement("li");
      li.textContent = c;
      if (texts.has(c)) {
        li.className = "text";
        li.textContent = c + " (answer texts)";
      } else if (!numeric.has(c)) {
        li.className = "text";
        li.textContent = c + " (text)";
      }
      ul.appendChild(li);
    });
    $("column-count").textContent = String(ds.columns.length);
    showSheets(ds);
    const warnings = $("dataset-warnings");
    warnings.textContent = "";
    (ds.warnings || []).forEach((w) => warnings.appendChild(el("li", { text: w.message })));
    warnings.hidden = !(ds.warnings || []).length;
    const notes = $("draft-notes");
    notes.textContent = "";
    (ds.draft_notes || []).forEach((n) => notes.appendChild(el("li", { text: "Drafted " + n })));
    (ds.draft_left_out || []).forEach((d) => notes.appendChild(el("li", { text: "Left out " + d.column + ": " + d.reason })));
    notes.hidden = !notes.children.length;
    state.sources.clear();  // a new survey file: its sources are added again
    $("sources").textContent = "";
    loadDesign(ds.draft_design || { constructs: {}, paths: [] });
    $("design-step").hidden = false;
    $("run-step").hidden = false;
    resetProgress();
  }

  // a workbook's sheets: listed with their sizes, the one read chosen in step 4
  function showSheets(ds) {
    const sheets = ds.sheets || [];
    const select = $("sheet");
    select.textContent = "";
    sheets.forEach((sh) => {
      const o = el("option", { value: sh.name, text: sh.name + " (" + sh.rows + " rows, " + sh.columns + " columns)" });
      if (sh.name === ds.sheet) o.selected = true;
      select.appendChild(o);
    });
    $("sheet-field").hidden = sheets.length < 2;
    $("dataset-sheets").hidden = sheets.length < 2;
    $("dataset-sheets").textContent = sheets.length < 2 ? "" :
      "Sheets: " + sheets.map((sh) => "“" + sh.name + "” (" + sh.rows + " rows)").join(", ") +
      ". Read: “" + ds.sheet + "”, the sheet with the most rows under item-like columns; choose another in step 4.";
  }

  // ---- step 3: the design form -----------------------------------------------------------

  // columns that can be items: those holding numbers, and those holding answer texts (which
  // answer_labels map to numbers)
  function numericColumns(ds) {
    ds = ds || state.dataset;
    if (!ds) return [];
    const usable = new Set(ds.numeric_columns || ds.columns);
    (ds.warnings || []).forEach((w) => { if (w.code === "text_answers") usable.add(w.column); });
    return ds.columns.filter((c) => usable.has(c));
  }

  function el(tag, attrs, ...children) {
    const e = document.createElement(tag);
    for (const [k, v] of Object.entries(attrs || {})) {
      if (k === "class") e.className = v;
      else if (k === "text") e.textContent = v;
      else if (v !== null && v !== undefined && v !== false) e.setAttribute(k, v === true ? "" : v);
    }
    children.forEach((c) => e.appendChild(typeof c === "string" ? document.createTextNode(c) : c));
    return e;
  }

  function checkbox(idBase, value, labelText, checked, cls) {
    const id = idBase + "-" + value.replace(/[^A-Za-z0-9_-]/g, "_");
    const input = el("input", { type: "checkbox", id, value });
    input.checked = !!checked;
    return el("div", { class: "choice" + (cls ? " " + cls : "") }, input,
              el("label", { for: id, text: labelText }));
  }

  function constructBoxes() { return Array.from(document.querySelectorAll("#constructs .construct")); }
  function pathBoxes() { return Array.from(document.querySelectorAll("#paths .path")); }

  function addConstruct(name, spec, focus) {
    const key = "c" + state.nextKey++;
    const box = el("fieldset", { class: "construct", "data-key": key });
    if (spec.answer_labels) box.dataset.labels = JSON.stringify(spec.answer_labels);  // kept as loaded
    const legend = el("legend", { text: "Construct" });
    const nameInput = el("input", { type: "text", id: key + "-name", value: name, autocomplete: "off",
                                    spellcheck: "false", "data-role": "name" });
    const roleSelect = el("select", { id: key + "-role", "data-role": "role" });
    ROLES.forEach(([v, t]) => {
      const o = el("option", { value: v, text: t });
      if ((spec.role || "substantive") === v) o.selected = true;
      roleSelect.appendChild(o);
    });
    const remove = el("button", { type: "button", class: "remove" }, "Remove construct");
    box.append(legend,
      el("div", { class: "head" },
        el("div", { class: "field" }, el("label", { for: key + "-name", text: "Name" }), nameInput),
        el("div", { class: "field" }, el("label", { for: key + "-role", text: "Role" }), roleSelect),
        remove));
    box.dataset.source = spec.source || MAIN_SOURCE;
    box.dataset.sameAs = spec.same_as || "";
    const sourceSelect = el("select", { id: key + "-source", "data-role": "source" });
    const sameSelect = el("select", { id: key + "-same-as", "data-role": "same-as" });
    const links = el("div", { class: "links", "data-role": "links" },
      el("div", { class: "field" }, el("label", { for: key + "-source", text: "Items from" }), sourceSelect),
      el("div", { class: "field", "data-role": "same-as-field" },
         el("label", { for: key + "-same-as", text: "Measures again (the same thing, from the survey or another source)" }),
         sameSelect));
    box.append(links);
    sourceSelect.addEventListener("change", () => {
      box.dataset.source = sourceSelect.value;
      renderItems(box);
      renderLinks(box);
      markTaken();
    });
    sameSelect.addEventListener("change", () => { box.dataset.sameAs = sameSelect.value; });

    const itemsSet = el("fieldset", { class: "checks", "data-role": "items" },
                        el("legend", { text: "Items" }));
    const list = el("div", { class: "check-list" });
    itemsSet.appendChild(list);
    const showAll = el("input", { type: "checkbox", id: key + "-show-all", "data-role": "show-all" });
    itemsSet.appendChild(el("div", { class: "choice show-all" }, showAll,
      el("label", { for: key + "-show-all", text: "Also list columns used by other constructs" })));
    showAll.addEventListener("change", markTaken);

    const revSet = el("fieldset", { class: "checks", "data-role": "reverse" },
                      el("legend", { text: "Reverse-keyed items" }));
    box.append(itemsSet, revSet);
    $("constructs").appendChild(box);
    renderItems(box, new Set(spec.items || []));
    renderLinks(box);
    renderReverse(box, new Set(spec.reverse || []));
    updateLegend(box);

    nameInput.addEventListener("input", () => { updateLegend(box); refreshPaths(); });
    roleSelect.addEventListener("change", () => { refreshPaths(); });
    list.addEventListener("change", () => { renderReverse(box); markTaken(); });
    remove.addEventListener("click", () => {
      const label = nameInput.value || "the construct";
      const next = box.nextElementSibling || box.previousElementSibling;
      box.remove();
      refreshPaths();
      markTaken();
      say("Removed " + label + ".");
      (next ? next.querySelector("input[data-role='name']") : $("add-construct")).focus();
    });
    if (focus) nameInput.focus();
    return box;
  }

  // the item choices of a construct: the columns of the file its items come from
  function renderItems(box, keep) {
    const list = box.querySelector("[data-role='items'] .check-list");
    const chosen = keep || new Set(checkedValues(list));
    const src = state.sources.get(box.dataset.source);
    const cols = box.dataset.source && src ? numericColumns(src.dataset).slice() :
      box.dataset.source ? [] : numericColumns().slice();
    chosen.forEach((c) => { if (!cols.includes(c)) cols.push(c); });
    list.textContent = "";
    cols.forEach((c) => list.appendChild(checkbox(box.dataset.key + "-item", c, c, chosen.has(c))));
    renderReverse(box);
  }

  // the construct's source (the survey or a second source) and what it measures again
  function renderLinks(box) {
    const sourceSelect = box.querySelector("select[data-role='source']");
    const names = Array.from(state.sources.keys());
    if (box.dataset.source && !names.includes(box.dataset.source)) names.push(box.dataset.source);
    sourceSelect.textContent = "";
    sourceSelect.appendChild(el("option", { value: MAIN_SOURCE, text: "The survey file" }));
    names.forEach((n) => sourceSelect.appendChild(el("option", {
      value: n, text: "Source “" + n + "”" + (state.sources.has(n) ? "" : " (file not uploaded yet)") })));
    sourceSelect.value = box.dataset.source;
    box.querySelector("[data-role='links']").hidden = !names.length;
    const sameSelect = box.querySelector("select[data-role='same-as']");
    sameSelect.textContent = "";
    sameSelect.appendChild(el("option", { value: "", text: "Nothing (a construct of its own)" }));
    constructBoxes().filter((b) => b !== box && (b.dataset.source || MAIN_SOURCE) !== box.dataset.source)
      .forEach((b) => {
        const n = b.querySelector("input[data-role='name']").value.trim();
        if (n) sameSelect.appendChild(el("option", { value: n, text: n }));
      });
    if (box.dataset.sameAs && !Array.from(sameSelect.options).some((o) => o.value === box.dataset.sameAs)) {
      sameSelect.appendChild(el("option", { value: box.dataset.sameAs, text: box.dataset.sameAs }));
    }
    sameSelect.value = box.dataset.sameAs;
    box.querySelector("[data-role='same-as-field']").hidden = !box.dataset.source && !box.dataset.sameAs;
  }

  function refreshLinks() { constructBoxes().forEach(renderLinks); }

  function updateLegend(box) {
    const name = box.querySelector("input[data-role='name']").value.trim();
    box.querySelector("legend").textContent = name ? "Construct “" + name + "”" : "New construct";
  }

  function checkedValues(container) {
    return Array.from(container.querySelectorAll("input[type='checkbox']:checked")).map((i) => i.value);
  }

  function renderReverse(box, keep) {
    const revSet = box.querySelector("[data-role='reverse']");
    const before = keep || new Set(checkedValues(revSet));
    const items = checkedValues(box.querySelector("[data-role='items']"));
    revSet.querySelectorAll(".check-list, .empty").forEach((n) => n.remove());
    if (!items.length) {
      revSet.appendChild(el("p", { class: "empty", text: "Choose items first." }));
      return;
    }
    const list = el("div", { class: "check-list" });
    items.forEach((c) => list.appendChild(checkbox(box.dataset.key + "-rev", c, c, before.has(c))));
    revSet.appendChild(list);
  }

  // an item belongs to one construct: show where a column is already used
  function markTaken() {
    const owner = new Map();
    constructBoxes().forEach((b) => {
      const name = b.querySelector("input[data-role='name']").value.trim() || "another construct";
      checkedValues(b.querySelector("[data-role='items']")).forEach((c) => {
        if (!owner.has(c)) owner.set(c, []);
        owner.get(c).push({ key: b.dataset.key, name });
      });
    });
    constructBoxes().forEach((b) => {
      b.querySelectorAll("[data-role='items'] .check-list .choice").forEach((ch) => {
        const input = ch.querySelector("input");
        const others = (owner.get(input.value) || []).filter((o) => o.key !== b.dataset.key);
        let note = ch.querySelector(".taken-note");
        const showAll = b.querySelector("input[data-role='show-all']").checked;
        ch.hidden = !!(others.length && !input.checked && !showAll);
        if (others.length && !input.checked) {
          ch.classList.add("taken");
          if (!note) { note = el("span", { class: "taken-note" }); ch.appendChild(note); }
          note.textContent = "(in " + others[0].name + ")";
        } else {
          ch.classList.remove("taken");
          if (note) note.remove();
        }
      });
    });
  }

  function substantive() {
    return constructBoxes()
      .filter((b) => b.querySelector("select[data-role='role']").value === "substantive")
      .map((b) => ({ key: b.dataset.key, name: b.querySelector("input[data-role='name']").value.trim() }));
  }

  function keyForName(name) {
    const b = constructBoxes().find((x) => x.querySelector("input[data-role='name']").value.trim() === name);
    return b ? b.dataset.key : null;
  }

  function addPath(outcomeKey, predictorKeys, focus) {
    const pk = "p" + state.nextKey++;
    const box = el("fieldset", { class: "path", "data-key": pk });
    box.dataset.outcome = outcomeKey || "";
    box.dataset.predictors = (predictorKeys || []).join(" ");
    const select = el("select", { id: pk + "-outcome", "data-role": "outcome" });
    const remove = el("button", { type: "button", class: "remove" }, "Remove path");
    box.append(el("legend", { text: "Path" }),
      el("div", { class: "head" },
        el("div", { class: "field" }, el("label", { for: pk + "-outcome", text: "Outcome" }), select),
        el("div"),
        remove),
      el("fieldset", { class: "checks", "data-role": "predictors" }, el("legend", { text: "Predictors" })));
    $("paths").appendChild(box);
    select.addEventListener("change", () => { box.dataset.outcome = select.value; renderPath(box); });
    remove.addEventListener("click", () => {
      const next = box.nextElementSibling || box.previousElementSibling;
      box.remove();
      say("Path removed.");
      (next ? next.querySelector("select") : $("add-path")).focus();
    });
    renderPath(box);
    if (focus) select.focus();
    return box;
  }

  function renderPath(box) {
    const subs = substantive();
    const select = box.querySelector("select[data-role='outcome']");
    const predSet = box.querySelector("[data-role='predictors']");
    // remember the current choices (by construct key, so renaming keeps them)
    if (predSet.querySelector(".check-list")) {
      box.dataset.predictors = checkedValues(predSet).join(" ");
    }
    const chosen = new Set(box.dataset.predictors.split(" ").filter(Boolean));
    select.textContent = "";
    select.appendChild(el("option", { value: "", text: "Choose an outcome" }));
    subs.forEach((s) => {
      const o = el("option", { value: s.key, text: s.name || "(unnamed)" });
      if (s.key === box.dataset.outcome) o.selected = true;
      select.appendChild(o);
    });
    if (!subs.some((s) => s.key === box.dataset.outcome)) select.value = "";
    const legend = box.querySelector("legend");
    const outName = (subs.find((s) => s.key === select.value) || {}).name;
    legend.textContent = outName ? "Path to “" + outName + "”" : "Path";
    predSet.querySelectorAll(".check-list, .empty").forEach((n) => n.remove());
    const options = subs.filter((s) => s.key !== select.value);
    if (!options.length) {
      predSet.appendChild(el("p", { class: "empty", text: "Needs at least two substantive constructs." }));
      return;
    }
    const list = el("div", { class: "check-list" });
    options.forEach((s) => {
      const ch = checkbox(box.dataset.key + "-pred", s.key, s.name || "(unnamed)", chosen.has(s.key));
      list.appendChild(ch);
    });
    list.addEventListener("change", () => { box.dataset.predictors = checkedValues(list).join(" "); });
    predSet.appendChild(list);
  }

  function refreshPaths() { pathBoxes().forEach(renderPath); refreshLinks(); }

  function fillColumnSelect(select, value) {
    select.textContent = "";
    select.appendChild(el("option", { value: "", text: "None" }));
    (state.dataset ? state.dataset.columns : []).forEach((c) => {
      const o = el("option", { value: c, text: c });
      select.appendChild(o);
    });
    if (value && !Array.from(select.options).some((o) => o.value === value)) {
      select.appendChild(el("option", { value, text: value }));
    }
    select.value = value || "";
  }

  function loadDesign(d) {
    $("constructs").textContent = "";
    $("paths").textContent = "";
    state.pendingSources = {};
    Object.entries(d.sources || {}).forEach(([name, spec]) => {
      const src = state.sources.get(name);
      if (src) fillSource(src.box, spec || {});
      else state.pendingSources[name] = spec || {};
    });
    Object.entries(d.constructs || {}).forEach(([name, spec]) => addConstruct(name, spec || {}, false));
    markTaken();
    (d.paths || []).forEach((p) => {
      addPath(keyForName(p.outcome), (p.predictors || []).map(keyForName).filter(Boolean), false);
    });
    const rs = d.response_scale || {};
    $("scale-min").value = rs.min ?? "";
    $("scale-max").value = rs.max ?? "";
    $("missing-codes").value = (d.missing_codes || []).join(", ");
    $("answer-labels").value = d.answer_labels ? JSON.stringify(d.answer_labels, null, 1) : "";
    fillColumnSelect($("id-column"), d.id_column);
    fillColumnSelect($("group-column"), d.group_column);
    refreshLinks();
    if ($("json-view").open) $("design-json").value = JSON.stringify(d, null, 2);
  }

  class FormProblem extends Error {
    constructor(message, field, target) { super(message); this.field = field; this.target = target; }
  }

  function readDesign() {
    const constructs = {};
    const names = new Map();
    constructBoxes().forEach((b, i) => {
      const nameInput = b.querySelector("input[data-role='name']");
      const name = nameInput.value.trim();
      if (!name) throw new FormProblem("Construct " + (i + 1) + " has no name.", "constructs[" + (i + 1) + "].name", nameInput);
      if (constructs[name]) throw new FormProblem("Two constructs are called “" + name + "”.", "constructs." + name, nameInput);
      const spec = { items: checkedValues(b.querySelector("[data-role='items']")) };
      const rev = checkedValues(b.querySelector("[data-role='reverse']"));
      if (rev.length) spec.reverse = rev;
      const role = b.querySelector("select[data-role='role']").value;
      if (role !== "substantive") spec.role = role;
      if (b.dataset.labels) spec.answer_labels = JSON.parse(b.dataset.labels);
      if (b.dataset.source) spec.source = b.dataset.source;
      if (b.dataset.sameAs) spec.same_as = b.dataset.sameAs;
      constructs[name] = spec;
      names.set(b.dataset.key, name);
    });
    const design = { constructs, paths: [] };
    pathBoxes().forEach((b, i) => {
      const sel = b.querySelector("select[data-role='outcome']");
      if (!sel.value) throw new FormProblem("Path " + (i + 1) + " has no outcome.", "paths[" + i + "].outcome", sel);
      const preds = b.dataset.predictors.split(" ").filter((k) => k && names.has(k) && k !== sel.value);
      design.paths.push({ outcome: names.get(sel.value), predictors: preds.map((k) => names.get(k)) });
    });
    const lo = $("scale-min").value.trim();
    const hi = $("scale-max").value.trim();
    if (lo === "" || hi === "") {
      throw new FormProblem("Give the lowest and the highest answer the scale offers (such as 1 and 5): " +
                            "reverse-keyed items are recoded with them, and codes such as 99 would " +
                            "otherwise be read as answers.", "response_scale",
                            lo === "" ? $("scale-min") : $("scale-max"));
    }
    design.response_scale = { min: Number(lo), max: Number(hi) };
    const labelsText = $("answer-labels").value.trim();
    if (labelsText) {
      let labels;
      try { labels = JSON.parse(labelsText); } catch (e) { labels = null; }
      if (!labels || typeof labels !== "object" || Array.isArray(labels)) {
        throw new FormProblem("The answer texts must be a JSON object such as {\"Agree\": 4}.", "answer_labels", $("answer-labels"));
      }
      design.answer_labels = labels;
    }
    const codesText = $("missing-codes").value.trim();
    if (codesText) {
      const codes = codesText.split(/[,;\s]+/).filter(Boolean).map((t) => {
        const n = Number(t);
        if (!Number.isFinite(n)) throw new FormProblem("“" + t + "” is not a number.", "missing_codes", $("missing-codes"));
        return n;
      });
      design.missing_codes = codes;
    }
    if ($("id-column").value) design.id_column = $("id-column").value;
    if ($("group-column").value) design.group_column = $("group-column").value;
    const sources = readSources();
    if (Object.keys(sources).length) design.sources = sources;
    return design;
  }

  // ---- second sources: files joined to the survey's rows on ids ---------------------------

  function readSources() {
    const out = {};
    state.sources.forEach((src, name) => {
      const b = src.box;
      const spec = { id_column: b.querySelector("select[data-role='id']").value,
                     kind: b.querySelector("select[data-role='kind']").value };
      if (!spec.id_column) {
        throw new FormProblem("Choose the column of “" + src.dataset.name + "” that holds the ids its rows are " +
                              "joined on.", "sources." + name + ".id_column", b.querySelector("select[data-role='id']"));
      }
      const lo = b.querySelector("input[data-role='min']").value.trim();
      const hi = b.querySelector("input[data-role='max']").value.trim();
      if (lo !== "" && hi !== "") spec.response_scale = { min: Number(lo), max: Number(hi) };
      const codes = b.querySelector("input[data-role='codes']").value.trim();
      if (codes) {
        spec.missing_codes = codes.split(/[,;\s]+/).filter(Boolean).map((t) => {
          const n = Number(t);
          if (!Number.isFinite(n)) {
            throw new FormProblem("“" + t + "” is not a number.", "sources." + name + ".missing_codes",
                                  b.querySelector("input[data-role='codes']"));
          }
          return n;
        });
      }
      out[name] = spec;
    });
    return out;
  }

  function fillSource(box, spec) {
    const idSel = box.querySelector("select[data-role='id']");
    if (spec.id_column) {
      if (!Array.from(idSel.options).some((o) => o.value === spec.id_column)) {
        idSel.appendChild(el("option", { value: spec.id_column, text: spec.id_column }));
      }
      idSel.value = spec.id_column;
    }
    if (spec.kind) box.querySelector("select[data-role='kind']").value = spec.kind;
    const rs = spec.response_scale || {};
    if (rs.min !== undefined) box.querySelector("input[data-role='min']").value = rs.min;
    if (rs.max !== undefined) box.querySelector("input[data-role='max']").value = rs.max;
    if (spec.missing_codes) box.querySelector("input[data-role='codes']").value = spec.missing_codes.join(", ");
  }

  function addSourceBox(name, ds) {
    const key = "s" + state.nextKey++;
    const box = el("fieldset", { class: "source", "data-name": name });
    const idSel = el("select", { id: key + "-id", "data-role": "id" });
    idSel.appendChild(el("option", { value: "", text: "Choose the id column" }));
    ds.columns.forEach((c) => idSel.appendChild(el("option", { value: c, text: c })));
    const kindSel = el("select", { id: key + "-kind", "data-role": "kind" });
    SOURCE_KINDS.forEach(([v, t]) => kindSel.appendChild(el("option", { value: v, text: t })));
    const field = (id, label, input) => el("div", { class: "field" }, el("label", { for: id, text: label }), input);
    const lo = el("input", { id: key + "-min", type: "number", step: "any", "data-role": "min" });
    const hi = el("input", { id: key + "-max", type: "number", step: "any", "data-role": "max" });
    const codes = el("input", { id: key + "-codes", type: "text", "data-role": "codes", placeholder: "e.g. 0" });
    const remove = el("button", { type: "button", class: "remove" }, "Remove source");
    box.append(el("legend", { text: "Source “" + name + "”: " + ds.name + " (" + ds.rows + " rows)" }),
      el("div", { class: "head" }, field(key + "-id", "Its id column", idSel), field(key + "-kind", "What it is", kindSel),
         field(key + "-min", "Lowest answer", lo), field(key + "-max", "Highest answer", hi),
         field(key + "-codes", "Codes meaning “no answer”", codes), remove));
    $("sources").appendChild(box);
    const draft = ds.draft_design || {};
    fillSource(box, { id_column: draft.id_column, response_scale: draft.response_scale,
                      missing_codes: draft.missing_codes });
    state.sources.set(name, { dataset: ds, box });
    remove.addEventListener("click", () => {
      state.sources.delete(name);
      box.remove();
      constructBoxes().filter((b) => b.dataset.source === name).forEach((b) => { b.dataset.source = MAIN_SOURCE; renderItems(b); });
      refreshLinks();
      say("Removed source " + name + "; its constructs now take their items from the survey file.");
      $("source-name").focus();
    });
    return box;
  }

  $("add-source").addEventListener("click", async () => {
    clearError();
    const name = $("source-name").value.trim();
    const f = $("source-file").files[0];
    if (!state.dataset) { showError("Upload the survey file first (step 2).", "file", $("file")); return; }
    if (!name || name === "main") {
      showError("Give the source a name (such as manager), other than “main”.", "sources", $("source-name"));
      return;
    }
    if (state.sources.has(name)) { showError("A source called “" + name + "” is added already.", "sources", $("source-name")); return; }
    if (!f) { showError("Choose the source's file.", "sources", $("source-file")); return; }
    const fd = new FormData();
    fd.append("file", f, f.name);
    $("add-source").disabled = true;
    say("Uploading " + f.name + "…");
    try {
      const ds = await api("POST", "/v1/datasets", fd);
      addSourceBox(name, ds);
      const taken = new Set(constructBoxes().map((b) => b.querySelector("input[data-role='name']").value.trim()));
      const pending = state.pendingSources[name];
      const waiting = constructBoxes().filter((b) => b.dataset.source === name);
      if (pending) { fillSource(state.sources.get(name).box, pending); delete state.pendingSources[name]; }
      let added = 0;
      if (!waiting.length) {  // its drafted constructs, their items from this file
        Object.entries((ds.draft_design || {}).constructs || {}).forEach(([cname, spec]) => {
          const n = taken.has(cname) ? name + "_" + cname : cname;
          addConstruct(n, Object.assign({}, spec, { source: name }), false);
          added++;
        });
      }
      waiting.forEach((b) => renderItems(b));
      refreshPaths();
      markTaken();
      $("source-name").value = "";
      $("source-file").value = "";
      say("Added source " + name + " (" + ds.name + ", " + ds.rows + " rows)" +
          (added ? "; " + added + " drafted construct(s) from it are in the list above." : "."));
      refreshHistory();
    } catch (e) {
      reportFailure(e, "sources");
    } finally {
      $("add-source").disabled = false;
    }
  });

  // find the form control an API error field points at, e.g. design.constructs.support.items[2]
  function elementForField(field) {
    if (!field) return null;
    const f = field.replace(/^design\./, "");
    if (f === "file") return $("file");
    if (f === "token" || f === "Authorization") return $("token");
    let m = f.match(/^constructs\.([^.[]+)/);
    if (m) {
      const key = keyForName(m[1]);
      const box = key && document.querySelector(".construct[data-key='" + key + "']");
      if (!box) return $("constructs");
      if (/\.reverse/.test(f)) return box.querySelector("[data-role='reverse']");
      if (/\.items/.test(f)) return box.querySelector("[data-role='items']");
      if (/\.role/.test(f)) return box.querySelector("select[data-role='role']");
      if (/\.source/.test(f)) return box.querySelector("select[data-role='source']");
      if (/\.same_as/.test(f)) return box.querySelector("select[data-role='same-as']");
      return box.querySelector("input[data-role='name']");
    }
    m = f.match(/^paths\[(\d+)\]/);
    if (m) {
      const box = pathBoxes()[Number(m[1])];
      return box ? (/predictors/.test(f) ? box.querySelector("[data-role='predictors']") : box.querySelector("select")) : $("paths");
    }
    if (f.startsWith("response_scale")) return $("scale-min");
    if (f.startsWith("missing_codes")) return $("missing-codes");
    if (f.startsWith("answer_labels")) return $("answer-labels");
    m = f.match(/^sources\.([^.]+)(?:\.(\w+))?/);
    if (m) {
      const src = state.sources.get(m[1]);
      if (!src) return $("source-name");
      const role = { id_column: "id", kind: "kind", response_scale: "min", missing_codes: "codes" }[m[2]];
      return (role && src.box.querySelector("[data-role='" + role + "']")) || src.box.querySelector("select");
    }
    if (f === "sources") return $("source-name");
    if (f === "id_column") return $("id-column");
    if (f === "group_column") return $("group-column");
    m = f.match(/^options\.(\w+)/);
    if (m) return $(m[1] === "missing" ? "missing-listwise" : m[1]) || null;
    return null;
  }

  $("add-construct").addEventListener("click", () => {
    addConstruct("", {}, true);
    refreshPaths();
    say("Added a construct: give it a name and items.");
  });
  $("add-path").addEventListener("click", () => { addPath(null, [], true); say("Added a path."); });

  function refreshJson() {
    try {
      $("design-json").value = JSON.stringify(readDesign(), null, 2);
      $("design-json").removeAttribute("aria-invalid");
    } catch (e) {
      if (!(e instanceof FormProblem)) throw e;
      showError(e.message, e.field, e.target);
    }
  }
  $("json-view").addEventListener("toggle", () => { if ($("json-view").open) refreshJson(); });
  $("json-refresh").addEventListener("click", () => { clearError(); refreshJson(); say("JSON refreshed from the form."); });
  $("json-load").addEventListener("click", () => {
    clearError();
    let d;
    try {
      d = JSON.parse($("design-json").value);
    } catch (e) {
      showError("The design JSON does not parse: " + e.message, "design", $("design-json"));
      return;
    }
    if (!d || typeof d !== "object" || Array.isArray(d) || typeof (d.constructs || {}) !== "object") {
      showError("The design must be a JSON object with a “constructs” object.", "design", $("design-json"));
      return;
    }
    loadDesign(d);
    say("Design loaded into the form: " + Object.keys(d.constructs || {}).length + " constructs, " +
        (d.paths || []).length + " paths.");
  });

  // save the design as a file, and load one again
  $("design-save").addEventListener("click", () => {
    clearError();
    let design;
    try {
      design = readDesign();
    } catch (e) {
      if (!(e instanceof FormProblem)) throw e;
      showError(e.message, e.field, e.target);
      return;
    }
    const url = URL.createObjectURL(new Blob([JSON.stringify(design, null, 2) + "\n"], { type: "application/json" }));
    const a = el("a", { href: url, download: "design.json" });
    document.body.appendChild(a);
    a.click();
    a.remove();
    window.setTimeout(() => URL.revokeObjectURL(url), 10000);
    say("Design saved as design.json.");
  });
  $("design-file").addEventListener("change", async () => {
    clearError();
    const f = $("design-file").files[0];
    if (!f) return;
    let d;
    try {
      d = JSON.parse(await f.text());
    } catch (e) {
      showError("“" + f.name + "” is not a design file (its JSON does not parse: " + e.message + ").", "design", $("design-file"));
      return;
    }
    if (!d || typeof d !== "object" || Array.isArray(d) || typeof (d.constructs || {}) !== "object") {
      showError("“" + f.name + "” is not a design: it needs a “constructs” object.", "design", $("design-file"));
      return;
    }
    loadDesign(d);
    $("design-file").value = "";
    say("Design loaded from " + f.name + ": " + Object.keys(d.constructs || {}).length + " constructs.");
  });

  // ---- step 4: options, run, progress ----------------------------------------------------

  function readOptions() {
    const opts = { missing: document.querySelector("input[name='missing']:checked").value };
    for (const name of ["bootstrap", "seed", "check_corrections"]) {
      const t = $(name).value.trim();
      if (t === "") continue;
      const n = Number(t);
      if (!Number.isInteger(n) || n < 0) {
        throw new FormProblem("“" + t + "” is not a whole number of 0 or more.", "options." + name, $(name));
      }
      opts[name] = n;
    }
    const conf = $("confidence").value.trim();
    if (conf !== "") {
      const c = Number(conf);
      if (!Number.isFinite(c) || c < 0.5 || c > 0.999) {
        throw new FormProblem("The confidence level must be a number from 0.5 to 0.999.", "options.confidence", $("confidence"));
      }
      opts.confidence = c;
    }
    const mg = $("min_group_size").value.trim();
    if (mg !== "") {
      const g = Number(mg);
      if (!Number.isInteger(g) || g < 2 || g > 1000) {
        throw new FormProblem("The smallest team shown must be a whole number from 2 to 1000.", "options.min_group_size", $("min_group_size"));
      }
      opts.min_group_size = g;
    }
    opts.drop_flagged = $("drop_flagged").checked;
    const ds = state.dataset;
    if (ds && (ds.sheets || []).length > 1 && $("sheet").value && $("sheet").value !== ds.sheet) {
      opts.sheet = $("sheet").value;
    }
    return opts;
  }

  function resetProgress() {
    if (state.pollTimer) window.clearTimeout(state.pollTimer);
    state.pollTimer = null;
    state.analysisId = null;
    [state.reportUrl, state.jsonUrl, state.tablesUrl].forEach((u) => u && URL.revokeObjectURL(u));
    state.reportUrl = state.jsonUrl = state.tablesUrl = null;
    $("progress-box").hidden = true;
    $("report-links").hidden = true;
    $("run-btn").disabled = false;  // a run given up (new file, file deleted) may be re-run
  }

  $("run-form").addEventListener("submit", async (ev) => {
    ev.preventDefault();
    clearError();
    if (!state.dataset) { showError("Upload a survey file first (step 2).", "file", $("file")); return; }
    let design, options;
    try {
      design = readDesign();
      options = readOptions();
    } catch (e) {
      if (!(e instanceof FormProblem)) throw e;
      showError(e.message, e.field, e.target);
      return;
    }
    if ($("json-view").open) $("design-json").value = JSON.stringify(design, null, 2);
    resetProgress();
    $("run-btn").disabled = true;
    try {
      const body = { dataset_id: state.dataset.id, design, options };
      if (state.sources.size) {
        body.sources = {};
        state.sources.forEach((src, name) => { body.sources[name] = src.dataset.id; });
      }
      const a = await api("POST", "/v1/analyses", body);
      state.analysisId = a.id;
      $("progress-box").hidden = false;
      showProgress({ status: a.status, progress: { stage: "waiting", done: 0, total: 0 } });
      say("Analysis started.");
      poll();
    } catch (e) {
      reportFailure(e);
      $("run-btn").disabled = false;
    }
  });

  const STAGES = {
    waiting: "waiting to start", starting: "starting", load: "reading the data",
    screen: "screening answers", reliability: "reliability", measurement_model: "measurement model",
    method_variance: "common-method checks", paths: "key paths", bootstrap: "bootstrap",
    teams: "teams", check_corrections: "checking the corrections on simulated surveys",
    report: "writing the report", done: "done",
  };

  function showProgress(a) {
    const p = a.progress || {};
    const st = $("an-status");
    st.textContent = a.status;
    st.className = "status-" + a.status;
    $("an-stage").textContent = STAGES[p.stage] || p.stage || "-";
    const bar = $("an-progress");
    if (a.status === "succeeded") {
      bar.max = 1; bar.value = 1;
      $("an-count").textContent = "";
    } else if (p.total) {
      bar.max = p.total; bar.value = Math.min(p.done || 0, p.total);
      $("an-count").textContent = (p.done || 0) + " of " + p.total;
    } else {
      bar.removeAttribute("value");  // indeterminate until the service knows the steps
      $("an-count").textContent = "";
    }
  }

  async function poll() {
    const id = state.analysisId;
    if (!id) return;
    let a;
    try {
      a = await api("GET", "/v1/analyses/" + encodeURIComponent(id));
    } catch (e) {
      reportFailure(e);
      $("run-btn").disabled = false;
      return;
    }
    if (id !== state.analysisId) return;
    const before = $("an-stage").textContent;
    showProgress(a);
    if (a.status === "succeeded") {
      $("run-btn").disabled = false;
      await prepareReport(id);
      refreshHistory();
      return;
    }
    if (a.status === "failed") {
      $("run-btn").disabled = false;
      const err = a.error || {};
      say("The analysis failed.");
      showError(failureText("The analysis", err), err.field || null);
      refreshHistory();
      return;
    }
    if ($("an-stage").textContent !== before) say("Analysis " + a.status + ": " + $("an-stage").textContent + ".");
    state.pollTimer = window.setTimeout(poll, 1000);
  }

  function failureText(subject, err) {
    let where = "";
    if (err.row) where += " (row " + err.row + (err.column ? ", column " + err.column : "") + ")";
    return subject + " failed: " + (err.message || "no reason given") + where;
  }

  // a report fetched with the token and handed to the browser as a blob: address, so the
  // token never goes into a link
  async function reportBlob(id, kind) {
    const resp = await api("GET", "/v1/analyses/" + encodeURIComponent(id) + "/report." + kind,
                           undefined, { raw: true });
    const type = kind === "html" ? "text/html" : "application/json";
    return URL.createObjectURL(new Blob([await resp.blob()], { type }));
  }

  async function tablesBlob(id) {
    const resp = await api("GET", "/v1/analyses/" + encodeURIComponent(id) + "/tables.xlsx", undefined, { raw: true });
    return URL.createObjectURL(new Blob([await resp.blob()],
      { type: "application/vnd.openxmlformats-officedocument.spreadsheetml.sheet" }));
  }

  async function prepareReport(id) {
    try {
      state.jsonUrl = await reportBlob(id, "json");
      $("download-json").href = state.jsonUrl;
      $("download-json").download = "report-" + id + ".json";
      try {
        state.tablesUrl = await tablesBlob(id);
        $("download-tables").href = state.tablesUrl;
        $("download-tables").download = "tables-" + id + ".xlsx";
        $("download-tables").hidden = false;
      } catch (e) {
        $("download-tables").hidden = true;  // the report itself is what counts
      }
      let html = null;
      try {
        html = state.reportUrl = await reportBlob(id, "html");
      } catch (e) {
        if (!(e instanceof ApiFailure && e.code === "not_available")) throw e;
      }
      $("open-report").hidden = !html;
      if (html) $("open-report").href = html;
      $("report-links").hidden = false;
      say("The analysis succeeded. " + (html ? "The report is ready to open." : "Download report.json to read it."));
      (html ? $("open-report") : $("download-json")).focus();
    } catch (e) {
      reportFailure(e);
    }
  }

  // ---- earlier work: this tenant's uploads and analyses ----------------------------------

  const PAGE = 10;
  const hist = {
    gen: 0,               // bumped by every full refresh and by forgetting the token: late answers are dropped
    datasets: [], datasetTotal: 0,
    analyses: [], analysisTotal: 0,
    names: new Map(),     // dataset id -> file name, also for datasets not on a loaded page
    blobs: new Map(),     // "ID.html" / "ID.json" -> blob: address of a finished report
  };

  function whenText(iso) {
    const d = new Date(iso || "");
    return Number.isNaN(d.getTime()) ? "-"
      : d.toLocaleString(undefined, { dateStyle: "medium", timeStyle: "short" });
  }

  function when(iso) {
    return iso ? el("time", { datetime: iso, text: whenText(iso) }) : el("span", { text: "-" });
  }

  // every row has the same buttons: the hidden part makes each one's name say which row it is
  function rowButton(text, context, cls) {
    return el("button", { type: "button", class: cls },
              text, el("span", { class: "visually-hidden", text: " " + context }));
  }

  function datasetContext(ds) { return ds.name + ", uploaded " + whenText(ds.created_at); }

  function analysisContext(a) {
    return "of " + (hist.names.get(a.dataset_id) || a.dataset_id) + ", requested " + whenText(a.created_at);
  }

  function forgetHistory() {
    hist.gen++;
    hist.datasets = []; hist.analyses = [];
    hist.datasetTotal = hist.analysisTotal = 0;
    hist.names.clear();
    hist.blobs.forEach((u) => URL.revokeObjectURL(u));
    hist.blobs.clear();
    renderHistory();
  }

  function pageQuery(offset) { return "?limit=" + PAGE + "&offset=" + offset; }

  // analyses name their dataset by id; look up the files that are not on a loaded page
  async function learnNames(analyses) {
    hist.datasets.forEach((ds) => hist.names.set(ds.id, ds.name));
    const missing = [...new Set(analyses.map((a) => a.dataset_id))].filter((id) => !hist.names.has(id));
    await Promise.all(missing.map(async (id) => {
      try {
        hist.names.set(id, (await api("GET", "/v1/datasets/" + encodeURIComponent(id))).name);
      } catch (e) {
        if (!(e instanceof ApiFailure && e.status === 404)) throw e;  // deleted meanwhile: show the id
      }
    }));
  }

  // reload the first page of both lists; announce says so through the live region
  async function refreshHistory(announce) {
    if (!token()) return;
    const gen = ++hist.gen;
    $("history-refresh").disabled = true;
    try {
      const [d, a] = await Promise.all([api("GET", "/v1/datasets" + pageQuery(0)),
                                        api("GET", "/v1/analyses" + pageQuery(0))]);
      if (gen !== hist.gen) return;
      hist.datasets = d.datasets; hist.datasetTotal = d.total;
      hist.analyses = a.analyses; hist.analysisTotal = a.total;
      await learnNames(hist.analyses);
      if (gen !== hist.gen) return;
      renderHistory();
      if (announce) {
        say(announce + " Earlier work: " + d.total + " survey file(s), " + a.total + " analysis(es).");
      }
    } catch (e) {
      if (gen === hist.gen) reportFailure(e);
    } finally {
      if (gen === hist.gen) $("history-refresh").disabled = false;
    }
  }

  $("history-refresh").addEventListener("click", () => { clearError(); refreshHistory("Refreshed."); });

  async function loadMore(kind) {
    const gen = hist.gen;
    const list = kind === "datasets" ? hist.datasets : hist.analyses;
    const btn = $(kind + "-more");
    btn.disabled = true;
    clearError();
    try {
      const page = await api("GET", "/v1/" + kind + pageQuery(list.length));
      if (gen !== hist.gen) return;
      const seen = new Set(list.map((x) => x.id));
      // newer uploads shift the pages: an item already shown may come again
      const fresh = page[kind].filter((x) => !seen.has(x.id));
      list.push(...fresh);
      if (kind === "datasets") hist.datasetTotal = page.total; else hist.analysisTotal = page.total;
      await learnNames(hist.analyses);
      if (gen !== hist.gen) return;
      renderHistory();
      say(fresh.length + " more " + (kind === "datasets" ? "survey file(s)" : "analysis(es)") + " shown.");
      if (btn.hidden) {  // the button went away under the focus: go to the first new row
        const rows = $(kind + "-body").rows;
        const first = rows[rows.length - fresh.length];
        const target = first && first.querySelector("button");
        (target || $(kind + "-h")).focus();
      }
    } catch (e) {
      reportFailure(e);
    } finally {
      btn.disabled = false;
    }
  }

  $("datasets-more").addEventListener("click", () => loadMore("datasets"));
  $("analyses-more").addEventListener("click", () => loadMore("analyses"));

  function renderList(kind, items, total, row) {
    const body = $(kind + "-body");
    body.textContent = "";
    items.forEach((x) => body.appendChild(row(x)));
    $(kind + "-wrap").hidden = !items.length;
    $(kind + "-empty").hidden = !!items.length;
    $(kind + "-count").textContent = items.length ? "Showing " + items.length + " of " + total + "." : "";
    $(kind + "-more").hidden = items.length >= total;
  }

  function renderHistory() {
    renderList("datasets", hist.datasets, hist.datasetTotal, datasetRow);
    renderList("analyses", hist.analyses, hist.analysisTotal, analysisRow);
  }

  function datasetRow(ds) {
    const use = rowButton("Use again", datasetContext(ds), "secondary");
    const del = rowButton("Delete", datasetContext(ds), "remove");
    use.addEventListener("click", () => reuseDataset(ds.id, use));
    del.addEventListener("click", () => deleteDataset(ds, del));
    return el("tr", { role: "row", "data-id": ds.id },
      el("th", { role: "rowheader", scope: "row", text: ds.name }),
      el("td", { role: "cell", class: "number", "data-label": "Rows", text: String(ds.rows) }),
      el("td", { role: "cell", class: "number", "data-label": "Columns",
                 text: String((ds.columns || []).length) }),
      el("td", { role: "cell", "data-label": "Uploaded" }, when(ds.created_at)),
      el("td", { role: "cell" }, el("div", { class: "actions" }, use, del)));
  }

  function stageText(a) {
    const p = a.progress || {};
    const stage = STAGES[p.stage] || p.stage;
    if (a.status === "succeeded") return STAGES.done;
    if (a.status === "queued") return STAGES.waiting;
    if (a.status === "failed") return stage ? "stopped at " + stage : "-";
    return (stage || STAGES.starting) + (p.total ? ", " + (p.done || 0) + " of " + p.total : "");
  }

  function analysisRow(a) {
    const actions = el("div", { class: "actions" });
    const ctx = analysisContext(a);
    if (a.status === "succeeded") {
      const open = rowButton("Open the report", ctx, "primary");
      const save = rowButton("Download report.json", ctx, "secondary");
      open.addEventListener("click", () => openListedReport(a, open));
      save.addEventListener("click", () => downloadListedReport(a, save));
      actions.append(open, save);
    } else if (a.status === "failed") {
      const why = rowButton("Show the error", ctx, "secondary");
      why.addEventListener("click", () => {
        clearError();
        // the field is the failed design's, which the form may no longer hold
        showError(failureText("The analysis " + ctx, a.error || {}), (a.error || {}).field || null, false);
      });
      actions.append(why);
    }
    return el("tr", { role: "row", "data-id": a.id },
      el("th", { role: "rowheader", scope: "row", text: hist.names.get(a.dataset_id) || a.dataset_id }),
      el("td", { role: "cell", "data-label": "Requested" }, when(a.created_at)),
      el("td", { role: "cell", "data-label": "Status" },
         el("span", { class: "status-" + a.status, text: a.status })),
      el("td", { role: "cell", "data-label": "Stage", text: stageText(a) }),
      el("td", { role: "cell" }, actions));
  }

  async function listedReport(id, kind) {
    const key = id + "." + kind;
    if (!hist.blobs.has(key)) hist.blobs.set(key, await reportBlob(id, kind));
    return hist.blobs.get(key);
  }

  async function openListedReport(a, btn) {
    clearError();
    btn.disabled = true;
    try {
      const url = await listedReport(a.id, "html");
      const w = window.open(url, "_blank");
      if (w) {
        w.opener = null;
        say("The report opened in a new tab.");
        return;
      }
      // the browser blocked the new tab (the fetch outlasted the click): a link works next time
      const link = el("a", { class: "button primary", href: url, target: "_blank", rel: "noopener" },
                      "Open the report", el("span", { class: "visually-hidden", text: " " + analysisContext(a) }));
      btn.replaceWith(link);
      link.focus();
      say("The browser kept the report from opening: press Open the report again.");
    } catch (e) {
      reportFailure(e);
    } finally {
      btn.disabled = false;
    }
  }

  async function downloadListedReport(a, btn) {
    clearError();
    btn.disabled = true;
    try {
      const link = el("a", { href: await listedReport(a.id, "json"), download: "report-" + a.id + ".json",
                             hidden: true });
      document.body.appendChild(link);
      link.click();
      link.remove();
      say("Downloading report-" + a.id + ".json.");
    } catch (e) {
      reportFailure(e);
    } finally {
      btn.disabled = false;
    }
  }

  async function reuseDataset(id, btn) {
    clearError();
    btn.disabled = true;
    try {
      const ds = await api("GET", "/v1/datasets/" + encodeURIComponent(id));
      showDataset(ds);
      say("Using " + ds.name + " again: " + ds.rows + " rows, " + ds.columns.length +
          " columns. Its draft design is in step 3.");
      $("design-h").focus();
    } catch (e) {
      reportFailure(e);
    } finally {
      btn.disabled = false;
    }
  }

  async function deleteDataset(ds, btn) {
    clearError();
    if (!window.confirm("Delete “" + ds.name + "” (uploaded " + whenText(ds.created_at) +
                        ") and every analysis of it? This cannot be undone.")) {
      say("Nothing deleted.");
      return;
    }
    btn.disabled = true;
    try {
      await api("DELETE", "/v1/datasets/" + encodeURIComponent(ds.id));
    } catch (e) {
      reportFailure(e);
      btn.disabled = false;
      return;
    }
    hist.analyses.filter((a) => a.dataset_id === ds.id).forEach((a) => {
      ["html", "json"].forEach((k) => {
        const u = hist.blobs.get(a.id + "." + k);
        if (u) { URL.revokeObjectURL(u); hist.blobs.delete(a.id + "." + k); }
      });
    });
    hist.names.delete(ds.id);
    if (state.dataset && state.dataset.id === ds.id) {
      // the form belonged to the deleted file: nothing left to run it on
      state.dataset = null;
      resetProgress();
      $("dataset").hidden = $("design-step").hidden = $("run-step").hidden = true;
    }
    $("datasets-h").focus();
    say("Deleted “" + ds.name + "” and its analyses.");
    await refreshHistory();
  }

  showTokenState();
  refreshHistory();
})();
