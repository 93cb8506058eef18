"""Explorer benchmark: a widget change to all views' data (server side), and, in chromium, to a redrawn page.

Targets:
- all views' data recomputed <= 30 ms after a change (20 years monthly, one basin), server side;
- issue 17 (with --browser): a source change (P, ET, TWSA picker) to a redrawn page <= 0.3 s; a period
  drag (the slider's handle moved) to a redrawn page <= 0.5 s; the first page of a fresh `wbexplore serve`
  with a warm series cache <= 3 s (its start-up, before it answers at all, reported beside it).

"Redrawn page" (every browser figure here): the summary pane's text has changed, then nothing has arrived
on the page's websocket and no bokeh document change has happened for QUIET_S; the time ends at the second
animation frame after the last bokeh document change (that frame has been painted), and starts at the DOM
event of the user's action (the select's input/change, the handle's keydown, the pointer's release). Both
ends are read from the page's own clock (performance.now()), so playwright's polling adds nothing.

Where a source change's time goes: the page's websocket frames (counted and sized in the page), split into
browser to first frame sent, server (last frame sent to first frame back), reply span (first to last frame
back) and browser apply + paint (last frame back to the painted frame); in process, the server's compute
(state.view_data), the whole widget change in a bokeh Document as a session has it (compute + panel's model
updates), the PATCH-DOC of that change serialised, and a cProfile of one change (top 15 cumulative).

    python benchmarks/explorer.py            # server side
    python benchmarks/explorer.py --browser  # also the page figures (Debian's chromium); about 2 to 3 minutes
"""

from __future__ import annotations

import argparse
import cProfile
import io
import os
import pstats
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.error
import urllib.request
import warnings
from pathlib import Path

warnings.simplefilter("ignore")
SOURCE_TARGET_S, PERIOD_TARGET_S, FIRST_PAGE_TARGET_S = 0.3, 0.5, 3.0
QUIET_S = 0.4
ARGS = ["--no-sandbox", "--disable-gpu", "--disable-background-networking", "--no-first-run",
        "--disable-component-update", "--disable-sync"]
SUMMARY = ".wbx-summary"
FIRST = (SUMMARY, ".wbx-ranking .tabulator-row")
PLOTS = tuple(f".{css} canvas" for css in ("wbx-map", "wbx-bars", "wbx-residual", "wbx-scatter", "wbx-multi"))

# Installed before the page's own scripts: every websocket frame (direction, page time, bytes), the user's
# DOM events (capture phase, page time) and, once bokeh's documents exist, every document change with the
# page time of the second animation frame after it.
PROBE = """
window.__wbx = {ws: [], ev: [], ch: [], lt: []};
(() => {
  new PerformanceObserver(l => { for (const e of l.getEntries()) __wbx.lt.push([e.startTime, e.duration]); })
    .observe({type: 'longtask', buffered: true});
  const size = d => typeof d === 'string' ? d.length : (d.byteLength ?? d.size ?? 0);
  const W = window.WebSocket;
  window.WebSocket = class extends W {
    constructor(...a) {
      super(...a);
      this.addEventListener('message', e => __wbx.ws.push(['in', performance.now(), size(e.data)]));
    }
    send(d) {
      __wbx.ws.push(['out', performance.now(), size(d), typeof d === 'string' && d.length < 400 ? d : '']);
      return super.send(d);
    }
  };
  for (const t of ['input', 'change', 'keydown', 'pointerdown', 'pointerup'])
    document.addEventListener(t, () => __wbx.ev.push([t, performance.now()]), true);
})();
"""
HOOK_DOCS = """() => {
  if (__wbx.hooked || !window.Bokeh || !Bokeh.documents.length) return false;
  for (const d of Bokeh.documents) d.on_change(() => {
    const c = {t: performance.now(), p: null};
    __wbx.ch.push(c);
    requestAnimationFrame(() => requestAnimationFrame(() => { c.p = performance.now(); }));
  });
  __wbx.hooked = true;
  return true;
}"""
STATE = """() => {
  const last = Math.max(0, ...__wbx.ws.filter(w => w[0] === 'in').map(w => w[1]), ...__wbx.ch.map(c => c.t));
  const c = __wbx.ch[__wbx.ch.length - 1];
  return {quiet: performance.now() - last, painted: !c || c.p !== null};
}"""
# `wbexplore serve` for the change trials, with bokeh's websocket handler logging each frame it receives
# (and when its handling returned) and tornado's handler each frame written (bokeh's and panel's own writes;
# tornado hands a frame to the socket at once unless its buffer is full), wall-clock (the page's timeOrigin + now() is on
# the same clock); nothing else changed.
LOGGED_SERVE = """
import json, os, sys, time
from bokeh.server.views import ws
from tornado.websocket import WebSocketHandler
log = open(os.environ["WBX_WS_LOG"], "a", buffering=1)
on_message, write_message = ws.WSHandler.on_message, WebSocketHandler.write_message
def kind(frame):
    if isinstance(frame, str) and frame.startswith('{"msgid"'):
        return json.loads(frame).get("msgtype", "?")
    return "-"
async def logged_on_message(self, fragment):
    log.write(f"in {time.time():.6f} {len(fragment)} {kind(fragment)}\\n")
    out = await on_message(self, fragment)
    log.write(f"done {time.time():.6f} 0 -\\n")
    return out
def logged_write_message(self, message, binary=False):
    n = len(message) if isinstance(message, (bytes, str)) else 0
    log.write(f"out {time.time():.6f} {n} {kind(message)}\\n")
    return write_message(self, message, binary)
ws.WSHandler.on_message, WebSocketHandler.write_message = logged_on_message, logged_write_message
from wbexplore.cli import main
sys.exit(main(sys.argv[1:]))
"""
FRAME2 = "() => new Promise(r => requestAnimationFrame(() => requestAnimationFrame(r)))"


