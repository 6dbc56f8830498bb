"""Command line of the benchmark suite: run the figures, print a table, optionally write JSON.

python -m bench --quick --json /tmp/bench-quick.json
python -m bench --only edit_locality search
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from bench.figures import FIGURES, Bench, Figure, Sizes


def machine() -> dict[str, Any]:
    """What the figures were measured on."""
    import lancedb
    import onnxruntime

    return {
        "nproc": os.cpu_count(),
        "python": platform.python_version(),
        "lancedb": lancedb.__version__,
        "onnxruntime": onnxruntime.__version__,
        "platform": platform.platform(),
    }


def render_table(figures: list[Figure]) -> str:
    """A plain-text table: figure, measure, value, target, verdict."""
    rows = [("figure", "measure", "value", "target", "verdict")]
    for figure in figures:
        for n, (measure, value, target, verdict) in enumerate(figure.rows):
            rows.append((figure.name if n == 0 else "", measure, value, target, verdict))
    widths = [max(len(r[i]) for r in rows) for i in range(5)]
    lines = [
        "  ".join(cell.ljust(w) for cell, w in zip(r, widths, strict=True)).rstrip() for r in rows
    ]
    lines.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(lines)


def collect(figures: list[Figure]) -> dict[str, Any]:
    """The JSON document: each figure's value under its name, plus its extra keys."""
    result: dict[str, Any] = {}
    for figure in figures:
        result[figure.name] = figure.value
        result.update(figure.extra)
    return result


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="python -m bench", description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="small sizes; within 10 minutes")
    parser.add_argument("--json", metavar="FILE", help="also write the figures as JSON here")
    parser.add_argument(
        "--only",
        nargs="+",
        metavar="FIGURE",
        choices=sorted(FIGURES),
        help="run only these figures: " + ", ".join(FIGURES),
    )
    parser.add_argument(
        "--model",
        default="default",
        help="embedder for figures 2, 4 and 6 (default: the real model)",
    )
    parser.add_argument("--keep", metavar="DIR", help="work in DIR and keep it (for profiling)")
    args = parser.parse_args(argv)

    sizes = Sizes.quick() if args.quick else Sizes()
    chosen = args.only or list(FIGURES)
    log = lambda message: print(message, file=sys.stderr, flush=True)  # noqa: E731
    with tempfile.TemporaryDirectory(prefix="upwell-bench-") as scratch:
        workdir = Path(args.keep) if args.keep else Path(scratch)
        workdir.mkdir(parents=True, exist_ok=True)
        bench = Bench(workdir=workdir, sizes=sizes, model=args.model, log=log)
        figures: list[Figure] = []
        started = time.perf_counter()
        for name in FIGURES:  # the suite's order, whatever order --only gave
            if name not in chosen:
                continue
            log(f"[{time.perf_counter() - started:6.0f} s] {name} ...")
            figures.append(FIGURES[name](bench))
        total = time.perf_counter() - started

    result = collect(figures)
    result["machine"] = machine()
    result["run"] = {
        "quick": args.quick,
        "seconds": total,
        "model": args.model,
        "sizes": vars(sizes),
    }
    print(render_table(figures))
    print(f"\n{len(figures)} figures in {total:.0f} s; machine: {json.dumps(result['machine'])}")
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
