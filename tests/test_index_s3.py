"""The index on object storage: an s3:// index on a real local S3 server (moto, 127.0.0.1)."""

from __future__ import annotations

import itertools
from collections.abc import Iterator
from datetime import timedelta
from pathlib import Path

import numpy as np
import pytest
from scipy.spatial.distance import cosine

from connectors.s3 import S3Source
from pipeline import formats
from pipeline.config import parse_config
from pipeline.errors import IndexLocked, IndexMissing, StoreError, UsageError
from pipeline.index import Index
from pipeline.store import tables as store
from tests.conftest import write
from tests.support.s3_server import LocalS3, running_s3_server

_buckets = itertools.count()


@pytest.fixture(scope="module")
def s3() -> Iterator[LocalS3]:
    with running_s3_server(check_credentials=True) as server:
        yield server


@pytest.fixture(autouse=True)
def machine_folders(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> Path:
    """Locks and connector state of remote indexes go under $XDG_CACHE_HOME; keep them here.
    The working folder is tmp_path too, so a URI mistaken for a path would show up in it."""
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))
    monkeypatch.chdir(tmp_path)
    return tmp_path / "cache"


@pytest.fixture
def bucket(s3: LocalS3) -> str:
    name = f"marrowby-index-{next(_buckets)}"
    s3.client().create_bucket(Bucket=name)
    return name


def keys_in(s3: LocalS3, bucket: str, prefix: str) -> list[str]:
    pages = s3.client().get_paginator("list_objects_v2").paginate(Bucket=bucket, Prefix=prefix)
    return [o["Key"] for page in pages for o in page.get("Contents", ())]


PROCEDURE = (
    "# Wheel build\n\n## Lacing\n\nLace the rim with a three-cross pattern.\n\n"
    "## Tension\n\nBring spoke tension up evenly, a quarter turn at a time.\n"
)
NOTICE = "ENGINEERING CHANGE NOTICE ECN-0040\n\nThe kickstand plate is now 4 mm thick.\n"


def test_sync_search_history_and_rollback_with_the_index_on_s3(
    s3: LocalS3, bucket: str, tmp_path: Path
) -> None:
    share = tmp_path / "share"
    write(share / "procedures" / "wheel-build.md", PROCEDURE)
    write(share / "notices" / "ECN-0040.txt", NOTICE)
    uri = f"s3://{bucket}/workshop/ix"
    ix = Index(uri, model="hash", storage_options=s3.storage_options())

    first = ix.sync([f"share={share}"])
    assert first.counts.documents["added"] == 2
    write(share / "procedures" / "wheel-build.md", PROCEDURE.replace("three-cross", "radial"))
    (share / "notices" / "ECN-0040.txt").unlink()
    second = ix.sync([f"share={share}"], yes=True)
    assert (second.counts.documents["modified"], second.counts.documents["removed"]) == (1, 1)

    # The tables live in the bucket under the prefix, and nowhere on the local disk.
    stored = keys_in(s3, bucket, "workshop/ix/")
    assert {k.split("/")[2] for k in stored} >= {
        "chunks.lance",
        "documents.lance",
        "tombstones.lance",
        "commits.lance",
        "vectors.lance",
        "settings.lance",
    }
    assert not (tmp_path / "s3:").exists() and not any(tmp_path.glob("**/*.lance"))

    # A fresh handle (as another process would open it) reads everything back from the bucket.
    reader = Index(uri, storage_options=s3.storage_options())
    log = reader.history()
    assert [c.documents["added"] for c in log] == [0, 2]
    assert reader.status()["totals"]["documents"] == 1
    assert "radial" in reader.search("how to lace the rim", k=1)[0].text
    as_before = reader.search("how to lace the rim", k=1, as_of=log[1].id)
    assert "three-cross" in as_before[0].text

    ix.tag("before-radial", log[1].id)
    ix.rollback("before-radial", yes=True)
    reader.store().refresh()
    assert reader.status()["totals"]["documents"] == 2
    assert "three-cross" in reader.search("how to lace the rim", k=1)[0].text
    assert reader.diff(reader.history()[0].id).added == ("share:notices/ECN-0040.txt",)

    # Compaction and version clean-up run on object storage too; the tag keeps its versions.
    ix.maintain(keep_days=0, yes=True)
    assert "three-cross" in ix.search("how to lace the rim", k=1, as_of="before-radial")[0].text


