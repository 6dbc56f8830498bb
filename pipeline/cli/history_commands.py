"""Command-line commands over the version history: history, diff, tags, rollback, resume,
rebuild, erase and maintain. Each parses, calls one ``Index`` method, prints."""

from __future__ import annotations

import argparse
from typing import Any

from pipeline.cli.common import HelpFormatter, add_cluster_arguments, cluster_for_command, json_out
from pipeline.index import Index

REF_HELP = (
    "a commit id (or a prefix of 4+ characters), a version number (12 or v12), a tag, or an "
    "ISO-8601 time meaning the last commit at or before it (UTC when no zone is given)"
)


def _counts(c: dict[str, Any]) -> str:
    d = c["documents"]
    parts = [f"{d[k]} {k}" for k in ("added", "modified", "removed", "moved", "failed") if d.get(k)]
    return ", ".join(parts) or "no document changes"


def cmd_history(args: argparse.Namespace, index: Index) -> int:
    log = index.history(limit=args.limit)
    tags_by_commit: dict[str, list[str]] = {}
    for name, commit in index.tags().items():
        tags_by_commit.setdefault(commit.id, []).append(name)
    if args.json:
        json_out({"commits": [dict(c.as_dict(), tags=tags_by_commit.get(c.id, [])) for c in log]})
        return 0
    if not log:
        print("no commits yet", file=args.out)
    for c in log:
        tags = f"  [{', '.join(tags_by_commit[c.id])}]" if c.id in tags_by_commit else ""
        ch = c.chunks
        print(
            f"{c.id}  v{c.version:<5} {c.time}  {c.trigger:<10} {_counts(c.as_dict())}; "
            f"{ch['embedded']} embedded, {ch['deleted']} deleted{tags}",
            file=args.out,
        )
    return 0


def cmd_diff(args: argparse.Namespace, index: Index) -> int:
    d = index.diff(args.ref, args.ref2, paths=args.path or ())
    data = d.as_dict()
    if args.json:
        json_out(data, args.out)
        return 0
    base = f"{d.base.id} (v{d.base.version})" if d.base else "the empty index"
    print(f"from {base} to {d.head.id} (v{d.head.version})", file=args.out)
    docs = data["documents"]
    for label, key in (("added", "added"), ("modified", "modified"), ("removed", "removed")):
        for doc in docs[key]:
            print(f"  {label:<9} {doc}", file=args.out)
    for m in docs["moved"]:
        print(f"  moved     {m['from']} -> {m['to']}", file=args.out)
    c = data["counts"]
    print(
        f"documents: {c['documents']['added']} added, {c['documents']['modified']} modified, "
        f"{c['documents']['removed']} removed, {c['documents']['moved']} moved; chunks: "
        f"{c['chunks']['added']} added, {c['chunks']['removed']} removed",
        file=args.out,
    )
    return 0


def cmd_tag(args: argparse.Namespace, index: Index) -> int:
    commit = index.tag(args.name, args.ref)
    if args.json:
        json_out({"tag": args.name, "commit": commit.as_dict()}, args.out)
    else:
        print(
            f"tagged {commit.id} (version {commit.version}, {commit.time}) as {args.name}",
            file=args.out,
        )
    return 0


def cmd_tags(args: argparse.Namespace, index: Index) -> int:
    tags = index.tags()
    if args.json:
        json_out({"tags": {name: c.as_dict() for name, c in tags.items()}}, args.out)
        return 0
    if not tags:
        print("no tags", file=args.out)
    for name, c in tags.items():
        print(f"{name:<20} {c.id}  v{c.version:<5} {c.time}", file=args.out)
    return 0


def cmd_untag(args: argparse.Namespace, index: Index) -> int:
    commit_id = index.untag(args.name)
    print(
        f"removed tag {args.name} (was {commit_id}); retention may now remove that version",
        file=args.out,
    )
    return 0


def cmd_rollback(args: argparse.Namespace, index: Index) -> int:
    confirm = args.confirm
    if args.dry_run:
        plan = index.plan_rollback(args.ref)
        if args.json:
            json_out(plan.as_dict(), args.out)
        else:
            print(plan.describe(), file=args.out)
        return 0
    if not args.yes and not args.json:
        print(index.plan_rollback(args.ref).describe(), file=args.out)
    commit = index.rollback(
        args.ref,
        pause=args.pause,
        yes=args.yes,
        confirm=(lambda message: confirm("Roll back?")) if not args.json else confirm,
    )
    if args.json:
        json_out({"commit": commit.as_dict(), "paused": args.pause}, args.out)
    else:
        summary = _counts(commit.as_dict())
        print(
            f"rolled back: commit {commit.id} (version {commit.version}): {summary}", file=args.out
        )
        if args.pause:
            print("syncing is paused; `upwell resume` lifts the pause", file=args.out)
    return 0