def _median(xs):
    xs = [x for x in xs if x is not None]
    return statistics.median(xs) if xs else float("nan")


# ----------------------------------------------------------------------------------------- server side
def server_side(state, rounds: int = 2):
    changes = {
        "ET source": [("ET", v) for v in state.param.ET.objects] * rounds,
        "P source": [("P", v) for v in state.param.P.objects] * rounds,
        "TWSA source": [("TWSA", v) for v in state.param.TWSA.objects] * rounds,
        "basin": [("basin", v) for v in state.param.basin.objects][:10],
        "period": [("period", (f"{state.months[i]:%Y-%m}", f"{state.months[-1 - i]:%Y-%m}")) for i in range(0, 60, 6)],
        "storage method": [("storage_change", v) for v in ("backward", "forward", "central")] * rounds,
    }
    print("server side: change -> all views' data (result, ranking, map scores, all-basin view); target <= 30 ms")
    out = {}
    for name, seq in changes.items():
        cold, first, warm = [], [], []
        for attr, val in seq:
            state._memo.clear()  # nothing cached at all
            t = time.perf_counter()
            setattr(state, attr, val)
            state.view_data()
            cold.append(time.perf_counter() - t)
            t = time.perf_counter()
            state.view_data()
            warm.append(time.perf_counter() - t)
        state._memo.clear()
        state.view_data()
        for attr, val in dict.fromkeys(seq):  # first visit of each value; what does not depend on it stays cached
            t = time.perf_counter()
            setattr(state, attr, val)
            state.view_data()
            first.append(time.perf_counter() - t)
        out[name] = statistics.median(first)
        print(f"  {name:15s} first visit {statistics.median(first) * 1e3:6.1f} ms (ratio to target "
              f"{statistics.median(first) / 0.030:.2f}); every cache cleared {statistics.median(cold) * 1e3:6.1f} ms; "
              f"revisit {statistics.median(warm) * 1e3:5.2f} ms", flush=True)
    return out


def _session(catalog, cache):
    """A session as `serve` builds it: a state sharing the server's warm memo, its Explorer's page rendered
    into a bokeh Document, and a list collecting the document's change events."""
    import panel as pn
    from bokeh.document import Document

    from wbexplore import plots
    from wbexplore.explorer.app import Explorer, load_state
    from wbexplore.explorer.state import ClosureState

    pn.extension("tabulator")
    base = load_state(catalog, cache_dir=cache)
    base.view_data()
    st = ClosureState(base.series, basins=base.basins, catalog_path=base.catalog_path, title=base.title,
                      memo=base._memo)
    ex = Explorer(st, outlines=plots.basin_outlines(base.basins))
    doc = Document()
    doc.add_root(ex.panel().get_root(doc))
    events = []
    doc.on_change(lambda e: events.append(e))
    return base, st, ex, doc, events


