"""The benchmark suite still runs: every figure at toy sizes, and its corpora checked against
reference parsers. Structure and counts only; no time is ever asserted."""

from __future__ import annotations

import dataclasses
import io
import os
import random
from pathlib import Path

import docx2txt
import pytest
import srt
import webvtt
from pdfminer.high_level import extract_text

from bench import baselines, corpora
from bench.__main__ import collect, render_table
from bench.figures import FIGURES, Bench, Sizes
from pipeline.tokens import TokenCounter

TOY = Sizes(
    build_documents=12,  # two of each format
    rescan_documents=12,
    scan_files=250,
    search_rows=2_000,
    search_1m_rows=3_000,  # below the vector index's threshold: the exact path
    queries=20,
    filtered_queries=4,
    commits=3,
    saves=2,
    long_documents=1,
    edits_per_kind=2,
    raw_embed_sample=None,
    large_build_documents=None,
    quick_retrieval=True,
)


@pytest.fixture(scope="module")
def toy_run(tmp_path_factory: pytest.TempPathFactory) -> dict:
    bench = Bench(
        workdir=tmp_path_factory.mktemp("bench"), sizes=TOY, model="hash", log=lambda m: None
    )
    figures = [run(bench) for run in FIGURES.values()]
    return {"figures": figures, "json": collect(figures), "bench": bench}


def test_every_figure_reports_the_keys_the_readme_documents(toy_run: dict) -> None:
    result = toy_run["json"]
    for key in ("upwell", "fixed_window", "whole_document"):
        assert isinstance(result["edit_locality"][key], float)
    for key in ("incremental_ratio", "rescan_ratio", "embed_efficiency", "peak_rss_mb"):
        assert isinstance(result[key], float) and result[key] > 0
    assert isinstance(result["search"]["p50_ratio"], float)
    assert 0.0 <= result["search"]["recall_at_10"] <= 1.0
    large = result["search_1m"]
    assert large["rows"] == TOY.search_1m_rows and large["queries"] == TOY.queries
    assert isinstance(large["p50_ms"], float) and isinstance(large["index_build_s"], float)
    assert large["peak_rss_mb"] > 0
    # No vector index below upwell's threshold, so the engine's search is exact: it agrees
    # with numpy's exact top-k (the reference) but for a rare near-tie at the tenth place.
    assert large["index"] == {} and large["recall_at_10"] >= 0.99
    table = render_table(toy_run["figures"])
    assert all(name in table for name in FIGURES)


def test_the_build_indexes_every_generated_document_and_modifies_one_percent(toy_run: dict) -> None:
    build = toy_run["bench"].shared["build"]
    assert build["full_documents"] == TOY.build_documents
    assert build["full_failed"] == 0
    # 1% of 12 rounds to 0; the corpus always changes at least one document.
    assert build["documents_changed"] == 1 == build["incremental_documents_modified"]
    assert 0 < build["incremental_embedded"] < build["full_embedded"]
    # The raw embedder is timed on exactly the texts the build embedded, before and after it.
    detail = toy_run["json"]["embed_efficiency_detail"]
    assert detail["raw_texts"] == detail["raw_texts_in_index"] == build["full_embedded"]
    assert detail["ratio_min"] <= toy_run["json"]["embed_efficiency"] <= detail["ratio_max"]


def test_counts_of_the_rescan_and_commit_figures(toy_run: dict) -> None:
    detail = toy_run["json"]["rescan_detail"]
    assert detail["sync_documents"] == TOY.rescan_documents
    assert detail["scan_files"] == TOY.scan_files
    commits = toy_run["json"]["many_commits"]
    # One sync of one changed document writes exactly one new version of the chunks table.
    assert commits["chunks_versions_of_syncs"] == TOY.commits


