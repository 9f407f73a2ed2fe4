#!/usr/bin/env python3
"""Print the README table from criterion's last run (target/criterion/*/*/new/estimates.json).

Median time per call, GFLOP/s at the nominal flop counts of core/benches/kernels.rs, and the share of
the same-shape GEMV roofline measured in the same run."""
import json
import pathlib
import re

root = pathlib.Path(__file__).resolve().parent.parent / "target" / "criterion"
rows = {}
for est in sorted(root.glob("N*_d*_k*/*/new/estimates.json")):
    group, name = est.parts[-4], est.parts[-3]
    n, d, k = map(int, re.findall(r"\d+", group))
    median_ns = json.loads(est.read_text())["median"]["point_estimate"]
    rows.setdefault((n, d, k), {})[name] = median_ns
print("| N | d | k | algorithm | median | GFLOP/s | % of GEMV roofline |")
print("|---|---|---|---|---|---|---|")
for (n, d, k), algos in sorted(rows.items()):
    dpp = 2 * (n * k * d + 2 * k * k * d)
    flops = {"dpp": dpp, "dpp_lazy": dpp, "mmr": 2 * n * k * d, "gemv_roofline": 2 * n * k * d}
    roof = flops["gemv_roofline"] / algos["gemv_roofline"] if "gemv_roofline" in algos else None
    for name in ["dpp", "dpp_lazy", "mmr", "quota", "relevance", "gemv_roofline"]:
        if name not in algos:
            continue
        t = algos[name]
        us = f"{t / 1e3:.1f} µs" if t < 1e6 else f"{t / 1e6:.2f} ms"
        gf = flops[name] / t if name in flops else None
        pct = f"{100 * gf / roof:.0f} %" if gf and roof and name != "gemv_roofline" else ""
        print(f"| {n} | {d} | {k} | {name} | {us} | {f'{gf:.1f}' if gf else ''} | {pct} |")
