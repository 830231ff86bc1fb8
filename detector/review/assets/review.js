// patchwood review: the page of `patchwood review` (served from the package; nothing fetched
// from elsewhere). State comes from /api/state; every edit goes to /api/edit and is saved at once.
"use strict";
const TOKEN = new URLSearchParams(location.search).get("token") || "";
const $ = (id) => document.getElementById(id);
const S = { images: [], version: 0, current: 0, selected: null, threshold: 0.5, styles: {},
            view: { scale: 1, x: 0, y: 0 }, img: null, drag: null, total: 0, orders: [],
            runs: [], run: 0, items: new Map(), decoded: new Map() };
// images kept decoded for the next moves (the current one and its neighbours in the list)
const DECODED_KEPT = 8;
// each run's curve and point: Okabe & Ito's blue for the run under review, orange for the other
const RUN_COLOURS = ["#0072b2", "#e69f00"];
const dets = (im, r = S.run) => im.runs[r] || [];

async function api(path, body) {
  const opts = { headers: { "X-Review-Token": TOKEN } };
  if (body !== undefined) {
    opts.method = "POST";
    opts.headers["Content-Type"] = "application/json";
    opts.body = JSON.stringify(body);
  }
  const res = await fetch(path, opts);
  const data = await res.json();
  if (res.status === 409) {
    message(data.error);
    document.body.dataset.conflict = "1";
    return null;
  }
  if (!res.ok) { message(data.error || res.statusText); return null; }
  return data;
}

function message(text) { $("message").textContent = text || ""; }

// per image at the current threshold: detections kept (of run r), their kinds, labels missed
function judge(im, r = S.run) {
  const t = S.threshold, kept = [], found = new Set();
  dets(im, r).forEach((d, i) => {
    if (d.score >= t) {
      kept.push({ i, kind: d.match >= 0 ? "matched" : "false alarm" });
      if (d.match >= 0) found.add(d.match);
    }
  });
  const missed = im.labels.map((_, j) => j).filter((j) => !found.has(j));
  return { kept, missed, matched: found.size, alarms: kept.length - found.size };
}

function curve() {
  // per run, every detection of every image in descending score: a threshold keeps a prefix
  S.total = 0;
  for (const im of S.images) S.total += im.labels.length;
  S.orders = S.runs.map((_, r) => {
    const all = [];
    for (const im of S.images) for (const d of dets(im, r)) all.push([d.score, d.match >= 0 ? 1 : 0]);
    all.sort((a, b) => b[0] - a[0]);
    let tp = 0, fp = 0;
    return all.map(([s, ok]) => { tp += ok; fp += 1 - ok; return [s, tp, fp]; });
  });
}

function drawCurve(points) {
  const c = $("curve"), g = c.getContext("2d"), W = c.width, H = c.height, m = 24;
  g.clearRect(0, 0, W, H);
  g.strokeStyle = "#999"; g.strokeRect(m, 4, W - m - 4, H - m - 4);
  g.fillStyle = "#555"; g.font = "10px sans-serif";
  g.fillText("recall", W / 2 - 12, H - 6); g.save(); g.translate(10, H / 2 + 20);
  g.rotate(-Math.PI / 2); g.fillText("precision", 0, 0); g.restore();
  const X = (r) => m + r * (W - m - 4), Y = (p) => 4 + (1 - p) * (H - m - 4);
  S.orders.forEach((order, run) => {
    g.strokeStyle = RUN_COLOURS[run]; g.lineWidth = run === S.run ? 2 : 1; g.beginPath();
    order.forEach(([_, tp, fp], k) => {
      const r = S.total ? tp / S.total : 0, p = tp / (tp + fp);
      k ? g.lineTo(X(r), Y(p)) : g.moveTo(X(r), Y(p));
    });
    g.stroke();
  });
  g.lineWidth = 1;
  points.forEach(([r, p], run) => {
    g.fillStyle = RUN_COLOURS[run]; g.strokeStyle = "#000"; g.beginPath();
    g.arc(X(r), Y(p), run === S.run ? 5 : 3.5, 0, 2 * Math.PI); g.fill(); g.stroke();
  });
}

// matched, false alarms and missed over all images for run r at the current threshold
function totals(r) {
  let m = 0, a = 0, miss = 0;
  for (const im of S.images) { const j = judge(im, r); m += j.matched; a += j.alarms; miss += j.missed.length; }
  return { m, a, miss, p: m + a ? m / (m + a) : 1, r: S.total ? m / S.total : 0 };
}