def cmd_resume(args: argparse.Namespace, index: Index) -> int:
    was = index.resume()
    print("syncing resumed" if was else "syncing was not paused", file=args.out)
    return 0


def cmd_erase(args: argparse.Namespace, index: Index) -> int:
    result = index.erase(args.patterns, yes=args.yes, confirm=args.confirm, cwd=args.cwd)
    if args.json:
        json_out(result, args.out)
    else:
        print(
            f"erased {result['documents']} documents ({result['chunks_deleted']} chunks, "
            f"{result['vectors_deleted']} cached vectors); old versions removed",
            file=args.out,
        )
        for doc in result["erased"]:
            print(f"  {doc}", file=args.out)
    return 0


def cmd_maintain(args: argparse.Namespace, index: Index) -> int:
    confirm = args.confirm
    if not args.yes and not args.json:
        plan = index.plan_retention(args.keep_days)
        print(plan.describe(), file=args.out)
    result = index.maintain(keep_days=args.keep_days, yes=args.yes, confirm=confirm)
    if args.json:
        json_out(result, args.out)
        return 0
    for name, t in result["tables"].items():
        print(
            f"{name:<11} data files {t['data_files_before']} -> {t['data_files_after']}, "
            f"{t['versions_removed']} old versions removed, {t['versions_kept']} kept",
            file=args.out,
        )
    for ix in result["indexes_created"]:
        print(f"index created: {ix}", file=args.out)
    return 0


def rebuild_command(args: argparse.Namespace, index: Index) -> int:
    with cluster_for_command(args, index):
        return _rebuild(args, index)


def _rebuild(args: argparse.Namespace, index: Index) -> int:
    report = index.rebuild(
        args.into,
        as_of=args.as_of,
        model=args.new_model,
        chunking={
            k: v
            for k, v in (
                ("min_tokens", args.min_tokens),
                ("max_tokens", args.max_tokens),
                ("overlap_tokens", args.overlap_tokens),
            )
            if v is not None
        },
    )
    data = report.as_dict()
    if args.json:
        json_out(data, args.out)
    else:
        c = data["chunks"]
        print(
            f"rebuilt {data['documents']['added']} documents into {args.into}: "
            f"{c['embedded']} chunks embedded, {c['reused']} reused from the old index",
            file=args.out,
        )
    return 0


