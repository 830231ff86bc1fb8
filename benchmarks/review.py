"""Review speed: `patchwood review` on a folder of 1,000 frames, driven in headless Chromium.

    .venv/bin/python benchmarks/review.py
    .venv/bin/python benchmarks/review.py --images 1000 --presses 30 --opens 5
    .venv/bin/python benchmarks/review.py --keep /tmp/review-bench   # keep the folder and files

The folder: ``--rendered`` frames of 640 x 480 (default 40) drawn with
``synthetic_images.render_frame`` (every tenth without nuts), each written as drawn, mirrored
left-right, upside down and turned half a turn (boxes turned with them), then copied under new
names until there are ``--images`` of them (``frame_0001.png`` ...), so that building it takes
seconds. A labels CSV with their boxes (object-free frames as one row with empty box fields) and a
detections CSV shaped like a scan's at a low threshold: per frame, most labelled nuts found once
(jittered by up to a tenth of their size, scores mostly 0.4..1), a few found twice (the duplicate
a false alarm), and tens of false alarms of nut-like sizes anywhere on the frame with scores
spread over 0.05..1 (most of them low); rows grouped by image, score descending.

The server is the real one: ``detector.review.create_app`` served by ``detector.review.serve``
(waitress) in a thread of this process, as ``tests/test_review_browser.py`` runs it. Its WSGI
application is wrapped so that every request's handling time (the Flask view and the encoding of
its body, until the view returns) is recorded by path. The browser is Debian's Chromium, headless,
through ``tests/browser.py`` (a fresh profile), its HTTP cache switched off through the DevTools
protocol (``Network.setCacheDisabled``) so that every open fetches every file, as a first visit
does.

How the times are taken, all inside the page on the browser's own clock (``performance.now()``,
milliseconds since the navigation started, ``performance.timeOrigin``): before any script of the
page runs, a script given to ``Page.addScriptToEvaluateOnNewDocument`` installs a
``MutationObserver`` on the document for the body's ``data-ready`` and ``data-shown`` attributes
and a keydown listener on the window in the capture phase (so it runs before the page's own
listener on the document). The observer's callback runs at the microtask checkpoint right after the
page's task that set the attribute, i.e. once the image has been decoded and drawn into the canvas;
it also asks for the next animation frame and records when that frame begins (the drawn frame goes
to the screen at the end of that frame).

(a) Opening: ``--opens`` navigations to the page (the first in a fresh browser); per open, the
time from the navigation's start to the first ``data-shown``, to ``data-ready`` (which the page
sets once it is built from /api/state), and the Resource Timing entry of /api/state (request sent to
response complete, bytes transferred); on the server, the /api/state handling time. The state is
also timed in-process, through Flask's test client (``--repeats`` times).

(b) Next image: ``--presses`` presses of the right arrow (sent through WebDriver, one at a time:
the next is sent once the previous image is shown and its frame has begun, a few tens of
milliseconds later given WebDriver's round trips, which the output reports; a person looking at
each image presses far less often); per press, the time from the keydown listener
to ``data-shown`` changing to the name the page lists next. If the first image shown is too close
to the end of the list, the left arrow is pressed instead (the output says so). Where the page has
global ``refresh`` and ``draw`` functions, they are wrapped to report how much of each press they
took (the breakdown is left out if they are not there; a draw() called by refresh() counts in
both).

Goals (issue 21, item 8): the first image shown at most 1 s after the navigation starts; the next
image shown at most 100 ms after the key, both on this machine, worst case. Printed: median and
worst of each, the goals, the ratios (goal / worst: above 1 is met), the machine and its load
before and after.
"""

from __future__ import annotations

import argparse
import os
import platform
import shlex
import shutil
import statistics
import sys
import tempfile
import threading
import time
from importlib import metadata
from pathlib import Path

import cv2
import numpy as np

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))
sys.path.insert(0, str(ROOT / "tests"))

from synthetic_images import frame_name, render_frame  # noqa: E402

from _machine import cpu_name, load  # noqa: E402  (benchmarks/ is on the path when run as a script)

OPEN_GOAL_MS = 1000.0
NEXT_GOAL_MS = 100.0
SIZE = (640, 480)