// the two runs disagree on an image: other labels found, or another number of false alarms
function disagree(im) {
  if (S.runs.length < 2) return false;
  const a = judge(im, 0), b = judge(im, 1);
  return a.alarms !== b.alarms || a.missed.join() !== b.missed.join();
}

function refresh() {
  $("threshold-value").textContent = S.threshold.toFixed(2);
  const rows = S.images.map((im, k) => {
    const j = judge(im);
    return { k, im, j, errors: j.alarms + j.missed.length };
  });
  const all = S.runs.map((_, r) => totals(r)), t = all[S.run] || totals(S.run);
  $("all-matched").textContent = t.m; $("all-alarms").textContent = t.a;
  $("all-missed").textContent = t.miss;
  $("precision").textContent = t.p.toFixed(3); $("recall").textContent = t.r.toFixed(3);
  $("runs-pr").replaceChildren(...all.map((x, r) => {
    const li = document.createElement("li");
    li.id = "run-" + r; li.style.borderLeftColor = RUN_COLOURS[r];
    li.textContent = `${S.runs[r].name}: precision ${x.p.toFixed(3)}, recall ${x.r.toFixed(3)}` +
      (r === S.run ? " (shown)" : "");
    return li;
  }));
  drawCurve(all.map((x) => [x.r, x.p]));
  const f = $("filter").value;
  const shown = rows.filter(({ im, j }) =>
    f === "all" || (f === "unreviewed" && !im.reviewed) || (f === "misses" && j.missed.length) ||
    (f === "alarms" && j.alarms) || (f === "disagree" && disagree(im)) ||
    (f === "flagged" && im.flags.length));
  if ($("sort").value === "errors") shown.sort((a, b) => b.errors - a.errors || a.k - b.k);
  const list = $("images");
  list.replaceChildren(...shown.map(({ k, im, j }) => {
    const li = document.createElement("li");
    li.dataset.index = k; li.dataset.name = im.name;
    li.className = (k === S.current ? "current " : "") + (im.reviewed ? "done" : "");
    li.innerHTML = `<span class="name"></span><span class="n">${j.alarms} fa · ${j.missed.length} miss` +
      (im.flags.length ? ` · ${im.flags.length} flag` : "") + "</span>";
    li.querySelector(".name").textContent = im.name;
    li.onclick = () => show(k);
    return li;
  }));
  S.items = new Map(shown.map(({ k }, n) => [k, list.children[n]]));
  S.listed = shown.map((row) => row.k);
  mark();
  draw();
}

// what moving to another image changes besides the frame: the list's highlight, the counts
function mark() {
  for (const li of $("images").querySelectorAll("li.current")) li.classList.remove("current");
  const li = S.items.get(S.current);
  if (li) li.classList.add("current");
  const im = S.images[S.current];
  if (!im) return;
  const j = judge(im);
  $("img-matched").textContent = j.matched; $("img-alarms").textContent = j.alarms;
  $("img-missed").textContent = j.missed.length;
}

function fit() {
  const cv = $("canvas"), im = S.img;
  cv.width = cv.clientWidth; cv.height = cv.clientHeight;
  if (!im) return;
  const s = Math.min(cv.width / im.naturalWidth, cv.height / im.naturalHeight);
  S.view = { scale: s, x: (cv.width - s * im.naturalWidth) / 2, y: (cv.height - s * im.naturalHeight) / 2 };
}

// the image of S.images[k], fetched and decoded off the main thread (HTMLImageElement.decode),
// kept for DECODED_KEPT moves
function decoded(k) {
  const name = S.images[k].name;
  let p = S.decoded.get(name);
  if (!p) {
    const img = new Image();
    img.src = "api/image/" + encodeURIComponent(name) + "?token=" + encodeURIComponent(TOKEN);
    p = img.decode().then(() => img);
    p.catch(() => S.decoded.delete(name));
    S.decoded.set(name, p);
    while (S.decoded.size > DECODED_KEPT) S.decoded.delete(S.decoded.keys().next().value);
  }
  return p;
}

// the frame of image k once it is decoded (the previous one stays until then); the highlight
// and counts at once; then its neighbours in the list are fetched for the next move
function show(k) {
  if (k < 0 || k >= S.images.length) return;
  S.current = k; S.selected = null;
  mark();
  decoded(k).then((img) => {
    if (S.current !== k) return;  // moved on before it arrived
    S.img = img; fit(); draw(); document.body.dataset.shown = S.images[k].name;
    const order = S.listed && S.listed.length ? S.listed : S.images.map((_, i) => i);
    const at = order.indexOf(k);
    for (const step of [1, -1, 2]) if (order[at + step] !== undefined) decoded(order[at + step]);
  }, () => message("could not load " + S.images[k].name));
}