def register(sub: Any) -> None:
    """Add the history commands to the ``upwell`` subcommand parser."""
    formatter = HelpFormatter

    def add(name: str, help_: str, description: str, epilog: str) -> argparse.ArgumentParser:
        return sub.add_parser(
            name, help=help_, description=description, epilog=epilog, formatter_class=formatter
        )

    p = add(
        "history",
        "list commits, newest first",
        "Every commit with its id, table version, UTC time, what triggered it, and what it "
        "changed. A rollback appears as a commit whose trigger says so.",
        "examples:\n  upwell history --limit 10\n  upwell history --json",
    )
    p.add_argument("--limit", type=int, default=None, metavar="N", help="show the N newest")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_history)

    p = add(
        "diff",
        "documents and chunks changed between two commits",
        "What changed from REF's parent to REF, or from REF to REF2: documents added, "
        "modified, removed and moved (by name), and how many chunks were added and removed. "
        f"A REF is {REF_HELP}. --path limits it to some documents, named as erase names them.",
        "examples:\n  upwell diff 01a2b3c4\n  upwell diff release-2026-11 HEAD-time-2026-12-01\n"
        "  upwell diff v12 v15 --json\n  upwell diff v12 v15 --path 'handbook/*'\n"
        "  upwell diff v12 --path /srv/share/manuals/brakes.pdf",
    )
    p.add_argument("ref", metavar="REF")
    p.add_argument("ref2", metavar="REF2", nargs="?", default=None)
    p.add_argument(
        "--path",
        action="append",
        metavar="DOC",
        help="only this document: SOURCE/PATH, PATH or a glob of them, or a file's path on "
        "disk inside a folder source (repeatable)",
    )
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_diff)

    p = add(
        "tag",
        "name a commit (and keep it from retention)",
        "Give a commit a name to use as a REF. A tagged commit's versions are never removed "
        f"by `upwell maintain`. REF defaults to the latest commit; a REF is {REF_HELP}.",
        "examples:\n  upwell tag before-import\n  upwell tag audit-2026-11 2026-11-30T18:00",
    )
    p.add_argument("name", metavar="NAME")
    p.add_argument("ref", metavar="REF", nargs="?", default=None)
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_tag)

    p = add("tags", "list tags", "Every tag with the commit it names.", "example:\n  upwell tags")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_tags)

    p = add(
        "untag",
        "remove a tag",
        "Remove a tag. The commit stays in the history; retention may now remove its versions.",
        "example:\n  upwell untag before-import",
    )
    p.add_argument("name", metavar="NAME")
    p.set_defaults(func=cmd_untag)

    p = add(
        "rollback",
        "make the index what it was at REF (history is kept)",
        "Restore the chunks and documents to what they were at REF, as new versions on top: "
        "the current state stays in history, so a rollback can itself be rolled back. Says "
        "first which documents come back, go away and change, and asks unless --yes. Without "
        "--pause the next sync re-applies whatever differs at the sources. "
        f"A REF is {REF_HELP}.",
        "examples:\n  upwell rollback before-import --dry-run\n  upwell rollback 01a2b3c4 "
        "--pause\n  upwell resume",
    )
    p.add_argument("ref", metavar="REF")
    p.add_argument("--pause", action="store_true", help="pause syncing until `upwell resume`")
    p.add_argument("--dry-run", action="store_true", help="only say what would change")
    p.add_argument("--yes", action="store_true", help="do not ask for confirmation")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_rollback)

    p = add(
        "resume",
        "lift a pause set by rollback --pause",
        "Let syncs run again after `upwell rollback --pause`. The next sync brings the index "
        "in line with the sources, re-applying what differs.",
        "example:\n  upwell resume",
    )
    p.set_defaults(func=cmd_resume)

    p = add(
        "rebuild",
        "build a new index from the stored text, with other settings",
        "Build a new index in DIR from the extracted text this index stores, without reading "
        "any source: the way to change the chunking or the model. Vectors are reused wherever "
        "the model and the exact text match, so a rebuild with the same model embeds only "
        "chunks whose text changed.",
        "examples:\n  upwell rebuild --into /var/lib/upwell/ix-v2 --max-tokens 160\n"
        "  upwell rebuild --into ix-old --as-of before-import\n"
        "  upwell rebuild --into ix-e5 --new-model onnx:/models/e5.onnx,/models/tokenizer.json",
    )
    p.add_argument("--into", required=True, metavar="DIR", help="folder of the new index")
    p.add_argument("--as-of", metavar="REF", default=None, help="rebuild the index as at REF")
    p.add_argument("--new-model", metavar="SPEC", default=None, help="model of the new index")
    p.add_argument("--min-tokens", type=int, default=None, help="smallest content-cut chunk")
    p.add_argument("--max-tokens", type=int, default=None, help="largest chunk (default 200)")
    p.add_argument(
        "--overlap-tokens", type=int, default=None, help="context from the previous chunk"
    )
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    add_cluster_arguments(p)
    p.set_defaults(func=rebuild_command)

    p = add(
        "erase",
        "forget documents completely (rewrites history)",
        "For a request to forget: delete the matching documents' chunks, stored text and "
        "cached vectors, then remove every earlier version of the index that still holds them. "
        "Earlier rollback points and all tags are lost. The tombstone log records the erasure "
        "without the name or the content. Patterns are globs on SOURCE/PATH, PATH or the doc "
        "id, or a file's path on disk (absolute, or relative to the current folder) inside a "
        "folder source. Asks first unless --yes.",
        "examples:\n  upwell erase 'share/hr/complaint-0042.docx'\n  upwell erase 'share/tmp/*' "
        "--yes\n  upwell erase /srv/share/hr/complaint-0042.docx",
    )
    p.add_argument("patterns", nargs="+", metavar="PATH_OR_GLOB")
    p.add_argument("--yes", action="store_true", help="do not ask for confirmation")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_erase)

    p = add(
        "maintain",
        "compact, index, and remove versions past retention",
        "Compact small data files, create scalar indexes once tables are large, and remove "
        "versions older than --keep-days (default 30). Tagged versions and the state a paused "
        "rollback replaced are always kept. Removing versions loses the ability to search as "
        "of them or roll back to them, so it asks first unless --yes.",
        "examples:\n  upwell maintain\n  upwell maintain --keep-days 7 --yes",
    )
    p.add_argument("--keep-days", type=float, default=30.0, metavar="DAYS")
    p.add_argument("--yes", action="store_true", help="do not ask for confirmation")
    p.add_argument("--json", action="store_true", help="print as JSON")
    p.set_defaults(func=cmd_maintain)
