"""Write commands while ``upwell watch`` runs: handed to the service over its control socket.

Each test starts the real service as a subprocess (real watchdog, real LanceDB, the hash model)
and runs the real command line beside it, as an operator would in a second terminal.
"""

from __future__ import annotations

import json
import os
import pty
import select
import shutil
import stat
import subprocess
import tempfile
import time
from pathlib import Path

import pytest

from pipeline.service.control import socket_path
from tests.conftest import write
from tests.support.service import PY, REPO, make_config, upwell, wait_for

A = "# Cranks\n\nThe crank bolts take 40 Nm on the left and the right arm.\n"
B = "# Brakes\n\nBrake pads are changed when the groove is gone.\n"
C = "# Chains\n\nA chain is replaced once it has stretched by half a percent.\n"


def status(config: Path) -> dict:
    done = upwell("--config", str(config), "status", "--json")
    assert done.returncode == 0, done.stderr
    return json.loads(done.stdout)


def documents(config: Path) -> int:
    return status(config)["totals"]["documents"]


def test_rollback_with_pause_stops_syncing_at_once_and_resume_lifts_it(tmp_path, watches):
    share = tmp_path / "share"
    write(share / "a.md", A)
    write(share / "b.md", B)
    config = make_config(tmp_path, {"share": share})
    w = watches(config).wait_listening()
    wait_for("the first commit", w.commits_logged, 60)
    tagged = upwell("--config", str(config), "tag", "good")
    assert tagged.returncode == 0, tagged.stderr
    assert tagged.stdout.startswith("tagged ") and tagged.stdout.rstrip().endswith(" as good")

    # The bad ingest: a file deleted by mistake, synced away by the service.
    (share / "b.md").unlink()
    wait_for("the deletion to be synced", lambda: documents(config) == 1, 60)

    # Without --yes and without a terminal it refuses, as it does by hand, and changes nothing.
    refused = upwell("--config", str(config), "rollback", "good", "--pause")
    assert refused.returncode == 2
    assert "Nothing was changed; re-run with --yes." in refused.stderr
    assert documents(config) == 1

    done = upwell("--config", str(config), "rollback", "good", "--pause", "--yes")
    assert done.returncode == 0, done.stderr
    assert "rolled back: commit " in done.stdout
    assert "syncing is paused; `upwell resume` lifts the pause" in done.stdout
    assert documents(config) == 2  # b.md is searchable again although its file is gone
    assert w.json("/status")["service"]["paused"] is True
    assert status(config)["paused"]

    # Paused at once: a new file is seen and its sync skipped; b.md is not removed again.
    write(share / "c.md", C)
    wait_for("the sync to be skipped", lambda: "skipped syncing share" in w.text(), 60)
    assert documents(config) == 2
    assert "c.md" not in w.search_paths("chain stretched")

    resumed = upwell("--config", str(config), "resume")
    assert (resumed.returncode, resumed.stdout) == (0, "syncing resumed\n")
    assert w.json("/status")["service"]["paused"] is False
    # No restart: the service catches up with the sources by itself.
    wait_for("c.md to be synced", lambda: "c.md" in w.search_paths("chain stretched"), 60)
    wait_for(
        "b.md to go again", lambda: documents(config) == 2 and not status(config)["paused"], 60
    )
    again = upwell("--config", str(config), "resume")
    assert (again.returncode, again.stdout) == (0, "syncing was not paused\n")
    assert w.stop() == 0
    assert "running a handed-over command: upwell --config" in w.text()


def test_handed_over_commands_print_and_exit_as_they_do_by_hand(tmp_path, watches):
    share = tmp_path / "share"
    write(share / "a.md", A)
    write(share / "b.md", B)
    config = make_config(tmp_path, {"share": share})
    w = watches(config).wait_listening()
    wait_for("the first commit", w.commits_logged, 60)
    c = ["--config", str(config)]
    # Erase first (it rewrites history, which the messages below list).
    # Erase a document named by its path on disk, relative to the caller's folder.
    erased = upwell(*c, "erase", "share/b.md", "--yes", cwd=tmp_path)
    assert erased.returncode == 0, erased.stderr
    assert erased.stdout.startswith("erased 1 documents")
    assert documents(config) == 1
    commands = [
        [*c, "tag", "x", "v999"],  # an unknown version
        [*c, "untag", "never-made"],
        [*c, "erase", "share/nothing-*", "--yes"],  # no match
        [*c, "rollback", "v999", "--yes"],
        [*c, "remove-source", "share", "--yes"],  # still configured
        [*c, "maintain", "--keep-days", "30", "--json"],
    ]
    handed = [upwell(*argv) for argv in commands]
    # unknown versions are exit code 1; no match and a configured source are usage errors, 2
    assert [h.returncode for h in handed] == [1, 1, 2, 1, 2, 0], [h.stderr for h in handed]
    assert w.stop() == 0
    assert w.text().count("running a handed-over command") == 1 + len(commands)

    # The same commands by hand, with no service: the same output and the same exit codes.
    by_hand = [upwell(*argv) for argv in commands]
    for argv, h, b in zip(commands, handed, by_hand, strict=True):
        assert (h.returncode, h.stderr) == (b.returncode, b.stderr), argv
        if "--json" in argv:  # the maintenance report: the same keys
            assert json.loads(h.stdout).keys() == json.loads(b.stdout).keys()
        else:
            assert h.stdout == b.stdout, argv


