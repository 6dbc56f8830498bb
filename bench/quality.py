"""Search quality on a labelled question set: hit@1, hit@3, MRR@10 and nDCG@10 per mode.

The questions (``bench/retrieval/questions.toml``) were written before any tuning, by a person
asking as a workshop hand or a customer would, in words other than the documents'; each names
the one file that answers it and, where the format has one, the anchor (PDF page, heading,
transcript time range). They are never tuned to: a change to search is judged by them, not
fitted to them.

Relevance of one hit, graded: 2 for the right file at the right anchor, 1 for the right file
elsewhere (or a format with no anchor), 0 otherwise. Definitions:

- hit@n: the right file is among the first n hits.
- MRR@10: mean of 1/rank of the first hit from the right file (0 if none in the top 10).
- nDCG@10: DCG of the graded list over the ideal DCG (Jarvelin and Kekalainen, "Cumulated
  gain-based evaluation of IR techniques", ACM TOIS 2002), with their discount: gain G[i] at
  rank i counts G[i] / log2(i) for i >= 2 and G[1] at rank 1. The ideal list is the judged
  gains of the hits sorted best first, with one grade-2 hit added when none was found (the
  answer exists in the corpus), so nDCG is 1 exactly when the best possible hit leads.
"""

from __future__ import annotations

import math
import statistics
import time
import tomllib
from collections.abc import Sequence
from dataclasses import dataclass
from pathlib import Path
from typing import Any

HERE = Path(__file__).resolve().parent
QUESTIONS = HERE / "retrieval" / "questions.toml"
KINDS = ("paraphrase", "identifier")


@dataclass(frozen=True)
class Question:
    id: str
    text: str
    kind: str
    file: str
    page: int | None = None
    heading: str | None = None
    time: tuple[float, float] | None = None


def load_questions(path: Path = QUESTIONS) -> list[Question]:
    raw = tomllib.loads(path.read_text(encoding="utf-8"))["question"]
    out = []
    for q in raw:
        span = None
        if q.get("time"):
            start, end = q["time"].split("-")
            span = (_seconds(start), _seconds(end))
        out.append(
            Question(
                id=q["id"],
                text=q["text"],
                kind=q["kind"],
                file=q["file"],
                page=q.get("page"),
                heading=q.get("heading"),
                time=span,
            )
        )
    return out


def _seconds(clock: str) -> float:
    h, m, s = clock.strip().split(":")
    return int(h) * 3600 + int(m) * 60 + float(s)


def grade(question: Question, hit: Any) -> int:
    """2: right file and anchor; 1: right file; 0: another file."""
    if hit.path != question.file:
        return 0
    if question.page is not None:
        last = hit.page_end if hit.page_end is not None else hit.page
        return 2 if hit.page is not None and hit.page <= question.page <= last else 1
    if question.heading is not None:
        path = [h.strip().lower() for h in (hit.heading or "").split(">")]
        return 2 if question.heading.strip().lower() in path else 1
    if question.time is not None:
        if hit.start is None:
            return 1
        end = hit.end if hit.end is not None else hit.start
        return 2 if hit.start <= question.time[1] and end >= question.time[0] else 1
    return 2  # a format with no anchor: the right file is the whole answer


def dcg(gains: Sequence[float]) -> float:
    """Discounted cumulated gain, Jarvelin and Kekalainen (2002), logarithm base 2."""
    return sum(g if i == 1 else g / math.log2(i) for i, g in enumerate(gains, start=1))


def ndcg(gains: Sequence[float], best_gain: float = 2.0) -> float:
    ideal = sorted(gains, reverse=True)
    if not ideal or ideal[0] < best_gain:
        ideal = sorted([*gains, best_gain], reverse=True)[: max(len(gains), 1)]
    top = dcg(ideal)
    return dcg(gains) / top if top > 0 else 0.0


def reciprocal_rank(grades: Sequence[int]) -> float:
    for i, g in enumerate(grades, start=1):
        if g > 0:
            return 1.0 / i
    return 0.0


def score_lists(questions: Sequence[Question], grades: Sequence[Sequence[int]]) -> dict[str, Any]:
    """The four measures over these questions' graded top-10 lists."""
    n = len(questions)
    if n == 0:
        return {"questions": 0}
    return {
        "questions": n,
        "hit_at_1": sum(1 for g in grades if g and g[0] > 0) / n,
        "hit_at_3": sum(1 for g in grades if any(x > 0 for x in g[:3])) / n,
        "mrr_at_10": statistics.fmean(reciprocal_rank(g[:10]) for g in grades),
        "ndcg_at_10": statistics.fmean(ndcg(list(g[:10])) for g in grades),
    }


def evaluate(index: Any, questions: Sequence[Question], modes: Sequence[str]) -> dict[str, Any]:
    """Per mode: the measures for all questions and for each kind, and the search latency."""
    result: dict[str, Any] = {}
    for mode in modes:
        graded: list[list[int]] = []
        seconds: list[float] = []
        misses: list[str] = []
        for q in questions:
            started = time.perf_counter()
            hits = index.search(q.text, k=10, mode=mode)
            seconds.append(time.perf_counter() - started)
            graded.append([grade(q, h) for h in hits])
            if not graded[-1] or graded[-1][0] == 0:
                misses.append(q.id)
        per_mode: dict[str, Any] = {"all": score_lists(questions, graded)}
        for kind in KINDS:
            chosen = [i for i, q in enumerate(questions) if q.kind == kind]
            per_mode[kind] = score_lists(
                [questions[i] for i in chosen], [graded[i] for i in chosen]
            )
        per_mode["p50_ms"] = statistics.median(seconds) * 1000
        per_mode["misses_at_1"] = misses
        result[mode] = per_mode
    return result


# --- the benchmark figure -----------------------------------------------------------------------

#: Chunk settings compared on the question set (full runs only): today's default and two
#: smaller ones. Only the sizes change; the cut rule and overlap rule stay.
CHUNK_VARIANTS = {
    "48-200": {"min_tokens": 48, "max_tokens": 200, "overlap_tokens": 40},
    "32-120": {"min_tokens": 32, "max_tokens": 120, "overlap_tokens": 24},
    "24-96": {"min_tokens": 24, "max_tokens": 96, "overlap_tokens": 20},
}


def build_question_index(bench: Any, name: str, chunking: dict[str, int] | None = None) -> Any:
    """The corpus of the question set, indexed with the bench's model (and chunking)."""
    from bench.retrieval.corpus import write_corpus
    from pipeline import Index
    from pipeline.records import ChunkSettings

    share = bench.workdir / "questions-share"
    if not share.exists():
        write_corpus(share)
    ix = Index(
        bench.workdir / f"questions-index-{name}",
        model=bench.model,
        chunking=ChunkSettings(**chunking) if chunking else None,
    )
    ix.sync([share])
    return ix
