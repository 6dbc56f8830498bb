"""The s3 connector against a real local S3 server (moto's server mode on 127.0.0.1)."""

from __future__ import annotations

import hashlib
import itertools
from collections import Counter
from collections.abc import Iterator
from pathlib import Path

import pytest

from connectors.s3 import S3Source, from_config
from pipeline import formats
from pipeline.config import parse_config
from pipeline.errors import (
    DocumentTooLarge,
    DocumentUnreadable,
    SourcePermission,
    SourceUnreachable,
    UsageError,
)
from pipeline.index import Index
from tests.support.s3_server import LocalS3, running_s3_server

_buckets = itertools.count()


@pytest.fixture(scope="module")
def s3() -> Iterator[LocalS3]:
    with running_s3_server(check_credentials=True) as server:
        yield server


@pytest.fixture(autouse=True)
def aws_environment(s3: LocalS3, monkeypatch: pytest.MonkeyPatch, tmp_path: Path) -> None:
    """Credentials reach boto3 through the standard environment only, as they would in use."""
    for name in ("AWS_PROFILE", "AWS_SESSION_TOKEN", "AWS_ACCESS_KEY_ID", "AWS_SECRET_ACCESS_KEY"):
        monkeypatch.delenv(name, raising=False)
    for name, value in s3.environment().items():
        monkeypatch.setenv(name, value)
    monkeypatch.setenv("AWS_CONFIG_FILE", str(tmp_path / "no-aws-config"))
    monkeypatch.setenv("AWS_SHARED_CREDENTIALS_FILE", str(tmp_path / "no-aws-credentials"))
    monkeypatch.setenv("AWS_EC2_METADATA_DISABLED", "true")
    monkeypatch.setenv("XDG_CACHE_HOME", str(tmp_path / "cache"))


@pytest.fixture
def bucket(s3: LocalS3) -> str:
    """A fresh bucket for each test: the server lives for the whole module."""
    name = f"marrowby-docs-{next(_buckets)}"
    s3.client().create_bucket(Bucket=name)
    return name


def source(s3: LocalS3, bucket: str, **kw: object) -> S3Source:
    return S3Source(
        name="bucket",
        bucket=bucket,
        endpoint_url=s3.endpoint_url,
        accept=lambda key: formats.media_type_for(key) is not None,
        **kw,  # type: ignore[arg-type]
    )


def count_requests(src: S3Source) -> Counter[str]:
    """S3 operations the connector sends, counted from botocore's own event hooks."""
    sent: Counter[str] = Counter()

    def seen(model: object, **_: object) -> None:
        sent[getattr(model, "name", "?")] += 1

    src._client.meta.events.register("before-call.s3", seen)
    return sent


NOTICE = "ENGINEERING CHANGE NOTICE ECN-0031\n\nThe seat clamp bolt is now M5, torque 5 Nm.\n"
POLICY = "# Warranty\n\n## Frames\n\nMarrowby frames carry a ten-year warranty.\n"
TRANSCRIPT = "WEBVTT\n\n00:00:01.000 --> 00:00:04.000\nWe bleed the rear brake today.\n"


def test_listing_gives_keys_under_the_prefix_with_size_and_etag(s3: LocalS3, bucket: str) -> None:
    client = s3.client()
    bodies = {
        "manuals/notices/ECN-0031.txt": NOTICE.encode(),
        "manuals/warranty.md": POLICY.encode(),
        "manuals/setup.exe": b"MZ not a document",
        "manuals/empty-folder/": b"",
        "manuals-old/warranty.md": POLICY.encode(),
        "elsewhere/training.vtt": TRANSCRIPT.encode(),
    }
    for key, body in bodies.items():
        client.put_object(Bucket=bucket, Key=key, Body=body)

    items = list(source(s3, bucket, prefix="manuals").list_items())

    assert [i.key for i in items] == ["notices/ECN-0031.txt", "warranty.md"]
    for item in items:
        body = bodies["manuals/" + item.key]
        assert item.source == "bucket"
        assert item.fingerprint.size == len(body)
        # The ETag of a single-part upload is the MD5 of the object (AWS S3 user guide,
        # "Checking object integrity"); the connector stores it without the quotes.
        assert item.fingerprint.tag == hashlib.md5(body).hexdigest()
    assert source(s3, bucket, prefix="manuals").read("warranty.md", 10_000) == POLICY.encode()