def _patch_bytes(events) -> int:
    """Bytes of the PATCH-DOC message bokeh's server would send for ``events`` (header, metadata, content,
    binary buffers)."""
    from bokeh.protocol import Protocol

    msg = Protocol().create("PATCH-DOC", [e for e in events if hasattr(e, "to_serializable")])
    n = len(msg.header_json) + len(msg.metadata_json) + len(msg.content_json)
    return n + sum(len(b.to_bytes()) if hasattr(b, "to_bytes") else len(memoryview(b.data).cast("B"))
                   for b in msg.buffers)


def in_process_change(catalog, cache, profile_top: int = 15):
    """A source change in a session's Document: the compute alone (view_data), the whole widget change
    (compute + panel's updates of the bokeh models), the PATCH-DOC serialised; each the first visit of the
    value (the server's memo warm with the first page, as on a running server). Then cProfile of one."""
    from bokeh.protocol import Protocol

    from wbexplore.balance.terms import SOURCE_COMPONENTS

    base, st, ex, _doc, events = _session(catalog, cache)
    first_page = dict(base._memo)  # what the server computed for the first page

    def reset(comp, orig):
        ex.w_src[comp].value = orig
        base._memo.clear()
        base._memo.update(first_page)

    rows = {"compute (state.view_data)": [], "widget change (compute + model updates)": [],
            "PATCH-DOC serialised": [], "events": [], "bytes": []}
    for comp in SOURCE_COMPONENTS:
        orig = getattr(st, comp)
        for val in [v for v in getattr(st.param, comp).objects if v != orig][:3]:
            # compute alone: the server's own state (no page bound to it), same memo
            t = time.perf_counter()
            setattr(base, comp, val)
            base.view_data()
            rows["compute (state.view_data)"].append(time.perf_counter() - t)
            setattr(base, comp, orig)
            reset(comp, orig)
            del events[:]
            t = time.perf_counter()
            ex.w_src[comp].value = val
            rows["widget change (compute + model updates)"].append(time.perf_counter() - t)
            t = time.perf_counter()
            rows["bytes"].append(_patch_bytes(events))
            rows["PATCH-DOC serialised"].append(time.perf_counter() - t)
            rows["events"].append(len(events))
            reset(comp, orig)
    print("in process, a source change in a session's Document (first visit of the value, server memo as after "
          f"the first page; median of {len(rows['events'])}):")
    for k in ("compute (state.view_data)", "widget change (compute + model updates)", "PATCH-DOC serialised"):
        print(f"  {k:42s} {_median(rows[k]) * 1e3:7.1f} ms")
    print(f"  {'document change events per change':42s} {_median(rows['events']):7.0f}  "
          f"(PATCH-DOC {_median(rows['bytes']) / 1e3:.1f} kB)")

    comp = "ET"
    val = [v for v in st.param.ET.objects if v != st.ET][-1]
    del events[:]
    prof = cProfile.Profile()
    t = time.perf_counter()
    prof.enable()
    ex.w_src[comp].value = val
    _ = Protocol().create("PATCH-DOC", [e for e in events if hasattr(e, "to_serializable")]).content_json  # serialised
    prof.disable()
    wall = time.perf_counter() - t
    s = io.StringIO()
    pstats.Stats(prof, stream=s).sort_stats("cumulative").print_stats(profile_top)
    print(f"cProfile: ET picker change in the session's Document, then its PATCH-DOC serialised "
          f"({wall * 1e3:.0f} ms under the profiler; top {profile_top} cumulative):")
    body = s.getvalue().splitlines()
    start = next(i for i, ln in enumerate(body) if ln.lstrip().startswith("ncalls"))
    roots = sorted({str(Path(m.__file__).parent.parent) + "/" for m in (pstats, argparse) if m.__file__}
                   | {str(Path(__file__).resolve().parent.parent) + "/"}
                   | {p + "/" for p in sys.path if p.endswith("-packages")}, key=len, reverse=True)
    for ln in body[start:start + profile_top + 1]:
        for r in roots:
            ln = ln.replace(r, "")
        print("  " + ln[:160])
    return rows


