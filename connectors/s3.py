"""An S3-compatible bucket as a source: list objects with their ETags, read one object's bytes.

A rescan is one paginated ``ListObjectsV2`` (up to 1,000 keys per request) and nothing else: the
ETag and size in each listing entry are the fingerprint, so an unchanged object is never
downloaded. Credentials come from boto3's default chain (the ``AWS_*`` environment variables,
``~/.aws/credentials`` and ``~/.aws/config``, then instance or container roles).

A bucket that is missing, an endpoint that cannot be reached and refused credentials are errors
of the whole source, never an empty listing, so they cannot empty the index.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Iterator, Mapping
from contextlib import contextmanager
from dataclasses import dataclass, field
from functools import cached_property
from pathlib import Path
from typing import Any, ClassVar

from pipeline.errors import (
    DocumentTooLarge,
    DocumentUnreadable,
    SourceError,
    SourcePermission,
    SourceUnreachable,
)
from pipeline.records import Fingerprint, SourceItem

OPTIONS = ("bucket", "prefix", "endpoint_url", "region")
# S3 bucket naming rules (AWS S3 user guide, "Bucket naming rules"): 3-63 characters of lower-case
# letters, digits, dots and hyphens, starting and ending with a letter or digit.
_BUCKET_NAME = re.compile(r"^[a-z0-9][a-z0-9.-]{1,61}[a-z0-9]$")
# Error codes of the S3 API (S3 API reference, "Error responses") that mean "these credentials
# may not do this", as opposed to "this cannot be reached".
_REFUSED = frozenset(
    {
        "AccessDenied",
        "AllAccessDisabled",
        "InvalidAccessKeyId",
        "SignatureDoesNotMatch",
        "ExpiredToken",
        "InvalidToken",
        "TokenRefreshRequired",
    }
)
_GONE = frozenset({"NoSuchKey", "404", "NotFound"})
CONNECT_TIMEOUT_SECONDS = 10.0
READ_TIMEOUT_SECONDS = 60.0
MAX_ATTEMPTS = 3  # botocore "standard" retry mode: backoff with jitter on throttling and 5xx


@dataclass(frozen=True)
class S3Source:
    """Objects under ``prefix`` in ``bucket`` whose key (relative to the prefix) ``accept``s.

    ``prefix`` names a folder: "manuals" and "manuals/" both mean the keys under "manuals/".
    Keys in the index are relative to it, as a folder source's are relative to its root.
    """

    kind: ClassVar[str] = "s3"  # what `upwell status` and the console call it

    name: str
    bucket: str
    prefix: str = ""
    endpoint_url: str | None = None
    region: str | None = None
    accept: Callable[[str], bool] = field(default=lambda key: True, compare=False)
    page_size: int = 1000  # keys per ListObjectsV2 request; 1,000 is the S3 API's maximum

    @property
    def location(self) -> str:
        """Where the source lives: the bucket and prefix, and the endpoint unless it is AWS."""
        where = f"s3://{self.bucket}/{self._folder}"
        return f"{where} at {self.endpoint_url}" if self.endpoint_url else where

    @property
    def _folder(self) -> str:
        prefix = self.prefix.strip("/")
        return prefix + "/" if prefix else ""

    @cached_property
    def _client(self) -> Any:
        # boto3 is imported here, not at module load: building the source from the
        # configuration must stay cheap, and a sync that never lists it never pays for it.
        import boto3
        from botocore.config import Config

        session = boto3.session.Session(region_name=self.region)
        return session.client(
            "s3",
            endpoint_url=self.endpoint_url,
            config=Config(
                connect_timeout=CONNECT_TIMEOUT_SECONDS,
                read_timeout=READ_TIMEOUT_SECONDS,
                retries={"max_attempts": MAX_ATTEMPTS, "mode": "standard"},
            ),
        )

    def list_items(self) -> Iterator[SourceItem]:
        """Every accepted object with Fingerprint(size, tag=ETag), in key order.

        The whole listing is fetched before the first item is yielded, so a failure on page 7
        raises instead of leaving a partial listing that would look like removals.
        """
        folder = self._folder
        entries: list[SourceItem] = []
        with self._errors_of_the_source():
            pages = self._client.get_paginator("list_objects_v2").paginate(
                Bucket=self.bucket, Prefix=folder, PaginationConfig={"PageSize": self.page_size}
            )
            for page in pages:
                for obj in page.get("Contents", ()):
                    key = obj["Key"][len(folder) :]
                    if not key or key.endswith("/"):
                        continue  # the folder marker objects some tools create
                    if not self.accept(key):
                        continue
                    entries.append(
                        SourceItem(
                            source=self.name,
                            key=key,
                            fingerprint=Fingerprint(
                                size=int(obj["Size"]), tag=str(obj.get("ETag", "")).strip('"')
                            ),
                        )
                    )
        yield from entries

    def read(self, key: str, max_bytes: int) -> bytes:
        """The object's bytes; DocumentUnreadable if it vanished, DocumentTooLarge over the limit.

        An endpoint that stops answering mid-sync raises SourceUnreachable: that is an outage of
        the whole source, and recording every object as failed would hide it.
        """
        from botocore.exceptions import ClientError

        with self._errors_of_the_source():
            try:
                answer = self._client.get_object(Bucket=self.bucket, Key=self._folder + key)
            except ClientError as exc:
                code = _code(exc)
                if code in _GONE:
                    raise DocumentUnreadable(
                        "the object vanished before it could be read"
                    ) from None
                raise
            body = answer["Body"]
            try:
                size = int(answer.get("ContentLength") or 0)
                if size > max_bytes:
                    raise DocumentTooLarge(
                        f"{size:,} bytes is over the file size limit of {max_bytes:,} bytes"
                    )
                data: bytes = body.read(max_bytes + 1)
            finally:
                body.close()
        if len(data) > max_bytes:
            raise DocumentTooLarge(f"the object is over the file size limit of {max_bytes:,} bytes")
        return data

    @contextmanager
    def _errors_of_the_source(self) -> Iterator[None]:
        """Turn botocore's exceptions into SourceUnreachable / SourcePermission naming the
        bucket; the project's own errors pass through."""
        try:
            yield
        except (SourceError, DocumentUnreadable, DocumentTooLarge):
            raise
        except Exception as exc:
            error = _source_error(self, exc)
            if error is None:
                raise
            error.source = self.name
            raise error from None