def test_edit_locality_counts_are_bounded_by_the_whole_document(toy_run: dict) -> None:
    value = toy_run["json"]["edit_locality"]
    assert value["edits"] == 4 * TOY.edits_per_kind
    assert value["fixed_window"] <= value["whole_document"]
    assert value["upwell"] >= 1.0  # every edit changes at least the edited chunk


def test_bare_walk_counts_what_os_walk_counts(tmp_path: Path) -> None:
    corpora.write_small_file_tree(tmp_path, 230, per_folder=50)
    # Reference: the standard library's os.walk.
    assert (
        corpora.bare_walk(tmp_path) == sum(len(files) for _, _, files in os.walk(tmp_path)) == 230
    )


def test_fixed_windows_have_the_window_size_and_overlap() -> None:
    counter = TokenCounter()
    text = corpora.as_markdown(corpora.long_document(0, paragraphs=20))
    windows = baselines.fixed_windows(text, counter, window=50, overlap=10)
    ids = counter._tok.encode(text, add_special_tokens=False).ids
    # Reference: the tokenizer's own token ids; windows start every 40 tokens and cover them all.
    assert len(windows) == -(-(len(ids) - 10) // 40)
    assert all(counter.count_one(w) <= 50 + 2 for w in windows)  # +2: re-tokenising at an edge
    assert baselines.fixed_window_reembedded(windows, windows) == 0
    assert baselines.whole_document_reembedded(text, text + "x", 7) == 7


def test_generated_documents_read_back_with_reference_parsers() -> None:
    # Numbers 0..5 are one of each format; each must carry its paragraphs' text.
    for number, fmt in enumerate(corpora.FORMATS):
        paragraphs = corpora.document_paragraphs(number)
        data = corpora.render(fmt, corpora.document_title(number), paragraphs)
        if fmt == "vtt":  # webvtt-py
            text = " ".join(c.text for c in webvtt.from_buffer(io.StringIO(data.decode())))
        elif fmt == "srt":
            text = " ".join(c.content for c in srt.parse(data.decode()))  # srt
        elif fmt == "docx":
            text = docx2txt.process(io.BytesIO(data))  # docx2txt
        elif fmt == "pdf":
            text = extract_text(io.BytesIO(data))  # pdfminer.six
        else:
            text = data.decode()
        words = " ".join(text.split())
        serial = f"MCW-{number:06d}"
        assert words.count(serial) == sum(p.count(serial) for p in paragraphs), fmt


def test_edits_change_the_document_as_named() -> None:
    document = corpora.long_document(1, paragraphs=10)
    rng = random.Random(0)
    assert len(corpora.edited(document, "insert", rng)) == len(document) + 1
    assert len(corpora.edited(document, "delete", rng)) == len(document) - 1
    assert corpora.edited(document, "append", rng)[:-1] == document
    rewritten = corpora.edited(document, "rewrite", rng)
    assert sum(a != b for a, b in zip(rewritten, document, strict=True)) == 1


def test_the_full_run_paths_build_the_large_corpus_once(tmp_path: Path) -> None:
    # Full runs build a second, larger corpus for figure 6 and rescan it for figure 3.
    sizes = dataclasses.replace(TOY, build_documents=6, rescan_documents=9, large_build_documents=9)
    bench = Bench(workdir=tmp_path, sizes=sizes, model="hash", log=lambda m: None)
    rss = FIGURES["peak_rss_mb"](bench)
    rescan = FIGURES["rescan_ratio"](bench)
    assert rss.extra["peak_rss_mb_20000"] > 0
    assert rescan.extra["rescan_detail"]["sync_documents"] == 9
    assert bench.shared["large_build"]["full_documents"] == 9


def test_the_labelled_question_set_checks_out_against_its_documents(capsys) -> None:
    # Every label (file, page, heading, time range) is checked against the documents with
    # independent readers (pypdf, python-docx, lxml), and the corpus is written byte for byte.
    from bench.retrieval.check import main as check_questions

    assert check_questions() == 0, capsys.readouterr().out