function toScreen(b) {
  const v = S.view;
  return [v.x + b[0] * v.scale, v.y + b[1] * v.scale, b[2] * v.scale, b[3] * v.scale];
}

function toImage(px, py) { const v = S.view; return [(px - v.x) / v.scale, (py - v.y) / v.scale]; }

function stroke(g, box, kind, width) {
  const [rgb, style] = S.styles[kind];
  g.strokeStyle = `rgb(${rgb.join(",")})`; g.lineWidth = width;
  g.setLineDash(style === "dashed" ? [8, 6] : style === "dotted" ? [2, 5] :
    style === "dashdot" ? [10, 4, 2, 4] : []);
  g.strokeRect(...toScreen(box));
  g.setLineDash([]);
}

function draw() {
  const cv = $("canvas"), g = cv.getContext("2d");
  g.clearRect(0, 0, cv.width, cv.height);
  const im = S.images[S.current];
  if (!S.img || !im) return;
  const v = S.view;
  g.imageSmoothingEnabled = v.scale < 2;
  g.drawImage(S.img, v.x, v.y, S.img.naturalWidth * v.scale, S.img.naturalHeight * v.scale);
  const j = judge(im), missed = new Set(j.missed);
  im.labels.forEach((b, i) => {
    const sel = S.selected && S.selected.type === "label" && S.selected.i === i;
    stroke(g, b, missed.has(i) ? "missed" : "label", sel ? 4 : 2);
    if (sel) handles(g, b);
  });
  for (const f of im.flags) {
    stroke(g, f.box, f.kind, 2);
    const [x, y, , h] = toScreen(f.box);
    g.fillStyle = "#fff"; g.font = "11px sans-serif";
    g.fillText(f.kind === "background-called-object" ? "unlabelled?" : "label?", x + 2, y + h + 12);
  }
  for (const { i, kind } of j.kept) {
    const d = dets(im)[i], sel = S.selected && S.selected.type === "det" && S.selected.i === i;
    stroke(g, d.box, kind, sel ? 4 : 2);
    const [x, y] = toScreen(d.box);
    g.fillStyle = "#fff"; g.font = "11px sans-serif"; g.fillText(d.score.toFixed(2), x + 2, y - 3);
  }
  if (S.drag && S.drag.mode === "draw") stroke(g, S.drag.box, "label", 1);
}

function corners(b) { return [[b[0], b[1]], [b[0] + b[2], b[1]], [b[0], b[1] + b[3]], [b[0] + b[2], b[1] + b[3]]]; }

function handles(g, b) {
  g.fillStyle = "#fff";
  for (const [x, y] of corners(b)) {
    const [sx, sy] = toScreen([x, y, 0, 0]);
    g.fillRect(sx - 4, sy - 4, 8, 8);
  }
}

function hit(px, py) {
  const im = S.images[S.current], [x, y] = toImage(px, py), inside = (b) =>
    x >= b[0] && x <= b[0] + b[2] && y >= b[1] && y <= b[1] + b[3];
  const area = (b) => b[2] * b[3];
  let best = null;
  im.labels.forEach((b, i) => { if (inside(b) && (!best || area(b) < best.a)) best = { type: "label", i, a: area(b) }; });
  for (const { i } of judge(im).kept) {
    const b = dets(im)[i].box;
    if (inside(b) && (!best || area(b) < best.a)) best = { type: "det", i, a: area(b) };
  }
  return best;
}

async function edit(body) {
  const im = S.images[S.current];
  const data = await api("api/edit", { version: S.version, image: im.name, ...body });
  if (data) accept_data(data);
  return data;
}

function accept_data(data) {
  S.version = data.version;
  for (const rec of data.images) {
    const k = S.images.findIndex((im) => im.name === rec.name);
    if (k >= 0) S.images[k] = rec;
  }
  document.body.dataset.version = S.version;
  curve(); refresh();
}

async function acceptSelected() {
  if (!S.selected || S.selected.type !== "det") return message("select a detection to accept");
  const box = dets(S.images[S.current])[S.selected.i].box;
  S.selected = null;
  await edit({ edit: "add", box });
}

async function deleteSelected() {
  if (!S.selected || S.selected.type !== "label") return message("select a label to delete");
  const index = S.selected.i;
  S.selected = null;
  await edit({ edit: "delete", index });
}

async function undo() {
  const data = await api("api/undo", { version: S.version });
  if (data) { S.selected = null; accept_data(data); }
}

function nextError(step) {
  const n = S.images.length;
  for (let k = 1; k <= n; k++) {
    const i = (S.current + step * k + n) % n, j = judge(S.images[i]);
    if (j.alarms || j.missed.length) return show(i);
  }
}

