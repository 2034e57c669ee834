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
from datetime import UTC, datetime
from importlib import import_module
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
BENCHMARKS = [
    ("bias_recovery", "Does it find the injected cue?"),
    ("saliency_throughput", "Saliency stage against plain inference"),
    ("model_zoo", "Saliency stage against plain inference, every zoo model in every format"),
    ("interventions", "Ablation and insertion against plain inference"),
    ("intervention_truth", "Covering estimates against the true effect of removing the cue"),
    ("rules_scale", "Per-class rules at scale against scripted mlxtend"),
    ("aggregation_scale", "Dawid-Skene aggregation at scale"),
    ("agreement_page", "The agreement page on a large campaign: only what is shown, and cached"),
    ("annotation_load", "50 annotators at once against the served app"),
    ("product_scale", "The product at two sizes: pages, exports, labelling task, saliency job, disk and memory"),
    ("saliency_job", "The whole saliency job against plain inference, and its files"),
    ("cluster_saliency", "The saliency job on a local cluster: 1 and 2 workers"),
]
START, END = "<!-- benchmarks:start -->", "<!-- benchmarks:end -->"


def main(argv: list[str] | None = None) -> str:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--quick", action="store_true")
    p.add_argument("--only", nargs="*", help="names of the benchmarks to run (their sections are replaced, the rest kept)")
    args = p.parse_args(argv)
    command = "./dev bench" + (" --quick" if args.quick else "") + (f" --only {' '.join(args.only)}" if args.only else "")
    stamp = (f"Measured {datetime.now(UTC):%Y-%m-%d} on {platform.machine()} ({_cpus()} CPUs), Python {platform.python_version()}, "
             f"with `{command}`" + (" (quick sizes)." if args.quick else " (full sizes)."))
    parts = [stamp]
    sections: dict[str, str] = {}
    for name, title in BENCHMARKS:
        if args.only and name not in args.only:
            continue
        print(f"== {name}", flush=True)
        t = time.perf_counter()
        table = import_module(f"benchmarks.{name}").main(["--quick"] if args.quick else [])
        sections[title] = (f"### {title}\n\n`python -m benchmarks.{name}{' --quick' if args.quick else ''}` ({time.perf_counter() - t:.0f} s"
                           + (f"; {stamp[:-1].replace('Measured ', 'measured ')}" if args.only else "") + f")\n\n{table}")
        parts.append(sections[title])
    text = "\n\n".join(parts) + "\n"
    results = ROOT / "benchmarks" / "RESULTS.md"
    readme = ROOT / "README.md"
    if args.only:  # replace the sections that ran, keep the others as measured before
        for path in (results, readme):
            if path.is_file():
                path.write_text(_replace_sections(path.read_text(encoding="utf-8"), sections), encoding="utf-8")
        return text
    results.write_text("# Benchmark results\n\n" + text, encoding="utf-8")
    body = readme.read_text(encoding="utf-8")
    if START in body and END in body:
        body = re.sub(re.escape(START) + ".*?" + re.escape(END), lambda _: START + "\n" + text + END, body, flags=re.S)
        readme.write_text(body, encoding="utf-8")
    print(f"wrote {ROOT / 'benchmarks' / 'RESULTS.md'}", file=sys.stderr)
    return text


def _replace_sections(body: str, sections: dict[str, str]) -> str:
    """``body`` with each "### title" section (up to the next one or the end marker) replaced, or added at the end."""
    for title, section in sections.items():
        pattern = re.compile(r"### " + re.escape(title) + r"\n.*?(?=\n### |\n" + re.escape(END) + r"|\Z)", flags=re.S)
        if pattern.search(body):
            body = pattern.sub(lambda _, s=section: s + "\n", body, count=1)  # type: ignore[misc]
        elif END in body:
            body = body.replace(END, "\n" + section + "\n" + END, 1)
        else:
            body = body.rstrip("\n") + "\n\n" + section + "\n"
    return body


def _cpus() -> int:
    import os

    return len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity") else os.cpu_count() or 0


if __name__ == "__main__":
    main()
