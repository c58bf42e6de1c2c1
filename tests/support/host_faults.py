"""Real faults of a host for the tests: a small file system that fills up, a PostgreSQL of the test's own that
is stopped and started by PID."""

from __future__ import annotations

import contextlib
import errno
import glob
import os
import pwd
import shutil
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

__all__ = ["OwnPostgres", "fill", "small_filesystem"]


@contextlib.contextmanager
def small_filesystem(path: Path, megabytes: int) -> Iterator[Path]:
    """A tmpfs of ``megabytes`` MiB mounted at ``path`` (made), unmounted afterwards; needs root, as CI has."""
    path.mkdir(parents=True, exist_ok=True)
    done = subprocess.run(["mount", "-t", "tmpfs", "-o", f"size={megabytes}m", "tmpfs", str(path)],
                          capture_output=True, text=True, check=False)
    if done.returncode != 0:
        raise RuntimeError(f"could not mount a {megabytes} MiB tmpfs at {path} (root needed): {done.stderr.strip()}")
    try:
        yield path
    finally:
        subprocess.run(["umount", "-l", str(path)], capture_output=True, check=False)


def fill(directory: Path) -> Path:
    """Write a file in ``directory`` until its file system is full; returns it (delete it to free the space)."""
    filler = directory / "filler.bin"
    block = b"\0" * (1 << 16)
    with filler.open("wb", buffering=0) as handle:
        for _ in range(1 << 16):                      # bounded: 4 GiB at most
            try:
                handle.write(block)
            except OSError as exc:
                if exc.errno != errno.ENOSPC:
                    raise
                break
        else:
            raise RuntimeError(f"{directory} did not fill up")
    return filler


def _free_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return int(probe.getsockname()[1])


class OwnPostgres:
    """A PostgreSQL cluster of the test's own on 127.0.0.1 (trust authentication), run as the ``postgres`` user.

    :meth:`stop` sends the postmaster (by its PID) a fast shutdown; :meth:`start` starts it again on the same
    data and port. :meth:`close` stops it and removes its files.
    """

    def __init__(self) -> None:
        binaries = sorted(glob.glob("/usr/lib/postgresql/*/bin/initdb"))
        if not binaries:
            raise RuntimeError("PostgreSQL's server binaries are not installed (.ci/run installs postgresql)")
        self._bin = Path(binaries[-1]).parent
        self.user = pwd.getpwnam("postgres")
        # Under /tmp itself: the postgres user must reach it (pytest's own folders are root's only).
        self.root = Path(tempfile.mkdtemp(prefix="rwls-pg-", dir="/tmp"))
        os.chown(self.root, self.user.pw_uid, self.user.pw_gid)
        self.data = self.root / "data"
        self.port = _free_port()
        self.process: subprocess.Popen[bytes] | None = None
        subprocess.run([str(self._bin / "initdb"), "-D", str(self.data), "-U", "postgres", "--auth=trust",
                        "--no-sync", "-E", "UTF8"], check=True, capture_output=True, user=self.user.pw_uid,
                       group=self.user.pw_gid)

    @property
    def url(self) -> str:
        return f"postgresql://postgres@127.0.0.1:{self.port}/postgres"

    @property
    def pid(self) -> int | None:
        return None if self.process is None else self.process.pid

    def start(self, timeout: float = 30.0) -> None:
        with (self.root / "server.log").open("ab") as server_log:     # the child keeps its own descriptor
            self.process = subprocess.Popen(
                [str(self._bin / "postgres"), "-D", str(self.data), "-p", str(self.port), "-h", "127.0.0.1",
                 "-k", str(self.root), "-c", "fsync=off"],
                stdout=subprocess.DEVNULL, stderr=server_log, user=self.user.pw_uid, group=self.user.pw_gid)
        deadline = time.monotonic() + timeout
        while True:
            done = subprocess.run([str(self._bin / "pg_isready"), "-h", "127.0.0.1", "-p", str(self.port)],
                                  capture_output=True, check=False)
            if done.returncode == 0:
                return
            if self.process.poll() is not None or time.monotonic() > deadline:
                raise RuntimeError(f"own PostgreSQL did not start: {(self.root / 'server.log').read_text()[-2000:]}")
            time.sleep(0.1)

    def stop(self, timeout: float = 30.0) -> None:
        """Fast shutdown of our postmaster, by its PID; waits until it is gone."""
        if self.process is None:
            return
        os.kill(self.process.pid, signal.SIGINT)
        self.process.wait(timeout)
        self.process = None

    def close(self) -> None:
        try:
            self.stop()
        finally:
            shutil.rmtree(self.root, ignore_errors=True)