function neighbour(step) {
  const order = S.listed && S.listed.length ? S.listed : S.images.map((_, k) => k);
  const at = order.indexOf(S.current);
  show(order[Math.max(0, Math.min(order.length - 1, (at < 0 ? 0 : at + step)))]);
}

function setupCanvas() {
  const cv = $("canvas");
  cv.addEventListener("mousedown", (e) => {
    const px = e.offsetX, py = e.offsetY, [x, y] = toImage(px, py);
    if (e.shiftKey) { S.drag = { mode: "pan", px, py, vx: S.view.x, vy: S.view.y }; return; }
    const sel = S.selected, im = S.images[S.current];
    if (sel && sel.type === "label") {
      const b = im.labels[sel.i];
      const c = corners(b).findIndex(([cx, cy]) => Math.abs(cx - x) * S.view.scale < 6 && Math.abs(cy - y) * S.view.scale < 6);
      if (c >= 0) { S.drag = { mode: "resize", corner: c, box: b.slice(), i: sel.i }; return; }
      if (x >= b[0] && x <= b[0] + b[2] && y >= b[1] && y <= b[1] + b[3]) {
        S.drag = { mode: "move", x, y, box: b.slice(), start: b.slice(), i: sel.i }; return;
      }
    }
    const h = hit(px, py);
    if (h) { S.selected = h; S.drag = null; draw(); return; }
    S.selected = null;
    S.drag = { mode: "draw", x, y, box: [x, y, 0, 0] };
  });
  cv.addEventListener("mousemove", (e) => {
    const d = S.drag; if (!d) return;
    const [x, y] = toImage(e.offsetX, e.offsetY);
    if (d.mode === "pan") { S.view.x = d.vx + e.offsetX - d.px; S.view.y = d.vy + e.offsetY - d.py; }
    else if (d.mode === "draw") d.box = [Math.min(d.x, x), Math.min(d.y, y), Math.abs(x - d.x), Math.abs(y - d.y)];
    else if (d.mode === "move") { d.box = [d.start[0] + x - d.x, d.start[1] + y - d.y, d.start[2], d.start[3]]; S.images[S.current].labels[d.i] = d.box; }
    else if (d.mode === "resize") {
      const b = S.images[S.current].labels[d.i], c = corners(d.box), o = c[3 - d.corner];
      const nb = [Math.min(o[0], x), Math.min(o[1], y), Math.abs(x - o[0]), Math.abs(y - o[1])];
      S.images[S.current].labels[d.i] = nb; d.now = nb; void b;
    }
    draw();
  });
  window.addEventListener("mouseup", async () => {
    const d = S.drag; S.drag = null;
    if (!d) return;
    if (d.mode === "draw" && d.box[2] * S.view.scale >= 4 && d.box[3] * S.view.scale >= 4) await edit({ edit: "add", box: d.box });
    else if (d.mode === "move" && (d.box[0] !== d.start[0] || d.box[1] !== d.start[1])) await edit({ edit: "move", index: d.i, box: d.box });
    else if (d.mode === "resize" && d.now && d.now[2] > 0 && d.now[3] > 0) await edit({ edit: "move", index: d.i, box: d.now });
    draw();
  });
  cv.addEventListener("wheel", (e) => {
    e.preventDefault();
    const k = e.deltaY < 0 ? 1.2 : 1 / 1.2, v = S.view;
    v.x = e.offsetX - (e.offsetX - v.x) * k; v.y = e.offsetY - (e.offsetY - v.y) * k; v.scale *= k;
    draw();
  }, { passive: false });
  window.addEventListener("resize", () => { fit(); draw(); });
}

function setupKeys() {
  document.addEventListener("keydown", (e) => {
    const slider = e.target.type === "range" && /^(Arrow|Page|Home|End)/.test(e.key);
    if (e.target.tagName === "SELECT" || (e.target.tagName === "INPUT" && e.target.type !== "range") || slider) return;
    const key = e.key, im = S.images[S.current];
    if (key === "ArrowRight" || key === "n") neighbour(1);
    else if (key === "ArrowLeft" || key === "p") neighbour(-1);
    else if (key === "e") nextError(1);
    else if (key === "a") acceptSelected();
    else if (key === "Delete" || key === "Backspace" || key === "d") deleteSelected();
    else if (key === "u" || (key === "z" && (e.ctrlKey || e.metaKey))) undo();
    else if (key === "r") edit({ edit: "reviewed", value: !im.reviewed });
    else if (key === "o") edit({ edit: "object-free" });
    else if (key === "c" && S.runs.length > 1) setRun(1 - S.run);
    else return;
    e.preventDefault();
  });
}

