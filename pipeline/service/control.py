"""The control channel: write commands handed to a running ``upwell watch``.

While the service runs it holds the index's writer lock, so ``rollback``, ``tag``, ``erase`` and
the other write commands cannot take it. Instead the command line connects to this Unix socket
beside the lock, sends its arguments, and the service runs the command in its own writer
thread, between batches, with the same prompts, output and exit code as a command run by hand.

    upwell rollback v12 ──argv, cwd──▶ control socket ──▶ writer thread runs the command
        terminal ◀── output lines, questions ──┘            (between two batches)

The channel is for the service's own user only: the socket is created owner-only (mode 0600,
made so before it can be connected to), and each connection's peer credentials
(``SO_PEERCRED``) must show the same user id, so neither another local user nor anything on the
HTTP port can reach it.

The wire format is one JSON object per line. Client to service: ``{"argv": [...], "cwd": "..",
"interactive": bool}``, then ``{"answer": bool}`` after each question. Service to client:
``{"out": text}``, ``{"err": text}``, ``{"ask": message}`` and finally ``{"exit": code}``.
"""

from __future__ import annotations

import contextlib
import json
import logging
import os
import socket
import struct
import threading
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any, TextIO

from pipeline.locations import is_remote
from pipeline.locking import lock_files, machine_folder, uri_key

log = logging.getLogger("upwell.service")

SOCKET_NAME = ".control.sock"
# sockaddr_un holds 108 bytes on Linux, 104 on macOS, including the final NUL.
_MAX_SOCKET_PATH = 100
# How long the service waits for a person to answer a question before taking it as "no".
ANSWER_SECONDS = 300.0
_MAX_REQUEST_BYTES = 1024 * 1024


def socket_path(index_path: str | os.PathLike[str]) -> Path:
    """Where the control socket of the index at ``index_path`` lives: beside its writer lock,
    or, where that path would be too long for a socket address, under the machine's upwell
    folder, keyed by the index's location (the service and the command line agree on it)."""
    where = index_path if is_remote(index_path) else os.path.abspath(index_path)
    lock = lock_files(where)[0]
    # a local index's lock is in its folder; an object-storage index's is named by its URI
    beside = lock.with_suffix(".sock") if is_remote(where) else lock.with_name(SOCKET_NAME)
    if len(os.fsencode(beside)) <= _MAX_SOCKET_PATH:
        return beside
    key = uri_key(os.fspath(where))
    runtime = os.environ.get("XDG_RUNTIME_DIR")
    folder = Path(runtime) / "upwell" if runtime else machine_folder("control")
    return folder / f"{key[-16:]}.sock"


# --- the service's side ----------------------------------------------------------------------


class Session:
    """One connected command: what it prints goes back to the caller's terminal, and what it
    asks is asked there. Used by the writer thread while the command runs."""

    def __init__(self, conn: socket.socket, request: dict[str, Any]) -> None:
        self._conn = conn
        self._reader = conn.makefile("rb")
        self.argv: list[str] = [str(a) for a in request.get("argv", [])]
        self.cwd: str = str(request.get("cwd") or os.getcwd())
        self.interactive = bool(request.get("interactive"))
        self.out: TextIO = _Lines(self, "out")  # type: ignore[assignment]
        self.err: TextIO = _Lines(self, "err")  # type: ignore[assignment]
        self.gone = False

    def send(self, message: dict[str, Any]) -> None:
        if self.gone:
            return
        try:
            self._conn.sendall(json.dumps(message, ensure_ascii=False).encode("utf-8") + b"\n")
        except OSError:
            self.gone = True  # the caller went away (Ctrl-C): the command still finishes

    def confirm(self, message: str) -> bool:
        """Ask the caller; no terminal there, no answer in time, or a hang-up count as no."""
        if not self.interactive or self.gone:
            return False
        self.send({"ask": message})
        try:
            self._conn.settimeout(ANSWER_SECONDS)
            line = self._reader.readline(_MAX_REQUEST_BYTES)
        except OSError:
            return False
        try:
            return bool(json.loads(line).get("answer")) if line else False
        except (ValueError, AttributeError):
            return False


class _Lines:
    """A text stream whose writes travel to one of the caller's streams."""

    def __init__(self, session: Session, stream: str) -> None:
        self._session = session
        self._stream = stream

    def write(self, text: str) -> int:
        if text:
            self._session.send({self._stream: text})
        return len(text)

    def flush(self) -> None:
        pass

    def isatty(self) -> bool:
        return False


#: Runs one handed-over command: ``handler(session) -> exit code``.
Handler = Callable[[Session], int]