# Runs in every document before the page's own scripts (Page.addScriptToEvaluateOnNewDocument).
PROBE = """
window.__bench = { shown: [], frames: [], ready: null, keys: [], parts: [] };
new MutationObserver((records) => {
  const t = performance.now();
  for (const r of records) {
    if (r.attributeName === "data-shown") {
      const k = window.__bench.shown.length;
      window.__bench.shown.push([r.target.dataset.shown, t]);
      requestAnimationFrame(() => { window.__bench.frames[k] = performance.now(); });
    } else if (r.attributeName === "data-ready" && window.__bench.ready === null) {
      window.__bench.ready = t;
    }
  }
}).observe(document, { subtree: true, attributes: true,
                       attributeFilter: ["data-shown", "data-ready"] });
addEventListener("keydown", (e) => { window.__bench.keys.push([e.key, performance.now()]); }, true);
"""

# After the page is ready: time spent in its global refresh() and draw(), if it has them.
WRAP = """
const parts = window.__bench.parts, wrapped = [];
for (const name of ["refresh", "draw"]) {
  const f = window[name];
  if (typeof f !== "function") continue;
  window[name] = function (...args) {
    const t = performance.now();
    try { return f.apply(this, args); }
    finally { parts.push([name, t, performance.now()]); }
  };
  wrapped.push(name);
}
return wrapped;
"""


# ---------------------------------------------------------------- the folder

def turned(boxes: np.ndarray, variant: int) -> np.ndarray:
    """Boxes (x, y, w, h) of a 640 x 480 frame after ``variant``: 0 as drawn, 1 mirrored
    left-right, 2 upside down, 3 half a turn."""
    out = boxes.astype(np.float64).copy()
    if variant in (1, 3):
        out[:, 0] = SIZE[0] - boxes[:, 0] - boxes[:, 2]
    if variant in (2, 3):
        out[:, 1] = SIZE[1] - boxes[:, 1] - boxes[:, 3]
    return out


def turn_image(image: np.ndarray, variant: int) -> np.ndarray:
    return [image, image[:, ::-1], image[::-1, :], image[::-1, ::-1]][variant]


def fake_detections(rng: np.random.Generator, boxes: np.ndarray) -> list[tuple]:
    """A scan-like list of (x, y, w, h, score) for one frame with labelled ``boxes``."""
    out = []
    for x, y, w, h in boxes:
        if rng.random() < 0.85:                      # found
            for _ in range(1 + (rng.random() < 0.15)):   # sometimes twice (a duplicate)
                j = rng.uniform(-0.1, 0.1, 4) * [w, h, w, h]
                out.append((x + j[0], y + j[1], w + j[2], h + j[3],
                            float(np.clip(rng.beta(4, 1.5), 0.05, 1.0))))
    for _ in range(int(rng.integers(10, 41))):      # false alarms
        side = float(np.exp(rng.uniform(np.log(20), np.log(120))))
        w, h = side * rng.uniform(0.9, 1.1), side * rng.uniform(0.9, 1.1)
        x, y = rng.uniform(0, SIZE[0] - w), rng.uniform(0, SIZE[1] - h)
        out.append((x, y, w, h, 0.05 + 0.95 * float(rng.beta(1, 4))))
    out.sort(key=lambda d: -d[4])
    return out


def build_folder(work: Path, images: int, rendered: int, seed: int) -> dict:
    """Write ``work/images/``, ``work/labels.csv`` and ``work/detections.csv``; figures."""
    folder = work / "images"
    folder.mkdir(parents=True)
    rng = np.random.default_rng(seed)
    base: list[tuple[Path, np.ndarray]] = []       # distinct files and their boxes
    for k in range(rendered):
        frame = render_frame(rng, *SIZE, empty=(k % 10 == 9))
        for variant in range(4):
            if len(base) == images:
                break
            path = folder / frame_name(len(base) + 1)
            cv2.imwrite(str(path), np.ascontiguousarray(turn_image(frame.image, variant)))
            base.append((path, turned(np.asarray(frame.boxes).reshape(-1, 4), variant)))
    boxes_of = [b for _, b in base]
    for i in range(len(base), images):
        source, boxes = base[i % len(base)]
        shutil.copyfile(source, folder / frame_name(i + 1))
        boxes_of.append(boxes)
    label_rows, det_rows = ["image,x,y,width,height"], ["image,x,y,width,height,score"]
    n_dets = 0
    for i, boxes in enumerate(boxes_of):
        name = frame_name(i + 1)
        label_rows += ([f"{name},{x:.1f},{y:.1f},{w:.1f},{h:.1f}" for x, y, w, h in boxes]
                       or [f"{name},,,,"])
        dets = fake_detections(rng, boxes)
        n_dets += len(dets)
        det_rows += ([f"{name},{x:.2f},{y:.2f},{w:.2f},{h:.2f},{s:.4f}" for x, y, w, h, s in dets]
                     or [f"{name},,,,,"])
    (work / "labels.csv").write_text("\n".join(label_rows) + "\n", encoding="utf-8")
    (work / "detections.csv").write_text("\n".join(det_rows) + "\n", encoding="utf-8")
    return {"distinct": len(base), "labels": sum(len(b) for b in boxes_of), "detections": n_dets,
            "bytes": sum(p.stat().st_size for p in folder.iterdir())}


