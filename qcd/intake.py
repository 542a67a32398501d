"""Intake: observers per rig folder, and which files are finished recordings ready to measure.

A file is ready once its size and mtime have not changed for ``settle_s`` and its header fits
its size. Live files (seen through an event) go ahead of the start-up backlog. Clock (``now``)
and ``stat`` are parameters. Event handlers only enqueue. Imports qcd.errors, qcd.recording.
"""
from __future__ import annotations

import fnmatch
import heapq
import itertools
import logging
import os
import queue
import sys
from dataclasses import dataclass, field
from pathlib import Path
from typing import TYPE_CHECKING, Any, Callable, Iterable

from qcd.errors import RecordingError

if TYPE_CHECKING:
    from qcd.recording import Recording

__all__ = ["Ready", "GaveUp", "Hint", "Intake", "is_candidate_name", "read_header",
           "header_fits", "carried", "held_open", "is_network_path", "scan_folder",
           "recordings_in"]

log = logging.getLogger("qcd.intake")

# Names acquisition programs, editors and copiers use for files still being written.
_TEMP_SUFFIXES = (".tmp", ".part", ".crdownload", ".partial", ".swp")

_NETWORK_FS = {"cifs", "smb3", "smbfs", "nfs", "nfs4", "fuse.sshfs", "sshfs", "9p",
               "fuse.rclone", "afpfs", "davfs", "fuse.davfs2"}

Stat = Callable[[str], os.stat_result]
# (why the file is not ready yet, or None; its header when it was read)
HeaderCheck = Callable[[Path, int], "tuple[str | None, Any]"]


def is_candidate_name(path: Path, patterns: Iterable[str], root: Path | None = None) -> bool:
    """False for hidden and temporary files, files in hidden folders, and names no pattern matches."""
    name = path.name
    low = name.lower()
    if not name or name.startswith((".", "~$", "~")) or low.endswith(_TEMP_SUFFIXES):
        return False
    if root is not None:
        try:
            parts = path.relative_to(root).parts[:-1]
        except ValueError:
            parts = ()
        if any(p.startswith(".") for p in parts):
            return False
    return any(fnmatch.fnmatch(low, pat.lower()) for pat in patterns)


def read_header(path: Path, size: int) -> tuple[str | None, Recording | None]:
    """(None, the header) when it parses and its data fits ``size``; else (why the file is not
    ready, None).

    Only 'truncated' (and an empty file) mean "still being written"; any other bad header is
    the pipeline's business (it stores the error), so the file counts as ready, with no
    header. The header is the open Recording when ``carried`` keeps it (the measuring step
    reads from it and closes it), else None (the measuring step opens the file again).
    """
    if size == 0:
        return "empty so far", None
    why = _preallocated(path, size)
    if why is not None:
        return why, None
    from qcd.recording import not_finished, open_recording
    try:
        why = not_finished(path, size)        # HDF5: superblock end-of-file address vs size
        if why is not None:
            return why, None
        return None, carried(open_recording(path))
    except RecordingError as e:
        if e.kind == "truncated":
            return e.detail, None
        if e.kind == "empty":
            return "empty so far", None
        return None, None
    except Exception:                         # the pipeline will record what is wrong
        return None, None


# Copy tools and some acquisition programs set a file's final size first and fill it in later:
# until then the header (the first block) or the end of the data is all zeros. Real
# recordings end in at most one 512-byte block of padding zeros (every file of the sample set),
# so 4 KiB and more of zeros at the end mean the data is not there yet. Such a file waits (up
# to give_up_hours, after which it is measured as it is).
_HEAD_BYTES = 512
_ZERO_TAIL_BYTES = 4096