def test_listing_pages_through_every_key(s3: LocalS3, bucket: str) -> None:
    client = s3.client()
    keys = [f"ecn/ECN-{n:04d}.txt" for n in range(23)]
    for key in keys:
        client.put_object(Bucket=bucket, Key=key, Body=f"notice {key}".encode())
    src = source(s3, bucket, page_size=10)
    sent = count_requests(src)

    listed = [i.key for i in src.list_items()]

    # ListObjectsV2 returns keys in UTF-8 binary order (S3 API reference, from memory)
    assert listed == keys
    assert sent == Counter({"ListObjectsV2": 3})  # 10 + 10 + 3 keys


def test_sync_follows_objects_added_changed_and_deleted(
    s3: LocalS3, bucket: str, tmp_path: Path
) -> None:
    client = s3.client()
    client.put_object(Bucket=bucket, Key="notices/ECN-0031.txt", Body=NOTICE.encode())
    client.put_object(Bucket=bucket, Key="policies/warranty.md", Body=POLICY.encode())
    client.put_object(Bucket=bucket, Key="training/brakes.vtt", Body=TRANSCRIPT.encode())
    ix = Index(tmp_path / "ix", model="hash")

    first = ix.sync([source(s3, bucket)])
    assert first.counts.documents["added"] == 3

    client.put_object(
        Bucket=bucket,
        Key="notices/ECN-0031.txt",
        Body=NOTICE.replace("5 Nm", "6 Nm").encode(),
    )
    client.delete_object(Bucket=bucket, Key="training/brakes.vtt")
    client.put_object(
        Bucket=bucket,
        Key="notices/ECN-0032.txt",
        Body=b"ENGINEERING CHANGE NOTICE ECN-0032\n\nChain stays gain a guard.\n",
    )
    second = ix.sync([source(s3, bucket)], yes=True)

    docs = second.counts.documents
    assert (docs["added"], docs["modified"], docs["removed"], docs["unchanged"]) == (1, 1, 1, 1)
    status = {s["name"]: s for s in ix.status()["sources"]}
    assert status["bucket"]["documents"] == 3
    hits = ix.search("seat clamp bolt torque 6 Nm", k=1)
    assert hits[0].path == "notices/ECN-0031.txt" and "6 Nm" in hits[0].text

    # A rescan with nothing changed lists the bucket once and downloads nothing.
    unchanged_source = source(s3, bucket)
    sent = count_requests(unchanged_source)
    third = ix.sync([unchanged_source])
    assert third.commits == [] and third.counts.documents["unchanged"] == 3
    assert sent == Counter({"ListObjectsV2": 1})


def test_an_endpoint_that_goes_away_is_an_error_and_keeps_the_documents(
    tmp_path: Path, monkeypatch: pytest.MonkeyPatch
) -> None:
    ix = Index(tmp_path / "ix", model="hash")
    with running_s3_server() as short_lived:
        for name, value in short_lived.environment().items():
            monkeypatch.setenv(name, value)
        short_lived.client().create_bucket(Bucket="marrowby-brief")
        short_lived.client().put_object(
            Bucket="marrowby-brief", Key="policies/warranty.md", Body=POLICY.encode()
        )
        src = source(short_lived, "marrowby-brief")
        assert ix.sync([src]).counts.documents["added"] == 1
    # The server has stopped: its port refuses connections now.

    with pytest.raises(SourceUnreachable, match="bucket 'marrowby-brief'.*cannot be reached"):
        ix.sync([source(short_lived, "marrowby-brief")])

    status = ix.status()
    assert status["totals"]["documents"] == 1
    assert ix.search("ten-year frame warranty", k=1)[0].path == "policies/warranty.md"
    assert "marrowby-brief" in status["sources"][0]["error"]["reason"]


