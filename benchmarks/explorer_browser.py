"""The Explorer in a real browser: keypress-to-redraw, bytes per update, saved size.

Starts JupyterLab on 127.0.0.1 (as the browser test does), opens a notebook
with the quickstart's Explorer and one on the neural-network scenario (a
random plane), and for each: types learning rates into the slider's
readout and measures, in the page, the time from the Enter key to the
moment plotly.js has drawn the new figure (the PlotView marks the drawn
revision on the page), and the bytes the kernel sent over the websocket
for that update. Also: bytes sent when the Explorer is first shown
(plotly.js once per page, then the widgets), and the size of a notebook
with two Explorers saved with its widget state (nbconvert).

Run: ``python -m benchmarks.explorer_browser`` (needs /usr/bin/chromium and
the ``browser`` extra). Writes ``benchmarks/results_explorer_browser.json``.
The goal for the quickstart is a median under 150 ms on a 2-core machine;
the load average is recorded with the numbers (a shared machine moves them).
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

ROOT = Path(__file__).resolve().parents[1]
OUT = ROOT / "benchmarks" / "results_explorer_browser.json"

QUICKSTART = """import basinview as bv
from basinview.scenarios import beacon
problem = beacon().problem
explorer = bv.Explorer(problem, x="x", y="y", origin=problem.flatten({"x": 5.0, "y": 0.0}),
    span=((-7.0, 7.0), (-6.0, 6.0)), resolution=61, learning_rate=0.2, steps=400,
    n_starts=12, start_scale=4.0)
explorer"""

NETWORK = """import basinview as bv
from basinview.scenarios import wavy_band
problem = wavy_band(seed=3).problem
explorer = bv.Explorer(problem, "random", span=1.0, resolution=41, learning_rate=0.2,
    steps=200, n_starts=8, start_scale=0.5)
explorer"""


def _notebook(cells: list[str]) -> dict[str, Any]:
    return {
        "cells": [
            {
                "cell_type": "code",
                "metadata": {},
                "source": c,
                "outputs": [],
                "execution_count": None,
            }
            for c in cells
        ],
        "metadata": {
            "kernelspec": {"name": "python3", "display_name": "Python 3", "language": "python"}
        },
        "nbformat": 4,
        "nbformat_minor": 5,
    }


MARK = """() => { window.__bvT0 = performance.now(); window.__bvRev =
    Number(document.querySelector('.bv-main .bv-plot').dataset.revision); }"""
DRAWN = """() => Number(document.querySelector('.bv-main .bv-plot').dataset.revision) > window.__bvRev"""


def _measure(page, rates: list[str], frames: list[int]) -> tuple[list[float], list[int]]:
    readout = page.locator(
        ".bv-explorer .widget-slider:has(.widget-label:text-is('learning rate')) .widget-readout"
    ).first
    times, sizes = [], []
    for rate in rates:
        readout.click()
        page.keyboard.press("Control+A")
        page.keyboard.type(rate)
        page.evaluate(MARK)
        frames.clear()
        page.keyboard.press("Enter")
        page.wait_for_function(DRAWN, timeout=120_000)
        times.append(page.evaluate("() => performance.now() - window.__bvT0"))
        sizes.append(sum(frames))
    return times, sizes


def _browser_rows(quick: bool) -> dict[str, Any]:
    from playwright.sync_api import sync_playwright

    sys.path.insert(0, str(ROOT))
    from tests.browser.jupyter_server import CHROMIUM, CHROMIUM_ARGS, start_jupyter

    rows: dict[str, Any] = {}
    rates = ["0.15", "0.25", "0.3", "0.12", "0.2", "0.35"] * (1 if quick else 4)
    with tempfile.TemporaryDirectory() as tmp:
        tmp_path = Path(tmp)
        books = []
        for name, code in (("quickstart", QUICKSTART), ("neural_network", NETWORK)):
            path = tmp_path / f"{name}.ipynb"
            path.write_text(json.dumps(_notebook([code])))
            books.append(path)
        server = start_jupyter(tmp_path / "server", books, frontend="lab")
        try:
            with sync_playwright() as p:
                context = p.chromium.launch_persistent_context(
                    str(tmp_path / "profile"),
                    executable_path=CHROMIUM,
                    headless=True,
                    args=CHROMIUM_ARGS,
                    viewport={"width": 1500, "height": 1100},
                )
                context.set_default_timeout(300_000)
                for book in books:
                    page = context.new_page()
                    frames: list[int] = []
                    received: list[int] = []

                    def on_ws(
                        ws: Any, frames: list[int] = frames, received: list[int] = received
                    ) -> None:
                        def got(payload: Any) -> None:
                            n = len(payload)
                            frames.append(n)
                            received.append(n)

                        ws.on("framereceived", got)

                    page.on("websocket", on_ws)
                    page.goto(server.url(book.name))
                    page.wait_for_selector(".jp-Notebook .jp-Cell")
                    page.wait_for_function(
                        "() => /\\| Idle/.test(document.querySelector('#jp-main-statusbar').innerText)"
                    )
                    page.locator(".lm-MenuBar-itemLabel", has_text="Run").first.click()
                    page.locator(".lm-Menu-itemLabel", has_text="Run All Cells").first.click()
                    page.wait_for_selector(".bv-main .contourlayer path", timeout=600_000)
                    page.wait_for_function("() => !!document.querySelector('.bv-side .main-svg')")
                    first = sum(received)
                    _measure(page, rates[:2], frames)  # warm-up (compiles)
                    times, sizes = _measure(page, rates, frames)
                    rows[book.stem] = {
                        "first_show_bytes": first,
                        "keypress_to_redraw_ms": times,
                        "median_ms": statistics.median(times),
                        "bytes_per_update_median": statistics.median(sizes),
                    }
                    page.close()
                context.close()
        finally:
            server.stop()
    return rows


def _saved_size() -> dict[str, Any]:
    """A notebook with two Explorers executed and saved with its widget state."""
    with tempfile.TemporaryDirectory() as tmp:
        path = Path(tmp) / "two.ipynb"
        path.write_text(
            json.dumps(_notebook([QUICKSTART, QUICKSTART.replace("explorer", "second")]))
        )
        env = dict(os.environ, PYTHONPATH=str(ROOT))
        subprocess.run(
            [
                sys.executable,
                "-m",
                "jupyter",
                "nbconvert",
                "--to",
                "notebook",
                "--execute",
                "--inplace",
                "--NotebookClient.store_widget_state=True",
                str(path),
            ],
            check=True,
            env=env,
            capture_output=True,
            timeout=900,
        )
        text = path.read_text()
        return {
            "two_explorers_saved_bytes": len(text.encode()),
            "plotly_js_inside": "Plotly" in text and len(text) > 3_000_000,
        }


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer changes (checks it runs)")
    args = parser.parse_args(argv)
    load = os.getloadavg()
    t0 = time.time()
    result = {"load_average_before": load, "browser": _browser_rows(args.quick), **_saved_size()}
    result["seconds"] = time.time() - t0
    OUT.write_text(json.dumps(result, indent=2))
    for name, row in result["browser"].items():
        print(
            f"{name}: keypress to redraw median {row['median_ms']:.0f} ms, "
            f"{row['bytes_per_update_median'] / 1e3:.1f} kB per update, "
            f"first show {row['first_show_bytes'] / 1e6:.2f} MB"
        )
    print(
        f"two Explorers saved with widget state: {result['two_explorers_saved_bytes'] / 1e3:.0f} kB"
    )
    print(f"load average before: {' '.join(f'{x:.2f}' for x in load)}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
