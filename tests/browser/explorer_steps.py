"""Steps of the Explorer's browser test that check layout, drawing and long work.

Each function drives the page as a user would (keys, clicks, drags), waits
on DOM state (never on fixed sleeps) and asserts what a user would see.
Screenshots go to the folder the caller gives.
"""

from __future__ import annotations

import re
import time
from pathlib import Path

STATUS = ".bv-explorer .bv-status"


def status(page) -> str:
    return page.locator(STATUS).first.inner_text()


def revision(page, which: str = "main") -> int:
    value = page.evaluate(
        f"() => {{ const r = document.querySelector('.bv-{which} .bv-plot');"
        " return r && r.dataset.revision ? Number(r.dataset.revision) : -1; }"
    )
    return int(value)


def wait_status(page, pattern: str, timeout_s: float = 300.0) -> str:
    """Wait until the status line matches the regular expression ``pattern``."""
    page.wait_for_function(
        "([sel, pat]) => { const el = document.querySelector(sel);"
        " return !!el && new RegExp(pat).test(el.innerText); }",
        arg=[STATUS, pattern],
        timeout=timeout_s * 1000,
    )
    return status(page)


def set_readout(page, label: str, value: str) -> None:
    """Type ``value`` into the readout of the slider labelled ``label`` (then Enter)."""
    readout = page.locator(
        f".bv-explorer .widget-slider:has(.widget-label:text-is('{label}')) .widget-readout"
    ).first
    readout.scroll_into_view_if_needed()
    readout.click()
    page.keyboard.press("Control+A")
    page.keyboard.type(value)
    page.keyboard.press("Enter")


def set_text(page, label: str, value: str) -> None:
    box = page.locator(
        f".bv-explorer .widget-inline-hbox:has(.widget-label:text-is('{label}')) input"
    ).first
    box.scroll_into_view_if_needed()
    box.fill(value)
    box.press("Enter")


def select(page, label: str, value: str) -> None:
    page.locator(
        f".bv-explorer .widget-dropdown:has(.widget-label:text-is('{label}')) select"
    ).first.select_option(value)


def button(page, text: str):
    return page.locator(".bv-explorer button", has_text=text).first


def changed_status(page, action, pattern: str = r"runs:") -> str:
    """Do ``action`` and wait until the status line is a new one matching ``pattern``."""
    before = status(page)
    action()
    page.wait_for_function(
        "([sel, old, pat]) => { const t = document.querySelector(sel).innerText;"
        " return t !== old && new RegExp(pat).test(t); }",
        arg=[STATUS, before, pattern],
        timeout=300_000,
    )
    return status(page)


# ------------------------------------------------------------------ layout
GEOMETRY = """() => {
    const ex = document.querySelector('.bv-explorer');
    const box = ex.getBoundingClientRect();
    const bad = [];
    for (const svg of ex.querySelectorAll('.js-plotly-plot .main-svg')) {
        const r = svg.getBoundingClientRect();
        if (r.width === 0) continue;  // a hidden figure (tables shown instead)
        if (r.left < box.left - 1 || r.right > box.right + 1)
            bad.push(`figure ${r.left.toFixed(0)}..${r.right.toFixed(0)} outside ${box.left.toFixed(0)}..${box.right.toFixed(0)}`);
    }
    let el = ex;
    while (el && el !== document.body) {
        if (el.scrollWidth > el.clientWidth + 1 && getComputedStyle(el).overflowX !== 'visible')
            bad.push(`horizontal scroll in ${el.className || el.tagName}: ${el.scrollWidth} > ${el.clientWidth}`);
        el = el.parentElement;
    }
    const figures = ex.querySelector('.bv-figures').getBoundingClientRect();
    const panel = ex.querySelector('.bv-panel').getBoundingClientRect();
    return {bad, width: box.width, stacked: figures.top >= panel.bottom - 1,
            status_top: ex.querySelector('.bv-status').getBoundingClientRect().top - box.top};
}"""

FITTED = """() => {
    const plots = Array.from(document.querySelectorAll('.bv-explorer .bv-plot'));
    return plots.every(p => {
        const svg = p.querySelector('.main-svg');
        return !svg || p.offsetWidth === 0 || Math.abs(svg.getBoundingClientRect().width - p.getBoundingClientRect().width) <= 2;
    });
}"""