def test_a_handed_over_command_asks_on_the_callers_terminal(tmp_path, watches):
    share = tmp_path / "share"
    write(share / "a.md", A)
    write(share / "b.md", B)
    config = make_config(tmp_path, {"share": share})
    w = watches(config).wait_listening()
    wait_for("the first commit", w.commits_logged, 60)
    # A pseudo-terminal stands in for the operator's: the question appears there, "y" answers.
    main, secondary = pty.openpty()
    proc = subprocess.Popen(
        [PY, "-m", "pipeline.cli", "--config", str(config), "erase", "share/b.md"],
        cwd=REPO,
        stdin=secondary,
        stdout=subprocess.PIPE,
        stderr=secondary,
        text=True,
    )
    os.close(secondary)
    seen = b""
    deadline = time.monotonic() + 60
    while b"[y/N]" not in seen:
        assert time.monotonic() < deadline, seen
        ready, _, _ = select.select([main], [], [], 1)
        if ready:
            seen += os.read(main, 4096)
    assert b"Erasing 1 documents for good: " in seen and b"This cannot be undone." in seen
    os.write(main, b"y\n")
    out, _ = proc.communicate(timeout=60)
    os.close(main)
    assert proc.returncode == 0
    assert out.startswith("erased 1 documents")
    assert documents(config) == 1
    assert w.stop() == 0


def test_the_control_socket_is_for_the_services_own_user_only(watches):
    if os.geteuid() != 0:
        pytest.skip("needs root to run a client as another user")
    client_python = shutil.which("python3", path="/usr/bin:/bin")
    if client_python is None:
        pytest.skip("no system python3 for the other user's client")
    # A folder other users may enter, so only the socket's own mode keeps them out.
    root = Path(tempfile.mkdtemp(prefix="upwell-sock-"))
    try:
        root.chmod(0o755)
        share = root / "share"
        write(share / "a.md", A)
        config = make_config(root, {"share": share})
        (root / "ix").mkdir(mode=0o755)
        w = watches(config).wait_listening()
        wait_for("the first commit", w.commits_logged, 60)
        where = socket_path(root / "ix")
        info = where.stat()
        assert stat.S_ISSOCK(info.st_mode)
        assert stat.S_IMODE(info.st_mode) == 0o600 and info.st_uid == os.getuid()
        client = (
            "import json, socket, sys\n"
            "s = socket.socket(socket.AF_UNIX)\n"
            "try:\n"
            "    s.connect(sys.argv[1])\n"
            "except PermissionError:\n"
            "    print('refused by the file mode'); sys.exit(0)\n"
            "try:\n"
            "    s.sendall(json.dumps({'argv': ['resume'], 'cwd': '/'}).encode() + b'\\n')\n"
            "    print('answered' if s.recv(4096) else 'closed by the service')\n"
            "except (ConnectionResetError, BrokenPipeError):\n"
            "    print('closed by the service')\n"
        )

        def as_nobody() -> str:
            done = subprocess.run(
                [client_python, "-c", client, str(where)],
                user=65534,
                group=65534,
                capture_output=True,
                text=True,
                timeout=60,
                cwd="/",
            )
            assert done.returncode == 0, done.stderr
            return done.stdout.strip()

        assert as_nobody() == "refused by the file mode"
        # Even with the mode opened up, the peer's user id is checked (SO_PEERCRED).
        where.chmod(0o666)
        assert as_nobody() == "closed by the service"
        wait_for(
            "the refusal to be logged", lambda: "refused a command from user id" in w.text(), 30
        )
        # The HTTP port takes no commands at all.
        assert w.get("/resume")[0] == 404
        assert w.stop() == 0
        assert not where.exists()  # removed on a clean stop
    finally:
        shutil.rmtree(root, ignore_errors=True)