def test_a_missing_bucket_is_unreachable_not_empty(s3: LocalS3) -> None:
    with pytest.raises(SourceUnreachable, match="marrowby-no-such-bucket.*does not exist"):
        list(source(s3, "marrowby-no-such-bucket").list_items())


@pytest.mark.parametrize("who", ["unknown key", "wrong secret", "user without access"])
def test_refused_credentials_raise_source_permission(
    s3: LocalS3, bucket: str, who: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    assert s3.denied_keys is not None
    key, secret = {
        "unknown key": ("AKIAMARROWBY00000000", "not-a-secret"),
        "wrong secret": (s3.access_key, "not-the-secret"),
        "user without access": s3.denied_keys,
    }[who]
    monkeypatch.setenv("AWS_ACCESS_KEY_ID", key)
    monkeypatch.setenv("AWS_SECRET_ACCESS_KEY", secret)

    with pytest.raises(SourcePermission, match=f"bucket {bucket!r}.*refused the credentials"):
        list(source(s3, bucket).list_items())


def test_no_credentials_at_all_is_a_permission_error(
    s3: LocalS3, bucket: str, monkeypatch: pytest.MonkeyPatch
) -> None:
    monkeypatch.delenv("AWS_ACCESS_KEY_ID")
    monkeypatch.delenv("AWS_SECRET_ACCESS_KEY")
    with pytest.raises(SourcePermission, match="no credentials found"):
        list(source(s3, bucket).list_items())


def test_reading_a_vanished_or_oversized_object_fails_that_document_only(
    s3: LocalS3, bucket: str
) -> None:
    s3.client().put_object(Bucket=bucket, Key="manual.md", Body=b"# Manual\n\n" + b"x" * 5000)
    src = source(s3, bucket)
    with pytest.raises(DocumentTooLarge):
        src.read("manual.md", 1000)
    with pytest.raises(DocumentUnreadable, match="vanished"):
        src.read("gone.md", 1000)


def test_configuration_builds_the_source_and_rejects_bad_keys(tmp_path: Path) -> None:
    config = parse_config(
        {
            "source": [
                {
                    "name": "workshop-bucket",
                    "kind": "s3",
                    "bucket": "marrowby-docs",
                    "prefix": "manuals/",
                    "endpoint_url": "http://127.0.0.1:9000/",
                    "region": "eu-west-2",
                    "every": "10m",
                }
            ]
        },
        tmp_path / "upwell.toml",
    )
    built = config.sources[0].connector(tmp_path / "state")
    assert isinstance(built, S3Source)
    assert (built.bucket, built.prefix, built.endpoint_url, built.region) == (
        "marrowby-docs",
        "manuals/",
        "http://127.0.0.1:9000",
        "eu-west-2",
    )
    assert built.location == "s3://marrowby-docs/manuals/ at http://127.0.0.1:9000"
    assert built.accept("a.md") and not built.accept("a.exe")
    assert config.sources[0].every == 600.0

    def fail(key: str, problem: str) -> None:
        raise UsageError(f"{key} {problem}")

    for options, key in (
        ({}, "bucket"),
        ({"bucket": "Marrowby_Docs"}, "bucket"),  # upper case and "_" break the naming rules
        ({"bucket": "marrowby-docs", "endpoint_url": "127.0.0.1:9000"}, "endpoint_url"),
        ({"bucket": "marrowby-docs", "prefix": 3}, "prefix"),
        ({"bucket": "marrowby-docs", "profile": "x"}, "profile"),
    ):
        with pytest.raises(UsageError, match=f"^{key} "):
            from_config("b", options, fail, tmp_path)
    with pytest.raises(UsageError, match=r"source 'b'\.bucket: is required"):
        parse_config({"source": [{"name": "b", "kind": "s3"}]}, tmp_path / "upwell.toml")