def check_layout(page, shots: Path, name: str) -> dict:
    """Every figure inside the widget, no sideways scroll, status at the top."""
    page.wait_for_function(FITTED, timeout=60_000)
    page.locator(".bv-explorer").first.scroll_into_view_if_needed()
    geometry = page.evaluate(GEOMETRY)
    page.screenshot(path=str(shots / f"{name}.png"))
    assert not geometry["bad"], (name, geometry)
    assert geometry["status_top"] < 60, (name, geometry)  # the status line heads the controls
    return geometry


# ------------------------------------------------------------------ samplers
SAMPLER = """(what) => {
    window.__bvSamples = [];
    window.__bvSampling = true;
    const take = () => {
        if (!window.__bvSampling) return;
        if (what === 'map') {
            const m = document.querySelector('.bv-main');
            window.__bvSamples.push([
                m.querySelectorAll('.contourlayer path').length,
                m.querySelectorAll('.scatterlayer .trace').length,
                m.querySelectorAll('.legend .traces').length,
            ]);
        } else {
            const bar = document.querySelector('.bv-progress .progress-bar, .bv-progress [role=progressbar], .bv-progress .widget-progress div div');
            const shown = getComputedStyle(document.querySelector('.bv-progress')).visibility;
            window.__bvSamples.push([bar ? bar.style.width || bar.style.height : '', shown]);
        }
        requestAnimationFrame(take);
    };
    requestAnimationFrame(take);
}"""


def start_sampling(page, what: str) -> None:
    page.evaluate(SAMPLER, what)


def stop_sampling(page) -> list:
    return page.evaluate("() => { window.__bvSampling = false; return window.__bvSamples; }")


def x_range(page) -> list[float] | None:
    return page.evaluate(
        "() => { const gd = document.querySelector('.bv-main .js-plotly-plot');"
        " const ax = gd && gd.layout && gd.layout.xaxis;"
        " return ax && ax.range ? ax.range.map(Number) : null; }"
    )


def zoom_in(page) -> list[float]:
    drag = page.locator(".bv-main .nsewdrag").first
    drag.scroll_into_view_if_needed()
    box = drag.bounding_box()
    x0, y0 = box["x"] + box["width"] * 0.3, box["y"] + box["height"] * 0.3
    page.mouse.move(x0, y0)
    page.mouse.down()
    page.mouse.move(x0 + box["width"] * 0.3, y0 + box["height"] * 0.3, steps=8)
    page.mouse.up()
    page.wait_for_function(
        "() => { const gd = document.querySelector('.bv-main .js-plotly-plot');"
        " return !!(gd.layout.xaxis && gd.layout.xaxis.autorange === false && gd.layout.xaxis.range); }"
    )
    value = x_range(page)
    assert value is not None
    return value


def tick_rows(page) -> dict:
    """Vertical centres of the side figure's y and y2 tick labels (two panels)."""
    return page.evaluate(
        """() => {
            const side = document.querySelector('.bv-side');
            const centres = sel => Array.from(side.querySelectorAll(sel)).map(t => {
                const r = t.getBoundingClientRect(); return (r.top + r.bottom) / 2; });
            const gd = side.querySelector('.js-plotly-plot');
            return {y: centres('.ytick text'), y2: centres('.y2tick text'),
                    top: gd.layout.yaxis && gd.layout.yaxis.domain,
                    bottom: gd.layout.yaxis2 && gd.layout.yaxis2.domain,
                    height: side.getBoundingClientRect().height};
        }"""
    )


def side_picture(page) -> str:
    """What the side figure shows (its SVG text and path count), to see it unchanged."""
    return page.evaluate(
        "() => { const s = document.querySelector('.bv-side .main-svg');"
        " return s ? s.querySelectorAll('path').length + '|' + s.textContent : ''; }"
    )


def timed_cancel(page) -> float:
    """Click cancel; seconds until the status says cancelled and the bar is gone."""
    t0 = time.monotonic()
    button(page, "cancel").click()
    page.wait_for_function(
        "() => /cancelled/.test(document.querySelector('.bv-explorer .bv-status').innerText)"
        " && getComputedStyle(document.querySelector('.bv-progress')).visibility === 'hidden'",
        timeout=60_000,
    )
    return time.monotonic() - t0


def distinct_progress(samples: list) -> set[str]:
    return {w for w, shown in samples if shown == "visible" and re.match(r"[\d.]+%", w or "")}