def _preallocated(path: Path, size: int) -> str | None:
    """Why the file looks set aside but not yet written (blank header, zeros at its end)."""
    try:
        with open(path, "rb") as f:
            head = f.read(min(size, _HEAD_BYTES))
            if head and not head.strip(b"\0"):
                return "the header is all zeros so far (space set aside, not written yet)"
            tail = min(4 * _ZERO_TAIL_BYTES, size // 2)
            if tail >= _ZERO_TAIL_BYTES:
                f.seek(size - tail)
                if not f.read(tail).strip(b"\0"):
                    return (f"the last {tail} bytes are all zeros so far (space set aside, "
                            f"data not written yet)")
    except OSError:
        return None                           # the pipeline stores why it cannot be read
    return None


def header_fits(path: Path, size: int) -> str | None:
    """None when the header parses and its data fits ``size``; else why the file is not ready."""
    return read_header(path, size)[0]


# Formats whose Recording holds no file handle between reads and is plain data, so it can wait
# in the queue and go to a measuring process as it is (the ABF reader's memmap windows).
_CARRIED_FORMATS = ("ABF1", "ABF2")


def carried(rec: Recording) -> Recording | None:
    """``rec`` when it can be measured later, in another process, from the header read now;
    else None, with ``rec`` closed (a reader may hold the file open until ``close()``)."""
    if rec.format in _CARRIED_FORMATS:
        return rec
    rec.close()
    return None


def held_open(path: Path) -> bool:
    """True when another program holds the file open for writing (Windows only).

    Windows: CreateFileW with share mode 0 fails with ERROR_SHARING_VIOLATION (32) while the
    acquisition program still has the file open. POSIX has no mandatory locks, so there this
    is always False and intake relies on size/mtime and the header fitting the size.
    """
    if sys.platform != "win32":
        return False
    import ctypes
    from ctypes import wintypes
    kernel32 = ctypes.WinDLL("kernel32", use_last_error=True)
    create = kernel32.CreateFileW
    create.argtypes = [wintypes.LPCWSTR, wintypes.DWORD, wintypes.DWORD, wintypes.LPVOID,
                       wintypes.DWORD, wintypes.DWORD, wintypes.HANDLE]
    create.restype = wintypes.HANDLE
    generic_read, open_existing, normal = 0x80000000, 3, 0x80
    handle = create(str(path), generic_read, 0, None, open_existing, normal, None)
    if handle == wintypes.HANDLE(-1).value:
        return ctypes.get_last_error() == 32   # ERROR_SHARING_VIOLATION
    kernel32.CloseHandle(handle)              # keep our handle short: it blocks renames
    return False


@dataclass(frozen=True)
class Ready:
    """A settled file to measure; ``header`` is its Recording as intake read it (or None)."""
    rig: str
    path: Path
    size: int
    mtime: float
    live: bool
    header: Recording | None = field(default=None, compare=False, repr=False)


@dataclass(frozen=True)
class GaveUp:
    """``reason`` empty: settled but never fit its header; measure it so the real error is stored."""
    rig: str
    path: Path
    reason: str
    size: int = -1
    mtime: float = -1.0


@dataclass
class _Item:
    rig: str
    path: Path
    live: bool
    first_seen: float
    size: int = -1
    mtime: float = -1.0
    stable_since: float = 0.0
    due: float = 0.0
    gen: int = 0                              # heap entries of older generations are stale
    aged: bool = False                        # first_seen was taken from the file's mtime
    why: str = ""


class Intake:
    """Files waiting to settle, in two lanes: live (events) before backlog (catch-up, oldest first).

    ``offer()`` is called for every hint (event, scan); ``check(now)`` stats due files and
    returns those ready and those given up on. Ready backlog files are released only while
    fewer than ``backlog_window`` are out, so a new file never waits behind the whole backlog.
    """

    def __init__(self, *, settle_s: float, give_up_s: float, stat: Stat = os.stat,
                 header_check: HeaderCheck = read_header,
                 probe: Callable[[Path], bool] = held_open) -> None:
        self.settle_s = float(settle_s)
        self.give_up_s = float(give_up_s)
        self._stat, self._header, self._probe = stat, header_check, probe
        self._items: dict[tuple[str, Path], _Item] = {}
        self._live: list = []                 # heap of (due, seq, gen, key)
        self._backlog: list = []              # heap of (mtime, seq, gen, key): oldest first
        self._seq = itertools.count()

    def __len__(self) -> int:
        return len(self._items)

    def counts(self) -> dict[str, int]:
        live = sum(1 for it in self._items.values() if it.live)
        return {"live": live, "backlog": len(self._items) - live}

    def offer(self, rig: str, path: Path, now: float, *, live: bool = True,
              closed: bool = False, mtime: float | None = None) -> None:
        """A hint that ``path`` may be new or changed. Duplicates collapse into one item."""
        key = (rig, Path(path))
        it = self._items.get(key)
        if it is None:
            it = _Item(rig, key[1], live, now, due=now)
            if not live and mtime is not None:
                it.stable_since = min(now, mtime)     # orders the backlog, oldest first
                # waiting counts from its mtime: a file cut short long ago is handed over at
                # once (stored as truncated) instead of waiting give_up_s again
                it.first_seen = min(now, mtime)
                it.aged = True
            self._items[key] = it
            self._push(it, now)
            return
        if live and not it.live:              # an event for a backlog file: move it up
            it.live = True
            self._push(it, now)
        elif closed and it.live:              # Linux close-after-write: re-check soon
            self._push(it, min(it.due, max(now, it.stable_since + self.settle_s)))

    def discard(self, rig: str, path: Path) -> None:
        """Forget a file (deleted, or moved away)."""
        self._items.pop((rig, Path(path)), None)

    def _push(self, it: _Item, due: float) -> None:
        it.gen += 1
        it.due = due
        key = (it.rig, it.path)
        if it.live:
            heapq.heappush(self._live, (due, next(self._seq), it.gen, key))
        else:
            order = it.mtime if it.mtime >= 0 else it.stable_since
            heapq.heappush(self._backlog, (order, due, next(self._seq), it.gen, key))

    def check(self, now: float, *, backlog_window: int = 8, max_checks: int = 200
              ) -> tuple[list[Ready], list[GaveUp]]:
        """Stat the due files; return (ready, given_up). Live ready files come first."""
        ready: list[Ready] = []
        gave_up: list[GaveUp] = []
        checks = 0
        while self._live and self._live[0][0] <= now and checks < max_checks:
            _, _, gen, key = heapq.heappop(self._live)
            it = self._items.get(key)
            if it is None or it.gen != gen or not it.live:
                continue
            checks += 1
            self._examine(it, now, ready, gave_up)
        deferred = []
        n_backlog = 0
        pops = 0
        while (self._backlog and n_backlog < backlog_window and checks < max_checks
               and pops < 4 * max_checks):
            pops += 1
            entry = heapq.heappop(self._backlog)
            _, due, _, gen, key = entry
            it = self._items.get(key)
            if it is None or it.gen != gen or it.live:
                continue
            if due > now:
                deferred.append(entry)
                continue
            checks += 1
            before = len(ready)
            self._examine(it, now, ready, gave_up)
            n_backlog += len(ready) - before
        for entry in deferred:
            heapq.heappush(self._backlog, entry)
        return ready, gave_up

    def _examine(self, it: _Item, now: float, ready: list[Ready], gave_up: list[GaveUp]) -> None:
        key = (it.rig, it.path)
        try:
            st = self._stat(os.fspath(it.path))
        except FileNotFoundError:
            self._items.pop(key, None)        # deleted or renamed away: a moved event follows
            return
        except OSError as e:                  # a share gone offline: keep trying until give-up
            it.why = f"cannot stat: {e.strerror or e}"
            self._retry_or_give_up(it, now, gave_up, stable=False)
            return
        size, mtime = st.st_size, st.st_mtime
        if (size, mtime) != (it.size, it.mtime):
            first = it.size < 0
            it.size, it.mtime = size, mtime
            # a backlog file has not changed since its mtime (clamped: clocks may differ);
            # a live one must be seen unchanged for settle_s by us
            it.stable_since = min(now, mtime) if first and not it.live else now
            if not first and it.aged:         # changing again: it gets a full give-up time
                it.first_seen, it.aged = now, False
        if now - it.stable_since < self.settle_s:
            it.why = "still changing"
            self._retry_or_give_up(it, now, gave_up, stable=False,
                                   due=it.stable_since + self.settle_s)
            return
        why, header = self._header(it.path, size)
        if why is None and self._probe(it.path):
            why = "held open by another program"
        if why is not None:
            it.why = why
            self._retry_or_give_up(it, now, gave_up, stable=True)
            return
        self._items.pop(key, None)
        ready.append(Ready(it.rig, it.path, size, mtime, it.live, header))

    def _retry_or_give_up(self, it: _Item, now: float, gave_up: list[GaveUp], *, stable: bool,
                          due: float | None = None) -> None:
        waited = now - it.first_seen
        if waited >= self.give_up_s:
            self._items.pop((it.rig, it.path), None)
            if stable:
                # settled but the header still disagrees: the pipeline stores the real error
                # (truncated, empty) rather than a vague never_settled
                gave_up.append(GaveUp(it.rig, it.path, "", it.size, it.mtime))
            else:
                gave_up.append(GaveUp(it.rig, it.path,
                                      f"{it.path}: {it.why} for {waited / 3600:.2f} h (give_up_hours "
                                      f"{self.give_up_s / 3600:g}); the file kept changing or "
                                      f"could not be read, so it was never measured"))
            return
        if due is None:
            due = now + max(self.settle_s, 0.2)
        self._push(it, max(due, now + 0.05))


# ---------------------------------------------------------------- where hints come from

def _mounts(text: str) -> list[tuple[str, str]]:
    out = []
    for line in text.splitlines():
        parts = line.split()
        if len(parts) >= 3:
            # /proc/mounts escapes spaces as \040
            out.append((parts[1].replace("\\040", " "), parts[2]))
    return out


def is_network_path(path: Path, *, mounts_text: str | None = None,
                    platform: str = sys.platform) -> bool:
    """True for a folder on SMB/NFS/sshfs (Linux /proc/mounts), a UNC or mapped network drive."""
    p = os.path.abspath(os.fspath(path))
    if platform == "win32":
        if p.startswith(("\\\\", "//")):
            return True
        if platform == sys.platform:
            try:
                import ctypes
                drive = os.path.splitdrive(p)[0] + "\\"
                return ctypes.windll.kernel32.GetDriveTypeW(drive) == 4   # DRIVE_REMOTE
            except Exception:
                return False
        return False
    if mounts_text is None:
        try:
            mounts_text = Path("/proc/mounts").read_text()
        except OSError:
            return False
    best, fstype = "", ""
    for mnt, fs in _mounts(mounts_text):
        if (p == mnt or p.startswith(mnt.rstrip("/") + "/")) and len(mnt) >= len(best):
            best, fstype = mnt, fs
    return fstype in _NETWORK_FS


def scan_folder(root: Path, patterns, *, listdir=os.scandir):
    """Yield (path, stat) of every candidate recording under root (recursive), skipping junk."""
    stack = [root]
    while stack:
        d = stack.pop()
        try:
            with listdir(d) as it:
                entries = list(it)
        except OSError as e:
            log.warning("cannot list %s: %s", d, e.strerror or e)
            continue
        for e in entries:
            try:
                if e.is_dir(follow_symlinks=False):
                    if not e.name.startswith("."):
                        stack.append(Path(e.path))
                    continue
                p = Path(e.path)
                if is_candidate_name(p, patterns, root):
                    yield p, e.stat()
            except OSError:
                continue


def recordings_in(path: Path) -> list[Path]:
    """A file as itself; a folder's recordings: every file below it whose suffix a reader takes
    (``qcd.recording.SUFFIXES``), recursive and sorted, hidden and temporary files skipped."""
    from qcd.recording import SUFFIXES
    path = Path(path)
    if not path.is_dir():
        return [path]
    return sorted(p for p, _ in scan_folder(path, tuple(f"*{s}" for s in SUFFIXES)))


@dataclass(frozen=True)
class Hint:
    """What an observer saw at ``path`` in ``rig``'s folder; ``what`` is one of:

    'written' (created or modified), 'closed' (closed after writing, Linux), 'removed'
    (deleted or moved away), 'folder' (a folder made or moved in: look inside), 'root_gone'
    (the rig folder itself was deleted).
    """
    rig: str
    path: str
    what: str


class _Inbox:
    """Only enqueues a Hint per event. Runs on watchdog's thread, which calls ``dispatch``.

    watchdog is imported where folders are watched, not with this module: ``qcd scan`` uses
    intake's file finding only and never loads it."""

    def __init__(self, q: "queue.Queue[Hint]", rig: str, root: Path) -> None:
        self._q, self._rig, self._root = q, rig, root

    def _put(self, path: Any, what: str) -> None:
        self._q.put(Hint(self._rig, os.fsdecode(path), what))

    def dispatch(self, event) -> None:
        from watchdog.events import (DirCreatedEvent, DirDeletedEvent, DirMovedEvent,
                                     FileAttribEvent, FileClosedEvent, FileCreatedEvent,
                                     FileDeletedEvent, FileModifiedEvent, FileMovedEvent)
        t = type(event)
        if t in (FileCreatedEvent, FileModifiedEvent):
            self._put(event.src_path, "written")
        elif t is FileAttribEvent:           # permissions changed: an unreadable file may read
            self._put(event.src_path, "written")
        elif t is FileClosedEvent:                      # close after write (Linux)
            self._put(event.src_path, "closed")
        elif t is FileMovedEvent:
            self._put(event.src_path, "removed")
            self._put(event.dest_path, "written")
        elif t is FileDeletedEvent:
            self._put(event.src_path, "removed")
        elif t is DirMovedEvent:
            self._put(event.dest_path, "folder")
        elif t is DirCreatedEvent:           # files may land before its watch is added
            self._put(event.src_path, "folder")
        elif t is DirDeletedEvent and os.fsdecode(event.src_path) == os.fspath(self._root):
            self._put(self._root, "root_gone")
        # opened / closed_no_write (our own reads), attrib, dir events: nothing to do


def _wanted_events() -> list:
    """The events ``_Inbox`` acts on. Only these are asked of the kernel (watchdog turns the
    list into the inotify mask): without it every open and close of a file, our own reads
    included (the header check here, the measuring in the workers), is an event for
    watchdog's threads to parse and drop, about 20 per file in a backlog."""
    from watchdog import events as ev
    return [ev.FileCreatedEvent, ev.FileModifiedEvent, ev.FileAttribEvent, ev.FileClosedEvent,
            ev.FileMovedEvent, ev.FileDeletedEvent, ev.DirMovedEvent, ev.DirCreatedEvent,
            ev.DirDeletedEvent]


class _FolderWatch:
    """One observer for one rig folder; re-created when the folder comes back."""

    def __init__(self, rig: Any, root: Path, q: "queue.Queue", *, poll_interval_s: float) -> None:
        self.rig, self.root, self._q = rig, root, q
        self.polling = bool(rig.polling)
        if not self.polling and is_network_path(root):
            log.warning("%s is on a network filesystem: watching it by polling", root)
            self.polling = True
        self._poll_interval_s = poll_interval_s
        self.observer = None
        self.state = "not started"
        self._identity: tuple[int, int] | None = None     # (device, inode) being watched

    def _current(self) -> tuple[int, int] | None:
        try:
            st = os.stat(self.root)
        except OSError:
            return None
        return (st.st_dev, st.st_ino)

    def ensure(self) -> bool:
        """Start or restart the observer as needed; True when it was (re)started now.

        The folder's identity (device, inode) is checked too: a folder renamed away and
        made again under the configured name (``mv rig rig_old; mkdir rig``) is a new folder,
        which the old observer (following the old one) would never see."""
        present = self.root.is_dir()
        if self.observer is not None:
            alive = self.observer.is_alive() and any(e.is_alive() for e in self.observer.emitters)
            same = not present or self._identity is None or self._current() == self._identity
            if present and alive and same:
                return False
            log.warning("%s: %s; will watch it again when it is back", self.root,
                        "folder is gone" if not present else "watcher stopped" if not alive
                        else "folder was replaced by a new one of the same name")
            self.stop()
            self.state = "missing" if not present else "restarting"
        if not present:
            if self.state != "missing":
                log.warning("%s: folder not found; waiting for it", self.root)
            self.state = "missing"
            return False
        from watchdog.observers import Observer
        from watchdog.observers.polling import PollingObserver
        obs = (PollingObserver(timeout=self._poll_interval_s) if self.polling else Observer())
        obs.name = f"qcd-observer-{self.rig.name}"
        try:
            obs.schedule(_Inbox(self._q, self.rig.name, self.root), os.fspath(self.root),
                         recursive=True, event_filter=_wanted_events())
            obs.start()
        except OSError as e:                 # e.g. inotify watch limit, folder vanished again
            try:
                obs.stop()
            except Exception:
                pass
            if not self.polling and self.root.is_dir():
                # inotify limits (fs.inotify.max_user_watches / max_user_instances) or a
                # filesystem without native events: polling still works
                log.warning("%s: native events unavailable (%s); watching it by polling "
                            "(raise fs.inotify.max_user_watches to avoid this)", self.root,
                            e.strerror or e)
                self.polling = True
                return self.ensure()
            if self.state != "error":
                log.error("%s: cannot watch (%s); retrying", self.root, e.strerror or e)
            self.state = "error"
            return False
        self.observer = obs
        self._identity = self._current()
        self.state = "polling" if self.polling else "watching"
        log.info("%s: %s for rig %s", self.root, self.state, self.rig.name)
        return True

    def stop(self) -> None:
        if self.observer is not None:
            try:
                self.observer.stop()
                self.observer.join(timeout=5.0)
            except Exception:               # a dead emitter must not stop the service
                log.exception("stopping the observer of %s", self.root)
            self.observer = None
