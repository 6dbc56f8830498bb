"""The real ``upwell watch`` as a subprocess, for the service tests: start it, wait for it,
ask its HTTP API, stop it. Waits are bounded by generous deadlines so a slow shared machine
fails loudly instead of hanging; nothing here asserts how long anything took."""

from __future__ import annotations

import json
import os
import re
import signal
import subprocess
import sys
import time
import urllib.error
import urllib.request
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

import pytest

from tests.conftest import REPO, write  # conftest imports this module last

PY = sys.executable
START_DEADLINE = 90.0  # the default model and lancedb load on a busy 2-core machine
# The README's save-to-searchable figure is measured in bench/, never asserted here.
CHANGE_DEADLINE = 30.0


# --- helpers ---------------------------------------------------------------------------------


def wait_for(what: str, condition: Callable[[], Any], deadline: float) -> Any:
    end = time.monotonic() + deadline
    while True:
        value = condition()
        if value:
            return value
        if time.monotonic() > end:
            raise AssertionError(f"gave up waiting for {what}")
        time.sleep(0.05)


def make_config(
    tmp: Path, sources: dict[str, Path], *, model: str = "hash", **service: Any
) -> Path:
    lines = [
        "[index]",
        f'path = "{tmp / "ix"}"',
        f'model = "{model}"',
        "[server]",
        'listen = "127.0.0.1:0"',
    ]
    if "token_env" in service:
        lines.append(f'token_env = "{service.pop("token_env")}"')
    lines.append("[service]")
    for key, value in service.items():
        lines.append(f"{key} = {json.dumps(value)}")
    for name, path in sources.items():
        lines += ["[[source]]", f'name = "{name}"', f'path = "{path}"']
    return write(tmp / "upwell.toml", "\n".join(lines) + "\n")


class Watch:
    """One ``upwell watch`` subprocess; always stopped by the fixture that made it."""

    def __init__(
        self, config: Path, log_path: Path, env: dict[str, str] | None = None, *extra: str
    ):
        self.config = config
        self.log_path = log_path
        self.log = open(log_path, "ab")  # noqa: SIM115 - closed in stop()
        self.proc = subprocess.Popen(
            [PY, "-m", "pipeline.cli", "--config", str(config), *extra, "watch"],
            cwd=REPO,
            stdout=self.log,
            stderr=self.log,
            env={**os.environ, **(env or {})},
        )
        self.port: int | None = None

    def text(self) -> str:
        return self.log_path.read_text(errors="replace")

    def wait_listening(self) -> Watch:
        def port() -> int | None:
            if self.proc.poll() is not None:
                raise AssertionError(f"watch exited with {self.proc.returncode}:\n{self.text()}")
            found = re.findall(r"listening on http://127\.0\.0\.1:(\d+)", self.text())
            return int(found[-1]) if found else None

        self.port = wait_for("the service to listen", port, START_DEADLINE)
        return self

    def get(self, path: str, token: str | None = None) -> tuple[int, bytes]:
        request = urllib.request.Request(f"http://127.0.0.1:{self.port}{path}")
        if token:
            request.add_header("Authorization", f"Bearer {token}")
        try:
            with urllib.request.urlopen(request, timeout=30) as response:
                return response.status, response.read()
        except urllib.error.HTTPError as exc:
            return exc.code, exc.read()

    def json(self, path: str) -> Any:
        code, body = self.get(path)
        assert code == 200, (code, body)
        return json.loads(body)

    def search_paths(self, q: str, k: int = 50) -> dict[str, str]:
        """path -> text of every chunk returned (the test corpora are smaller than k)."""
        results = self.json(f"/search?q={urllib.request.quote(q)}&k={k}")["results"]
        out: dict[str, str] = {}
        for r in results:
            out[r["path"]] = out.get(r["path"], "") + r["text"]
        return out

    def metric(self, name: str, labels: str = "") -> float:
        code, body = self.get("/metrics")
        assert code == 200
        # Prometheus text exposition format: `name{labels} value` per sample line.
        pattern = re.escape(name + (f"{{{labels}}}" if labels else "")) + r" ([0-9.e+-]+)$"
        match = re.search(pattern, body.decode(), re.M)
        return float(match.group(1)) if match else 0.0

    def commits_logged(self) -> int:
        return len(re.findall(r" commit [0-9a-f]{20} ", self.text()))

    def stop(self, sig: int = signal.SIGTERM, deadline: float = 30.0) -> int:
        try:
            if self.proc.poll() is None:
                self.proc.send_signal(sig)
            return self.proc.wait(timeout=deadline)
        finally:
            if self.proc.poll() is None:
                self.proc.kill()
                self.proc.wait(timeout=10)
            self.log.close()


@pytest.fixture
def watches() -> Iterator[Callable[..., Watch]]:
    started: list[Watch] = []

    def start(config: Path, env: dict[str, str] | None = None, *extra: str) -> Watch:
        w = Watch(config, config.parent / f"watch-{len(started)}.log", env, *extra)
        started.append(w)
        return w

    yield start
    for w in started:  # never leave a subprocess behind
        if w.proc.poll() is None:
            w.proc.kill()
            w.proc.wait(timeout=10)
        if not w.log.closed:
            w.log.close()


def upwell(*argv: str, cwd: Path = REPO) -> subprocess.CompletedProcess[str]:
    return subprocess.run(
        [PY, "-m", "pipeline.cli", *argv], cwd=cwd, capture_output=True, text=True, timeout=120
    )
