"""A local S3 server for tests: moto's server mode on 127.0.0.1, in a child process.

``running_s3_server()`` starts it on an ephemeral port and stops it on exit. It runs in its own
process, not a thread of the test process, so LanceDB's native S3 client and boto3 talk to it over
a real socket without competing with it for the GIL, and a crashed test cannot leave a thread
behind: the child exits as soon as its stdin closes (when the parent closes it or dies).

With ``check_credentials=True`` the server enforces IAM: requests must be signed with a key of
a user it knows. The helper then creates one user with full S3 access and one with none, using
the few unauthenticated requests moto allows at start (``INITIAL_NO_AUTH_ACTION_COUNT``).

Run as a script, this file is the child: it prints the port on one line, then serves until
stdin closes.
"""

from __future__ import annotations

import json
import os
import queue
import subprocess
import sys
import threading
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass
from typing import Any

START_TIMEOUT_SECONDS = 30.0
STOP_TIMEOUT_SECONDS = 10.0
REGION = "us-east-1"
# Keys for a server that does not check credentials; any value is accepted.
OPEN_KEYS = ("testing-access-key", "testing-secret-key")
# Unauthenticated requests the IAM set-up below makes: 2 users x (create user, create key) + 1
# policy. Every request after these must be signed by a known user.
_SETUP_REQUESTS = 5


@dataclass(frozen=True)
class LocalS3:
    """A running local S3 server and the credentials that work against it."""

    endpoint_url: str
    access_key: str
    secret_key: str
    # A user that exists but may do nothing (only when credentials are checked).
    denied_keys: tuple[str, str] | None = None

    def client(self, access_key: str | None = None, secret_key: str | None = None) -> Any:
        """A boto3 S3 client for this server (the allowed user's keys unless given)."""
        import boto3

        return boto3.client(
            "s3",
            endpoint_url=self.endpoint_url,
            region_name=REGION,
            aws_access_key_id=access_key or self.access_key,
            aws_secret_access_key=secret_key or self.secret_key,
        )

    def environment(self) -> dict[str, str]:
        """The standard AWS environment variables for the allowed user (boto3's default chain
        reads them)."""
        return {
            "AWS_ACCESS_KEY_ID": self.access_key,
            "AWS_SECRET_ACCESS_KEY": self.secret_key,
            "AWS_DEFAULT_REGION": REGION,
        }

    def storage_options(self) -> dict[str, str]:
        """LanceDB storage options that reach this server."""
        return {
            "aws_access_key_id": self.access_key,
            "aws_secret_access_key": self.secret_key,
            "aws_endpoint": self.endpoint_url,
            "aws_region": REGION,
            "allow_http": "true",
        }


@contextmanager
def running_s3_server(*, check_credentials: bool = False) -> Iterator[LocalS3]:
    """A moto S3 server on 127.0.0.1 for the duration of the block; always stopped after."""
    env = dict(os.environ)
    if check_credentials:
        env["INITIAL_NO_AUTH_ACTION_COUNT"] = str(_SETUP_REQUESTS)
    else:
        env.pop("INITIAL_NO_AUTH_ACTION_COUNT", None)
    child = subprocess.Popen(
        [sys.executable, os.path.abspath(__file__)],
        stdin=subprocess.PIPE,
        stdout=subprocess.PIPE,
        stderr=subprocess.DEVNULL,
        env=env,
        text=True,
    )
    try:
        port = _read_port(child)
        endpoint = f"http://127.0.0.1:{port}"
        if check_credentials:
            yield _with_iam_users(endpoint)
        else:
            yield LocalS3(endpoint, *OPEN_KEYS)
    finally:
        _stop(child)


def _read_port(child: subprocess.Popen[str]) -> int:
    # A reader thread gives readline() a bounded wait; it ends when the child's stdout closes.
    lines: queue.Queue[str] = queue.Queue()
    assert child.stdout is not None
    reader = threading.Thread(target=lambda: lines.put(child.stdout.readline()), daemon=True)
    reader.start()
    try:
        line = lines.get(timeout=START_TIMEOUT_SECONDS)
    except queue.Empty:
        raise RuntimeError("the local S3 server did not start in time") from None
    finally:
        reader.join(timeout=1.0)
    if not line.strip().isdigit():
        raise RuntimeError(f"the local S3 server did not report a port (got {line!r})")
    return int(line)


def _stop(child: subprocess.Popen[str]) -> None:
    if child.stdin is not None:
        try:
            child.stdin.close()
        except OSError:
            pass
    try:
        child.wait(timeout=STOP_TIMEOUT_SECONDS)
    except subprocess.TimeoutExpired:
        child.kill()
        child.wait(timeout=STOP_TIMEOUT_SECONDS)
    if child.stdout is not None:
        child.stdout.close()


def _with_iam_users(endpoint: str) -> LocalS3:
    """Create an allowed and a denied user through the first unauthenticated requests."""
    import boto3

    iam = boto3.client(
        "iam",
        endpoint_url=endpoint,
        region_name=REGION,
        aws_access_key_id=OPEN_KEYS[0],
        aws_secret_access_key=OPEN_KEYS[1],
    )
    keys = {}
    for user in ("workshop-writer", "workshop-nobody"):
        iam.create_user(UserName=user)
        key = iam.create_access_key(UserName=user)["AccessKey"]
        keys[user] = (key["AccessKeyId"], key["SecretAccessKey"])
    policy = {
        "Version": "2012-10-17",
        "Statement": [{"Effect": "Allow", "Action": ["s3:*", "iam:*"], "Resource": "*"}],
    }
    iam.put_user_policy(
        UserName="workshop-writer", PolicyName="all-s3", PolicyDocument=json.dumps(policy)
    )
    return LocalS3(endpoint, *keys["workshop-writer"], denied_keys=keys["workshop-nobody"])


def _serve_until_stdin_closes() -> None:
    from moto.server import ThreadedMotoServer

    server = ThreadedMotoServer(ip_address="127.0.0.1", port=0, verbose=False)
    server.start()
    print(server.get_host_and_port()[1], flush=True)
    try:
        sys.stdin.read()  # returns at EOF: the parent closed the pipe or went away
    finally:
        server.stop()


if __name__ == "__main__":
    _serve_until_stdin_closes()