def _source_error(s: S3Source, exc: Exception) -> SourceError | None:
    from botocore.exceptions import (
        BotoCoreError,
        ClientError,
        EndpointConnectionError,
        NoCredentialsError,
        PartialCredentialsError,
    )

    where = f"source {s.name!r}: bucket {s.bucket!r}" + (
        f" at {s.endpoint_url}" if s.endpoint_url else ""
    )
    if isinstance(exc, ClientError):
        code = _code(exc)
        if code in _REFUSED:
            return SourcePermission(
                f"{where} refused the credentials ({code}); check AWS_ACCESS_KEY_ID / "
                "AWS_PROFILE and the bucket policy; nothing was changed"
            )
        if code == "NoSuchBucket":
            return SourceUnreachable(f"{where} does not exist; nothing was changed")
        return SourceUnreachable(f"{where} answered {code}; nothing was changed")
    if isinstance(exc, (NoCredentialsError, PartialCredentialsError)):
        return SourcePermission(
            f"{where}: no credentials found (set AWS_ACCESS_KEY_ID and AWS_SECRET_ACCESS_KEY, "
            "or AWS_PROFILE); nothing was changed"
        )
    if isinstance(exc, EndpointConnectionError):
        return SourceUnreachable(f"{where} cannot be reached; nothing was changed")
    if isinstance(exc, (BotoCoreError, OSError)):
        return SourceUnreachable(f"{where} failed: {exc}; nothing was changed")
    return None


def _code(exc: Any) -> str:
    return str(exc.response.get("Error", {}).get("Code", "")) or str(
        exc.response.get("ResponseMetadata", {}).get("HTTPStatusCode", "")
    )


def from_config(
    name: str, options: Mapping[str, Any], fail: Callable[[str, str], Any], state_dir: Path
) -> S3Source:
    """A ``kind = "s3"`` source: ``bucket`` (required), ``prefix``, ``endpoint_url``, ``region``.

    Cheap: checks the keys and builds the object; no network, no boto3 import.
    """
    from pipeline import formats

    for key in options:
        if key not in OPTIONS:
            fail(key, f"is not a key of an s3 source (known: {', '.join(OPTIONS)})")
    bucket = options.get("bucket")
    if not isinstance(bucket, str) or not bucket:
        fail("bucket", "is required: the name of the bucket to index")
    elif not _BUCKET_NAME.match(bucket):
        fail("bucket", f"{bucket!r} is not a bucket name (3-63 of a-z, 0-9, '.', '-')")
    text: dict[str, str | None] = {}
    for key in ("prefix", "endpoint_url", "region"):
        value = options.get(key)
        if value is not None and not isinstance(value, str):
            fail(key, f"must be a string, not {type(value).__name__}")
        text[key] = value
    endpoint = text["endpoint_url"]
    if endpoint is not None and not re.match(r"^https?://[^/\s]+", endpoint):
        fail("endpoint_url", f"{endpoint!r} is not an http:// or https:// URL")
    return S3Source(
        name=name,
        bucket=str(bucket),
        prefix=text["prefix"] or "",
        endpoint_url=endpoint.rstrip("/") if endpoint else None,
        region=text["region"],
        accept=lambda key: formats.media_type_for(key) is not None,
    )