# ----------------------------------------------------------------------------------------- browser
def _free_port():
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _start_server(catalog, cache, ws_log=None):
    """A fresh `wbexplore serve` (with ``ws_log``: its websocket messages logged there); returns the process,
    its URL and the seconds until it answered at all (a request for a page that does not exist: no session)."""
    port = _free_port()
    args = ["serve", str(catalog), "--port", str(port), "--cache-dir", str(cache)]
    cmd = [sys.executable, "-c", LOGGED_SERVE, *args] if ws_log else [sys.executable, "-m", "wbexplore.cli", *args]
    t = time.perf_counter()
    proc = subprocess.Popen(cmd, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL,
                            env=dict(os.environ, PYTHONWARNINGS="ignore", WBX_WS_LOG=str(ws_log or "")))
    url = f"http://127.0.0.1:{port}/"
    while time.perf_counter() - t < 180:
        try:
            urllib.request.urlopen(url + "wbx-no-such-page", timeout=5)
            break
        except urllib.error.HTTPError:
            break  # an answer (404): the server listens
        except OSError:
            time.sleep(0.05)
    return proc, url, time.perf_counter() - t


def _stop(proc):
    proc.terminate()
    proc.wait(20)


def _new_page(browser):
    pg = browser.new_page(viewport={"width": 1500, "height": 1700})
    pg.add_init_script(PROBE)
    return pg


def _rendered(pg, t_request):
    """Wait for the first page to be rendered; seconds from ``t_request`` (perf_counter, before goto)."""
    for css in FIRST + PLOTS:
        pg.wait_for_selector(css, timeout=180_000)
    pg.wait_for_function("() => window.Bokeh && Bokeh.documents.length && Bokeh.documents.every(d => d.is_idle)",
                         timeout=180_000)
    pg.evaluate(FRAME2)
    return time.perf_counter() - t_request


def first_pages(browser, catalog, cache, n: int):
    """n fresh servers (warm series cache): start-up until it answers, then the first request to a rendered
    page: summary, ranking rows, every plot's canvas, bokeh's documents idle (each root view's first render
    finished), then two animation frames."""
    startup, first = [], []
    for _ in range(n):
        proc, url, up = _start_server(catalog, cache)
        try:
            ctx = browser.new_context(viewport={"width": 1500, "height": 1700})
            pg = ctx.new_page()
            t = time.perf_counter()
            pg.goto(url, timeout=180_000)
            first.append(_rendered(pg, t))
            startup.append(up)
            ctx.close()
        finally:
            _stop(proc)
    return startup, first


def _wait_redrawn(pg, before, timeout=20):
    t = time.perf_counter()
    while pg.locator(SUMMARY).first.inner_text() == before:
        if time.perf_counter() - t > timeout:
            return False
        pg.wait_for_timeout(10)
    while time.perf_counter() - t < timeout:
        s = pg.evaluate(STATE)
        if s["quiet"] > QUIET_S * 1e3 and s["painted"]:
            return True
        pg.wait_for_timeout(50)
    return False


def _cpu_s(pid) -> float:
    """CPU seconds (user + system) the process ``pid`` has used so far."""
    f = Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()
    return (int(f[11]) + int(f[12])) / os.sysconf("SC_CLK_TCK")


