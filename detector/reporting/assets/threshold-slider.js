// The score report's threshold slider and review links (report.html, no server, no network).
//
// The data (JSON in the page's element #threshold-data, written by
// detector/reporting/threshold_data.py) holds every detection on a labelled image: its image,
// score and match: the index of the labelled box it found, -1 for a false alarm, -2 for one
// counted neither way. Matching is greedy in descending score, so a threshold keeps a prefix of
// that order and the outcomes hold at every threshold: counting is all the page does. The same
// reading in Python is threshold_data.counts_at.
(function () {
  "use strict";
  const $ = (id) => document.getElementById(id);
  const source = $("threshold-data");
  const table = $("per-image");
  const data = source ? JSON.parse(source.textContent) : null;

  // ------------------------------------------------------------------ counts at a threshold
  function countsAt(t) {
    const n = data.images.length, D = data.detections;
    const kept = new Array(n).fill(0), truth = new Array(n).fill(0), alarms = new Array(n).fill(0);
    for (let i = 0; i < D.score.length; i++) {
      if (!(D.score[i] >= t)) continue;
      const k = D.image[i];
      kept[k] += 1;
      if (D.match[i] >= 0) truth[k] += 1;
      else if (D.match[i] === -1) alarms[k] += 1;
    }
    const sum = (a) => a.reduce((x, y) => x + y, 0);
    const tp = sum(truth), fp = sum(alarms), objects = sum(data.objects);
    return {
      kept, truth, alarms, detections: sum(kept), tp, fp, misses: objects - tp,
      precision: tp + fp ? tp / (tp + fp) : NaN, recall: objects ? tp / objects : NaN,
    };
  }

  const fmt = (v) => (Number.isFinite(v) ? v.toFixed(3) : "n/a");

  // ------------------------------------------------------------------ the curve (SVG)
  let SVG = null;  // the namespace, taken from the page's own <svg> element
  const box = { left: 46, top: 12, width: 268, height: 200 };
  const X = (r) => box.left + r * box.width, Y = (p) => box.top + (1 - p) * box.height;
  function el(name, attrs, parent, text) {
    const node = document.createElementNS(SVG || parent.namespaceURI, name);
    for (const key in attrs) node.setAttribute(key, attrs[key]);
    if (text !== undefined) node.textContent = text;
    if (parent) parent.appendChild(node);
    return node;
  }
  let dot = null;
  function drawCurve(svg) {
    SVG = svg.namespaceURI;
    el("rect", { x: box.left, y: box.top, width: box.width, height: box.height, fill: "none",
                 stroke: "#999999" }, svg);
    for (const v of [0, 0.25, 0.5, 0.75, 1]) {
      el("line", { x1: X(v), x2: X(v), y1: box.top, y2: box.top + box.height, stroke: "#e3e3e3" }, svg);
      el("line", { x1: box.left, x2: box.left + box.width, y1: Y(v), y2: Y(v), stroke: "#e3e3e3" }, svg);
      el("text", { x: X(v), y: box.top + box.height + 14, "text-anchor": "middle", class: "tick" }, svg, String(v));
      el("text", { x: box.left - 5, y: Y(v) + 4, "text-anchor": "end", class: "tick" }, svg, String(v));
    }
    el("text", { x: box.left + box.width / 2, y: box.top + box.height + 34, "text-anchor": "middle",
                 class: "axis" }, svg, "recall");
    el("text", { x: 12, y: box.top + box.height / 2, "text-anchor": "middle", class: "axis",
                 transform: `rotate(-90 12 ${box.top + box.height / 2})` }, svg, "precision");
    const objects = data.objects.reduce((x, y) => x + y, 0);
    // the counted detections in descending score (a stable sort: ties keep the images' order,
    // as the evaluation pools them); one point per detection, as the PNG curve draws it
    const D = data.detections;
    const order = [];
    for (let i = 0; i < D.score.length; i++) if (D.match[i] !== -2) order.push(i);
    order.sort((a, b) => D.score[b] - D.score[a]);
    const middle = (text) => el("text", { x: box.left + box.width / 2, y: box.top + box.height / 2,
                                          "text-anchor": "middle", class: "axis" }, svg, text);
    if (!objects) middle("no labelled objects: recall is undefined");
    else if (!order.length) middle("no detections on labelled images");
    else {
      let tp = 0;
      const points = order.map((i, k) => {
        tp += D.match[i] >= 0 ? 1 : 0;
        return `${X(tp / objects).toFixed(2)},${Y(tp / (k + 1)).toFixed(2)}`;
      });
      el("polyline", { points: points.join(" "), fill: "none", stroke: "#0072b2",
                       "stroke-width": 1.5 }, svg);
    }
    if (data.recommended !== null && objects) {
      const c = countsAt(data.recommended);
      if (Number.isFinite(c.precision)) {
        el("circle", { id: "recommended-point", cx: X(c.recall), cy: Y(c.precision), r: 8,
                       fill: "none", stroke: "#1d2430", "stroke-width": 1.5 }, svg);
      }
    }
    dot = el("circle", { id: "threshold-point", r: 5, fill: "#d55e00", stroke: "#000000" }, svg);
  }

  // ------------------------------------------------------------------ the per-image table
  // Rows are rewritten only where a value changed, and moved only when the order changed: a
  // report of thousands of images stays quick to slide.
  const rows = table ? Array.from(table.tBodies[0].rows) : [];
  function setText(cell, value) {
    const text = String(value);
    if (cell.textContent !== text) cell.textContent = text;
  }
  function reorder(sorted) {
    const body = table.tBodies[0], now = body.rows;
    if (sorted.every((row, i) => now[i] === row)) return;
    const fragment = document.createDocumentFragment();
    sorted.forEach((row) => fragment.appendChild(row));
    body.appendChild(fragment);
  }
  function errorsFirst(c) {
    // the server's order: most errors (false alarms + misses) first, then most misses, then name
    const key = new Map(rows.map((row) => {
      if (row.dataset.index === undefined) return [row, [Infinity, Infinity, row.cells[0].textContent]];
      const k = +row.dataset.index, misses = data.objects[k] - c.truth[k];
      return [row, [-(c.alarms[k] + misses), -misses, data.images[k]]];
    }));
    const sorted = rows.slice().sort((a, b) => {
      const x = key.get(a), y = key.get(b);
      return x[0] - y[0] || x[1] - y[1] || (x[2] < y[2] ? -1 : x[2] > y[2] ? 1 : 0);
    });
    reorder(sorted);
  }
  function sortedByColumn() {
    return Array.from(table.tHead.rows[0].cells).some((th) => {
      const state = th.getAttribute("aria-sort");
      return state === "ascending" || state === "descending";
    });
  }

  // ------------------------------------------------------------------ the slider
  let last = null;  // the counts shown, for the "most errors first" button
  function show(t, recommended, resort) {
    const c = countsAt(t);
    last = c;
    $("threshold-value").textContent = recommended ? `${+t.toPrecision(6)} (recommended)` : t.toFixed(2);
    $("at-detections").textContent = c.detections;
    $("at-true-detections").textContent = c.tp;
    $("at-false-alarms").textContent = c.fp;
    $("at-misses").textContent = c.misses;
    $("at-precision").textContent = fmt(c.precision);
    $("at-recall").textContent = fmt(c.recall);
    if (dot) {
      const on = Number.isFinite(c.precision) && Number.isFinite(c.recall);
      dot.setAttribute("visibility", on ? "visible" : "hidden");
      dot.setAttribute("cx", X(on ? c.recall : 0));
      dot.setAttribute("cy", Y(on ? c.precision : 0));
      dot.dataset.recall = on ? c.recall : "";
      dot.dataset.precision = on ? c.precision : "";
    }
    if (table) {
      if (resort) updateTable(c, true);
      else scheduleTable(c);
    }
  }

  // The counts above follow every step at once; the table, the slow part on thousands of images,
  // catches up once per frame with the latest counts (a held arrow key skips the steps between).
  const shown = data ? new Array(data.images.length).fill(-1) : [];  // detections kept, as shown
  const rowIndex = rows.map((row) => (row.dataset.index === undefined ? -1 : +row.dataset.index));
  let pending = null;
  function scheduleTable(c) {
    const idle = pending === null;
    pending = c;
    if (idle) {
      requestAnimationFrame(() => {
        const latest = pending;
        pending = null;
        updateTable(latest, false);
      });
    }
  }
  function updateTable(c, resort) {
    let changed = false;
    rows.forEach((row, i) => {
      const k = rowIndex[i];
      // kept detections nest as the threshold moves: the same number is the same detections
      if (k < 0 || shown[k] === c.kept[k]) return;
      shown[k] = c.kept[k];
      changed = true;
      const misses = data.objects[k] - c.truth[k];
      setText(row.cells[2], c.kept[k]);
      setText(row.cells[3], c.truth[k]);
      setText(row.cells[4], c.alarms[k]);
      setText(row.cells[5], misses);
      const cls = c.alarms[k] + misses ? "bad" : "clean";
      if (row.className !== cls) row.className = cls;
    });
    if (!changed && !resort) return;
    if (sortedByColumn()) table.dispatchEvent(new Event("rows-changed"));
    else errorsFirst(c);
  }

  if (data) {
    const slider = $("threshold");
    drawCurve($("threshold-curve"));
    // the recommended threshold exactly, though the slider's thumb sits on the nearest 0.01
    show(data.start, data.recommended !== null, true);
    slider.addEventListener("input", () => show(parseFloat(slider.value), false));
    const back = $("to-recommended");
    if (back) {
      back.addEventListener("click", () => {
        slider.value = String(data.recommended);
        show(data.recommended, true);
      });
    }
    const errors = $("sort-errors");
    if (errors) {
      errors.addEventListener("click", () => {
        for (const th of table.tHead.rows[0].cells) {
          if (th.hasAttribute("aria-sort")) th.setAttribute("aria-sort", "none");
        }
        errorsFirst(last);
      });
    }
  }

  // ------------------------------------------------------------------ links to patchwood review
  // The address patchwood review printed (127.0.0.1, its port, ?token=...) is pasted by the
  // user; it is kept in this browser's localStorage, never written to the report folder.
  const KEY = "patchwood.review-address";
  const field = $("review-address"), state = $("review-state");
  if (!field || !table) return;
  let storage = null;
  try {
    storage = window.localStorage;
    storage.getItem(KEY);
  } catch (err) {
    storage = null;  // some browsers give pages opened from files no storage
  }
  function parse(text) {
    let url;
    try {
      url = new URL(text.trim());
    } catch (err) {
      return null;
    }
    if (url.protocol !== "http:" && url.protocol !== "https:") return null;
    url.hash = "";
    return url.href;
  }
  function link(base) {
    for (const a of table.querySelectorAll("a.review-link")) {
      if (base) {
        a.href = `${base}#image=${encodeURIComponent(a.dataset.image)}`;
        a.target = "_blank";
        a.rel = "noopener";
        a.removeAttribute("aria-disabled");
        a.title = "opens this image in patchwood review";
      } else {
        a.removeAttribute("href");
        a.setAttribute("aria-disabled", "true");
        a.title = "give the address of patchwood review above first";
      }
    }
  }
  function update(save) {
    const text = field.value.trim(), base = text ? parse(text) : null;
    link(base);
    if (!text) state.textContent = 'no address given: the "open in review" links are inactive';
    else if (!base) state.textContent = "not an address: paste the whole address patchwood review printed; the links are inactive";
    else state.textContent = storage ? "the links open patchwood review at this address (kept in this browser)"
                                     : "the links open patchwood review at this address (not kept: this browser gives the page no storage)";
    if (save && storage) {
      try {
        if (text) storage.setItem(KEY, text); else storage.removeItem(KEY);
      } catch (err) { /* full or refused: the links still work for this visit */ }
    }
  }
  field.value = (storage && storage.getItem(KEY)) || "";
  update(false);
  field.addEventListener("input", () => update(true));
})();
