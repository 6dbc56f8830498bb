"""The ``upwell`` command line: parses, calls one ``Index`` method, prints.

Exit codes: 0 done; 1 error; 2 usage error or a confirmation that was not given; 3 committed
but some documents failed; 4 another writer holds the index; 6 syncing is paused.
"""

from __future__ import annotations

import argparse
import os
import sys
import textwrap
from collections.abc import Sequence
from typing import Any

from pipeline import retrieval
from pipeline.cli import handover, history_commands, service_commands
from pipeline.cli.common import (
    HelpFormatter,
    add_cluster_arguments,
    cluster_for_command,
    confirm_on_terminal,
    json_out,
)
from pipeline.config import CONFIG_ENV, config_path_from, load_config
from pipeline.errors import EXIT_OK, EXIT_PARTIAL, UpwellError, UsageError
from pipeline.index import DEFAULT_INDEX, Index, default_index_path
from pipeline.progress import Progress
from pipeline.service import control

DESCRIPTION = """\
upwell keeps a document vector index current. It reads folders of PDF, Word (.docx),
Markdown, plain text, HTML and WebVTT/SRT transcripts, splits them into chunks whose boundaries
survive edits, embeds only chunks whose text changed, and commits each batch as one version
of a local LanceDB table that you can search with citations.
"""

EPILOG = f"""\
examples:
  upwell sync sample_corpus                 build or update the index in ./{DEFAULT_INDEX}
  upwell search "torque for the crank bolts" -k 3
  upwell status                             documents, chunks, failures, last commit
  upwell --index /var/lib/upwell/ix sync /srv/share/handbook --json

The index folder is --index, else $UPWELL_INDEX, else ./{DEFAULT_INDEX}.
Run `upwell COMMAND --help` for each command's options.
"""


# --- commands --------------------------------------------------------------------------------


def _sync_targets(args: argparse.Namespace, index: Index) -> list[Any]:
    """Folders given on the command line, else the configured sources (all, or --source)."""
    if args.paths:
        if args.source:
            raise UsageError("give folders or --source NAME, not both")
        return list(args.paths)
    config = args.config
    if config is None:
        raise UsageError(
            "nothing to sync: give a folder, or a configuration (--config FILE or "
            f"${CONFIG_ENV}) that lists sources"
        )
    if args.source:
        return [config.source(name).connector(index.state_root) for name in args.source]
    if not config.sources:
        raise UsageError(f"config {config.file}: no [[source]] to sync")
    return [s.connector(index.state_root) for s in config.sources]


def cmd_sync(args: argparse.Namespace, index: Index) -> int:
    with cluster_for_command(args, index):
        report = index.sync(_sync_targets(args, index), yes=args.yes, confirm=args.confirm)
    data = report.as_dict()
    if args.json:
        json_out(data, args.out)
    else:
        d, c = data["documents"], data["chunks"]
        print(
            f"documents: {d['added']} added, {d['modified']} modified, {d['removed']} removed, "
            f"{d['moved']} moved, {d['unchanged']} unchanged, {d['failed']} failed",
            file=args.out,
        )
        print(
            f"chunks:    {c['embedded']} embedded, {c['reused']} reused, {c['deleted']} deleted",
            file=args.out,
        )
        if data["commit"]:
            n = len(data["commits"])
            more = f" ({n} commits)" if n > 1 else ""
            print(f"commit:    {data['commit']} (version {data['version']}){more}", file=args.out)
        else:
            print(f"commit:    none, nothing changed (version {data['version']})", file=args.out)
        for name, counts in data["skipped"].items():
            print(f"skipped:   {name}: {skipped_text(counts)}", file=args.out)
        for f in data["failures"]:
            print(f"failed:    {f['source']}/{f['path']}: {f['reason']}", file=args.err)
    return EXIT_PARTIAL if data["failures"] else EXIT_OK


def skipped_text(counts: dict[str, int]) -> str:
    """``412 .dwg, 37 .zip`` (most first, as recorded), with the reason once at the end."""
    shown = [f"{n} {suffix or '(no suffix)'}" for suffix, n in list(counts.items())[:8]]
    rest = sum(list(counts.values())[8:])
    more = f", {rest} of {len(counts) - 8} other types" if rest else ""
    return ", ".join(shown) + more + " (types upwell does not read)"