# ---------------------------------------------------------------- the server

class RequestTimes:
    """WSGI middleware: seconds spent in the application per request, by path."""

    def __init__(self, app):
        self.app = app
        self.times: dict[str, list[float]] = {}

    def __call__(self, environ, start_response):
        start = time.perf_counter()
        try:
            return self.app(environ, start_response)
        finally:
            self.times.setdefault(environ.get("PATH_INFO", ""), []).append(
                time.perf_counter() - start)


def start_server(work: Path, token: str):
    from detector.review import create_app, serve

    app = create_app(work / "images", work / "labels.csv", work / "detections.csv", token=token,
                     host="127.0.0.1", port=0)
    timer = RequestTimes(app.wsgi_app)
    app.wsgi_app = timer
    bound: list[str] = []
    threading.Thread(target=serve, args=(app, "127.0.0.1", 0), kwargs={"ready": bound.append},
                     daemon=True).start()
    for _ in range(200):
        if bound:
            break
        time.sleep(0.05)
    if not bound:
        raise RuntimeError("the review server did not start")
    return app, timer, f"http://{bound[0]}/?token={token}"


def state_in_process(app, token: str, repeats: int) -> tuple[list[float], int]:
    """Seconds of GET /api/state through Flask's test client (the app's own route, no socket),
    ``repeats`` times; and the body's bytes."""
    client = app.test_client()
    base = f"http://{app.config['REVIEW_ADDRESS']}"
    seconds, size = [], 0
    for _ in range(repeats):
        t0 = time.perf_counter()
        response = client.get("/api/state", base_url=base, headers={"X-Review-Token": token})
        size = len(response.get_data())
        seconds.append(time.perf_counter() - t0)
        if response.status_code != 200:
            raise RuntimeError(f"/api/state answered {response.status_code}")
    return seconds, size


# ---------------------------------------------------------------- the browser

def wait_for(predicate, timeout: float = 30.0, what: str = "the page"):
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        value = predicate()
        if value:
            return value
        time.sleep(0.005)
    raise TimeoutError(f"waited {timeout:g} s for {what}")


def open_page(driver, url: str) -> dict:
    """One navigation: the page's own figures (ms since navigation start)."""
    driver.get(url)
    wait_for(lambda: driver.execute_script(
        "return window.__bench && window.__bench.shown.length && window.__bench.frames.length"),
        what="the first image")
    return driver.execute_script("""
        const b = window.__bench;
        const st = performance.getEntriesByType("resource").find((e) => /\\/api\\/state/.test(e.name));
        const nav = performance.getEntriesByType("navigation")[0];
        return { shown: b.shown[0][1], name: b.shown[0][0], frame: b.frames[0], ready: b.ready,
                 html: nav ? nav.responseEnd : null,
                 dom: nav ? nav.domContentLoadedEventEnd : null,
                 state_start: st ? st.startTime : null, state_end: st ? st.responseEnd : null,
                 state_first_byte: st ? st.responseStart : null,
                 state_bytes: st ? st.encodedBodySize : null };""")