class Trials:
    """The change trials on one page of a logged server (`LOGGED_SERVE`)."""

    def __init__(self, pg, proc, ws_log):
        self.pg, self.proc, self.ws_log = pg, proc, Path(ws_log)
        self.origin = pg.evaluate("() => performance.timeOrigin") / 1e3  # page time -> wall clock

    def _server_log(self, since):
        out = []
        for ln in self.ws_log.read_text().splitlines():
            kind, t, n, msgtype = ln.split()
            if float(t) >= since:
                out.append((kind, float(t), int(n), msgtype))
        return out

    def run(self, act, start_events):
        """One user action to the redrawn page (page clock), its websocket frames (page side and server side)
        and the server's CPU time meanwhile."""
        pg = self.pg
        mark = pg.evaluate("() => performance.now()")
        before = pg.locator(SUMMARY).first.inner_text()
        cpu = _cpu_s(self.proc.pid)
        act()
        ok = _wait_redrawn(pg, before)
        cpu = _cpu_s(self.proc.pid) - cpu  # the quiet wait adds nothing: the server is idle then
        d = pg.evaluate("m => ({ev: __wbx.ev.filter(e => e[1] >= m), ws: __wbx.ws.filter(w => w[1] >= m),"
                        " ch: __wbx.ch.filter(c => c.t >= m).map(c => [c.t, c.p]), lt: __wbx.lt.filter(l => l[0] >= m)})", mark)
        t0 = next((t for e, t in d["ev"] if e in start_events), None)
        if not ok or t0 is None or not d["ch"]:
            return None
        def ms(page_t):  # page time -> wall clock
            return self.origin + page_t / 1e3

        ws = [w for w in d["ws"] if w[1] >= t0]
        out = [w for w in ws if w[0] == "out"]
        inn = [w for w in ws if w[0] == "in"]
        last_t, painted = d["ch"][-1]
        srv = self._server_log(ms(t0))
        r = {"total": (painted - t0) / 1e3, "frames_out": len(out), "frames_in": len(inn),
             "bytes_out": sum(w[2] for w in out), "bytes_in": sum(w[2] for w in inn), "changes": len(d["ch"]),
             "server_cpu": cpu, "change_to_paint": (painted - last_t) / 1e3}
        s_in = [x for x in srv if x[0] == "in"]
        patches = [x for x in srv if x[0] == "out" and x[3] == "PATCH-DOC"]
        if s_in and patches:
            # the server's reply: its frames from its first PATCH-DOC to the browser's next message (the
            # browser answers a redraw with the ranges its plots computed: those, and the server's OKs, are
            # the browser's part); server-side clock throughout
            first = patches[0][1]
            nxt = next((x[1] for x in s_in if x[1] > first and x[3] != "-"), float("inf"))
            reply = [x for x in srv if x[0] == "out" and first <= x[1] < nxt]
            r |= {"to_server": s_in[0][1] - ms(t0),
                  "server_first_patch": first - s_in[0][1], "server_last_patch": reply[-1][1] - s_in[0][1],
                  "after_last_patch": ms(painted) - reply[-1][1],
                  "reply_msgs": sum(x[3] != "-" for x in reply), "reply_frames": len(reply),
                  "reply_bytes": sum(x[2] for x in reply),
                  "followups": sum(x[3] != "-" for x in s_in if x[1] >= nxt)}
            s_out = [x for x in srv if x[0] == "out"]
            k = s_out.index(reply[-1])
            if len(s_out) == len(inn):  # the same frames in the same order: when the page's script got the last
                r["last_patch_to_script"] = ms(inn[k][1]) - reply[-1][1]
                # the page's longest task (>= 50 ms, the browser's long-task entries) follows which message
                # of the reply (1 = its first PATCH-DOC)
                heads = [inn[i][1] for i, x in enumerate(s_out) if x in reply and x[3] != "-"]
                lts = [lt for lt in d["lt"] if lt[0] >= t0]
                if lts and heads:
                    start = max(lts, key=lambda lt: lt[1])[0]
                    r["longest_after_msg"] = sum(h <= start for h in heads)
        lts = [lt for lt in d["lt"] if lt[0] >= t0]
        r |= {"long_tasks": len(lts), "long_ms": sum(lt[1] for lt in lts) / 1e3,
              "longest": max((lt[1] for lt in lts), default=0) / 1e3}
        return r


def _picker(pg, st, comp):
    """The page's <select> of component ``comp`` (its options read "<label> [<id>]")."""
    ids = [str(v) for v in getattr(st.param, comp).objects]
    sels = pg.locator("select")
    for i in range(sels.count()):
        texts = sels.nth(i).locator("option").all_inner_texts()
        if texts and all(any(t.endswith(f"[{v}]") for v in ids) for t in texts):
            return sels.nth(i), texts
    raise RuntimeError(f"no picker for {comp}")


