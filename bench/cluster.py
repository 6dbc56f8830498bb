"""Builds on a Dask LocalCluster against the in-process build of the same corpus, in one run.

    python -m bench.cluster            # 400 generated documents
    python -m bench.cluster --documents 2000

Each build runs in a fresh interpreter (model load timed apart, as in the main suite), one after
another on the same machine, so the ratios are side by side:

- distributed overhead: a 1-worker LocalCluster build / the in-process build (target 1.15 or
  less): what shipping documents and texts to a worker costs when it does the same work;
- local parallelism: a 2-worker build / the in-process build (the model already uses both cores
  in process, so little gain is expected on a 2-core machine);
- the writer's limit: with the ``hash`` embedder on 2 workers, chunks committed per second of
  the writer's own work (wall time less the time it waited on workers; target 2,000 or more:
  one writer could then feed 50 workers at this machine's model speed of ~40 chunks/s), per
  CPU-second of the writer process (user + system, its Dask client thread included) and per
  wall second;
- the writer's peak RSS on the cluster build (the workers are other processes).
"""

from __future__ import annotations

import argparse
import json
import resource
import subprocess
import sys
import tempfile
import time
from pathlib import Path
from typing import Any

from bench import corpora

REPO = Path(__file__).resolve().parents[1]


def _child(spec_json: str) -> None:
    spec = json.loads(spec_json)
    from pipeline.index import Index
    from pipeline.records import ClusterSettings

    index = Index(spec["index"], model=spec["model"])
    index.embedder().embed(["warm up"])  # the writer's model load is not build work
    if spec["workers"]:
        from pipeline.engine.cluster import embed_job

        index.set_cluster(ClusterSettings(workers=spec["workers"]))
        assert index.cluster is not None
        cluster = index.cluster.get(spec["model"], index.embedder().model_id)
        assert cluster is not None
        cluster.client.run(embed_job, spec["model"], ["warm up"])  # workers' model loads too
    before = resource.getrusage(resource.RUSAGE_SELF)
    started = time.perf_counter()
    report = index.sync([spec["corpus"]])
    seconds = time.perf_counter() - started
    after = resource.getrusage(resource.RUSAGE_SELF)
    waited = 0.0
    if index.cluster is not None and index.cluster._cluster is not None:
        waited = index.cluster._cluster.waited
    index.close_cluster()
    print(
        "BENCH-RESULT "
        + json.dumps(
            {
                "seconds": seconds,
                "writer_busy_seconds": seconds - waited,
                "writer_cpu_seconds": (after.ru_utime - before.ru_utime)
                + (after.ru_stime - before.ru_stime),
                "chunks": report.counts.chunks["added"],
                "documents": report.counts.documents["added"],
                "failed": report.counts.documents["failed"],
                "commits": len(report.commits),
                "writer_peak_rss_mb": after.ru_maxrss / 1024,
            }
        ),
        flush=True,
    )


def build(corpus: Path, index: Path, model: str, workers: int) -> dict[str, Any]:
    spec = json.dumps(
        {"corpus": str(corpus), "index": str(index), "model": model, "workers": workers}
    )
    code = "import sys; from bench.cluster import _child; _child(sys.argv[1])"
    done = subprocess.run(
        [sys.executable, "-c", code, spec], cwd=REPO, capture_output=True, text=True, check=False
    )
    if done.returncode != 0:
        raise RuntimeError(f"build failed ({done.returncode}):\n{done.stderr[-3000:]}")
    line = next(x for x in done.stdout.splitlines() if x.startswith("BENCH-RESULT "))
    return dict(json.loads(line.removeprefix("BENCH-RESULT ")))


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(
        prog="python -m bench.cluster", description=__doc__.split("\n")[0]
    )
    parser.add_argument("--documents", type=int, default=400)
    parser.add_argument("--json", metavar="FILE", default=None)
    args = parser.parse_args(argv)
    with tempfile.TemporaryDirectory(prefix="upwell-bench-cluster-") as tmp:
        root = Path(tmp)
        corpus = corpora.write_corpus(root / "corpus", args.documents)
        runs = {}
        for name, model, workers in (
            ("in_process", "default", 0),
            ("one_worker", "default", 1),
            ("two_workers", "default", 2),
            ("hash_two_workers", "hash", 2),
        ):
            runs[name] = build(corpus, root / f"ix-{name}", model, workers)
            r = runs[name]
            print(
                f"{name:17} {r['seconds']:7.1f} s  {r['chunks'] / r['seconds']:7.1f} chunks/s  "
                f"writer {r['writer_cpu_seconds']:6.1f} CPU-s, "
                f"peak {r['writer_peak_rss_mb']:.0f} MB",
                flush=True,
            )
    base = runs["in_process"]["seconds"]
    hashed = runs["hash_two_workers"]
    result = {
        "documents": args.documents,
        "chunks": runs["in_process"]["chunks"],
        "overhead_one_worker": runs["one_worker"]["seconds"] / base,
        "two_workers_over_in_process": runs["two_workers"]["seconds"] / base,
        "in_process_chunks_per_second": runs["in_process"]["chunks"] / base,
        "writer_chunks_per_busy_second": hashed["chunks"]
        / max(hashed["writer_busy_seconds"], 1e-9),
        "writer_chunks_per_cpu_second": hashed["chunks"] / max(hashed["writer_cpu_seconds"], 1e-9),
        "writer_chunks_per_wall_second": hashed["chunks"] / hashed["seconds"],
        "writer_peak_rss_mb_two_workers": runs["two_workers"]["writer_peak_rss_mb"],
        "writer_peak_rss_mb_in_process": runs["in_process"]["writer_peak_rss_mb"],
        "runs": runs,
    }
    print()
    print(
        f"distributed overhead, 1 worker / in process:  {result['overhead_one_worker']:.2f}  "
        "(target 1.15 or less)"
    )
    print(
        f"2 workers / in process:                      {result['two_workers_over_in_process']:.2f}"
    )
    print(
        "writer limit (hash embedder on 2 workers):   "
        f"{result['writer_chunks_per_busy_second']:.0f} chunks per second of the writer's own "
        "work (target 2,000 or more; the rest of the time it waited on workers), "
        f"{result['writer_chunks_per_cpu_second']:.0f} per writer CPU-second (its Dask client "
        f"thread included), {result['writer_chunks_per_wall_second']:.0f} per wall second"
    )
    print(
        f"writer peak RSS: {result['writer_peak_rss_mb_two_workers']:.0f} MB on 2 workers, "
        f"{result['writer_peak_rss_mb_in_process']:.0f} MB in process"
    )
    if args.json:
        Path(args.json).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
