// tacit page: reading a CSV file of readings. Two layouts: wide (a time column and one
// column per sensor, a blank cell for no reading) and long (time, tag, value and an
// optional quality column). The page either sends the file itself with a `csv` section
// (multipart) or turns it into JSON measurement lines here, for a service without CSV in.
"use strict";
(function () {
  /** Split one CSV line; quoted cells ("a,b", "" for a quote) are handled. */
  function splitLine(line, d) {
    if (line.indexOf('"') < 0) return line.split(d);
    const out = [];
    let cell = "", q = false;
    for (let i = 0; i < line.length; i++) {
      const ch = line[i];
      if (q) {
        if (ch === '"') { if (line[i + 1] === '"') { cell += '"'; i++; } else q = false; }
        else cell += ch;
      } else if (ch === '"') q = true;
      else if (ch === d) { out.push(cell); cell = ""; }
      else cell += ch;
    }
    out.push(cell);
    return out;
  }

  /** The file's lines (line 1 is the header), without a trailing empty line. */
  function lines(text) {
    const ls = text.split(/\r?\n/);
    while (ls.length && ls[ls.length - 1].trim() === "") ls.pop();
    return ls;
  }

  /** Seconds of a time cell, for ordering and plotting: a number, or a timestamp. */
  function seconds(cell) {
    const s = cell.trim();
    if (s === "") return NaN;
    const n = Number(s);
    if (isFinite(n)) return n;
    let iso = s.replace(" ", "T");
    if (!/(Z|[+-]\d\d:?\d\d)$/.test(iso)) iso += "Z";
    return Date.parse(iso) / 1000;
  }

  /** The JSON form of a time cell: a number stays a number, a timestamp a string. */
  function timeJson(cell) {
    const s = cell.trim(), n = Number(s);
    return s !== "" && isFinite(n) ? s : JSON.stringify(s);
  }

  class CsvError extends Error {
    constructor(line, column, detail) { super(`line ${line}, column ${column}: ${detail}`); this.line = line; this.column = column; }
  }

  /**
   * Measurement lines from the file under the `csv` section `sec`, as JSON text of an
   * array, with per-sensor readings for the plots. Errors name line and column.
   */
  function convert(text, sec) {
    const d = sec.delimiter || ",";
    const ls = lines(text);
    if (!ls.length) throw new Error("the CSV file is empty");
    const head = splitLine(ls[0], d).map((h) => h.trim());
    const col = (name, what) => {
      const k = head.indexOf(name);
      if (k < 0) throw new Error(`the header has no column '${name}' (${what})`);
      return k;
    };
    const tc = col(sec.time_column || "time", "time column");
    const rows = []; // [seconds, timeJson, [[sensor, value], ...]]
    let dropped = 0;
    const used = new Set([tc]);
    if (sec.layout === "wide") {
      const map = Object.entries(sec.columns || {}).map(([s, h]) => [s, col(h, `column of sensor ${s}`)]);
      map.forEach(([, k]) => used.add(k));
      for (let i = 1; i < ls.length; i++) {
        const cells = splitLine(ls[i], d);
        const ts = seconds(cells[tc] || "");
        if (ts !== ts) throw new CsvError(i + 1, tc + 1, `'${cells[tc] || ""}' is not a time`);
        const vals = [];
        for (const [s, k] of map) {
          const c = (cells[k] || "").trim();
          if (c === "") continue;
          const v = Number(c);
          if (!isFinite(v)) throw new CsvError(i + 1, k + 1, `'${c}' is not a number`);
          vals.push([s, v]);
        }
        rows.push([ts, timeJson(cells[tc]), vals]);
      }
    } else {
      const tagc = col(sec.tag_column || "tag", "tag column"), vc = col(sec.value_column || "value", "value column");
      const qc = sec.quality_column ? col(sec.quality_column, "quality column") : -1;
      const good = new Set((sec.good || []).map(String));
      const byTag = new Map(Object.entries(sec.tags || {}).map(([s, tag]) => [tag, s]));
      const recs = [];
      for (let i = 1; i < ls.length; i++) {
        const cells = splitLine(ls[i], d);
        const s = byTag.get((cells[tagc] || "").trim());
        if (s === undefined) continue;
        if (qc >= 0 && !good.has((cells[qc] || "").trim())) { dropped++; continue; }
        const ts = seconds(cells[tc] || "");
        if (ts !== ts) throw new CsvError(i + 1, tc + 1, `'${cells[tc] || ""}' is not a time`);
        const c = (cells[vc] || "").trim(), v = Number(c);
        if (c === "" || !isFinite(v)) throw new CsvError(i + 1, vc + 1, `'${c}' is not a number`);
        recs.push([ts, cells[tc], s, v]);
      }
      recs.sort((a, b) => a[0] - b[0]); // Array sort is stable: same times keep file order.
      for (const [ts, cell, s, v] of recs) {
        const last = rows[rows.length - 1];
        if (last && last[0] === ts) last[2].push([s, v]);
        else rows.push([ts, timeJson(cell), [[s, v]]]);
      }
    }
    const parts = new Array(rows.length);
    const readings = {};
    for (let i = 0; i < rows.length; i++) {
      const [, tj, vals] = rows[i];
      let v = "";
      for (const [s, x] of vals) { v += (v ? "," : "") + JSON.stringify(s) + ":" + String(x); }
      parts[i] = `{"t":${tj},"values":{${v}}}`;
    }
    return { json: "[" + parts.join(",\n") + "]", count: rows.length, dropped, unused: head.filter((h, k) => sec.layout === "wide" && !used.has(k)) };
  }

  /** Header and the first rows, for the preview and the mapping lists. */
  function peek(text, d, n) {
    const ls = text.slice(0, 200000).split(/\r?\n/).filter((l) => l.trim() !== "");
    return { head: ls.length ? splitLine(ls[0], d).map((h) => h.trim()) : [], rows: ls.slice(1, n + 1).map((l) => splitLine(l, d)) };
  }

  /** Distinct values of one column over the first rows (the tags a long file holds). */
  function distinct(text, d, k, limit) {
    const ls = text.slice(0, 2000000).split(/\r?\n/);
    const seen = new Set();
    for (let i = 1; i < ls.length && seen.size < limit; i++) {
      const c = splitLine(ls[i], d)[k];
      if (c !== undefined && c.trim() !== "") seen.add(c.trim());
    }
    return [...seen];
  }

  window.TacitCsv = { convert, peek, distinct, seconds, splitLine };
})();
