// tacit page: a small canvas plotter of our own (no library). Every plot of the page
// shares one time range through a ZoomGroup, so zooming one zooms all.
//
// Decimation: a plot never draws more than a few marks per pixel column. For a line, each
// pixel column keeps the first, lowest, highest and last value of the points falling in
// it and draws them as one vertical stroke joined to its neighbours (min/max decimation,
// so a single-sample spike still shows); a band keeps the lowest lower edge and the
// highest upper edge per column; dots and crosses keep one mark per occupied pixel cell.
// The cost of a redraw is one pass over the visible points, without allocation per point.
"use strict";
(function () {
  // Okabe-Ito colours (a colour-blind-safe set; common practice).
  const C = {
    blue: "#0072B2", sky: "#56B4E9", green: "#009E73", orange: "#E69F00",
    vermillion: "#D55E00", purple: "#CC79A7", yellow: "#F0E442", black: "#000000",
  };

  /** Lower index of the first x >= v in an ascending Float64Array. */
  function lowerBound(xs, v) {
    let lo = 0, hi = xs.length;
    while (lo < hi) { const m = (lo + hi) >>> 1; if (xs[m] < v) lo = m + 1; else hi = m; }
    return lo;
  }

  /** About n round tick values covering [a, b]. */
  function ticks(a, b, n) {
    if (!(b > a)) return [a];
    const raw = (b - a) / n, mag = Math.pow(10, Math.floor(Math.log10(raw)));
    const step = [1, 2, 5, 10].map((k) => k * mag).find((s) => s >= raw) || raw;
    const out = [];
    for (let v = Math.ceil(a / step) * step; v <= b + step * 1e-9; v += step) out.push(Math.abs(v) < step * 1e-9 ? 0 : v);
    return out;
  }
  function fmt(v) {
    const a = Math.abs(v);
    if (a !== 0 && (a >= 1e5 || a < 1e-3)) return v.toExponential(1);
    return String(Number(v.toPrecision(4)));
  }

  class ZoomGroup {
    constructor() { this.plots = []; this.full = [0, 1]; this.range = null; this.listeners = []; }
    add(p) { this.plots.push(p); }
    clear() { this.plots = []; this.range = null; }
    setFull(a, b) { this.full = [a, b]; }
    view() { return this.range || this.full; }
    set(a, b) {
      if (!(b > a)) return;
      const [f0, f1] = this.full;
      a = Math.max(a, f0); b = Math.min(b, f1);
      if (!(b > a)) return;
      this.range = (a <= f0 && b >= f1) ? null : [a, b];
      this.redraw();
    }
    reset() { this.range = null; this.redraw(); }
    redraw() { for (const p of this.plots) p.draw(); for (const f of this.listeners) f(this.view()); }
  }

  class Plot {
    /**
     * opts: {id, title, yLabel, xLabel, caption, series: [...]}
     * series kinds: band {x, lo, hi}, line {x, y, dash}, dots {x, y}, crosses {x, y},
     * hline {y, dash}, each with colour and label.
     */
    constructor(parent, group, opts) {
      this.group = group; this.opts = opts; this.series = opts.series;
      const fig = document.createElement("figure");
      fig.className = "plot"; fig.id = opts.id;
      const cap = document.createElement("figcaption");
      cap.id = opts.id + "-caption";
      const strong = document.createElement("strong");
      strong.textContent = opts.title;
      cap.appendChild(strong);
      cap.appendChild(document.createTextNode(" " + (opts.caption || "")));
      const canvas = document.createElement("canvas");
      canvas.tabIndex = 0;
      canvas.setAttribute("role", "img");
      canvas.setAttribute("aria-label", opts.title + ". " + (opts.caption || ""));
      canvas.setAttribute("aria-describedby", cap.id);
      fig.appendChild(cap); fig.appendChild(canvas);
      parent.appendChild(fig);
      for (const [k, v] of Object.entries(opts.data || {})) fig.dataset[k] = String(v);
      this.fig = fig; this.canvas = canvas; this.drag = null;
      this.pad = { l: 64, r: 12, t: 8, b: 34 };
      this.bind();
      group.add(this);
    }

    bind() {
      const c = this.canvas;
      const xAt = (ev) => {
        const r = c.getBoundingClientRect();
        const [a, b] = this.group.view();
        const w = r.width - this.pad.l - this.pad.r;
        return a + (b - a) * Math.min(1, Math.max(0, (ev.clientX - r.left - this.pad.l) / w));
      };
      c.addEventListener("pointerdown", (ev) => {
        if (ev.button !== 0) return;
        c.setPointerCapture(ev.pointerId);
        this.drag = { x0: xAt(ev), x1: xAt(ev) };
      });
      c.addEventListener("pointermove", (ev) => {
        if (!this.drag) return;
        this.drag.x1 = xAt(ev); this.draw();
      });
      c.addEventListener("pointerup", (ev) => {
        if (!this.drag) return;
        const d = this.drag; this.drag = null;
        const a = Math.min(d.x0, d.x1), b = Math.max(d.x0, d.x1);
        const [v0, v1] = this.group.view();
        if (b - a > (v1 - v0) * 0.005) this.group.set(a, b); else this.draw();
        void ev;
      });
      c.addEventListener("dblclick", () => this.group.reset());
      c.addEventListener("keydown", (ev) => {
        const [a, b] = this.group.view(), w = b - a;
        let handled = true;
        if (ev.key === "ArrowLeft") this.group.set(a - w * 0.2, b - w * 0.2 + Math.max(0, this.group.full[0] - (a - w * 0.2)));
        else if (ev.key === "ArrowRight") this.group.set(a + w * 0.2 - Math.max(0, b + w * 0.2 - this.group.full[1]), b + w * 0.2);
        else if (ev.key === "+" || ev.key === "=") this.group.set(a + w * 0.25, b - w * 0.25);
        else if (ev.key === "-" || ev.key === "_") this.group.set(a - w * 0.5, b + w * 0.5);
        else if (ev.key === "0") this.group.reset();
        else handled = false;
        if (handled) ev.preventDefault();
      });
    }

    /** Lowest and highest value of every series over the visible time range. */
    yRange(i0s, i1s) {
      let lo = Infinity, hi = -Infinity;
      this.series.forEach((s, k) => {
        if (s.kind === "hline") { if (isFinite(s.y)) { lo = Math.min(lo, s.y); hi = Math.max(hi, s.y); } return; }
        if (s.noScale) return;
        const a = s.kind === "band" ? s.lo : s.y, b = s.kind === "band" ? s.hi : s.y;
        for (let i = i0s[k]; i < i1s[k]; i++) {
          const u = a[i], v = b[i];
          if (u < lo) lo = u;
          if (v > hi) hi = v;
        }
      });
      if (!isFinite(lo) || !isFinite(hi)) return [0, 1];
      if (hi - lo < 1e-12 * Math.max(1, Math.abs(hi))) { lo -= 0.5 * Math.max(1e-9, Math.abs(lo) * 0.01); hi += 0.5 * Math.max(1e-9, Math.abs(hi) * 0.01); }
      const m = (hi - lo) * 0.05;
      return [lo - m, hi + m];
    }

    draw() {
      const t0 = performance.now();
      const c = this.canvas, dpr = window.devicePixelRatio || 1;
      const W = Math.max(50, c.clientWidth), H = Math.max(50, c.clientHeight);
      if (c.width !== Math.round(W * dpr) || c.height !== Math.round(H * dpr)) {
        c.width = Math.round(W * dpr); c.height = Math.round(H * dpr);
      }
      const g = c.getContext("2d");
      g.setTransform(dpr, 0, 0, dpr, 0, 0);
      g.clearRect(0, 0, W, H);
      const { l, r, t, b } = this.pad;
      const pw = W - l - r, ph = H - t - b;
      this.ph = ph;
      const [xa, xb] = this.group.view();
      const i0s = [], i1s = [];
      for (const s of this.series) {
        if (s.kind === "hline") { i0s.push(0); i1s.push(0); continue; }
        // One point either side, so lines run to the edges.
        i0s.push(Math.max(0, lowerBound(s.x, xa) - 1));
        i1s.push(Math.min(s.x.length, lowerBound(s.x, xb) + 1));
      }
      const [ya, yb] = this.opts.yFixed || this.yRange(i0s, i1s);
      const X = (v) => l + ((v - xa) / (xb - xa)) * pw;
      const Y = (v) => t + (1 - (v - ya) / (yb - ya)) * ph;

      // Axes and grid.
      g.font = "11px system-ui, sans-serif"; g.fillStyle = "#55565e"; g.strokeStyle = "#e4e4de"; g.lineWidth = 1;
      g.textAlign = "right"; g.textBaseline = "middle";
      for (const v of ticks(ya, yb, 5)) { const y = Math.round(Y(v)) + 0.5; g.beginPath(); g.moveTo(l, y); g.lineTo(l + pw, y); g.stroke(); g.fillText(fmt(v), l - 4, y); }
      g.textAlign = "center"; g.textBaseline = "top";
      for (const v of ticks(xa, xb, Math.max(2, Math.floor(pw / 90)))) { const x = Math.round(X(v)) + 0.5; g.beginPath(); g.moveTo(x, t); g.lineTo(x, t + ph); g.stroke(); g.fillText(fmt(v), x, t + ph + 3); }
      g.fillStyle = "#1b1b1f"; g.fillText(this.opts.xLabel || "time (s)", l + pw / 2, t + ph + 18);
      g.save(); g.translate(12, t + ph / 2); g.rotate(-Math.PI / 2); g.textBaseline = "middle"; g.fillText(this.opts.yLabel || "", 0, 0); g.restore();
      g.strokeStyle = "#8a8a84"; g.strokeRect(l + 0.5, t + 0.5, pw, ph);

      g.save(); g.beginPath(); g.rect(l, t, pw, ph); g.clip();
      this.series.forEach((s, k) => {
        const i0 = i0s[k], i1 = i1s[k];
        if (s.kind === "band") this.drawBand(g, s, i0, i1, X, Y, xa, xb, pw);
        else if (s.kind === "line") this.drawLine(g, s, i0, i1, X, Y, xa, xb, pw);
        else if (s.kind === "dots" || s.kind === "crosses") this.drawMarks(g, s, i0, i1, X, Y, W, H);
        else if (s.kind === "hline") {
          g.strokeStyle = s.color; g.lineWidth = 1.5; g.setLineDash(s.dash || [6, 4]);
          g.beginPath(); g.moveTo(l, Y(s.y)); g.lineTo(l + pw, Y(s.y)); g.stroke(); g.setLineDash([]);
        }
      });
      if (this.drag) {
        g.fillStyle = "rgba(230,159,0,0.18)"; g.strokeStyle = C.orange;
        const a = X(Math.min(this.drag.x0, this.drag.x1)), bb = X(Math.max(this.drag.x0, this.drag.x1));
        g.fillRect(a, t, bb - a, ph); g.strokeRect(a, t, bb - a, ph);
      }
      g.restore();
      this.lastDrawMs = performance.now() - t0;
    }

    /** Column of pixel x within the plot, and a per-column pass calling visit(col, i). */
    columns(s, i0, i1, xa, xb, pw, visit) {
      const scale = pw / (xb - xa);
      for (let i = i0; i < i1; i++) visit(Math.floor((s.x[i] - xa) * scale), i);
    }

    drawLine(g, s, i0, i1, X, Y, xa, xb, pw) {
      g.strokeStyle = s.color; g.lineWidth = s.width || 1.6; g.setLineDash(s.dash || []);
      g.beginPath();
      let col = null, first = 0, last = 0, mn = 0, mx = 0, open = false;
      const flush = () => {
        if (col === null) return;
        const x = this.pad.l + col + 0.5;
        if (!open) { g.moveTo(x, Y(first)); open = true; } else g.lineTo(x, Y(first));
        if (mx !== mn) { g.lineTo(x, Y(mn)); g.lineTo(x, Y(mx)); }
        g.lineTo(x, Y(last));
      };
      const scale = pw / (xb - xa), ys = s.y, xs = s.x;
      for (let i = i0; i < i1; i++) {
        const v = ys[i];
        if (v !== v) { flush(); col = null; open = false; continue; } // NaN: a gap in the line
        const c = Math.floor((xs[i] - xa) * scale);
        if (c !== col) { flush(); col = c; first = last = mn = mx = v; }
        else { last = v; if (v < mn) mn = v; if (v > mx) mx = v; }
      }
      flush();
      g.stroke(); g.setLineDash([]);
    }

    drawBand(g, s, i0, i1, X, Y, xa, xb, pw) {
      const scale = pw / (xb - xa), xs = s.x;
      const cols = [], los = [], his = [];
      let col = null, lo = 0, hi = 0;
      for (let i = i0; i < i1; i++) {
        const a = s.lo[i], b = s.hi[i];
        if (a !== a || b !== b) continue;
        const c = Math.floor((xs[i] - xa) * scale);
        if (c !== col) { if (col !== null) { cols.push(col); los.push(lo); his.push(hi); } col = c; lo = a; hi = b; }
        else { if (a < lo) lo = a; if (b > hi) hi = b; }
      }
      if (col !== null) { cols.push(col); los.push(lo); his.push(hi); }
      if (!cols.length) return;
      g.fillStyle = s.color; g.beginPath();
      g.moveTo(this.pad.l + cols[0] + 0.5, Y(his[0]));
      for (let k = 1; k < cols.length; k++) g.lineTo(this.pad.l + cols[k] + 0.5, Y(his[k]));
      for (let k = cols.length - 1; k >= 0; k--) g.lineTo(this.pad.l + cols[k] + 0.5, Y(los[k]));
      g.closePath(); g.fill();
    }

    drawMarks(g, s, i0, i1, X, Y, W, H) {
      const seen = new Uint8Array(Math.ceil(W) * Math.ceil(H));
      const w = Math.ceil(W);
      g.strokeStyle = s.color; g.fillStyle = s.color; g.lineWidth = s.kind === "crosses" ? 2 : 1.5;
      g.beginPath();
      const r = s.kind === "crosses" ? 4 : (s.radius || 1.8);
      for (let i = i0; i < i1; i++) {
        const v = s.y[i];
        if (v !== v) continue;
        const x = X(s.x[i]);
        let y = Y(v);
        // Marks outside the axis range (kept out of it on purpose) sit on its edge.
        if (s.pin) y = Math.min(this.pad.t + this.ph - 3, Math.max(this.pad.t + 3, y));
        const yi = Math.min(H - 1, Math.max(0, Math.round(y))), xi = Math.min(w - 1, Math.max(0, Math.round(x)));
        const cell = yi * w + xi;
        if (seen[cell]) continue;
        seen[cell] = 1;
        if (s.kind === "crosses") { g.moveTo(x - r, y - r); g.lineTo(x + r, y + r); g.moveTo(x - r, y + r); g.lineTo(x + r, y - r); }
        else g.rect(x - r, y - r, 2 * r, 2 * r); // a small square: far cheaper than an arc
      }
      if (s.kind === "crosses") g.stroke(); else g.fill();
    }
  }

  window.TacitPlot = { Plot, ZoomGroup, colours: C, lowerBound };
})();