def cmd_remove_source(args: argparse.Namespace, index: Index) -> int:
    config = args.config
    if config is not None and any(s.name == args.name for s in config.sources):
        raise UsageError(
            f"source {args.name!r} is still in the configuration {config.file}: the next sync "
            "would add it back; remove its [[source]] first"
        )
    report = index.remove_source(args.name, yes=args.yes, confirm=args.confirm)
    data = report.as_dict()
    if args.json:
        json_out(data, args.out)
    else:
        print(
            f"removed:   source {args.name!r}: {data['documents']['removed']} documents, "
            f"{data['chunks']['deleted']} chunks",
            file=args.out,
        )
        print(f"commit:    {data['commit']} (version {data['version']})", file=args.out)
    return EXIT_OK


def cmd_search(args: argparse.Namespace, index: Index) -> int:
    hits = index.search(
        args.query,
        k=args.k,
        source=args.source or None,
        as_of=args.as_of,
        mode=args.mode,
        paths=index.document_patterns(args.path) if args.path else (),
        types=args.type or (),
        since=args.since,
        per_doc=args.per_doc,
    )
    if args.json:
        data: dict[str, Any] = {
            "query": args.query,
            "mode": args.mode,
            "results": [h.as_json() for h in hits],
        }
        notes = index.query_notes(args.query)
        if notes:
            data["notes"] = notes
        json_out(data, args.out)
        return EXIT_OK
    if not hits:
        print("no results: the index is empty" if not index.exists else "no results", file=args.out)
    width = 96
    bold = args.out.isatty() and not os.environ.get("NO_COLOR")
    for n, h in enumerate(hits, 1):
        print(f"{n:>2}. {h.score:.3f}  {h.citation()}", file=args.out)
        snippet = retrieval.best_snippet(h.text, args.query, args.snippet)
        lines = textwrap.fill(snippet, width - 6)
        if bold:
            lines = retrieval.highlight(lines, args.query)
        print(textwrap.indent(lines, "      "), file=args.out)
    return EXIT_OK


def cmd_status(args: argparse.Namespace, index: Index) -> int:
    st = index.status()
    if args.json:
        json_out(st, args.out)
        return EXIT_OK
    t = st["totals"]
    print(f"index:     {st['index']} (version {st['version']})", file=args.out)
    print(f"model:     {st['model']['id']} ({st['model']['dimension']} dimensions)", file=args.out)
    print(
        f"totals:    {t['documents']} documents, {t['chunks']} chunks, "
        f"{t['failed']} failed, {t['commits']} commits",
        file=args.out,
    )
    for s in st["sources"]:
        print(
            f"source:    {s['name']}: {s['documents']} documents, {s['chunks']} chunks, "
            f"{s['failed']} failed",
            file=args.out,
        )
        if "error" in s:
            print(f"  error:   {s['error']['reason']} (since {s['error']['since']})", file=args.out)
        for p in s.get("problems", []):
            print(f"  problem: {p['key']}: {p['problem']} (since {p['since']})", file=args.out)
        if s.get("skipped"):
            print(f"  skipped: {skipped_text(s['skipped'])}", file=args.out)
    if st.get("pending_erase"):
        pe = st["pending_erase"]
        print(
            f"pending:   an erase of {pe['documents']} documents was interrupted at {pe['since']}; "
            "the next command that writes finishes it",
            file=args.out,
        )
    lc = st["last_commit"]
    if lc:
        d = lc["documents"]
        print(
            f"last:      {lc['id']} at {lc['time']} ({lc['trigger']}): {d['added']} added, "
            f"{d['modified']} modified, {d['removed']} removed, {lc['chunks']['embedded']} "
            "chunks embedded",
            file=args.out,
        )
    for f in st["failures"]:
        kept = "last good version still searchable" if f["last_good_searchable"] else "not indexed"
        print(f"failed:    {f['source']}/{f['path']}: {f['reason']} ({kept})", file=args.out)
    for w in st["warnings"]:
        print(f"warning:   {w['source']}/{w['path']}: {w['warning']}", file=args.out)
    return EXIT_OK


