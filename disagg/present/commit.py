"""One commit point for a set of files written together (a run's outputs, a run's history
months): after any interruption the set is wholly the old one or wholly the new one.

How a set is written (:func:`staging` then :func:`commit`):

1. every new file is written in full into a hidden staging folder inside the destination
   folder (same file system, so the moves below are renames), named
   ``.disagg-tmp-<host>-<pid>-<random>``: the host and process id of the run writing it;
2. each file it will replace is hard-linked (copied where links are not supported) into the
   staging folder's ``.previous`` folder; nothing visible has changed so far;
3. **the commit point**: the journal ``commit.json`` (the list of moves) is written into the
   staging folder under a temporary name, flushed to disk, and renamed to its name in one
   step. Before this rename the old set is the valid one, after it the new one;
4. each new file is renamed over its old one (``os.replace``: a reader sees the old file or
   the new file, never a missing or partial one); then the staging folder is removed.

Step 4 takes microseconds, and Ctrl-C, SIGTERM, SIGHUP and SIGQUIT that arrive during steps 3
and 4 are held back until the set is in place (in the main thread; a signal handler cannot be
set in other threads, such as a Dask worker's). A failed rename (an OS error) in step 4 puts
every old file back and removes the journal: the old set stays. Only SIGKILL (or a power cut)
can stop the process during step 4; then the journal stays behind, and the next write into the
same folder (:func:`recover`, run by :func:`staging`) first finishes the dead run's moves, so
the folder holds its whole new set before anything else happens. Staging folders of dead runs
without a journal (killed before their commit point) are deleted. Only this host's folders
whose process no longer exists are touched: a live run's, or another machine's (a cluster
writing to a shared disk), are left alone.
"""

from __future__ import annotations

import contextlib
import json
import os
import re
import shutil
import signal
import socket
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from pathlib import Path

from disagg.errors import OutputError

PREFIX = ".disagg-tmp-"
JOURNAL = "commit.json"
PREVIOUS = ".previous"
# Signals held back while a set is being put in place.
DEFERRED_SIGNALS = tuple(getattr(signal, n) for n in ("SIGINT", "SIGTERM", "SIGHUP", "SIGQUIT")
                         if hasattr(signal, n))
_NAME = re.compile(r"\.disagg-tmp-([A-Za-z0-9_]+)-(\d+)-")

# Test hook: called with the name of each step ("staged", "backed-up", "committed",
# "placed <target name>"); a test raises from it, or ends the process, to stop a write there.
after_step: Callable[[str], None] | None = None


def _step(name: str) -> None:
    if after_step is not None:
        after_step(name)


def _host() -> str:
    return re.sub(r"[^A-Za-z0-9]", "_", socket.gethostname())[:40] or "host"


def _alive(pid: int) -> bool:
    if pid == os.getpid():
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # PermissionError: it exists, under another user
        return True
    return True


def _place(staging: Path, moves: list[tuple[str | None, str]]) -> None:
    """The moves of a journal still to be done (a file already moved is skipped)."""
    for name, target in moves:
        if name is None:  # a file of the set that the new set does not have
            with contextlib.suppress(FileNotFoundError):
                os.unlink(target)
            continue
        src = staging / name
        if src.exists():
            Path(target).parent.mkdir(parents=True, exist_ok=True)
            os.replace(src, target)


def recover(root: Path) -> None:
    """Finish or remove the staging folders of dead runs in root (see the module docstring);
    errors are ignored (the next run tries again)."""
    try:
        entries = list(Path(root).iterdir())
    except OSError:
        return
    host = _host()
    for entry in entries:
        m = _NAME.match(entry.name)
        if m is None or m.group(1) != host or _alive(int(m.group(2))) or not entry.is_dir():
            continue
        journal = entry / JOURNAL
        with contextlib.suppress(OSError, ValueError, TypeError):
            if journal.is_file():
                moves = json.loads(journal.read_text(encoding="utf-8"))["moves"]
                _place(entry, [(None if n is None else str(n), str(t)) for n, t in moves])
        shutil.rmtree(entry, ignore_errors=True)


def staging(root: Path, what: str = "output folder") -> Path:
    """Recover dead runs' folders in root, then make this run's staging folder there.

    Raises:
        OutputError: root cannot be written.
    """
    recover(root)
    try:
        return Path(tempfile.mkdtemp(prefix=f"{PREFIX}{_host()}-{os.getpid()}-", dir=root))
    except OSError as exc:
        raise OutputError(f"{root}: cannot write in the {what} ({exc.strerror})") from None