def test_readers_on_other_machines_see_new_commits_without_reopening(
    s3: LocalS3, bucket: str, tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    # The interval is what a remote reader may lag; zero makes every read check the latest
    # version, so the test needs no waiting.
    monkeypatch.setattr(store, "REMOTE_READ_CONSISTENCY", timedelta(0))
    share = tmp_path / "share"
    write(share / "procedures" / "wheel-build.md", PROCEDURE)
    uri = f"s3://{bucket}/ix"
    writer = Index(uri, model="hash", storage_options=s3.storage_options())
    writer.sync([f"share={share}"])
    reader = Index(uri, storage_options=s3.storage_options())
    assert reader.status()["totals"]["documents"] == 1

    write(share / "notices" / "ECN-0040.txt", NOTICE)
    writer.sync([f"share={share}"])

    assert reader.status()["totals"]["documents"] == 2  # same handle, no refresh()
    assert reader.search("kickstand plate thickness", k=1)[0].path == "notices/ECN-0040.txt"


def test_remote_index_lock_and_state_are_local_files_keyed_by_the_uri(
    s3: LocalS3, bucket: str, machine_folders: Path
) -> None:
    options = s3.storage_options()
    first = Index(f"s3://{bucket}/ix", model="hash", storage_options=options)
    same = Index(f"s3://{bucket}/ix", model="hash", storage_options=options)
    other = Index(f"s3://{bucket}/ix-2", model="hash", storage_options=options)

    with first.writing():
        locks = list((machine_folders / "upwell" / "locks").glob("*.lock"))
        assert len(locks) == 1 and locks[0].name.startswith(f"{bucket}_ix-")
        with pytest.raises(IndexLocked, match=f"s3://{bucket}/ix is being written by process"):
            with same.writing():
                pass
        with other.writing():  # another index: another lock
            pass

    with same.writing():  # released on exit
        pass
    assert first.state_root == same.state_root != other.state_root
    assert first.state_root.is_relative_to(machine_folders / "upwell" / "connector-state")


def test_a_missing_bucket_or_bad_credentials_is_a_clear_error(s3: LocalS3, bucket: str) -> None:
    good = s3.storage_options()
    with pytest.raises(StoreError, match="bucket does not exist.*create it first"):
        Index("s3://marrowby-no-bucket/ix", model="hash", storage_options=good).sync([])
    refused = {**good, "aws_secret_access_key": "not-the-secret"}
    with pytest.raises(StoreError, match="refused the credentials"):
        Index(f"s3://{bucket}/ix", storage_options=refused).status()
    with pytest.raises(IndexMissing):
        Index(f"s3://{bucket}/nothing-here", storage_options=good).status()


def test_configuration_accepts_an_s3_index_path_with_storage_options(tmp_path: Path) -> None:
    config = parse_config(
        {
            "index": {
                "path": "s3://marrowby-index/workshop",
                "storage_options": {"aws_region": "eu-west-2", "allow_http": True},
            }
        },
        tmp_path / "upwell.toml",
    )
    assert config.index_path == "s3://marrowby-index/workshop"
    assert config.index_storage_options == {"aws_region": "eu-west-2", "allow_http": "true"}
    local = parse_config({"index": {"path": "ix"}}, tmp_path / "upwell.toml")
    assert local.index_path == tmp_path / "ix"
    with pytest.raises(UsageError, match="index.storage_options: applies only to"):
        parse_config({"index": {"path": "ix", "storage_options": {"a": "b"}}}, tmp_path / "u.toml")


@pytest.mark.slow
def test_bucket_to_bucket_with_the_default_model(
    s3: LocalS3, bucket: str, real_embedder, monkeypatch: pytest.MonkeyPatch
) -> None:
    """Documents in one bucket, the index in another, searched with the real model."""
    for name, value in s3.environment().items():
        monkeypatch.setenv(name, value)
    client = s3.client()
    docs = f"{bucket}-docs"
    client.create_bucket(Bucket=docs)
    client.put_object(Bucket=docs, Key="procedures/wheel-build.md", Body=PROCEDURE.encode())
    client.put_object(Bucket=docs, Key="notices/ECN-0040.txt", Body=NOTICE.encode())
    client.put_object(
        Bucket=docs,
        Key="policies/returns.md",
        Body=b"# Returns\n\nUnused parts may be returned within 30 days for a refund.\n",
    )
    src = S3Source(
        name="docs",
        bucket=docs,
        endpoint_url=s3.endpoint_url,
        accept=lambda key: formats.media_type_for(key) is not None,
    )
    ix = Index(f"s3://{bucket}/ix", storage_options=s3.storage_options())
    ix.sync([src])

    hits = ix.search("how long do I have to send back a part I did not use?", k=3, mode="vector")

    assert hits[0].path == "policies/returns.md"
    # Scores are cosine similarities of the query and chunk vectors (scipy reference).
    query = real_embedder.embed(["how long do I have to send back a part I did not use?"])[0]
    rows = ix.store().table("chunks").to_lance().to_table(columns=["chunk_id", "vector"])
    vectors = dict(zip(rows["chunk_id"].to_pylist(), rows["vector"].to_pylist(), strict=True))
    for hit in hits:
        expected = 1.0 - cosine(query, np.asarray(vectors[hit.chunk_id]))
        assert hit.score == pytest.approx(expected, abs=1e-5)