def page_changes(browser, url, proc, ws_log, st, n_source: int, n_keys: int, n_drags: int):
    from wbexplore.balance.terms import SOURCE_COMPONENTS

    pg = _new_page(browser)
    pg.goto(url, timeout=180_000)
    _rendered(pg, time.perf_counter())
    pg.wait_for_function(HOOK_DOCS, timeout=60_000)
    pg.wait_for_timeout(1000)
    tr = Trials(pg, proc, ws_log)
    res = {}
    for comp in SOURCE_COMPONENTS:
        sel, texts = _picker(pg, st, comp)
        cur = sel.locator("option:checked").inner_text()
        i0 = texts.index(cur)
        seen, trials, first_visit = {cur}, [], []
        for i in range(1, n_source + 1):  # the next option each time (first visits), round again (revisits)
            label = texts[(i0 + i) % len(texts)]
            first_visit.append(label not in seen)
            seen.add(label)
            trials.append(tr.run(lambda sel=sel, label=label: sel.select_option(label=label), ("input", "change")))
        if sel.locator("option:checked").inner_text() != cur:  # back, so the next picker starts from the same page
            before = pg.locator(SUMMARY).first.inner_text()
            sel.select_option(label=cur)
            _wait_redrawn(pg, before)
        res[f"{comp} picker"] = (trials, first_visit)
    handle = pg.locator(".noUi-handle-lower").first
    handle.focus()
    keys = [tr.run(lambda: pg.keyboard.press("ArrowRight"), ("keydown",)) for _ in range(n_keys)]
    res["period, arrow key on the handle"] = (keys, [True] * n_keys)
    drags = []
    for i in range(n_drags):
        box = handle.bounding_box()
        x, y = box["x"] + box["width"] / 2, box["y"] + box["height"] / 2
        dx = 30 if i % 2 == 0 else -22  # right, then back less far: each drag a new period

        def drag(x=x, y=y, dx=dx):
            pg.mouse.move(x, y)
            pg.mouse.down()
            pg.mouse.move(x + dx, y, steps=6)
            pg.mouse.up()

        drags.append(tr.run(drag, ("pointerup",)))
    res["period, pointer drag (from release)"] = (drags, [True] * n_drags)
    shot = Path(__file__).resolve().parent.parent / "artifacts"
    shot.mkdir(exist_ok=True)
    pg.screenshot(path=str(shot / "explorer_benchmark.png"), full_page=True)
    pg.close()
    return res


def _print_changes(res):
    print(f"page: action (DOM event) -> redrawn page (summary changed, then no websocket frame and no bokeh "
          f"document change for {QUIET_S:.1f} s; time to the 2nd animation frame after the last document change)")
    for name, (trials, first_visit) in res.items():
        target = PERIOD_TARGET_S if name.startswith("period") else SOURCE_TARGET_S
        ok = [t for t in trials if t]
        if not ok:
            print(f"  {name}: no trial completed")
            continue
        def m(k, f=1e3, ok=ok):
            return _median([t.get(k) for t in ok]) * f

        med = m("total", 1)
        firsts = [t["total"] for t, f in zip(trials, first_visit) if t and f]
        revisits = [t["total"] for t, f in zip(trials, first_visit) if t and not f]
        extra = (f"; first visits {_median(firsts) * 1e3:.0f} ms (n={len(firsts)}), revisits "
                 f"{_median(revisits) * 1e3:.0f} ms (n={len(revisits)})") if revisits else ""
        print(f"  {name:36s} median {med * 1e3:5.0f} ms over {len(ok)} (min {min(t['total'] for t in ok) * 1e3:.0f}, "
              f"max {max(t['total'] for t in ok) * 1e3:.0f}); target <= {target * 1e3:.0f} ms, ratio "
              f"{med / target:.2f}{extra}")
        print(f"      where: event to server {m('to_server'):.0f} ms | server to its first patch "
              f"{m('server_first_patch'):.0f} ms, to its last {m('server_last_patch'):.0f} ms (server CPU in the "
              f"trial {m('server_cpu'):.0f} ms) | browser from the last patch to painted {m('after_last_patch'):.0f} ms "
              f"(of which the patch waited {m('last_patch_to_script'):.0f} ms for the page's busy main thread) "
              f"(last document change to painted {m('change_to_paint'):.0f} ms)")
        after = [t["longest_after_msg"] for t in ok if t.get("longest_after_msg") is not None]
        print(f"      the page's long tasks (>= 50 ms): {m('long_tasks', 1):.0f} per change, {m('long_ms'):.0f} ms in all, "
              f"the longest {m('longest'):.0f} ms, after the reply's message "
              f"{'/'.join(str(a) for a in sorted(set(after))) or '?'} (most often {max(set(after), key=after.count) if after else '?'})")
        print(f"      websocket per change: the server's reply {m('reply_msgs', 1):.0f} messages in "
              f"{m('reply_frames', 1):.0f} frames ({m('reply_bytes', 1e-3):.1f} kB); then {m('followups', 1):.0f} "
              f"browser messages (plot ranges) each answered OK; in all the page sent {m('frames_out', 1):.0f} frames "
              f"({m('bytes_out', 1e-3):.1f} kB) and got {m('frames_in', 1):.0f} ({m('bytes_in', 1e-3):.1f} kB); "
              f"{m('changes', 1):.0f} bokeh document changes in the page", flush=True)