function setRun(r) {
  S.run = r; S.selected = null; $("run").value = String(r);
  document.body.dataset.run = r; refresh();
}

// the runs, the filters that need a second run or an audit, and the legend, from a state
function load(data) {
  S.images = data.images; S.version = data.version; S.styles = data.styles; S.runs = data.runs;
  if (S.run >= S.runs.length) S.run = 0;
  $("labels-path").textContent = data.labels_path;
  $("legend").replaceChildren(...Object.entries(S.styles)
    .filter(([kind]) => data.audit_images || !kind.includes("-called-"))
    .map(([kind, [rgb, style, text]]) => {
      const s = document.createElement("span");
      const line = style === "dashdot" ? "dashed" : style;
      s.innerHTML = `<i style="border-top: 3px ${line} rgb(${rgb.join(",")})"></i>`;
      s.append(text); return s;
    }));
  $("run").replaceChildren(...S.runs.map((run, r) => new Option(run.name, String(r))));
  $("run").value = String(S.run);
  $("run-choice").hidden = S.runs.length < 2;
  $("filter").querySelector("[value=disagree]").hidden = S.runs.length < 2;
  $("filter").querySelector("[value=flagged]").hidden = !data.audit_images;
  document.body.dataset.version = S.version; document.body.dataset.runs = S.runs.length;
  curve();
}

// an image named in the address (#image=NAME, as the score report links it), else the one
// with the most errors
function wanted() {
  const name = new URLSearchParams(location.hash.slice(1)).get("image");
  const k = name === null ? -1 : S.images.findIndex((im) => im.name === name);
  if (name !== null && k < 0) message(`no image ${name} in this review`);
  if (k >= 0) return k;
  const first = S.images.map((im, i) => [judge(im), i])
    .sort((a, b) => (b[0].alarms + b[0].missed.length) - (a[0].alarms + a[0].missed.length) || a[1] - b[1]);
  return first.length ? first[0][1] : 0;
}

// retraining: the commands, and the job's progress while it runs
function showJob(job) {
  $("retrain-commands").textContent = job.commands.join("\n");
  document.body.dataset.job = job.state;
  const step = job.step ? ` step ${job.step} of ${job.steps}` : "";
  $("job-state").textContent = job.state === "idle" ? "" :
    `${job.state}${job.state === "running" ? step : ""}, ${job.seconds.toFixed(0)} s` +
    (job.error ? ` (${job.error})` : "") + (job.folder ? ` in ${job.folder}` : "");
  $("job-tail").textContent = job.tail.slice(-4).join("\n");
  $("job-progress").value = job.state === "done" ? job.steps : Math.max(0, job.step - 1);
  $("retrain-run").disabled = job.state === "running";
  $("retrain-cancel").hidden = job.state !== "running";
  $("retrain-open").hidden = job.state !== "done";
  if (job.state === "running") setTimeout(pollJob, 1000);
}

async function pollJob() {
  const job = await api("api/retrain");
  if (job) showJob(job);
}

async function setupJob() {
  const res = await fetch("api/retrain", { headers: { "X-Review-Token": TOKEN } });
  if (!res.ok) { $("retrain").hidden = true; return; }
  showJob(await res.json());
  $("retrain-run").onclick = async () => { const job = await api("api/retrain", {}); if (job) showJob(job); };
  $("retrain-cancel").onclick = async () => { const job = await api("api/retrain/cancel", {}); if (job) showJob(job); };
  $("retrain-open").onclick = async () => {
    const data = await api("api/retrain/open", {});
    if (data) { load(data); setRun(S.runs.length - 1); message(`comparing with ${S.runs[S.runs.length - 1].name}`); }
  };
}

async function start() {
  const data = await api("api/state");
  if (!data) return;
  load(data);
  S.threshold = parseFloat($("threshold").value);
  $("threshold").addEventListener("input", (e) => { S.threshold = parseFloat(e.target.value); refresh(); });
  $("filter").onchange = refresh; $("sort").onchange = refresh;
  $("run").onchange = (e) => setRun(parseInt(e.target.value, 10));
  $("accept").onclick = acceptSelected; $("delete").onclick = deleteSelected; $("undo").onclick = undo;
  $("reviewed").onclick = () => edit({ edit: "reviewed", value: !S.images[S.current].reviewed });
  $("object-free").onclick = () => edit({ edit: "object-free" });
  setupCanvas(); setupKeys();
  window.addEventListener("hashchange", () => show(wanted()));
  show(wanted());  // fetched and decoded while the list is made
  refresh();
  await setupJob();
  document.body.dataset.ready = "1";
}

start();
