"""Search at a million vectors: the engine's vector query over a chunks table of
``Sizes.search_1m_rows`` generated 384-dimension unit vectors, with the ANN index upwell builds
past its threshold (pipeline/store/upkeep.py: ensure_indexes).

The figure runs in a child process, so its peak RSS (os.wait4's ru_maxrss) is its own: vector
generation, the ten appends, the index builds and the queries. The vectors are clustered as in
the ``search`` figure, drawn in float32 blocks from one set of centres so no second copy of the
matrix is ever made. Texts are short (a part number and two words): the keyword
index is built and folded as a sync would, but is not what this figure measures.
"""

from __future__ import annotations

import json
import os
import statistics
import subprocess
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import pyarrow as pa

if TYPE_CHECKING:
    from bench.figures import Bench, Figure

# bench.figures registers this figure, so what this module uses of it is imported where used.

DIM = 384
K = 10
ROWS_PER_DOC = 10
APPENDS = 10  # as a build commits in batches: the table holds several fragments
P50_TARGET_MS = 50.0
RECALL_TARGET = 0.95
#: Queries timed against numpy's exact scan (info only: at 1M rows each exact query reads the
#: whole 1.5 GB matrix, so timing all of them would cost more than the engine's queries).
EXACT_TIMED = 30


def clustered_unit_vectors(
    seed: int, n: int, dim: int, clusters: int, block: int = 100_000
) -> np.ndarray:
    """``bench.figures._clustered_unit_vectors``'s recipe (centre plus 0.6 noise per dimension,
    normalised), made in blocks from one set of centres; float32 draws throughout."""
    rng = np.random.default_rng(seed)
    centres = rng.standard_normal((clusters, dim), dtype=np.float32)
    out = np.empty((n, dim), dtype=np.float32)
    for start in range(0, n, block):
        stop = min(n, start + block)
        part = out[start:stop]
        part[:] = centres[rng.integers(0, clusters, stop - start)]
        part += 0.6 * rng.standard_normal((stop - start, dim), dtype=np.float32)
        part /= np.linalg.norm(part, axis=1, keepdims=True)
    return out


def chunk_rows(start: int, vectors: np.ndarray) -> pa.Table:
    """Rows in the project's chunks schema, with short texts (two words and a part number)."""
    from bench.figures import _VOCABULARY
    from pipeline.store.schema import chunks_schema

    n, dim = vectors.shape
    schema = chunks_schema(dim)
    ids = range(start, start + n)
    docs = [f"doc-{i // ROWS_PER_DOC:07d}.md" for i in ids]
    words = len(_VOCABULARY)
    columns: dict[str, pa.Array] = {
        "chunk_id": pa.array([f"{i:032x}" for i in ids], pa.string()),
        "doc_id": pa.array(["bench:" + d for d in docs], pa.string()),
        "source": pa.array(["bench"] * n, pa.string()),
        "path": pa.array(docs, pa.string()),
        "ordinal": pa.array([i % ROWS_PER_DOC for i in ids], pa.int32()),
        "text": pa.array(
            [
                f"{_VOCABULARY[i % words]} {_VOCABULARY[(i * 7) % words]} part MCW-{i:07d}"
                for i in ids
            ],
            pa.string(),
        ),
        "text_hash": pa.array([f"{i:064x}" for i in ids], pa.string()),
        "media_type": pa.array(["text/markdown"] * n, pa.string()),
        "vector": pa.FixedSizeListArray.from_arrays(pa.array(vectors.ravel()), dim),
    }
    arrays = [columns.get(f.name, pa.nulls(n, f.type)) for f in schema]
    return pa.Table.from_arrays(arrays, schema=schema)


def needed_bytes(rows: int) -> int:
    """What the child needs at its peak, roughly: the vector matrix twice over (numpy's copy and
    the Arrow buffers of an append or the index build's reads), plus 1 GB for the libraries and
    the index build. Measured with lancedb 0.40: 3.1-3.3 GB peak RSS at 1,000,000 rows, against
    the 3.9 GB this says."""
    return 2 * rows * DIM * 4 + 2**30