# --- parser ------------------------------------------------------------------------------------


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="upwell",
        description=DESCRIPTION,
        epilog=EPILOG,
        formatter_class=HelpFormatter,
    )
    parser.add_argument(
        "--index",
        metavar="DIR",
        default=None,
        help=f"index folder (default: $UPWELL_INDEX or ./{DEFAULT_INDEX})",
    )
    parser.add_argument(
        "--model",
        metavar="SPEC",
        default=None,
        help="embedding model for a new index: 'default' (bundled all-MiniLM-L6-v2, ONNX), "
        "'onnx:MODEL.onnx,TOKENIZER.json' for another export, "
        "'http:BASE_URL,MODEL[,KEY_ENV][,batch=N,concurrency=N,...]' for an OpenAI-compatible "
        "embeddings service (see README), or 'hash' "
        "(no model; for tests). "
        "An existing index uses the model it was built with.",
    )
    parser.add_argument(
        "--config",
        metavar="FILE",
        default=None,
        help=f"TOML configuration (default: ${CONFIG_ENV}); gives the index folder, the model "
        "and the sources; --index and --model still win",
    )
    parser.add_argument(
        "--log-format",
        choices=("text", "json"),
        default="text",
        help="log lines on stderr as text or as JSON lines (upwell watch)",
    )
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")
    sub.required = True

    p = sub.add_parser(
        "sync",
        help="bring the index in line with one or more folders",
        description="Read each folder, and index what changed since the last sync: new and "
        "edited files are extracted and chunked, only chunks whose text is new are embedded, "
        "removed files leave the index (and the tombstone log records them). Each folder is a "
        "source named after the folder (NAME=PATH names it); syncing one source never touches "
        "another. Each batch of changes is one commit.",
        epilog="examples:\n  upwell sync sample_corpus\n  upwell sync /srv/share/handbook "
        "/srv/share/policies --json\n  upwell sync hr=/mnt/hr/docs\n"
        "  upwell --config upwell.toml sync --source handbook\n"
        "  upwell sync /srv/share --workers 2          # a first build on every core\n"
        "  upwell sync /srv/share --cluster tcp://10.0.0.5:8786\n\n"
        "exit codes: 0 done, 3 committed but some documents failed (see `upwell status`), "
        "2 a confirmation was needed (--yes), 4 another writer is running",
        formatter_class=HelpFormatter,
    )
    p.add_argument(
        "paths",
        nargs="*",
        metavar="PATH",
        help="folder to sync; each is a source named after the folder, or NAME=PATH to name it. "
        "Without one, every source of the configuration is synced",
    )
    p.add_argument(
        "--source",
        action="append",
        metavar="NAME",
        help="sync only this configured source (repeatable)",
    )
    p.add_argument(
        "--yes",
        action="store_true",
        help="do not ask before removing more than half of a source's documents, or before "
        "pointing a known source name at a different folder (a share that moved)",
    )
    add_cluster_arguments(p)
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=cmd_sync)

    p = sub.add_parser(
        "remove-source",
        help="take every document of a source out of the index",
        description="A sync only looks at the sources it is given, so a source taken out of the "
        "configuration, or a folder no longer wanted, stays searchable until it is removed "
        "here. Every document of source NAME leaves the index in one commit, each with a "
        "tombstone. Says what goes and asks first unless --yes. History keeps the documents: "
        "`upwell rollback` brings them back, `upwell erase` forgets them for good.",
        epilog="examples:\n  upwell status                      # lists the sources\n"
        "  upwell remove-source old-handbook\n  upwell remove-source scans --yes --json\n\n"
        "exit codes: 0 removed, 2 not confirmed, unknown source or still configured, "
        "4 another writer is running",
        formatter_class=HelpFormatter,
    )
    p.add_argument("name", metavar="NAME", help="the source's name, as `upwell status` shows it")
    p.add_argument("--yes", action="store_true", help="do not ask for confirmation")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.set_defaults(func=cmd_remove_source)

    p = sub.add_parser(
        "search",
        help="find the chunks that best answer a query, with citations",
        description="Return the K chunks that best match QUERY, each with its citation: file, "
        "page, heading or time range. QUERY is plain text (quotes, colons, AND, * are matched "
        "as text). Modes: hybrid (the default) fuses a vector search (the index's model, "
        "cosine similarity) and a keyword search (BM25 over chunk text and headings) by "
        "reciprocal rank, so both paraphrases and exact codes such as ECN-0141 are found; "
        "vector and keyword run one of them alone. Filters run inside the index, so K hits "
        "come back whenever K match. On a terminal the query's words are shown in bold.",
        epilog='examples:\n  upwell search "how do I return a damaged frame"\n  upwell search '
        '"spoke tension" -k 5 --json\n'
        "  upwell search ECN-0141 --mode keyword\n"
        '  upwell search "brake bleeding" --type vtt --type srt --per-doc 1\n'
        '  upwell search "torque" --path "manuals/*" --since 2026-11-01\n'
        '  upwell search "brake hose routing" --as-of 2026-11-24T09:00',
        formatter_class=HelpFormatter,
    )
    p.add_argument("query", metavar="QUERY")
    p.add_argument("-k", type=int, default=5, help="number of results (default 5)")
    p.add_argument(
        "--mode",
        choices=retrieval.MODES,
        default=retrieval.DEFAULT_MODE,
        help="hybrid (default): vector and keyword fused; vector: meaning only; keyword: BM25",
    )
    p.add_argument(
        "--source", action="append", metavar="NAME", help="only this source (repeatable)"
    )
    p.add_argument(
        "--path",
        action="append",
        metavar="GLOB",
        help="only documents whose PATH or SOURCE/PATH matches GLOB (* and ? as in a shell; "
        "* also matches /), or this file's path on disk inside a folder source; repeatable",
    )
    p.add_argument(
        "--type",
        action="append",
        metavar="SUFFIX",
        help=(
            "only documents of this format: pdf, docx, pptx, xlsx, csv, tsv, md, txt, vtt, srt, "
            "epub, eml, rtf, odt, ods, odp, html, png, jpg, tif (repeatable)"
        ),
    )
    p.add_argument(
        "--since",
        metavar="TIME_OR_REF",
        help="only documents changed at or after this ISO-8601 time or REF's commit",
    )
    p.add_argument("--per-doc", type=int, metavar="N", help="at most N hits from one document")
    p.add_argument(
        "--as-of",
        metavar="REF",
        default=None,
        help="search the index as it was at REF: a commit id (or prefix), a version number, "
        "a tag, or an ISO-8601 time (the last commit at or before it; UTC if no zone)",
    )
    p.add_argument("--snippet", type=int, default=240, help="characters of text to show")
    p.add_argument("--json", action="store_true", help="print results as JSON")
    p.set_defaults(func=cmd_search)

    p = sub.add_parser(
        "status",
        help="what the index holds, what failed and why, the last commit",
        description="Totals and per-source counts, every document that failed to extract with "
        "its reason (its last good version stays searchable), extraction warnings, the model "
        "and the last commit. Needs no lock: safe while a sync runs.",
        epilog="example:\n  upwell status --json",
        formatter_class=HelpFormatter,
    )
    p.add_argument("--json", action="store_true", help="print status as JSON")
    p.set_defaults(func=cmd_status)

    history_commands.register(sub)
    service_commands.register(sub)
    return parser


