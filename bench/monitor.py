"""Benchmark: does a monitor page slow the loop? Added latency with and without one.

Run ``python bench/monitor.py --json out/monitor.json`` (``--quick`` for a
short run). The same simulated demo session (``rig_adapters.sim.demo.run_demo``:
simulated rig, decoder loop, stimulator stand-in, all over loopback ZeroMQ)
runs twice per repeat, alternating the order: once alone, once with
``placeloop monitor`` subscribed to its state stream and a headless chromium
showing the page. Each run's summary gives the loop's added latency (receipt
of the message that closed a decoding step to the last byte of its output
handed to ZeroMQ) over every decoding step; the table gives p50 and p99 of
each condition (median over repeats) and the ratio of the p99s. The target
(issue 5) is a ratio of 1 within noise: the loop never waits for a monitor.

The browser is Debian's chromium at /usr/bin/chromium, driven by Playwright;
without it the "with" runs attach the monitor and a plain WebSocket client
instead, and the JSON says so.
"""

from __future__ import annotations

import argparse
import asyncio
import json
import os
import platform
import socket
import subprocess
import sys
import threading
import time
import urllib.request
from pathlib import Path

# bench/decoder.py is named like the package; drop this folder from the import
# path so that ``import decoder`` finds the package.
_HERE = Path(__file__).resolve().parent
sys.path[:] = [p for p in sys.path if Path(p or ".").resolve() != _HERE]

import numpy as np  # noqa: E402

from rig_adapters.sim.demo import run_demo  # noqa: E402
from rig_adapters.monitor.server import MONITOR_NICENESS  # noqa: E402

REPO = Path(__file__).resolve().parent.parent
CONFIG = REPO / "configs" / "round_arena_goal.toml"
CHROMIUM = Path("/usr/bin/chromium")
CHROMIUM_ARGS = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                 "--disable-background-networking", "--disable-component-update", "--disable-sync"]
TARGET_RATIO_P99 = 1.2


def _free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def _wait_http(url: str, timeout_s: float) -> None:
    deadline = time.monotonic() + timeout_s
    while True:
        try:
            with urllib.request.urlopen(url, timeout=1.0):
                return
        except OSError:
            if time.monotonic() > deadline:
                raise
            time.sleep(0.2)


def _watch_with_browser(url: str, stop: threading.Event) -> int:
    """Keep the page open in headless chromium until ``stop``; return the packets it drew."""
    from playwright.sync_api import sync_playwright

    with sync_playwright() as pw:
        browser = pw.chromium.launch(executable_path=str(CHROMIUM), args=CHROMIUM_ARGS)
        page = browser.new_page(viewport={"width": 1500, "height": 950})
        page.goto(url)
        while not stop.wait(0.5):
            pass
        packets = page.evaluate("window.__monitorState.packets")
        browser.close()
    return int(packets)


def _watch_with_websocket(url: str, stop: threading.Event) -> int:
    """Stand-in for a page: a WebSocket client that reads every packet until ``stop``."""
    import aiohttp

    async def read() -> int:
        n = 0
        async with aiohttp.ClientSession() as http, http.ws_connect(url + "ws") as ws:
            while not stop.is_set():
                try:
                    await ws.receive(timeout=0.5)
                    n += 1
                except asyncio.TimeoutError:
                    pass
        return n

    return asyncio.run(read())


def page_only(url: str) -> int:
    """Show ``url`` at low priority until a line arrives on stdin; print the packets drawn."""
    os.nice(MONITOR_NICENESS)
    stop = threading.Event()
    threading.Thread(target=lambda: (sys.stdin.readline(), stop.set()), daemon=True).start()
    watch = _watch_with_browser if CHROMIUM.exists() else _watch_with_websocket
    print(watch(url, stop))
    return 0


#: The loop gets the last core to itself in both conditions (``placeloop run --cpu``),
#: as the README advises for a rig; the monitor and the browser run on the others.
LOOP_CPU = max(os.sched_getaffinity(0))


def _off_loop_cpu() -> None:
    others = os.sched_getaffinity(0) - {LOOP_CPU}
    if others:
        os.sched_setaffinity(0, others)