def browser(catalog, cache, st, first_n=3, n_source=6, n_keys=7, n_drags=5):
    from playwright.sync_api import sync_playwright

    with sync_playwright() as p:
        b = p.chromium.launch(executable_path=shutil.which("chromium") or "/usr/bin/chromium", args=ARGS)
        try:
            t = time.perf_counter()
            startup, first = first_pages(b, catalog, cache, first_n)
            print(f"fresh `wbexplore serve`, warm series cache ({first_n} servers, one first page each; "
                  f"{time.perf_counter() - t:.0f} s):")
            print(f"  start-up (process start to its first answer) median {_median(startup):.2f} s "
                  f"({', '.join(f'{x:.2f}' for x in startup)})")
            print(f"  first request to rendered page (summary, ranking rows, every plot canvas, bokeh's documents "
                  f"idle, two frames) median {_median(first):.2f} s ({', '.join(f'{x:.2f}' for x in first)}); "
                  f"target <= {FIRST_PAGE_TARGET_S:.0f} s, ratio {_median(first) / FIRST_PAGE_TARGET_S:.2f}",
                  flush=True)
            t = time.perf_counter()
            with tempfile.TemporaryDirectory() as d:
                ws_log = Path(d) / "ws.log"
                ws_log.touch()
                proc, url, _ = _start_server(catalog, cache, ws_log)
                try:
                    res = page_changes(b, url, proc, ws_log, st, n_source, n_keys, n_drags)
                finally:
                    _stop(proc)
        finally:
            b.close()
    print(f"(change trials: {time.perf_counter() - t:.0f} s)")
    _print_changes(res)


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--browser", action="store_true")
    ap.add_argument("--no-profile", action="store_true", help="skip the in-process change and its cProfile")
    a = ap.parse_args()
    load0 = os.getloadavg()[0]
    t_all = time.perf_counter()
    from wbexplore.demo import write_demo
    from wbexplore.explorer.app import load_state

    with tempfile.TemporaryDirectory() as d:
        info = write_demo(Path(d) / "study")
        cache = Path(d) / "cache"
        state = load_state(info.catalog, cache_dir=cache)  # also warms the series cache for the servers below
        print(f"demo: {state.series.sizes['basin']} basins x {state.series.sizes['time']} months; "
              f"load average before {load0:.1f} (2 cores)", flush=True)
        server_side(state)
        if not a.no_profile:
            in_process_change(info.catalog, cache)
        if a.browser:
            browser(info.catalog, cache, load_state(info.catalog, cache_dir=cache))
    print(f"whole run {time.perf_counter() - t_all:.0f} s; load average after {os.getloadavg()[0]:.1f}")


if __name__ == "__main__":
    main()
