"""docs/benchmarks.md from benchmarks/results.json (``python -m tools.make_docs`` writes it).

Only reads the JSON that ``python -m benchmarks.run`` wrote; computes nothing.
"""

from __future__ import annotations

import json
import math
from pathlib import Path
from typing import Any

__all__ = ["LATENCY", "RESULTS", "benchmarks_markdown", "latency_markdown"]

RESULTS = Path(__file__).resolve().parent / "results.json"
#: W8 (``python -m benchmarks.explorer_latency``); its table is added when the file exists.
LATENCY = Path(__file__).resolve().parent / "results_explorer_latency.json"


def _num(x: Any, unit: str = "", digits: int = 3) -> str:
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return "-"
    if isinstance(x, (int, float)):
        return f"{x:.{digits}g}{unit}"
    return f"{x}{unit}"


def _cases(results: dict[str, Any]) -> list[tuple[str, dict[str, Any]]]:
    work, sizes = results["workloads"], results["settings"]["sizes"]
    cases: list[tuple[str, dict[str, Any]]] = []
    if "W1" in work:
        where = f"{sizes['w1_rows']:,} rows, {sizes['w1_resolution']}²"
        cases += [(f"W1 `{form}`, {where}", work["W1"][form]) for form in _FORMS]
    if "W2" in work:
        where = f"MLP, {sizes['w2_rows']:,} rows, {sizes['w2_resolution']}²"
        cases.append((f"W2 {where}", work["W2"]))
    if "W3" in work:
        runs = sizes["w3_starts"] * sizes["w3_rates"]
        where = f"{runs} runs x {sizes['w3_steps']} steps"
        cases += [(f"W3 `{form}`, {where}", work["W3"][form]) for form in _FORMS]
    if "W4" in work:
        runs = sizes["w4_starts"] * sizes["w4_rates"]
        cases.append((f"W4 MLP, {runs} runs x {sizes['w4_steps']} steps", work["W4"]))
    return cases


_FORMS = ("X @ theta", "theta0 + theta1 * x")


def _ms(x: float) -> str:
    """Milliseconds with 3 significant digits, whole numbers from 100 ms on."""
    return f"{x:.0f}" if abs(x) >= 100 else f"{x:.3g}"


def latency_markdown(record: dict[str, Any]) -> list[str]:
    """The W8 table (Explorer latency, kernel side) from its results record."""
    machine = record["machine"]
    lines = [
        "",
        "## W8, Explorer latency (kernel side)",
        "",
        f"From `benchmarks/results_explorer_latency.json`, run of {machine['date']}; load average "
        f"{machine['load_average_at_start'][0]} at the start, "
        f"{machine['load_average_at_end'][0]} at the end. Medians (min-max) from setting a "
        "control to both figure models updated (CPU: the process's CPU time, less moved by other "
        "work on the machine); compilations after the warm-up.",
        "",
        "| scenario | change | median | CPU | min-max | descent | figures | to model "
        "| compilations |",
        "|---|---|---|---|---|---|---|---|---|",
    ]
    kinds = (
        ("learning rate", lambda r: r["learning_rate_change"]),
        ("start count 1-64", lambda r: r["start_count_change"]),
        ("random plane, new seed", lambda r: r["plane_change"]["random_plane_new_seed"]),
        ("axes plane, new pair", lambda r: r["plane_change"]["axes_plane_new_pair"]),
    )
    for name, rec in record["scenarios"].items():
        for kind, pick in kinds:
            row = pick(rec)
            parts = row["breakdown_median_ms"]
            cells = [
                f"{name} ({rec['view']['parameters']} parameters)",
                kind,
                f"{_ms(row['median_ms'])} ms",
                f"{_ms(row['median_cpu_ms'])} ms",
                f"{_ms(row['min_ms'])}-{_ms(row['max_ms'])} ms",
                f"{_ms(parts['descent'])} ms",
                f"{_ms(parts['figure_build'])} ms",
                f"{_ms(parts['to_plot_model'])} ms",
                f"{row['compilations']} in {row['changes']}",
            ]
            lines.append("| " + " | ".join(cells) + " |")
    return lines