def one_run(with_page: bool, args: argparse.Namespace, out_dir: Path, tag: str) -> dict:
    """One demo session; with a monitor and a page attached when ``with_page``."""
    summary = out_dir / f"summary-{tag}.json"
    endpoints: list[str] = []
    rc: list[int] = []
    demo = threading.Thread(target=lambda: rc.append(run_demo(
        config_path=str(args.config), speed=args.speed, log_dir=None, summary_path=str(summary),
        learn_s=args.learn_s, decode_s=args.decode_s, seed=args.seed, monitor_state_endpoint=endpoints,
        loop_cpu=LOOP_CPU)))
    demo.start()
    monitor = None
    watcher_result: list[int] = []
    watcher = None
    try:
        if with_page:
            while not endpoints:
                time.sleep(0.05)
            port = _free_port()
            monitor = subprocess.Popen(
                [sys.executable, "-m", "rig_adapters.monitor.server", "--config", str(args.config),
                 "--state", endpoints[0], "--http-port", str(port)],
                cwd=REPO, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL, preexec_fn=_off_loop_cpu)
            url = f"http://127.0.0.1:{port}/"
            _wait_http(url + "api/environment", 20)
            # The page runs in its own process at the monitor's low priority, as an
            # operator would run a browser beside the loop (see the README).
            watcher = subprocess.Popen([sys.executable, __file__, "--page-only", url], cwd=REPO,
                                       stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True,
                                       preexec_fn=_off_loop_cpu)
        demo.join()
    finally:
        if watcher is not None:
            out, _ = watcher.communicate("stop\n", timeout=60)
            watcher_result.append(int(out.split()[-1]) if out.strip() else 0)
        if monitor is not None:
            monitor.terminate()
            monitor.wait(10)
    if not rc or rc[0] != 0 or not summary.exists():
        raise RuntimeError(f"the demo run {tag} failed (exit {rc}); run `placeloop demo` to see why")
    result = json.loads(summary.read_text())
    lat = result["latency_ms"]
    return {"p50": lat["p50"], "p99": lat["p99"], "steps": result["decode"]["steps"],
            "page_packets": watcher_result[0] if watcher_result else None}


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--json", default=None, help="write the results here")
    parser.add_argument("--config", default=str(CONFIG))
    parser.add_argument("--speed", type=float, default=4.0, help="simulated seconds per wall second")
    parser.add_argument("--learn-s", type=float, default=40.0)
    parser.add_argument("--decode-s", type=float, default=160.0, help="simulated seconds of decoding per run")
    parser.add_argument("--repeats", type=int, default=2, help="pairs of runs, order alternating")
    parser.add_argument("--seed", type=int, default=7)
    parser.add_argument("--quick", action="store_true", help="one short pair of runs")
    parser.add_argument("--page-only", default=None, metavar="URL", help=argparse.SUPPRESS)
    args = parser.parse_args(argv)
    if args.page_only:
        return page_only(args.page_only)
    if args.quick:
        args.learn_s, args.decode_s, args.repeats, args.speed = 30.0, 40.0, 1, 8.0

    out_dir = Path(args.json).resolve().parent if args.json else Path.cwd()
    out_dir.mkdir(parents=True, exist_ok=True)
    runs: dict[str, list[dict]] = {"without": [], "with": []}
    for r in range(args.repeats):
        order = ("without", "with") if r % 2 == 0 else ("with", "without")
        for cond in order:
            print(f"run {r + 1}/{args.repeats}: {cond} a page ...", file=sys.stderr)
            runs[cond].append(one_run(cond == "with", args, out_dir, f"{cond}-{r}"))

    def agg(cond: str) -> dict:
        return {"p50": float(np.median([x["p50"] for x in runs[cond]])),
                "p99": float(np.median([x["p99"] for x in runs[cond]])),
                "steps": int(sum(x["steps"] for x in runs[cond]))}

    result = {
        "without": agg("without"),
        "with": agg("with"),
        "runs": runs,
        "page": "headless chromium" if CHROMIUM.exists() else "WebSocket client (no chromium found)",
        "settings": {"speed": args.speed, "learn_s": args.learn_s, "decode_s": args.decode_s,
                     "repeats": args.repeats, "config": str(args.config)},
        "machine": {"python": platform.python_version(), "platform": platform.platform()},
        "target_ratio_p99": TARGET_RATIO_P99,
    }
    result["ratio_p99"] = result["with"]["p99"] / result["without"]["p99"]
    print(f"\nadded latency of the loop, ms ({result['page']} attached in the 'with' runs)")
    print(f"{'':10}{'steps':>8}{'p50':>10}{'p99':>10}")
    for cond in ("without", "with"):
        a = result[cond]
        print(f"{cond:10}{a['steps']:>8}{a['p50']:>10.3f}{a['p99']:>10.3f}")
    verdict = "met" if result["ratio_p99"] <= TARGET_RATIO_P99 else "NOT met"
    print(f"ratio of p99, with / without: {result['ratio_p99']:.2f} (target <= {TARGET_RATIO_P99}: {verdict})")
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2))
        print(f"written to {args.json}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