class ControlServer:
    """Accepts commands on the control socket and hands each to ``submit`` to run in the
    writer thread; the connection waits until the command has finished."""

    def __init__(
        self, index_path: str | os.PathLike[str], submit: Callable[[Callable[[], None]], None]
    ) -> None:
        self.path = socket_path(index_path)
        self._submit = submit
        self._handler: Handler | None = None
        self._sock: socket.socket | None = None
        self._thread: threading.Thread | None = None
        self._closing = threading.Event()

    def start(self, handler: Handler) -> None:
        """Listen. The caller holds the writer lock, so a socket file already there is left
        over from a service that did not stop cleanly."""
        self._handler = handler
        self.path.parent.mkdir(parents=True, exist_ok=True, mode=0o700)
        with contextlib.suppress(FileNotFoundError):
            self.path.unlink()
        sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        old_umask = os.umask(0o177)  # owner-only from the moment the file exists
        try:
            sock.bind(str(self.path))
        finally:
            os.umask(old_umask)
        os.chmod(self.path, 0o600)
        sock.listen(8)
        sock.settimeout(0.2)
        self._sock = sock
        self._thread = threading.Thread(target=self._accept_loop, name="control", daemon=True)
        self._thread.start()
        log.info(
            f"write commands accepted on {self.path}",
            extra={"fields": {"event": "control_listening", "socket": str(self.path)}},
        )

    def stop(self) -> None:
        self._closing.set()
        if self._thread is not None:
            self._thread.join(timeout=5)
        if self._sock is not None:
            self._sock.close()
        with contextlib.suppress(OSError):
            self.path.unlink()

    def _accept_loop(self) -> None:
        assert self._sock is not None
        while not self._closing.is_set():
            try:
                conn, _ = self._sock.accept()
            except TimeoutError:
                continue
            except OSError:
                return
            threading.Thread(
                target=self._serve, args=(conn,), name="control-command", daemon=True
            ).start()

    def _serve(self, conn: socket.socket) -> None:
        with conn:
            conn.settimeout(10)
            uid = _peer_uid(conn)
            if uid is not None and uid != os.getuid():
                log.warning(
                    f"control socket: refused a command from user id {uid}",
                    extra={"fields": {"event": "control_refused", "uid": uid}},
                )
                return
            try:
                line = conn.makefile("rb").readline(_MAX_REQUEST_BYTES)
                request = json.loads(line)
                if not isinstance(request, dict) or not isinstance(request.get("argv"), list):
                    raise ValueError("no argv")
            except (OSError, ValueError):
                return
            session = Session(conn, request)
            done = threading.Event()
            code = [1]

            def run() -> None:
                assert self._handler is not None
                words = " ".join(session.argv)
                log.info(
                    f"running a handed-over command: upwell {words}",
                    extra={"fields": {"event": "command", "argv": session.argv}},
                )
                try:
                    code[0] = self._handler(session)
                    log.info(
                        f"handed-over command done, exit code {code[0]}: upwell {words}",
                        extra={
                            "fields": {
                                "event": "command_done",
                                "argv": session.argv,
                                "exit_code": code[0],
                            }
                        },
                    )
                except Exception:  # a command never takes the writer down
                    log.exception(
                        "control command failed unexpectedly",
                        extra={"fields": {"event": "failure", "argv": session.argv}},
                    )
                    session.send(
                        {
                            "err": "upwell: error: the service could not run this "
                            "command; its log says why\n"
                        }
                    )
                    code[0] = 1
                finally:
                    done.set()

            self._submit(run)
            while not done.wait(0.5):
                if self._closing.is_set():
                    session.send({"err": "upwell: error: the service stopped first\n"})
                    return
            session.send({"exit": code[0]})


def _peer_uid(conn: socket.socket) -> int | None:
    """The connecting process's user id (Linux ``SO_PEERCRED``); None where unavailable."""
    option = getattr(socket, "SO_PEERCRED", None)
    if option is None:
        return None  # elsewhere the socket's owner-only mode is the guard
    creds = conn.getsockopt(socket.SOL_SOCKET, option, struct.calcsize("3i"))
    _pid, uid, _gid = struct.unpack("3i", creds)
    return uid


# --- the command line's side -----------------------------------------------------------------


@contextlib.contextmanager
def connect(index_path: str | os.PathLike[str]) -> Iterator[socket.socket | None]:
    """A connection to the service writing this index, or None when no service listens."""
    path = socket_path(index_path)
    if not path.exists():
        yield None
        return
    sock = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    try:
        sock.connect(str(path))
    except OSError:
        sock.close()
        yield None  # left over from a service that is gone
        return
    with sock:
        yield sock


def hand_over(
    sock: socket.socket,
    argv: list[str],
    *,
    out: TextIO,
    err: TextIO,
    ask: Callable[[str], bool] | None,
) -> int:
    """Send a command to the service and relay its output and questions; its exit code."""
    request = {"argv": argv, "cwd": os.getcwd(), "interactive": ask is not None}
    sock.sendall(json.dumps(request).encode("utf-8") + b"\n")
    reader = sock.makefile("rb")
    for raw in reader:
        try:
            message = json.loads(raw)
        except ValueError:
            continue
        if "out" in message:
            out.write(message["out"])
            out.flush()
        elif "err" in message:
            err.write(message["err"])
            err.flush()
        elif "ask" in message:
            answer = bool(ask and ask(message["ask"]))
            sock.sendall(json.dumps({"answer": answer}).encode("utf-8") + b"\n")
        elif "exit" in message:
            return int(message["exit"])
    err.write("upwell: error: the service closed the connection before the command finished\n")
    return 1