def benchmarks_markdown(
    results: dict[str, Any] | None = None, latency: dict[str, Any] | None = None
) -> str:
    """The benchmark tables as Markdown (default: from benchmarks/results.json).

    ``latency``: the W8 record (default: benchmarks/results_explorer_latency.json
    when it exists).
    """
    if results is None:
        results = json.loads(RESULTS.read_text(encoding="utf-8"))
    if latency is None and LATENCY.exists():
        latency = json.loads(LATENCY.read_text(encoding="utf-8"))
    machine = results["machine"]
    lines = [
        "# Benchmark results",
        "",
        "Generated from `benchmarks/results.json` by `python -m tools.make_docs`; do not edit by",
        "hand (rerun the benchmarks with `python -m benchmarks.run`, then the script). What the",
        'workloads and contenders are: DEVELOPERS.md, "Benchmarks and performance".',
        "",
        f"Run of {machine['date']} on {machine['cpu_model']} ({machine['logical_cores']} cores, "
        f"{machine['memory_gib']} GiB), jax {machine['jax']}, numpy {machine['numpy']}; load "
        f"average {machine['load_average_at_start'][0]} at the start, "
        f"{machine['load_average_at_end'][0]} at the end."
        + (" Some workloads were rerun and merged (see `merged`)." if "merged" in results else ""),
        "",
        "Medians; (a) jitted-JAX loop, (b) NumPy loop; sharding = one device / all devices;",
        "compile = basinview's first-call compile time (tuning included).",
        "",
        "| workload | basinview | 1 device | (a) | (b) | vs (a) | vs (b) | sharding | compile "
        "| max rel diff |",
        "|---|---|---|---|---|---|---|---|---|---|",
    ]
    for name, rec in _cases(results):
        one = rec.get("basinview_1_device", {})
        cells = [
            name,
            _num(rec["basinview"]["median_seconds"], " s"),
            _num(one.get("median_seconds"), " s"),
            _num(rec["a_jax_loop"]["median_seconds"], " s"),
            _num(rec["b_numpy_loop"]["median_seconds"], " s"),
            _num(rec["speedup_vs_a"], "x"),
            _num(rec["speedup_vs_b"], "x"),
            _num(rec.get("sharding_speedup"), "x"),
            _num(rec["basinview"]["compile_seconds"], " s"),
            _num(max(rec["max_rel_diff_a"], rec["max_rel_diff_b"]), "", 2),
        ]
        lines.append("| " + " | ".join(cells) + " |")
    work = results["workloads"]
    if "matmul" in work and "W1" in work:
        lines += [
            "",
            f"Matrix-product peak in this run: {work['matmul']['peak_gflops']:.1f} GFLOP/s.",
        ]
        for form in _FORMS:
            rec = work["W1"][form]
            lines.append(
                f"W1 `{form}`: {rec['gflops']:.1f} GFLOP/s, {rec['percent_of_matmul']:.0f}% of it."
            )
    if "W5" in work:
        rec = work["W5"]
        lr, mixed = rec["learning_rate_change"], rec["mixed_changes"]
        full = lr["full"]
        lines += [
            "",
            "## W5, Explorer interaction",
            "",
            "| measure | value |",
            "|---|---|",
            f"| build the Explorer | {rec['build']['seconds']:.2f} s, "
            f"{rec['build']['compilations']} compilations ({rec['build']['compile_seconds']:.2f} s) |",
            f"| learning-rate change, median over {full['changes']} | {full['median_ms']:.1f} ms "
            f"(min {full['min_ms']:.1f}, max {full['max_ms']:.1f}) |",
            f"| of it: descent / minima / figures and sync | {lr['descent_median_ms']:.1f} / "
            f"{lr['minima_median_ms']:.1f} / {lr['figures_and_sync_median_ms']:.1f} ms |",
            f"| warm-up compilations | {mixed['warm_up_compilations']} "
            f"({mixed['warm_up_compile_seconds']:.2f} s) |",
            f"| compilations in {len(mixed['changes'])} mixed changes | {mixed['compilations']} |",
        ]
    if "W6" in work:
        lines += [
            "",
            "## W6, memory (peak RSS of a fresh process)",
            "",
            "| workload | process peak | added by a repeat | added by the first run |",
            "|---|---|---|---|",
        ]
        for case in work["W6"]["surfaces"] + work["W6"]["basin_maps"]:
            first, second = case["first_run"], case["second_run"]
            peak = max(first["peak_rss_mib"], second["peak_rss_mib"])
            lines.append(
                f"| {case['workload']} | {peak:.0f} MiB | {second['added_peak_mib']:.0f} MiB | "
                f"{first['added_peak_mib']:.0f} MiB |"
            )
    if latency is not None:
        lines += latency_markdown(latency)
    return "\n".join(lines) + "\n"
