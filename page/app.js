// tacit page: the request editor, the calls to the service and the plots of its answers.
// Plain JavaScript, no framework; the plotter is plot.js, CSV reading csv.js. The browser
// test reads `window.tacitPage` (errors seen, timings, what each plot holds).
"use strict";
(function () {
  const P = window.TacitPlot, CSV = window.TacitCsv, C = P.colours;
  const $ = (id) => document.getElementById(id);

  // What the test and a curious person can read: console errors and timings.
  const page = (window.tacitPage = window.tacitPage || { errors: [], timings: [], plots: {} });
  const origError = console.error.bind(console);
  console.error = (...a) => { page.errors.push(a.map(String).join(" ")); origError(...a); };
  window.addEventListener("error", (e) => page.errors.push("error: " + e.message));
  window.addEventListener("unhandledrejection", (e) => page.errors.push("rejection: " + String(e.reason)));
  document.addEventListener("securitypolicyviolation", (e) => page.errors.push("csp: " + e.violatedDirective + " " + e.blockedURI));

  const group = new P.ZoomGroup();
  const st = { truth: null, units: {}, simulate: null, csv: null, answer: null, series: null, busy: false, identified: null };

  // ---- the editor and the pointer highlight --------------------------------------------
  const editor = $("editor"), backdrop = $("backdrop");
  const esc = (s) => s.replace(/[&<>]/g, (c) => ({ "&": "&amp;", "<": "&lt;", ">": "&gt;" }[c]));
  editor.addEventListener("input", () => { backdrop.textContent = ""; });
  editor.addEventListener("scroll", () => { backdrop.scrollTop = editor.scrollTop; backdrop.scrollLeft = editor.scrollLeft; });

  /** Index just past the JSON value starting at i (after blanks). */
  function skipValue(s, i) {
    i = skipWs(s, i);
    const ch = s[i];
    if (ch === '"') return skipString(s, i);
    if (ch === "{" || ch === "[") {
      let depth = 0;
      for (; i < s.length; i++) {
        const c = s[i];
        if (c === '"') { i = skipString(s, i) - 1; continue; }
        if (c === "{" || c === "[") depth++;
        else if (c === "}" || c === "]") { depth--; if (depth === 0) return i + 1; }
      }
      return s.length;
    }
    while (i < s.length && !/[,\]}\s]/.test(s[i])) i++;
    return i;
  }
  function skipWs(s, i) { while (i < s.length && /\s/.test(s[i])) i++; return i; }
  function skipString(s, i) { for (i++; i < s.length; i++) { if (s[i] === "\\") i++; else if (s[i] === '"') return i + 1; } return s.length; }

  /** The text span [start, end) of the value at an RFC 6901 pointer, or of its deepest
   *  existing parent when the pointer names something absent. */
  function locate(s, pointer) {
    const segs = pointer === "" ? [] : pointer.slice(1).split("/").map((x) => x.replace(/~1/g, "/").replace(/~0/g, "~"));
    let i = skipWs(s, 0), span = [i, skipValue(s, i)];
    for (const seg of segs) {
      const ch = s[i];
      let found = null;
      if (ch === "{") {
        let j = skipWs(s, i + 1);
        while (j < span[1] && s[j] === '"') {
          const kEnd = skipString(s, j);
          let key;
          try { key = JSON.parse(s.slice(j, kEnd)); } catch (_) { return span; }
          const vStart = skipWs(s, skipWs(s, kEnd) + 1), vEnd = skipValue(s, vStart);
          if (key === seg) { found = [j, vStart, vEnd]; break; }
          j = skipWs(s, vEnd); if (s[j] === ",") j = skipWs(s, j + 1);
        }
      } else if (ch === "[") {
        const want = Number(seg);
        let j = skipWs(s, i + 1), k = 0;
        while (j < span[1] && s[j] !== "]") {
          const vEnd = skipValue(s, j);
          if (k === want) { found = [j, j, vEnd]; break; }
          k++; j = skipWs(s, vEnd); if (s[j] === ",") j = skipWs(s, j + 1);
        }
      }
      if (!found) return span;
      i = found[1]; span = [found[1], found[2]];
    }
    return span;
  }

  /** Mark the text at `pointer` in the editor and scroll it into view. */
  function markPointer(pointer, focus) {
    const s = editor.value, [a, b] = locate(s, pointer);
    backdrop.innerHTML = esc(s.slice(0, a)) + '<mark id="pointer-mark" data-pointer="' + esc(pointer).replace(/"/g, "&quot;") + '">' + esc(s.slice(a, b)) + "</mark>" + esc(s.slice(b)) + "\n";
    const line = s.slice(0, a).split("\n").length - 1;
    const lh = parseFloat(getComputedStyle(editor).lineHeight) || 16;
    editor.scrollTop = Math.max(0, (line - 3) * lh);
    backdrop.scrollTop = editor.scrollTop;
    if (focus) { editor.focus(); editor.setSelectionRange(a, b); editor.scrollTop = Math.max(0, (line - 3) * lh); }
  }

  // ---- status and problems ---------------------------------------------------------------
  function status(text) { $("status").textContent = text; }
  function clearProblem() { $("problem").hidden = true; $("problem-errors").textContent = ""; backdrop.textContent = ""; }
  function showProblem(p, httpStatus) {
    const box = $("problem");
    box.hidden = false;
    $("problem-title").textContent = (p.title || "error") + " (HTTP " + (p.status || httpStatus) + ")";
    $("problem-detail").textContent = p.detail || "";
    const ul = $("problem-errors");
    ul.textContent = "";
    const errs = Array.isArray(p.errors) ? p.errors : [];
    for (const e of errs) {
      const li = document.createElement("li");
      const b = document.createElement("button");
      b.type = "button"; b.className = "pointer"; b.textContent = e.pointer || "(whole request)";
      b.setAttribute("aria-label", "Show " + (e.pointer || "the request") + " in the editor");
      b.addEventListener("click", () => markPointer(e.pointer || "", true));
      li.appendChild(b);
      li.appendChild(document.createTextNode(" " + (e.detail || "") + (e.column ? " (column " + e.column + ")" : "")));
      ul.appendChild(li);
    }
    const first = errs.find((e) => typeof e.pointer === "string" && !e.pointer.startsWith("/readings"));
    if (first) markPointer(first.pointer, false);
    box.focus();
  }

  // ---- demos and files -------------------------------------------------------------------
  async function loadDemo(name) {
    const res = await fetch("/page/demo/" + encodeURIComponent(name));
    if (!res.ok) { showProblem(await res.json(), res.status); return false; }
    const d = await res.json();
    st.truth = d.truth; st.units = d.units || {}; st.simulate = d.simulate || null; st.csv = null;
    editor.value = formatRequest(d.request);
    clearProblem();
    status("Loaded the " + d.title.toLowerCase() + ".");
    refreshMapping();
    return true;
  }

  /** The request as text, one measurement line per text line (readable, and a pointer
   *  into /measurements/i lands on its own line). */
  function formatRequest(req) {
    const keys = Object.keys(req).filter((k) => k !== "measurements");
    let s = "{\n";
    keys.forEach((k, n) => { s += "  " + JSON.stringify(k) + ": " + JSON.stringify(req[k], null, 2).replace(/\n/g, "\n  ") + (n + 1 < keys.length || req.measurements ? ",\n" : "\n"); });
    if (req.measurements) s += '  "measurements": [\n' + req.measurements.map((m) => "    " + JSON.stringify(m)).join(",\n") + "\n  ]\n";
    return s + "}\n";
  }

  $("file-json").addEventListener("change", async (ev) => {
    const f = ev.target.files[0]; if (!f) return;
    editor.value = await f.text();
    st.truth = null; st.units = {}; st.simulate = null;
    clearProblem(); refreshMapping();
    status("Loaded " + f.name + ".");
  });

  // ---- CSV -------------------------------------------------------------------------------
  const csvSel = ["csv-time", "csv-tag", "csv-value", "csv-quality"];
  function delim() { return $("csv-delimiter").value; }
  function scalarSensors() {
    try {
      const m = JSON.parse(editor.value).model || {};
      return Object.entries(m.sensors || {}).filter(([, s]) => !Array.isArray(s.measures)).map(([n]) => n);
    } catch (_) { return []; }
  }
  function fillSelect(id, options, pick, blank) {
    const sel = $(id); sel.textContent = "";
    if (blank) sel.appendChild(new Option("(none)", ""));
    for (const o of options) sel.appendChild(new Option(o, o));
    if (options.includes(pick)) sel.value = pick;
  }
  async function csvLoaded(text, name) {
    st.csv = { text, name };
    const pk = CSV.peek(text, delim(), 8);
    const guess = (re, dflt) => pk.head.find((h) => re.test(h)) || dflt;
    fillSelect("csv-time", pk.head, guess(/^(time|t|timestamp)$/i, pk.head[0]));
    fillSelect("csv-tag", pk.head, guess(/^(tag|sensor|name)$/i, pk.head[1]));
    fillSelect("csv-value", pk.head, guess(/^(value|val|reading)$/i, pk.head[2]));
    fillSelect("csv-quality", pk.head, guess(/^(quality|q|status)$/i, ""), true);
    if (pk.head.some((h) => /^tag$/i.test(h))) $("csv-layout").value = "long";
    layoutChanged();
    const tbl = document.createElement("table");
    const cap = tbl.createCaption(); cap.textContent = name + ": header and first rows";
    const hr = tbl.insertRow(); pk.head.forEach((h) => { const th = document.createElement("th"); th.scope = "col"; th.textContent = h; hr.appendChild(th); });
    pk.rows.forEach((r) => { const tr = tbl.insertRow(); pk.head.forEach((_, k) => { tr.insertCell().textContent = r[k] === undefined ? "" : r[k]; }); });
    $("csv-preview").textContent = ""; $("csv-preview").appendChild(tbl);
    status("CSV " + name + " loaded; map its columns to the sensors, then run.");
  }
  $("file-csv").addEventListener("change", async (ev) => { const f = ev.target.files[0]; if (f) await csvLoaded(await f.text(), f.name); });
  $("csv-clear").addEventListener("click", () => { st.csv = null; $("csv-preview").textContent = ""; $("csv-mapping").textContent = ""; $("file-csv").value = ""; status("CSV forgotten; readings come from the editor."); });
  function layoutChanged() {
    const long = $("csv-layout").value === "long";
    document.querySelectorAll(".long-only").forEach((e) => { e.hidden = !long; });
    refreshMapping();
  }
  $("csv-layout").addEventListener("change", layoutChanged);
  $("csv-delimiter").addEventListener("change", () => { if (st.csv) csvLoaded(st.csv.text, st.csv.name); });
  csvSel.forEach((id) => $(id).addEventListener("change", refreshMapping));

  /** One labelled list per scalar sensor: which column (wide) or tag (long) holds it. */
  function refreshMapping() {
    const box = $("csv-mapping"); box.textContent = "";
    if (!st.csv) return;
    const long = $("csv-layout").value === "long";
    const pk = CSV.peek(st.csv.text, delim(), 1);
    const choices = long ? CSV.distinct(st.csv.text, delim(), pk.head.indexOf($("csv-tag").value), 200) : pk.head;
    const sensors = scalarSensors();
    if (!sensors.length) { box.textContent = "The request in the editor names no scalar sensor to map."; return; }
    const tbl = document.createElement("table");
    tbl.createCaption().textContent = long ? "Tag of each sensor" : "Column of each sensor";
    sensors.forEach((s, n) => {
      const tr = tbl.insertRow();
      const th = document.createElement("th"); th.scope = "row";
      const lab = document.createElement("label"); lab.htmlFor = "map-" + n; lab.textContent = s; th.appendChild(lab); tr.appendChild(th);
      const sel = document.createElement("select"); sel.id = "map-" + n; sel.dataset.sensor = s;
      sel.appendChild(new Option("(not in the file)", ""));
      for (const c of choices) sel.appendChild(new Option(c, c));
      if (choices.includes(s)) sel.value = s;
      tr.insertCell().appendChild(sel);
    });
    box.appendChild(tbl);
  }

  /** The `csv` section the mapping describes. */
  function csvSection() {
    const long = $("csv-layout").value === "long";
    const map = {};
    document.querySelectorAll("#csv-mapping select").forEach((s) => { if (s.value) map[s.dataset.sensor] = s.value; });
    const sec = { layout: long ? "long" : "wide", time_column: $("csv-time").value, time_zone: $("csv-zone").value.trim() || "UTC", delimiter: delim() };
    if (long) {
      Object.assign(sec, { tag_column: $("csv-tag").value, value_column: $("csv-value").value, tags: map });
      if ($("csv-quality").value) { sec.quality_column = $("csv-quality").value; sec.good = $("csv-good").value.split(",").map((x) => x.trim()).filter(Boolean); }
    } else sec.columns = map;
    return sec;
  }

  // ---- calling the service ---------------------------------------------------------------
  function headers(json) {
    const h = {};
    if (json) h["Content-Type"] = "application/json";
    const key = $("api-key").value.trim();
    if (key) h.Authorization = "Bearer " + key;
    return h;
  }

  /** What to post for estimate/smooth/calibrate: the editor's text as it is, or with the
   *  CSV's readings (as JSON lines, or the file itself in a multipart body). */
  function body(kind) {
    const text = editor.value;
    if (!st.csv) {
      let req = null;
      try { req = JSON.parse(text); } catch (_) { return { body: text, json: true, req: null }; }
      const n = Array.isArray(req.measurements) ? req.measurements.length : 0;
      if (n > 20000 && !req.output) { req.output = { covariance: "std" }; return { body: JSON.stringify(req), json: true, req, note: "asked for std only (no covariance matrices) to keep the answer small" }; }
      return { body: text, json: true, req };
    }
    const req = JSON.parse(text);
    delete req.measurements;
    const sec = csvSection();
    if ($("csv-send").value === "multipart") {
      req.csv = sec;
      if (!req.output && kind !== "calibrate") req.output = { covariance: "std" };
      const fd = new FormData();
      fd.append("request", new Blob([JSON.stringify(req)], { type: "application/json" }), "request.json");
      fd.append("readings", new Blob([st.csv.text], { type: "text/csv" }), st.csv.name || "readings.csv");
      return { body: fd, json: false, req, readingsFromCsv: sec };
    }
    const conv = CSV.convert(st.csv.text, sec);
    if (sec.time_zone !== "UTC" && !req.time_zone) req.time_zone = sec.time_zone;
    if (conv.count > 20000 && !req.output && kind !== "calibrate") req.output = { covariance: "std" };
    const head = JSON.stringify(req);
    const bodyText = head.slice(0, -1) + (head.length > 2 ? "," : "") + '"measurements":' + conv.json + "}";
    const notes = [];
    if (conv.unused.length) notes.push("left the unmapped columns " + conv.unused.join(", ") + " unused");
    if (conv.dropped) notes.push("dropped " + conv.dropped + " rows whose quality was not good");
    return { body: bodyText, json: true, req: Object.assign({}, req, { measurementsText: conv.json }), conv, note: notes.join("; ") || undefined };
  }

  async function call(path, b) {
    const res = await fetch(path, { method: "POST", headers: headers(b.json), body: b.body });
    const text = await res.text();
    let data = null;
    try { data = JSON.parse(text); } catch (_) { data = { title: "not JSON", detail: text.slice(0, 500), status: res.status }; }
    return { ok: res.ok, status: res.status, data, bytes: text.length };
  }

  const frame = () => new Promise((r) => requestAnimationFrame(() => r()));

  async function run(kind) {
    if (st.busy) return;
    st.busy = true;
    // From the click: a demo's click also covers fetching the demo.
    const t0 = page.clickAt !== undefined ? page.clickAt : performance.now();
    page.clickAt = undefined;
    clearProblem();
    document.querySelectorAll("#actions button").forEach((b) => { b.disabled = true; });
    try {
      status("Running " + kind + "…");
      let b;
      try { b = kind === "simulate" ? simulateBody() : kind === "check" ? checkBody() : kind === "identify" ? { body: editor.value, json: true } : body(kind); }
      catch (e) {
        const ptr = e.line ? "/readings/" + e.line + "/" + e.column : undefined;
        showProblem({ title: "cannot read the readings", detail: String(e.message), errors: ptr ? [{ pointer: ptr, detail: e.message }] : [] }, 0);
        status("Not sent: " + e.message); return;
      }
      const r = await call("/v1/" + kind, b);
      const tFetch = performance.now();
      if (!r.ok) { showProblem(r.data, r.status); status(kind + " refused (HTTP " + r.status + ")."); return; }
      let points = 0;
      if (kind === "estimate" || kind === "smooth") points = render(r.data, b, kind);
      else if (kind === "check") renderCheck(r.data);
      else if (kind === "simulate") {
        const req = JSON.parse(editor.value);
        req.measurements = r.data.measurements;
        editor.value = formatRequest(req);
        st.truth = r.data.truth;
        st.busy = false;
        status("Simulated " + r.data.measurements.length + " reading lines (seed " + r.data.seed + "); estimating them…");
        await run("estimate");
        return;
      } else {
        renderRaw(kind, r.data);
        if (kind === "identify") { st.identified = r.data.model ? r.data : null; $("use-identified").disabled = !st.identified; }
      }
      await frame();
      const ms = performance.now() - t0;
      page.timings.push({ kind, ms, fetch_ms: tFetch - t0, points, bytes: r.bytes });
      status(kind + " done: " + (points ? points.toLocaleString("en") + " estimates plotted, " : "") + "click to plot " + ms.toFixed(0) + " ms (of which the service and transfer " + (tFetch - t0).toFixed(0) + " ms)." + (b.note ? " The page " + b.note + "." : ""));
    } catch (e) {
      status("Failed: " + e.message);
      page.errors.push("run: " + e.message);
    } finally {
      st.busy = false;
      document.querySelectorAll("#actions button").forEach((x) => { x.disabled = false; });
      $("use-identified").disabled = !st.identified;
    }
  }

  function checkBody() {
    const req = JSON.parse(editor.value);
    return { body: JSON.stringify({ model: req.model, prior: req.prior }), json: true };
  }

  /** A simulate request from the editor's model and prior: the demo's own schedule when a
   *  demo is loaded, else the times and input changes of the editor's readings. */
  function simulateBody() {
    const req = JSON.parse(editor.value);
    const seed = Math.floor(Math.random() * 2 ** 31);
    if (st.simulate) return { body: JSON.stringify(Object.assign({}, st.simulate, { model: req.model, prior: req.prior, seed })), json: true };
    const ms = req.measurements || [];
    const ts = ms.map((m) => m.t).filter((t) => typeof t === "number");
    if (ts.length < 2) throw new Error("simulate needs numeric reading times in the editor to copy");
    const inputs = ms.filter((m) => m.inputs).map((m) => ({ t: m.t, inputs: m.inputs }));
    const sim = { model: req.model, prior: req.prior, seed, times: { start: ts[0], step: (ts[ts.length - 1] - ts[0]) / (ts.length - 1), count: ts.length } };
    if (inputs.length) sim.inputs = inputs;
    return { body: JSON.stringify(sim), json: true };
  }

  // ---- plots -----------------------------------------------------------------------------
  const toSec = (t) => (typeof t === "number" ? t : CSV.seconds(String(t)));

  /** Readings per sensor: [{t, v}] from the request sent (its lines, or the CSV's). */
  function readingsOf(b) {
    let lines = null;
    if (b.req && Array.isArray(b.req.measurements)) lines = b.req.measurements;
    else if (b.req && b.req.measurementsText) lines = JSON.parse(b.req.measurementsText);
    else if (b.readingsFromCsv && st.csv) {
      // The service read the file itself; the page reads it too, only to draw the readings.
      try { lines = JSON.parse(CSV.convert(st.csv.text, b.readingsFromCsv).json); } catch (_) { lines = []; }
    }
    return lines || [];
  }

  function legend(items) {
    const box = $("legend"); box.textContent = "";
    for (const [label, css] of items) {
      const s = document.createElement("span");
      const i = document.createElement("i"); i.style.cssText = css;
      s.appendChild(i); s.appendChild(document.createTextNode(label)); box.appendChild(s);
    }
  }

  /** Inverse standard normal CDF (Acklam's rational approximation, relative error about
   *  1e-9; from memory), for the gate's bound on a normalised innovation. */
  function probit(p) {
    const a = [-39.69683028665376, 220.9460984245205, -275.9285104469687, 138.357751867269, -30.66479806614716, 2.506628277459239];
    const b = [-54.47609879822406, 161.5858368580409, -155.6989798598866, 66.80131188771972, -13.28068155288572];
    const c = [-0.007784894002430293, -0.3223964580411365, -2.400758277161838, -2.549732539343734, 4.374664141464968, 2.938163982698783];
    const d = [0.007784695709041462, 0.3224671290700398, 2.445134137142996, 3.754408661907416];
    const q0 = p < 0.5 ? p : 1 - p;
    let x;
    if (q0 < 0.02425) { const q = Math.sqrt(-2 * Math.log(q0)); x = (((((c[0] * q + c[1]) * q + c[2]) * q + c[3]) * q + c[4]) * q + c[5]) / ((((d[0] * q + d[1]) * q + d[2]) * q + d[3]) * q + 1); x = -x; }
    else { const q = q0 - 0.5, r = q * q; x = (((((a[0] * r + a[1]) * r + a[2]) * r + a[3]) * r + a[4]) * r + a[5]) * q / (((((b[0] * r + b[1]) * r + b[2]) * r + b[3]) * r + b[4]) * r + 1); }
    return p < 0.5 ? x : -x;
  }
  /** The 95 % bounds of the mean of chi-square variables with `dof` degrees in all, per
   *  degree (Wilson–Hilferty cube-root approximation; common practice). */
  function chi2MeanBounds(dof) {
    const z = 1.959963984540054, h = 2 / (9 * dof);
    const q = (s) => Math.pow(Math.max(0, 1 - h + s * z * Math.sqrt(h)), 3);
    return [q(-1), q(1)];
  }

  function render(ans, b, kind) {
    st.answer = ans;
    const est = ans.estimates || [], n = est.length, states = ans.states || [];
    const req = b.req || {};
    const sensors = (req.model && req.model.sensors) || {};
    const x = new Float64Array(n);
    for (let i = 0; i < n; i++) x[i] = toSec(est[i].t);
    const t0 = n ? x[0] : 0, t1 = n ? x[n - 1] : 1;
    group.clear(); group.setFull(t0, t1 > t0 ? t1 : t0 + 1);
    ["state-plots", "innovation-plots", "nis-plot", "observability"].forEach((id) => { $(id).textContent = ""; });
    $("raw-answer").hidden = true;
    const timeLabel = typeof (est[0] && est[0].t) === "string" ? "time (s after " + est[0].t + ")" : "time (s)";
    if (typeof (est[0] && est[0].t) === "string") for (let i = 0; i < n; i++) x[i] -= t0;
    if (typeof (est[0] && est[0].t) === "string") group.setFull(0, Math.max(1e-9, x[n - 1] || 1));

    // Readings, matched to estimate lines by time, split accepted / refused.
    const lines = readingsOf(b);
    const idx = new Map(); for (let i = 0; i < n; i++) idx.set(est[i].t, i);
    const perSensor = {};
    for (const s of Object.keys(sensors)) perSensor[s] = { xa: [], ya: [], xr: [], yr: [], nx: [], na: [], nr: [], nxr: [] };
    for (const m of lines) {
      const i = idx.get(m.t);
      if (i === undefined || !m.values) continue;
      for (const [s, v] of Object.entries(m.values)) {
        const ps = perSensor[s]; if (!ps || typeof v !== "number") continue;
        const inn = est[i].innovations && est[i].innovations[s];
        const refused = inn && inn.accepted === false;
        if (refused) { ps.xr.push(x[i]); ps.yr.push(v); } else { ps.xa.push(x[i]); ps.ya.push(v); }
      }
    }
    const f64 = (a) => Float64Array.from(a);
    const truth = st.truth && st.truth.length ? st.truth : null;
    const tx = truth ? f64(truth.map((r) => toSec(r.t) - (typeof (est[0] && est[0].t) === "string" ? t0 : 0))) : null;

    page.plots = {};
    const series = { t: x, states: {} };
    legend([["estimate", "background:" + C.blue], ["±2σ band", "background:rgba(86,180,233,0.35)"], ["reading accepted", "background:" + C.green + ";width:6px;height:6px"], ["reading refused (×)", "border:2px solid " + C.vermillion + ";width:10px;height:10px"], truth ? ["truth (simulated)", "border-top:2px dashed " + C.black + ";height:0"] : null, ["gate / 95 % bounds", "border-top:2px dashed " + C.purple + ";height:0"]].filter(Boolean));

    states.forEach((s, k) => {
      const mean = new Float64Array(n), lo = new Float64Array(n), hi = new Float64Array(n);
      let hasStd = false;
      for (let i = 0; i < n; i++) {
        const e = est[i], m = e.mean[s], sd = e.std ? e.std[s] : undefined;
        mean[i] = m;
        if (typeof sd === "number") { hasStd = true; lo[i] = m - 2 * sd; hi[i] = m + 2 * sd; } else { lo[i] = NaN; hi[i] = NaN; }
      }
      series.states[s] = { mean, lo, hi };
      // Drawing order: band, accepted readings, estimate, truth, refused readings on top.
      const sr = [];
      if (hasStd) sr.push({ kind: "band", x, lo, hi, color: "rgba(86,180,233,0.45)" });
      let acc = 0, ref = 0;
      const refusedSeries = [];
      for (const [sn, sd] of Object.entries(sensors)) {
        if (sd.measures !== s) continue;
        const ps = perSensor[sn]; acc += ps.xa.length; ref += ps.xr.length;
        sr.push({ kind: "dots", x: f64(ps.xa), y: f64(ps.ya), color: "rgba(0,158,115,0.75)", radius: 1.4 });
        refusedSeries.push({ kind: "crosses", x: f64(ps.xr), y: f64(ps.yr), color: C.vermillion, noScale: true, pin: true });
      }
      sr.push({ kind: "line", x, y: mean, color: C.blue, width: 1.8 });
      if (truth) sr.push({ kind: "line", x: tx, y: f64(truth.map((r) => (r.state && typeof r.state[s] === "number" ? r.state[s] : NaN))), color: C.black, dash: [4, 4], width: 1.1 });
      sr.push(...refusedSeries);
      const unit = st.units[s] ? " (" + st.units[s] + ")" : "";
      let mn = Infinity, mx = -Infinity; for (let i = 0; i < n; i++) { if (mean[i] < mn) mn = mean[i]; if (mean[i] > mx) mx = mean[i]; }
      const cap = (kind === "smooth" ? "Smoothed" : "Estimated") + " " + s + unit + ": " + n + " estimates from t = " + fmtT(est[0]) + " to " + fmtT(est[n - 1]) + ", mean between " + fmt(mn) + " and " + fmt(mx) + (hasStd ? ", with a ±2σ band" : "") + "; " + (acc + ref ? acc + " readings accepted, " + ref + " refused (crosses; the axis range leaves them out, so those beyond it sit on its edge)." : "no sensor reads this state directly" + (truth ? "; the dashed line is the simulated truth." : "."));
      const p = new P.Plot($("state-plots"), group, { id: "plot-state-" + k, title: s + unit, yLabel: s + unit, xLabel: timeLabel, caption: cap, series: sr, data: { state: s, points: n, readings: acc + ref, refused: ref } });
      page.plots["state:" + s] = { points: n, readings: acc + ref, refused: ref };
      void p;
    });

    // Normalised innovations per scalar sensor, with the gate's bounds.
    const prob = req.filter && req.filter.gate && req.filter.gate.probability;
    const bound = typeof prob === "number" ? probit((1 + prob) / 2) : null;
    let nisSum = 0, dofSum = 0;
    const nisX = new Float64Array(n), nisY = new Float64Array(n), nisLo = new Float64Array(n), nisHi = new Float64Array(n);
    const inn = {};
    for (let i = 0; i < n; i++) {
      const e = est[i].innovations || {};
      for (const [s, v] of Object.entries(e)) {
        if (!inn[s]) inn[s] = { xa: [], ya: [], xr: [], yr: [] };
        if (typeof v.innovation === "number" && v.innovation_std > 0) {
          const z = v.innovation / v.innovation_std;
          if (v.accepted === false) { inn[s].xr.push(x[i]); inn[s].yr.push(z); } else { inn[s].xa.push(x[i]); inn[s].ya.push(z); }
        }
        if (v.accepted !== false && typeof v.nis === "number") { nisSum += v.nis; dofSum += Array.isArray(v.innovation) ? v.innovation.length : 1; }
      }
      nisX[i] = x[i];
      if (dofSum > 0) { nisY[i] = nisSum / dofSum; const [a, c] = chi2MeanBounds(dofSum); nisLo[i] = a; nisHi[i] = c; } else { nisY[i] = nisLo[i] = nisHi[i] = NaN; }
    }
    series.innovations = inn;
    for (const [s, v] of Object.entries(inn)) {
      if (!v.xa.length && !v.xr.length) continue;
      const sr = [{ kind: "dots", x: f64(v.xa), y: f64(v.ya), color: "rgba(0,158,115,0.75)", radius: 1.6 }, { kind: "crosses", x: f64(v.xr), y: f64(v.yr), color: C.vermillion, noScale: !!bound, pin: !!bound }];
      if (bound) { sr.push({ kind: "hline", y: bound, color: C.purple }, { kind: "hline", y: -bound, color: C.purple }); }
      sr.push({ kind: "hline", y: 0, color: "#8a8a84", dash: [2, 3] });
      const cap = "Innovation of " + s + " over its predicted std (dimensionless): " + v.xa.length + " accepted, " + v.xr.length + " refused" + (bound ? "; the gate (probability " + prob + ") refuses beyond ±" + bound.toFixed(2) + " (dashed); refused ones beyond the axis range sit on its edge." : "; no gate in the request.");
      new P.Plot($("innovation-plots"), group, { id: "plot-innovation-" + s, title: "normalised innovation, " + s, yLabel: "innovation / std", xLabel: timeLabel, caption: cap, series: sr, data: { sensor: s, accepted: v.xa.length, refused: v.xr.length } });
    }
    if (dofSum > 0) {
      const last = nisY[n - 1], [a, c] = [nisLo[n - 1], nisHi[n - 1]];
      const cap = "Running mean NIS per degree of freedom over the accepted readings, with the 95 % bounds of a consistent filter for as many readings: ends at " + fmt(last) + " within [" + fmt(a) + ", " + fmt(c) + "]" + (ans.summary && ans.summary.nis ? "; the service's verdict: " + ans.summary.nis.verdict + "." : ".");
      new P.Plot($("nis-plot"), group, { id: "plot-nis", title: "running mean NIS", yLabel: "mean NIS per dof", xLabel: timeLabel, caption: cap, series: [{ kind: "line", x: nisX, y: nisLo, color: C.purple, dash: [6, 4], width: 1.2 }, { kind: "line", x: nisX, y: nisHi, color: C.purple, dash: [6, 4], width: 1.2 }, { kind: "line", x: nisX, y: nisY, color: C.orange, width: 1.8 }], data: { points: n } , yFixed: null });
    }
    st.series = series;
    group.redraw();
    $("export-csv").disabled = false; $("export-posterior").disabled = !ans.posterior;
    syncZoomFields(group.view());
    return n;
  }

  function fmt(v) { return Number.isFinite(v) ? String(Number(v.toPrecision(4))) : "—"; }
  function fmtT(e) { return e ? (typeof e.t === "number" ? fmt(e.t) + " s" : e.t) : "—"; }

  function renderCheck(ans) {
    const box = $("observability"); box.textContent = "";
    const o = ans.observability || {};
    const h = document.createElement("h2"); h.textContent = "Observability"; box.appendChild(h);
    const tbl = document.createElement("table");
    tbl.createCaption().textContent = "Rank of the observability matrix at the prior mean: " + o.rank + " of " + o.dimension + (o.unobservable && o.unobservable.length ? "; not observable: " + o.unobservable.join(", ") : "; every state is observable") + ".";
    const hr = tbl.insertRow(); ["sensors", "rank", "not observable from them"].forEach((t) => { const th = document.createElement("th"); th.scope = "col"; th.textContent = t; hr.appendChild(th); });
    const add = (name, r) => { const tr = tbl.insertRow(); tr.insertCell().textContent = name; tr.insertCell().textContent = r.rank; tr.insertCell().textContent = (r.unobservable || []).join(", ") || "none"; };
    add("all together", o);
    for (const [s, r] of Object.entries(o.by_sensor || {})) add(s + " alone", r);
    box.appendChild(tbl);
    if ((ans.warnings || []).length) { const p = document.createElement("p"); p.textContent = "Warnings: " + ans.warnings.map((w) => (typeof w === "string" ? w : w.detail || w.message || JSON.stringify(w))).join("; "); box.appendChild(p); }
    box.scrollIntoView({ block: "nearest" });
  }

  function renderRaw(kind, ans) {
    const pre = $("raw-answer"); pre.hidden = false;
    pre.textContent = kind + " answer:\n" + JSON.stringify(ans, null, 2);
    if (ans.posterior) { st.answer = ans; $("export-posterior").disabled = false; }
  }

  /** An estimate request from an identify answer: its model, its prior when it gave one
   *  (subspace, reduced), else a prior at the first sample's time with mean 0 and std 1
   *  for every state, to be edited; no readings yet. */
  function useIdentified(ans) {
    let t = 0;
    try { const s = JSON.parse(editor.value).series; if (s && s.length && typeof s[0].t === "number") t = s[0].t; } catch (_) { /* keep 0 */ }
    const states = ans.model.states || [];
    const prior = ans.prior || { t, mean: Object.fromEntries(states.map((n) => [n, 0])), std: Object.fromEntries(states.map((n) => [n, 1])) };
    editor.value = formatRequest({ model: ans.model, filter: { method: "ekf" }, prior, measurements: [] });
    st.truth = null; st.simulate = null;
    clearProblem(); refreshMapping();
    status("The identified model is in the editor: add readings (or load a CSV), then Estimate.");
  }

  // ---- zoom fields and exports -------------------------------------------------------------
  function syncZoomFields([a, b]) { $("zoom-from").value = Number(a.toPrecision(6)); $("zoom-to").value = Number(b.toPrecision(6)); }
  group.listeners.push(syncZoomFields);
  $("zoom-apply").addEventListener("click", () => group.set(Number($("zoom-from").value), Number($("zoom-to").value)));
  $("zoom-reset").addEventListener("click", () => group.reset());
  window.addEventListener("resize", () => group.redraw());

  function download(name, type, text) {
    const a = document.createElement("a");
    a.href = URL.createObjectURL(new Blob([text], { type }));
    a.download = name; document.body.appendChild(a); a.click(); a.remove();
    setTimeout(() => URL.revokeObjectURL(a.href), 5000);
  }
  /** The plotted state series (time, mean, mean ∓ 2σ per state) as CSV. */
  function plottedCsv() {
    const s = st.series; if (!s) return "";
    const names = Object.keys(s.states);
    const head = ["t"].concat(...names.map((n) => [n + "_mean", n + "_minus_2std", n + "_plus_2std"]));
    const out = [head.join(",")];
    const est = st.answer.estimates;
    for (let i = 0; i < s.t.length; i++) {
      const row = [typeof est[i].t === "string" ? est[i].t : String(est[i].t)];
      for (const n of names) { const v = s.states[n]; row.push(v.mean[i], Number.isNaN(v.lo[i]) ? "" : v.lo[i], Number.isNaN(v.hi[i]) ? "" : v.hi[i]); }
      out.push(row.join(","));
    }
    return out.join("\n") + "\n";
  }
  $("export-csv").addEventListener("click", () => download("tacit-series.csv", "text/csv", plottedCsv()));
  $("export-posterior").addEventListener("click", () => download("tacit-posterior.json", "application/json", JSON.stringify(st.answer.posterior, null, 2) + "\n"));
  page.plottedCsv = plottedCsv;

  // ---- wiring --------------------------------------------------------------------------------
  document.querySelectorAll("#demos button").forEach((b) => b.addEventListener("click", async () => {
    page.clickAt = performance.now();
    if (await loadDemo(b.dataset.demo)) await run("estimate");
  }));
  for (const k of ["estimate", "smooth", "check", "simulate", "calibrate", "identify"]) $("run-" + k).addEventListener("click", () => run(k));
  $("use-identified").addEventListener("click", () => { if (st.identified) useIdentified(st.identified); });
  editor.addEventListener("change", refreshMapping);
  page.loadCsvText = csvLoaded; // lets the browser test hand the page a generated file
  page.ready = true;
})();
