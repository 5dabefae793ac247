"""Benchmark suite: throughput and peak memory of wetlandflow against plain baselines, in one run.

    python benchmarks/run.py [--quick] [--only CASE ...] --json results.json

Each variant of each case (wetlandflow's path and the baseline a user would
otherwise write) runs in a fresh subprocess, so its peak resident memory is
its own; every figure is written with the baseline it is compared with and
the ratio, both measured in the same run: timings on shared 2-core machines
are noisy, ratios much less so.  Timings are medians of ``--repeat`` runs.
"""

from __future__ import annotations

import argparse
import json
import multiprocessing as mp
import platform
import sys
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))


def _child(name: str, variant: str, quick: bool, repeat: int, queue) -> None:
    try:
        sys.path.insert(0, str(HERE))
        import cases  # noqa: F401  (registers every case)
        from _harness import CASES, peak_rss_mb

        start = peak_rss_mb()
        work, seconds = CASES[name]["variants"][variant](quick=quick, repeat=repeat)
        queue.put({"work": work, "seconds": seconds, "peak_rss_mb": peak_rss_mb(), "start_rss_mb": start})
    except Exception as exc:  # report, never hang the parent
        import traceback

        queue.put({"error": f"{type(exc).__name__}: {exc}", "traceback": traceback.format_exc()})


def run_variant(name: str, variant: str, quick: bool, repeat: int) -> dict:
    ctx = mp.get_context("spawn")
    q = ctx.Queue()
    p = ctx.Process(target=_child, args=(name, variant, quick, repeat, q))
    p.start()
    res = q.get()
    p.join()
    return res


def figures_for(name: str, entry: dict, results: dict[str, dict]) -> list[dict]:
    base_label = entry["baseline"]
    base = results.get(base_label, {})
    out = []
    for label, res in results.items():
        if "error" in res:
            out.append({"case": name, "variant": label, "error": res["error"]})
            continue
        rate = res["work"] / res["seconds"] / entry.get("per", 1e6)
        fig = {"case": name, "name": f"{name} [{label}] throughput", "value": rate, "unit": entry["unit"],
               "seconds": res["seconds"], "baseline": f"{name} [{base_label}]"}
        mem = {"case": name, "name": f"{name} [{label}] peak memory", "value": res["peak_rss_mb"], "unit": "MB",
               "baseline": f"{name} [{base_label}]"}
        if base and "error" not in base:
            fig["baseline_value"] = base["work"] / base["seconds"] / entry.get("per", 1e6)
            fig["ratio"] = rate / fig["baseline_value"]
            mem["baseline_value"] = base["peak_rss_mb"]
            mem["ratio"] = res["peak_rss_mb"] / base["peak_rss_mb"]
        out += [fig, mem]
    return out


def main(argv: list[str] | None = None) -> int:
    import cases  # noqa: F401
    from _harness import CASES

    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--quick", action="store_true", help="smaller sizes: the whole suite in under 5 minutes")
    ap.add_argument("--json", type=Path, required=True, help="where to write the figures")
    ap.add_argument("--only", nargs="*", default=None, help="run only these cases")
    ap.add_argument("--repeat", type=int, default=3)
    args = ap.parse_args(argv)
    out = {"machine": {"python": platform.python_version(), "cpus": mp.cpu_count(), "quick": args.quick},
           "figures": []}
    for name in args.only or list(CASES):
        entry = CASES[name]
        t0 = time.perf_counter()
        results = {label: run_variant(name, label, args.quick, args.repeat) for label in entry["variants"]}
        for fig in figures_for(name, entry, results):
            out["figures"].append(fig)
            if "error" in fig:
                print(f"{fig['case']} [{fig['variant']}]: FAILED {fig['error']}")
                continue
            ratio = f"  x{fig['ratio']:.2f} of {fig['baseline']}" if "ratio" in fig else ""
            print(f"{fig['name']:<58s} {fig['value']:>10.3f} {fig['unit']:<6s}{ratio}")
        print(f"  ({name}: {entry['description']}; {time.perf_counter() - t0:.0f} s)")
    args.json.parent.mkdir(parents=True, exist_ok=True)
    args.json.write_text(json.dumps(out, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