@contextlib.contextmanager
def signals_deferred() -> Iterator[None]:
    """Hold back DEFERRED_SIGNALS inside the block, then deliver them to this process."""
    if threading.current_thread() is not threading.main_thread():
        yield
        return
    pending: list[int] = []
    previous = {}
    for sig in DEFERRED_SIGNALS:
        old = signal.getsignal(sig)
        if old is None:  # set outside Python: cannot be put back, so leave it
            continue
        previous[sig] = old
        signal.signal(sig, lambda signum, frame: pending.append(signum))
    try:
        yield
    finally:
        for sig, old in previous.items():
            signal.signal(sig, old)
        for sig in dict.fromkeys(pending):
            # To this (the main) thread: its handler runs now. os.kill on the process let
            # the kernel pick any thread, whose handling a busy machine could delay until
            # the caller had moved on (a KeyboardInterrupt raised somewhere later).
            signal.raise_signal(sig)


def _backup(target: Path, copy: Path) -> None:
    try:
        os.link(target, copy)
    except OSError:
        shutil.copy2(target, copy)


def _fsync_write(path: Path, text: str) -> None:
    with open(path, "w", encoding="utf-8") as f:
        f.write(text)
        f.flush()
        os.fsync(f.fileno())


# How long a run waits for another run's lock on a folder it writes into [s] (common
# practice, no source: long enough for any commit, short enough to say so).
LOCK_TIMEOUT_S = 60.0


def flock_waiting(fd: int, timeout_s: float, busy: str) -> OSError | None:
    """Take an exclusive flock on fd, waiting up to timeout_s seconds for another holder.

    Returns:
        None when held; the OSError when the file system has no locks.

    Raises:
        OutputError: busy, when another process held the lock for timeout_s seconds.
    """
    import fcntl

    deadline = time.monotonic() + timeout_s
    while True:
        try:
            fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
            return None
        except BlockingIOError:
            if time.monotonic() > deadline:
                raise OutputError(busy) from None
            time.sleep(0.05)
        except OSError as exc:
            return exc


@contextlib.contextmanager
def folder_locked(folder: Path, what: str = "output folder") -> Iterator[None]:
    """Hold an exclusive lock on the folder itself (fcntl.flock on its descriptor: no lock
    file) inside the block: two runs writing one folder take turns to decide and commit
    their sets, so neither leaves the other's files beside its own.

    Raises:
        OutputError: another run held the lock for LOCK_TIMEOUT_S seconds.
    """
    try:
        import fcntl
    except ImportError:  # no flock here: runs are not serialised
        yield
        return
    try:
        fd = os.open(folder, os.O_RDONLY)
    except OSError:  # cannot be opened for the lock: the write itself reports the reason
        yield
        return
    try:
        flock_waiting(fd, LOCK_TIMEOUT_S, f"{folder}: another run has been writing into this "
                      f"{what} for {LOCK_TIMEOUT_S:g} s; try again when it has finished")
        yield  # a file system without locks (an error returned): runs are not serialised
    finally:
        os.close(fd)  # releases the lock


def commit(staging_dir: Path, moves: list[tuple[str | None, Path]]) -> None:
    """Put the staged files in place as one set (steps 2 to 4 of the module docstring).

    Args:
        staging_dir: the folder from :func:`staging`, holding every staged file.
        moves: (file name inside staging_dir, target path) pairs; targets on the same file
            system, their folders created when missing. A name None removes the target: a
            file of the previous set that the new set does not have.

    Raises:
        OSError: a backup or a rename failed; the old files are all in place again.
    """
    previous = staging_dir / PREVIOUS
    previous.mkdir(exist_ok=True)
    backups: dict[int, Path] = {}
    for i, (_, target) in enumerate(moves):
        if os.path.lexists(target):
            _backup(target, previous / str(i))
            backups[i] = previous / str(i)
    _step("backed-up")
    journal = staging_dir / JOURNAL
    with signals_deferred():
        _fsync_write(staging_dir / (JOURNAL + ".part"),
                     json.dumps({"moves": [[n, str(t)] for n, t in moves]}))
        os.replace(staging_dir / (JOURNAL + ".part"), journal)  # the commit point
        placed: list[int] = []
        try:
            _step("committed")
            for i, (name, target) in enumerate(moves):
                if name is None:
                    with contextlib.suppress(FileNotFoundError):
                        os.unlink(target)
                    placed.append(i)
                    continue
                Path(target).parent.mkdir(parents=True, exist_ok=True)
                os.replace(staging_dir / name, target)
                placed.append(i)
                _step(f"placed {Path(target).name}")
        except OSError:
            for i in placed:
                target = moves[i][1]
                with contextlib.suppress(OSError):
                    if i in backups:
                        os.replace(backups[i], target)
                    elif moves[i][0] is not None:
                        os.unlink(target)
            with contextlib.suppress(OSError):
                journal.unlink()
            raise
        except BaseException:
            # Past the commit point the new set is the valid one: finish it, then stop.
            with contextlib.suppress(OSError):
                _place(staging_dir, [(n, str(t)) for n, t in moves])
            raise
