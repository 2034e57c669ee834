"""Run every benchmark and write their tables to benchmarks/RESULTS.md and into the README.

    .venv/bin/python -m benchmarks.run_all --quick    # a few minutes
    .venv/bin/python -m benchmarks.run_all            # full sizes (about half an hour here)
"""

from __future__ import annotations

import argparse
import platform
import re
import sys
import time
from datetime import datetime, timezone
from importlib import import_module
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
BENCHMARKS = [
    ("bias_recovery", "Does it find the injected cue?"),
    ("saliency_throughput", "Saliency stage against plain inference"),
    ("interventions", "Ablation and insertion against plain inference"),
    ("rules_scale", "Per-class rules at scale against scripted mlxtend"),
    ("aggregation_scale", "Dawid-Skene aggregation at scale"),
    ("annotation_load", "50 annotators at once against the served app"),
]
START, END = "<!-- benchmarks:start -->", "<!-- benchmarks:end -->"


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true")
    p.add_argument("--only", nargs="*", help="names of the benchmarks to run")
    args = p.parse_args(argv)
    command = "./dev bench" + (" --quick" if args.quick else "")
    parts = [f"Measured {datetime.now(timezone.utc):%Y-%m-%d} on {platform.machine()} ({_cpus()} CPUs), Python {platform.python_version()}, "
             f"with `{command}`" + (" (quick sizes)." if args.quick else " (full sizes).")]
    for name, title in BENCHMARKS:
        if args.only and name not in args.only:
            continue
        print(f"== {name}", flush=True)
        t = time.perf_counter()
        table = import_module(f"benchmarks.{name}").main(["--quick"] if args.quick else [])
        parts.append(f"### {title}\n\n`python -m benchmarks.{name}{' --quick' if args.quick else ''}` ({time.perf_counter() - t:.0f} s)\n\n{table}")
    text = "\n\n".join(parts) + "\n"
    (ROOT / "benchmarks" / "RESULTS.md").write_text("# Benchmark results\n\n" + text, encoding="utf-8")
    readme = ROOT / "README.md"
    body = readme.read_text(encoding="utf-8")
    if START in body and END in body and not args.only:
        body = re.sub(re.escape(START) + ".*?" + re.escape(END), START + "\n" + text + END, body, flags=re.S)
        readme.write_text(body, encoding="utf-8")
    print(f"wrote {ROOT / 'benchmarks' / 'RESULTS.md'}", file=sys.stderr)
    return text


def _cpus() -> int:
    import os

    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 0


if __name__ == "__main__":
    main()