def main(argv: Sequence[str] | None = None) -> int:
    parser = build_parser()
    words = list(sys.argv[1:] if argv is None else argv)
    args = parser.parse_args(words)
    args.parser = parser
    args.out, args.err, args.confirm, args.cwd = (
        sys.stdout,
        sys.stderr,
        confirm_on_terminal,
        os.getcwd(),
    )
    try:
        config_file = config_path_from(args.config)
        # `init` writes the file that --config or $UPWELL_CONFIG may already name
        wanted = config_file is not None and args.command != "init"
        args.config = load_config(config_file) if wanted and config_file else None
        from_config = args.config.index_path if args.config else None
        index = Index(
            args.index or from_config or default_index_path(),
            model=args.model or (args.config.model if args.config else None),
            progress=Progress(enabled=None),
            storage_options=args.config.index_storage_options if args.config else None,
        )
        if handover.writes(args):
            with control.connect(index.path) as service:
                if service is not None:
                    # `upwell watch` holds the writer lock: it runs the command between batches
                    ask = confirm_on_terminal if sys.stdin.isatty() else None
                    return control.hand_over(service, words, out=args.out, err=args.err, ask=ask)
        return int(args.func(args, index))
    except UpwellError as exc:
        print(f"upwell: error: {exc}", file=args.err)
        return exc.exit_code
    except KeyboardInterrupt:
        print("upwell: interrupted", file=args.err)
        return 130