def press_through(driver, presses: int) -> tuple[list[dict], str, list[str]]:
    """``presses`` arrow presses, each waited for; per press the page's figures."""
    from selenium.webdriver.common.action_chains import ActionChains
    from selenium.webdriver.common.keys import Keys

    wrapped = driver.execute_script(WRAP)
    order = driver.execute_script(
        "return (S.listed && S.listed.length ? S.listed : S.images.map((_, k) => k))"
        ".map((k) => S.images[k].name)")
    current = driver.execute_script("return document.body.dataset.shown")
    at = order.index(current)
    step, key, direction = ((1, Keys.ARROW_RIGHT, "right") if at + presses < len(order)
                            else (-1, Keys.ARROW_LEFT, "left"))
    if not 0 <= at + step * presses < len(order):
        raise ValueError(f"{presses} presses do not fit in a list of {len(order)} images")
    driver.execute_script("document.activeElement && document.activeElement.blur()")
    out = []
    for p in range(1, presses + 1):
        n_shown = driver.execute_script("return window.__bench.shown.length")
        n_keys = driver.execute_script("return window.__bench.keys.length")
        n_parts = driver.execute_script("return window.__bench.parts.length")
        ActionChains(driver).send_keys(key).perform()
        wait_for(lambda: driver.execute_script(
            "return window.__bench.frames.length > arguments[0]", n_shown), 10, "the next image")
        rec = driver.execute_script("""
            const b = window.__bench, [ns, nk, np] = arguments;
            return { key: b.keys[nk][1], name: b.shown[ns][0], shown: b.shown[ns][1],
                     frame: b.frames[ns], later: b.shown.length - ns - 1,
                     parts: b.parts.slice(np).filter((x) => x[2] <= b.shown[ns][1]) };""",
            n_shown, n_keys, n_parts)
        expected = order[at + step * p]
        if rec["name"] != expected:
            raise AssertionError(f"press {p}: the page showed {rec['name']}, expected {expected}")
        out.append(rec)
    return out, direction, wrapped


# ---------------------------------------------------------------- printing

def ms(values) -> str:
    values = list(values)
    return f"median {statistics.median(values):7.1f} ms, worst {max(values):7.1f} ms"


def verdict(worst: float, goal: float) -> str:
    return f"{goal / worst:.2f}x the goal, {'met' if worst <= goal else 'NOT met'}"


