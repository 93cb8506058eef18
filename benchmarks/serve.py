"""Served-page benchmark: many visitors opening the explorer at once.

Target (issue 11): with 20 sessions opened at the same moment, every page is rendered within 3 s.
Starts `wbexplore serve` on the demo scenario (series cache warmed first, as on a running server),
opens the sessions concurrently as pages of Debian's chromium (Playwright's async API, one browser,
one context per visitor), and times each from its request to a rendered page: the summary pane,
the ranking table rows and the map's canvas on screen. Also times, in this process, what the server
does per session (state + widgets + bokeh models), with the server's shared results and without.

    python benchmarks/serve.py               # 20 sessions
    python benchmarks/serve.py --sessions 5
"""

from __future__ import annotations

import argparse
import asyncio
import os
import shutil
import socket
import statistics
import subprocess
import sys
import tempfile
import time
import urllib.request
import warnings
from pathlib import Path

warnings.simplefilter("ignore")
TARGET_S = 3.0
ARGS = ["--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--disable-background-networking",
        "--disable-component-update", "--disable-sync"]


def per_session_server_cost(catalog, cache, n=5):
    """Seconds the server spends building one session's page (median of n), fresh vs shared results."""
    import panel as pn
    from bokeh.document import Document

    from wbexplore.explorer.app import Explorer, load_state
    from wbexplore.explorer.state import ClosureState

    pn.extension("tabulator")
    base = load_state(catalog, cache_dir=cache)
    Explorer(base).panel().get_root(Document())  # warm imports and the shared memo
    out = {}
    for label, memo in (("own results (each session recomputes)", None), ("shared results", base._memo)):
        times = []
        for _ in range(n):
            t = time.perf_counter()
            st = ClosureState(base.series, basins=base.basins, catalog_path=base.catalog_path, title=base.title,
                              memo=memo)
            Explorer(st).panel().get_root(Document())
            times.append(time.perf_counter() - t)
        out[label] = statistics.median(times)
    return out


async def open_sessions(url, n):
    from playwright.async_api import async_playwright

    async with async_playwright() as p:
        b = await p.chromium.launch(executable_path=shutil.which("chromium"), args=ARGS)
        contexts = [await b.new_context(viewport={"width": 1500, "height": 1700}) for _ in range(n)]
        pages = [await c.new_page() for c in contexts]

        frame = "() => new Promise(r => requestAnimationFrame(() => requestAnimationFrame(r)))"

        async def one(pg):
            t = time.perf_counter()
            await pg.goto(url, timeout=180_000)
            await pg.wait_for_selector(".wbx-summary", timeout=180_000)
            await pg.wait_for_selector(".wbx-ranking .tabulator-row", timeout=180_000)
            await pg.evaluate(frame)
            first = time.perf_counter() - t
            for css in ("wbx-map", "wbx-bars", "wbx-residual", "wbx-scatter", "wbx-multi"):
                await pg.wait_for_selector(f".{css} canvas", timeout=180_000)
            await pg.evaluate(frame)
            return first, time.perf_counter() - t

        times = await asyncio.gather(*(one(pg) for pg in pages))
        for c in contexts[:-1]:
            await c.close()
        shot = Path(__file__).resolve().parent.parent / "artifacts"
        shot.mkdir(exist_ok=True)
        await pages[-1].screenshot(path=str(shot / "serve_benchmark_last_session.png"))
        await b.close()
    return times


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("--sessions", type=int, default=20)
    a = ap.parse_args()
    load0 = os.getloadavg()[0]
    from wbexplore.demo import write_demo
    from wbexplore.pipeline import load_series

    with tempfile.TemporaryDirectory() as d:
        info = write_demo(Path(d) / "study")
        cache = Path(d) / "cache"
        load_series(info.catalog, cache_dir=cache)  # a warm cache, as on a server that has run before
        cost = per_session_server_cost(info.catalog, cache)
        for k, v in cost.items():
            print(f"server work per session with every plot drawn, {k}: {v * 1e3:.0f} ms", flush=True)
        with socket.socket() as s:
            s.bind(("127.0.0.1", 0))
            port = s.getsockname()[1]
        proc = subprocess.Popen([sys.executable, "-m", "wbexplore.cli", "serve", str(info.catalog), "--port",
                                 str(port), "--cache-dir", str(cache)], stdout=subprocess.DEVNULL,
                                stderr=subprocess.DEVNULL, env=dict(os.environ, PYTHONWARNINGS="ignore"))
        try:
            url = f"http://127.0.0.1:{port}/"
            for _ in range(240):
                try:
                    urllib.request.urlopen(url, timeout=5)  # the first page also warms the server's results
                    break
                except OSError:
                    time.sleep(0.5)
            times = asyncio.run(open_sessions(url, a.sessions))
        finally:
            proc.terminate()
            proc.wait(20)
    print(f"{a.sessions} sessions opened at once (load average before: {load0:.1f}; 2 cores), request to:")
    for i, what in enumerate(("controls, summary and ranking on screen", "every plot drawn as well")):
        t = sorted(x[i] for x in times)
        med, mx = statistics.median(t), max(t)
        print(f"  {what:40s} median {med:5.2f} s, max {mx:5.2f} s (fastest {t[0]:.2f} s); "
              f"target <= {TARGET_S:.0f} s, ratio max/target {mx / TARGET_S:.2f}")


if __name__ == "__main__":
    main()