def available_bytes() -> int | None:
    try:
        for line in Path("/proc/meminfo").read_text().splitlines():
            if line.startswith("MemAvailable:"):
                return int(line.split()[1]) * 1024
    except OSError:
        pass
    return None


def _child(spec_json: str) -> None:
    """Runs inside the child: generate, write, index, query. Prints one JSON line."""
    from bench.figures import _exact_top_k, generated_store
    from pipeline.index import SEARCH_COLUMNS
    from pipeline.store import upkeep

    # Lance's index statistics leave the centroids out (and say nothing about it).
    os.environ.setdefault("LANCE_INCLUDE_VECTOR_CENTROIDS", "false")
    spec = json.loads(spec_json)
    n, queries_wanted = int(spec["rows"]), int(spec["queries"])
    out: dict[str, Any] = {"rows": n}
    started = time.perf_counter()
    vectors = clustered_unit_vectors(17, n, DIM, clusters=max(10, n // 100))
    out["generate_s"] = time.perf_counter() - started
    _say(f"generate {out['generate_s']:.1f} s")

    started = time.perf_counter()
    store = generated_store(spec["path"], DIM)
    table = store.table("chunks")
    step = max(1, -(-n // APPENDS))
    for start in range(0, n, step):
        table.add(chunk_rows(start, vectors[start : start + step]))
    out["write_s"] = time.perf_counter() - started
    _say(f"write {out['write_s']:.1f} s")

    # The indexes a sync builds past its thresholds, the scalar and keyword ones first so the
    # vector index's build is timed on its own: ensure_indexes then finds only that one missing.
    started = time.perf_counter()
    others = upkeep.ensure_scalar_indexes(store) + upkeep.ensure_keyword_index(store)
    out["other_indexes_s"] = time.perf_counter() - started
    _say(f"other_indexes {out['other_indexes_s']:.1f} s")
    started = time.perf_counter()
    created = upkeep.ensure_indexes(store)
    out["index_build_s"] = time.perf_counter() - started
    _say(f"index_build {out['index_build_s']:.1f} s")
    out["indexes_created"] = others + created
    table.checkout_latest()

    # Queries near stored chunks, as in the search figure: noise of norm 0.3 around a stored
    # unit vector.
    rng = np.random.default_rng(23)
    # Float32 like the stored vectors (a float64 query would make numpy's exact scan convert
    # the whole matrix each time).
    noise = rng.standard_normal((queries_wanted, DIM), dtype=np.float32)
    queries = vectors[rng.integers(0, n, queries_wanted)] + np.float32(0.3 / DIM**0.5) * noise
    queries /= np.linalg.norm(queries, axis=1, keepdims=True)
    assert queries.dtype == np.float32

    def engine_query(q: np.ndarray) -> list[str]:
        # The query Index.search runs (pipeline/store/tables.py: Store.search), minus embedding.
        return [r["chunk_id"] for r in store.search(q, K, SEARCH_COLUMNS)]

    for q in queries[:5]:
        engine_query(q)
    engine_times, recalls = [], []
    for q in queries:
        started = time.perf_counter()
        got = engine_query(q)
        engine_times.append(time.perf_counter() - started)
        exact = _exact_top_k(vectors, q, K)
        recalls.append(len({int(c, 16) for c in got} & set(exact.tolist())) / K)
    exact_times = []
    for q in queries[:EXACT_TIMED]:
        started = time.perf_counter()
        _exact_top_k(vectors, q, K)
        exact_times.append(time.perf_counter() - started)
    out.update(
        p50_ms=float(np.percentile(engine_times, 50)) * 1000,
        p95_ms=float(np.percentile(engine_times, 95)) * 1000,
        recall_at_10=float(statistics.fmean(recalls)),
        recall_min=float(min(recalls)),
        queries_recall_below_0_9=sum(1 for r in recalls if r < 0.9),
        exact_p50_ms=float(np.percentile(exact_times, 50)) * 1000,
        queries=len(queries),
        index=_vector_index_settings(table),
    )
    print("BENCH-RESULT " + json.dumps(out), flush=True)


def _say(message: str) -> None:
    print(f"  search_1m: {message}", file=sys.stderr, flush=True)


def _vector_index_settings(table: Any) -> dict[str, Any]:
    """The vector index's type, partitions and rows as Lance reports them."""
    for ix in table.list_indices():
        if "vector" in tuple(ix.columns):
            stats = table.to_lance().stats.index_stats(ix.name)
            parts = stats["indices"][0]
            return {
                "type": stats["index_type"],
                "partitions": parts.get("num_partitions"),
                "indexed_rows": table.index_stats(ix.name).num_indexed_rows,
            }
    return {}


def search_1m(bench: Bench) -> Figure:
    """p50/p95 of the engine's vector query and recall@10 against numpy's exact top-k at a
    million chunks, with the index build time and the figure's peak RSS (its child process)."""
    from bench.figures import REPO, Figure, _verdict

    n = bench.sizes.search_1m_rows
    need, have = needed_bytes(n), available_bytes()
    if have is not None and have < need:
        reason = (
            f"skipped: needs about {need / 2**30:.1f} GB of memory, {have / 2**30:.1f} GB available"
        )
        value = {"skipped": reason, "needed_gb": need / 2**30, "rows": n}
        return Figure("search_1m", value, [(f"{n} rows", reason, "", "n/a")])

    spec = json.dumps(
        {"rows": n, "queries": bench.sizes.queries, "path": str(bench.workdir / f"search-1m-{n}")}
    )
    code = "import sys; from bench.search_1m import _child; _child(sys.argv[1])"
    started = time.perf_counter()
    proc = subprocess.Popen(
        [sys.executable, "-c", code, spec], cwd=REPO, stdout=subprocess.PIPE, text=True
    )
    assert proc.stdout is not None
    output = proc.stdout.read()
    _, status, usage = os.wait4(proc.pid, 0)
    status = os.waitstatus_to_exitcode(status)
    seconds = time.perf_counter() - started
    lines = [ln for ln in output.splitlines() if ln.startswith("BENCH-RESULT ")]
    if status != 0 or not lines:
        raise RuntimeError(f"the search_1m child failed (status {status}): {output[-2000:]}")
    value: dict[str, Any] = json.loads(lines[-1].removeprefix("BENCH-RESULT "))
    # Linux reports ru_maxrss in KiB.
    value["peak_rss_mb"] = usage.ru_maxrss / 1024
    value["seconds"] = seconds
    p50, recall = value["p50_ms"], value["recall_at_10"]
    ix = value["index"]
    rows = [
        (
            f"p50, {n} rows",
            f"{p50:.1f} ms",
            f"<= {P50_TARGET_MS:.0f} ms",
            _verdict(p50 <= P50_TARGET_MS),
        ),
        (
            "recall@10 vs numpy exact",
            f"{recall:.3f}",
            f">= {RECALL_TARGET}",
            _verdict(recall >= RECALL_TARGET),
        ),
        (
            "  (info) lowest recall@10; queries below 0.9",
            f"{value['recall_min']:.1f}; {value['queries_recall_below_0_9']} of {value['queries']}",
            "",
            "info",
        ),
        (
            "  (info) p95; numpy exact p50",
            f"{value['p95_ms']:.1f} ms; {value['exact_p50_ms']:.0f} ms",
            "",
            "info",
        ),
        (
            "  (info) vector index, build time",
            (
                f"{ix['type']}, {ix['partitions']} partitions; {value['index_build_s']:.0f} s"
                if ix
                else "none below the threshold (exact scan)"
            ),
            "",
            "info",
        ),
        (
            "  (info) peak RSS; figure's time",
            f"{value['peak_rss_mb']:.0f} MB; {seconds:.0f} s (generate {value['generate_s']:.0f}, "
            f"write {value['write_s']:.0f}, other indexes {value['other_indexes_s']:.0f})",
            "",
            "info",
        ),
    ]
    return Figure("search_1m", value, rows)