def main(argv=None):
    parser = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    parser.add_argument("--images", type=int, default=1000, help="frames in the folder")
    parser.add_argument("--rendered", type=int, default=40,
                        help="frames rendered (each written in four orientations, then copied)")
    parser.add_argument("--presses", type=int, default=30, help="right-arrow presses timed")
    parser.add_argument("--opens", type=int, default=5, help="navigations to the page timed")
    parser.add_argument("--repeats", type=int, default=5, help="in-process timings of the state")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--window", default="1300x800", help="browser window, WxH")
    parser.add_argument("--keep", type=Path, help="build the folder here and keep it")
    args = parser.parse_args(argv)
    if args.images < 2 or args.presses < 1 or args.opens < 1 or args.rendered < 1:
        parser.error("--images needs at least 2, --presses, --opens and --rendered at least 1")

    import browser

    reason = browser.missing()
    if reason:
        sys.exit(f"cannot run: {reason}")

    print("command:", shlex.join([Path(sys.executable).name, *sys.argv]))
    print(f"machine: {cpu_name()}; {os.cpu_count()} logical cores, "
          f"{len(os.sched_getaffinity(0)) if hasattr(os, 'sched_getaffinity') else '?'} usable; "
          f"{platform.system()} {platform.machine()}")
    versions = ", ".join(f"{p} {metadata.version(p)}" for p in ("flask", "waitress", "selenium"))
    print(f"versions: python {platform.python_version()}, {versions}")
    print(f"load average (1, 5, 15 min) before: {load()}")

    with tempfile.TemporaryDirectory(prefix="patchwood-review-bench-") as tmp:
        work = args.keep or Path(tmp)
        if args.keep and (work / "images").exists():
            sys.exit(f"{work / 'images'} exists: give --keep an empty or new folder")
        t0 = time.perf_counter()
        built = build_folder(work, args.images, args.rendered, args.seed)
        print(f"\nfolder: {args.images:,} frames of {SIZE[0]} x {SIZE[1]} ({built['distinct']} "
              f"distinct files from {args.rendered} rendered, {built['bytes'] / 1e6:.0f} MB), "
              f"{built['labels']:,} labels, {built['detections']:,} detections "
              f"({built['detections'] / args.images:.1f} per image); built in "
              f"{time.perf_counter() - t0:.1f} s")

        t0 = time.perf_counter()
        app, timer, url = start_server(work, token="bench")
        print(f"server: create_app (reading labels and detections) {time.perf_counter() - t0:.2f} s")

        driver = browser.start(work / "profile")
        try:
            print(f"browser: {driver.capabilities.get('browserName')} "
                  f"{driver.capabilities.get('browserVersion')}, headless, window {args.window}, "
                  f"HTTP cache off")
            width, height = (int(v) for v in args.window.lower().split("x"))
            driver.set_window_size(width, height)
            driver.execute_cdp_cmd("Network.enable", {})
            driver.execute_cdp_cmd("Network.setCacheDisabled", {"cacheDisabled": True})
            driver.execute_cdp_cmd("Page.addScriptToEvaluateOnNewDocument", {"source": PROBE})

            opens = [open_page(driver, url) for _ in range(args.opens)]
            server_state = [1e3 * s for s in timer.times.get("/api/state", [])]
            presses, direction, wrapped = press_through(driver, args.presses)
        finally:
            driver.quit()
        in_process, body = state_in_process(app, "bench", args.repeats)

    print(f"\n(a) opening the page, {args.opens} navigations (ms since the navigation started; "
          f"the first in a fresh browser):")
    print("  open   html   ready  /api/state sent..received   first image shown  next frame")
    for k, o in enumerate(opens, 1):
        print(f"  {k:4d} {o['html']:6.0f} {o['ready']:7.0f}   {o['state_start']:7.0f} .. "
              f"{o['state_end']:7.0f}           {o['shown']:7.0f}       {o['frame']:7.0f}")
    shown = [o["shown"] for o in opens]
    print(f"  first image shown:   {ms(shown)}")
    print(f"  its next frame:      {ms(o['frame'] for o in opens)}")
    print(f"  /api/state, browser: {ms(o['state_end'] - o['state_start'] for o in opens)} "
          f"(request sent to response received; {opens[0]['state_bytes'] / 1e6:.1f} MB)")
    print(f"  /api/state, server:  {ms(server_state)} (the Flask view until it returns)")
    print(f"  /api/state in-process: {ms(1e3 * s for s in in_process)} (Flask's test client, "
          f"{args.repeats} runs, {body / 1e6:.1f} MB)")
    after_state = [o["shown"] - o["state_end"] for o in opens]
    print(f"  from the state received to the first image shown: {ms(after_state)}")

    keys = [p["shown"] - p["key"] for p in presses]
    frames = [p["frame"] - p["key"] for p in presses]
    print(f"\n(b) next image: {args.presses} presses of the {direction} arrow, key to the next "
          f"image shown (ms):")
    print(f"  key -> shown:       {ms(keys)}")
    print(f"  key -> next frame:  {ms(frames)}")
    if wrapped:
        for name in wrapped:
            spent = [sum(e - s for n, s, e in p["parts"] if n == name) for p in presses]
            calls = statistics.median(sum(n == name for n, _, _ in p["parts"]) for p in presses)
            print(f"  of which in {name}(): {ms(spent)} ({calls:g} calls per press"
                  f"{'; refresh() includes its draw()' if name == 'draw' and 'refresh' in wrapped else ''})")
    print("  per press: " + " ".join(f"{v:.0f}" for v in keys))
    gaps = [p["key"] - q["shown"] for q, p in zip(presses, presses[1:])]
    if gaps:
        print(f"  presses came {ms(gaps)} after the previous image was shown "
              f"(WebDriver's round trips)")

    print("\ngoals (issue 21, item 8; worst case):")
    print(f"  first image shown within {OPEN_GOAL_MS:g} ms of the navigation "
          f"({max(shown):.0f} ms): {verdict(max(shown), OPEN_GOAL_MS)}")
    print(f"  next image shown within {NEXT_GOAL_MS:g} ms of the key "
          f"({max(keys):.0f} ms): {verdict(max(keys), NEXT_GOAL_MS)}")
    print(f"load average (1, 5, 15 min) after: {load()}")


if __name__ == "__main__":
    main()
