"""The SQLite store: the Store class (WAL, busy timeout, every query qcd makes).

One writer process (the service); short writes from a second process (``qcd mute``) are
safe because every write transaction starts with BEGIN IMMEDIATE. Times are Unix seconds.
Imports sqlite-utils, numpy, qcd.errors, qcd.results (what a measured file is), qcd.alerts
(Message, Mute), qcd.schema (the migrations) and qcd.codec (stored values); never
qcd.analyze. All of qcd's SQL is here and in qcd.schema; no other module holds SQL. Over 500
lines: one Store class holds every query.
"""
from __future__ import annotations

import json
import logging
import math
import os
import sqlite3
import threading
from collections.abc import Callable, Iterable, Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from datetime import datetime, timezone
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
from sqlite_utils import Database

from qcd.alerts import Message, Mute
from qcd.codec import (_decode_value, _dumps, _encode_value, _f32, _from_f32, _path_key,
                       _plain, _real)
from qcd.errors import StoreError, path_bytes, printable
from qcd.results import ChannelMeasures, FileMeasures, Measure, Spectrum, file_time
from qcd.schema import MIGRATIONS

if TYPE_CHECKING:
    from qcd.judge import Finding

__all__ = ["Store", "FileState", "MIGRATIONS"]

log = logging.getLogger("qcd.store")


def cannot_write(path: Path) -> str | None:
    """Why qcd cannot write ``path`` and the files it keeps beside it (-wal, -shm, lock,
    log), or None when it can: 'the folder F is on a read-only file system', ..."""
    import errno
    import tempfile
    folder = Path(path).parent
    try:
        with tempfile.TemporaryFile(dir=folder, prefix=".qcd-write-check-"):
            pass
    except OSError as e:
        kind = ("is on a read-only file system" if e.errno == errno.EROFS else
                "is not writable for this user (permission denied)"
                if e.errno in (errno.EACCES, errno.EPERM) else "does not exist"
                if e.errno == errno.ENOENT else f"cannot be written ({e.strerror})")
        return (f"the folder {folder} {kind}; qcd writes its database, the -wal and -shm files "
                f"beside it, its lock and its log there")
    if Path(path).exists() and not os.access(path, os.W_OK):
        return f"the file {path} is read-only (permission denied)"
    return None


def describe_error(e: BaseException) -> str:
    """What an SQLite error means for the lab, with the driver's own words."""
    text = str(e)
    low = text.lower()
    if "malformed" in low or "not a database" in low or "corrupt" in low:
        return (f"the database file is damaged ({text}); stop qcd, keep a copy, and restore a "
                f"backup or move the file aside (qcd then starts a new one)")
    if "disk is full" in low or "disk i/o" in low:
        return f"the disk is full or failing ({text}); free space on it"
    if "readonly" in low or "read-only" in low:
        return f"the database cannot be written ({text}): check its folder's permissions"
    return text


@dataclass(frozen=True)
class FileState:
    """What the store knows of a path: enough for the watcher to skip unchanged files."""
    id: int
    size: int | None
    mtime: float | None
    sha256: str | None
    status: str
    error_kind: str | None = field(default=None, compare=False)


def _bad_targets(findings: Iterable[Finding]) -> tuple[bool, set[tuple[int | None, str]]]:
    """(any bad finding, {(channel or None, measure)} named by bad findings)."""
    any_bad, named = False, set()
    for f in findings:
        if f.bad:
            any_bad = True
            if f.measure:
                named.add((f.channel, f.measure))
                named.update((c, f.measure) for c in getattr(f, "channels", ()))  # file-level
    return any_bad, named


# a file's findings go in with one executemany (same rows, same order, fewer statement calls)
_INSERT_FINDING = ("INSERT INTO findings (file_id, rig, mode, channel, measure, rule, kind, bad, "
                   "severity, value, unit, limit_text, hint) VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?)")


class Store:
    """The qcd database. ``Store(path)`` creates or migrates it; use as a context manager.

    ``before_commit`` (for crash tests only) is called inside ``commit_file``'s transaction
    just before COMMIT.
    """

    def __init__(self, path: Path | str, timeout_s: float = 30.0, *,
                 before_commit: Callable[[], None] | None = None) -> None:
        self.path = Path(path)
        self.timeout_s = float(timeout_s)
        self._before_commit = before_commit
        self._lock = threading.RLock()
        self._depth = 0                      # nesting of _write() in this thread
        # learning_points, remembered within one write transaction (no other writer then):
        # key -> (before, rows); commit_file says which entries its file changes, any other
        # write inside the transaction forgets them all, and its end (COMMIT or ROLLBACK) too
        self._learnt: dict[tuple, tuple[float, list[tuple[float, float, int]]]] = {}
        self._kept = False                   # commit_file's own write: it forgets precisely
        self._closed = True
        if not self.path.parent.is_dir():
            raise StoreError(f"{self.path}: folder {self.path.parent} does not exist")
        try:
            # isolation_level=None: the driver opens no transaction of its own; every write
            # transaction here starts with an explicit BEGIN IMMEDIATE.
            conn = sqlite3.connect(os.fspath(self.path), timeout=self.timeout_s,
                                   isolation_level=None, check_same_thread=False)
        except sqlite3.Error as e:
            raise StoreError(f"{self.path}: cannot open the database: {e}") from e
        self._closed = False
        try:
            self.db = Database(conn, execute_plugins=False)
            conn.execute(f"PRAGMA busy_timeout = {int(self.timeout_s * 1000)}")
            conn.execute("PRAGMA foreign_keys = ON")
            self.db.enable_wal()
            conn.execute("PRAGMA synchronous = FULL")
            if self.db.journal_mode != "wal":
                log.warning("%s: write-ahead log not available (journal_mode=%s); keep the "
                            "database on a local disk", self.path, self.db.journal_mode)
            self._migrate()
        except sqlite3.DatabaseError as e:
            conn.close()
            self._closed = True
            why = cannot_write(self.path)
            if why is not None:               # a healthy database in a folder qcd cannot write
                raise StoreError(f"{self.path}: cannot be opened for writing: {why}; the "
                                 f"database itself may be fine: do not delete it") from e
            raise StoreError(f"{self.path}: not a usable qcd database: {e}") from e
        except BaseException:
            conn.close()
            self._closed = True
            raise

    # --- lifecycle ----------------------------------------------------------------------------

    def _migrate(self) -> None:
        known = {m.name for m in MIGRATIONS._migrations}
        applied = {m.name for m in MIGRATIONS.applied(self.db)}
        newer = sorted(applied - known)
        if newer:
            raise StoreError(f"{self.path}: written by a newer qcd (schema steps {', '.join(newer)}"
                             f" unknown here); upgrade qcd")
        if not MIGRATIONS.pending(self.db):
            return
        with self._write():      # BEGIN IMMEDIATE: two processes opening at once migrate once
            MIGRATIONS.apply(self.db)

    def close(self) -> None:
        with self._lock:
            if self._closed:
                return
            self._closed = True
            conn = self.db.conn
            try:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
            finally:
                conn.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Store({os.fspath(self.path)!r})"

    def checkpoint(self) -> tuple[int, int, int]:
        """``PRAGMA wal_checkpoint(TRUNCATE)``: (busy, wal pages, pages checkpointed)."""
        with self._lock:
            row = self.db.conn.execute("PRAGMA wal_checkpoint(TRUNCATE)").fetchone()
            return int(row[0]), int(row[1]), int(row[2])

    def wal_bytes(self) -> int:
        """Size of the -wal file (0 when absent): call ``checkpoint`` when it grows large."""
        try:
            return os.stat(f"{os.fspath(self.path)}-wal").st_size
        except OSError:
            return 0

    @contextmanager
    def transaction(self) -> Iterator[None]:
        """One write transaction around reads and writes that belong together (read alert
        states, judge, commit): no other process writes in between. Store calls inside it
        join it instead of starting their own."""
        with self._write(joins=True):
            yield

    @contextmanager
    def _write(self, joins: bool = False) -> Iterator[sqlite3.Connection]:
        """One write transaction, BEGIN IMMEDIATE (waits up to timeout_s for another writer).
        ``joins``: only joins a transaction under way (writes nothing itself)."""
        with self._lock:
            conn = self.db.conn
            if self._depth:                  # inside transaction(): one COMMIT at its end
                if not (joins or self._kept):
                    self._learnt.clear()
                self._depth += 1
                try:
                    yield conn
                finally:
                    self._depth -= 1
                return
            try:
                conn.execute("BEGIN IMMEDIATE")
            except sqlite3.OperationalError as e:
                raise StoreError(f"{self.path}: cannot start a write ({e}); another process "
                                 f"held the database longer than {self.timeout_s:g} s") from e
            self._depth = 1
            self._learnt.clear()
            try:
                yield conn
                conn.execute("COMMIT")
            except BaseException as e:
                if conn.in_transaction:
                    conn.execute("ROLLBACK")
                if isinstance(e, sqlite3.Error):
                    raise StoreError(f"{self.path}: write failed: {describe_error(e)}") from e
                raise
            finally:
                self._depth = 0
                self._learnt.clear()

    def _rows(self, sql: str, params: Iterable[Any] = ()) -> list[dict[str, Any]]:
        with self._lock, self._reading():
            cur = self.db.conn.execute(sql, tuple(params))
            names = [d[0] for d in cur.description]
            return [dict(zip(names, row)) for row in cur.fetchall()]

    def _one(self, sql: str, params: Iterable[Any] = ()) -> Any:
        with self._lock, self._reading():
            return self.db.conn.execute(sql, tuple(params)).fetchone()

    @contextmanager
    def _reading(self) -> Iterator[None]:
        """A failed read is a StoreError saying what is wrong, not a driver traceback (also
        inside a write, so the pipeline never takes it for a bad file)."""
        try:
            yield
        except sqlite3.DatabaseError as e:
            raise StoreError(f"{self.path}: reading failed: {describe_error(e)}") from e

    # --- intake ---------------------------------------------------------------------------------

    def file_state(self, rig: str, path: Path | str) -> FileState | None:
        """The latest non-superseded row of ``rig``/``path``, or None."""
        text, raw = _path_key(path)
        row = self._one("SELECT id, size, mtime, sha256, status, error_kind FROM files WHERE "
                        "rig = ? AND path = ? AND path_bytes IS ? AND superseded = 0 ORDER BY id DESC "
                        "LIMIT 1", (rig, text, raw))
        return FileState(*row) if row else None

    def same_content(self, rig: str, sha256: str | None) -> dict[str, Any] | None:
        """The current row (id, path, status) holding this content for the rig, or None."""
        if not sha256:
            return None
        rows = self._rows("SELECT id, path, path_bytes, status FROM files WHERE rig = ? AND "
                          "sha256 = ? AND superseded = 0 AND status != 'skipped' "
                          "ORDER BY id DESC LIMIT 1", (rig, sha256))
        return rows[0] if rows else None

    def file_bytes(self, file_id: int) -> bytes | None:
        """The exact file-system name of a stored file (its path as bytes), or None."""
        row = self._one("SELECT path, path_bytes FROM files WHERE id = ?", (file_id,))
        if row is None:
            return None
        return bytes(row[1]) if row[1] is not None else os.fsencode(row[0])

    # --- history for the judge ----------------------------------------------------------------

    def history(self, rig: str, mode: str, channel: int, measure: str, *, limit: int = 30,
                days: float = 30.0, before: float, after: float | None = None,
                skip: int = 0, clean_files: bool = False) -> list[tuple[float, float]]:
        """[(recorded_at, value)] of ok, current files in [before - days, before) whose value of
        this measure was not flagged, newest first, at most ``limit``; ``after``: only files
        recorded at or after it (a re-learn); ``skip``: leave out the newest ``skip`` of them;
        ``clean_files``: only files with no flag at all (what the noise-source hints compare
        with, so a lasting fault on one measure does not become the normal of the others).

        The flag is per measure: a file whose hum was flagged still gives its seal resistance
        to the baseline, so a lasting condition on one measure cannot keep a rig learning.
        """
        rows = self._one_all(
            "SELECT f.recorded_at, m.value FROM files f JOIN measures m ON m.file_id = f.id "
            "WHERE f.rig = ? AND f.mode = ? AND f.status = 'ok' "
            "AND f.superseded = 0 AND f.recorded_at < ? AND f.recorded_at >= ? "
            "AND m.channel = ? AND m.name = ? AND m.flagged = 0 AND m.value IS NOT NULL "
            + ("AND f.flagged = 0 " if clean_files else "") +
            "ORDER BY f.recorded_at DESC, f.id DESC LIMIT ? OFFSET ?",
            (rig, mode, before, max(before - days * 86400.0,
                                    -math.inf if after is None else float(after)),
             channel, measure, int(limit), int(skip)))
        return [(float(t), float(v)) for t, v in rows]

    def reference_rows(self, rig: str, mode: str, channel: int, measure: str, *,
                       start: float | None, before: float, limit: int
                       ) -> list[tuple[float, float]]:
        """[(recorded_at, value)] of ok, current files recorded in [start, before) whose value
        of this measure was not flagged, OLDEST first, at most ``limit``: a reference to learn."""
        rows = self._one_all(
            "SELECT f.recorded_at, m.value FROM files f JOIN measures m ON m.file_id = f.id "
            "WHERE f.rig = ? AND f.mode = ? AND f.status = 'ok' AND f.superseded = 0 "
            "AND f.recorded_at < ? AND f.recorded_at >= ? AND m.channel = ? AND m.name = ? "
            "AND m.flagged = 0 AND m.value IS NOT NULL "
            "ORDER BY f.recorded_at, f.id LIMIT ?",
            (rig, mode, before, -math.inf if start is None else float(start), channel, measure,
             int(limit)))
        return [(float(t), float(v)) for t, v in rows]

    def chart_points(self, rig: str, mode: str, channel: int, measure: str, *,
                     after: float | None, before: float | None = None,
                     limit: int | None = None) -> list[tuple[float, float]]:
        """[(recorded_at, value)] of every ok, current file (flagged or not) recorded in
        (after, before), oldest first (the first ``limit``): what a drift chart steps through."""
        return [(t, v) for t, v, _ in self.flagged_points(rig, mode, channel, measure,
                                                          after=after, before=before,
                                                          limit=limit)]

    def flagged_points(self, rig: str, mode: str, channel: int, measure: str, *,
                       after: float | None, before: float | None = None,
                       limit: int | None = None, inclusive: bool = False
                       ) -> list[tuple[float, float, int]]:
        """``chart_points`` with each value's flag: [(recorded_at, value, flagged)];
        ``inclusive``: files recorded at ``after`` too."""
        rows = self._one_all(
            "SELECT f.recorded_at, m.value, m.flagged FROM files f JOIN measures m "
            "ON m.file_id = f.id WHERE f.rig = ? AND f.mode = ? AND f.status = 'ok' "
            f"AND f.superseded = 0 AND f.recorded_at {'>=' if inclusive else '>'} ? "
            "AND f.recorded_at < ? AND m.channel = ? AND m.name = ? AND m.value IS NOT NULL "
            "ORDER BY f.recorded_at, f.id LIMIT ?",
            (rig, mode, -math.inf if after is None else float(after),
             math.inf if before is None else float(before), channel, measure,
             -1 if limit is None else int(limit)))
        return [(float(t), float(v), int(g)) for t, v, g in rows]

    def learning_points(self, rig: str, mode: str, channel: int, measure: str, *,
                        start: float | None, before: float, limit: int
                        ) -> list[tuple[float, float, int]]:
        """``flagged_points`` of the files recorded at or after ``start`` (to within 1 us) and
        before ``before``, the first ``limit``: the rows a reference learns from.

        Inside a write transaction (``transaction()``: the service's group of files) the rows
        are remembered per (rig, mode, channel, measure, start, limit), and a later file's call
        reads only the rows recorded since the last one's ``before``; ``commit_file`` forgets
        the entries whose rows its file changes (a row recorded before their ``before``, a
        row superseded), every other write forgets them all, and so does the transaction's
        end. The rows returned are those of the query, exactly (tests/test_pipeline_learning.py)."""
        after = None if start is None else start - 1e-6
        with self._lock:
            if not self._depth:               # outside a transaction another writer may come
                return self.flagged_points(rig, mode, channel, measure, after=after,
                                           before=before, limit=limit)
            key = (rig, mode, int(channel), measure, after, int(limit))
            got = self._learnt.get(key)
            if got is None:
                rows = self.flagged_points(rig, mode, channel, measure, after=after,
                                           before=before, limit=limit)
            else:
                hi, rows = got
                if before <= hi:              # the rows recorded earlier: a prefix of these
                    return [r for r in rows if r[0] < before]
                if len(rows) < limit:         # the rest, recorded in [hi, before)
                    rows = rows + self.flagged_points(rig, mode, channel, measure, after=hi,
                                                      inclusive=True, before=before,
                                                      limit=limit - len(rows))
            self._learnt[key] = (before, rows)
            return list(rows)

    def _forget(self, rig: str, mode: str | None = None, at: float | None = None) -> None:
        """Drop the remembered learning rows a write changed: of ``rig`` (its ``mode``; None:
        every mode) whose ``before`` lies after ``at`` (None: all of them)."""
        for key, (hi, _) in list(self._learnt.items()):
            if key[0] == rig and (mode is None or key[1] == mode) and (at is None or at < hi):
                del self._learnt[key]

    def charts(self, rig: str, mode: str | None = None) -> dict[tuple, dict[str, Any]]:
        """{(mode, channel, measure, rule): {start_at, state, ref, updated_at}} of a rig."""
        sql, params = "SELECT * FROM charts WHERE rig = ?", [rig]
        if mode is not None:
            sql += " AND mode = ?"
            params.append(mode)
        out = {}
        for r in self._rows(sql + " ORDER BY mode, channel, measure, rule", params):
            out[(r["mode"], int(r["channel"]), r["measure"], r["rule"])] = {
                "start_at": r["start_at"], "state": json.loads(r["state_json"] or "{}"),
                "ref": json.loads(r["ref_json"]) if r["ref_json"] else None,
                "updated_at": r["updated_at"]}
        return out

    def relearn(self, rig: str, at: float, *, measures: Iterable[str] | None = None,
                channel: int | None = None, keys: Iterable[tuple] = (),
                now: float) -> list[tuple]:
        """Start the references of a rig's charts again from files recorded at or after ``at``
        (optionally only of some measures or one channel): references forgotten, charts reset.
        ``keys`` adds (mode, channel, measure, rule) charts not stored yet. Returns the keys."""
        measures = None if measures is None else set(measures)
        chosen = []
        for key in list(self.charts(rig)) + list(keys):
            mode, ch, measure, rule = key
            if (measures is None or measure in measures) and (channel is None or ch == channel) \
                    and key not in chosen:
                chosen.append(key)
        with self._write() as conn:
            for mode, ch, measure, rule in chosen:
                conn.execute(
                    "INSERT INTO charts (rig, mode, channel, measure, rule, start_at, state_json, "
                    "ref_json, updated_at) VALUES (?,?,?,?,?,?,?,NULL,?) "
                    "ON CONFLICT (rig, mode, channel, measure, rule) DO UPDATE SET "
                    "start_at = excluded.start_at, state_json = excluded.state_json, "
                    "ref_json = NULL, updated_at = excluded.updated_at",
                    (rig, mode, int(ch), measure, rule, float(at), _dumps({}), float(now)))
        return chosen

    @staticmethod
    def _upsert_charts(conn: sqlite3.Connection, rig: str, charts: Iterable[dict],
                       now: float) -> None:
        for c in charts:
            conn.execute(
                "INSERT INTO charts (rig, mode, channel, measure, rule, start_at, state_json, "
                "ref_json, updated_at) VALUES (?,?,?,?,?,?,?,?,?) "
                "ON CONFLICT (rig, mode, channel, measure, rule) DO UPDATE SET "
                "start_at = excluded.start_at, state_json = excluded.state_json, "
                "ref_json = excluded.ref_json, updated_at = excluded.updated_at",
                (rig, c["mode"], int(c["channel"]), c["measure"], c["rule"],
                 _real(c.get("start_at")), _dumps(c.get("state") or {}),
                 None if c.get("ref") is None else _dumps(c["ref"]), float(now)))

    def _one_all(self, sql: str, params: Iterable[Any] = ()) -> list[tuple]:
        with self._lock, self._reading():
            return self.db.conn.execute(sql, tuple(params)).fetchall()

    def reference_spectrum(self, rig: str, mode: str, channel: int, *, limit: int = 30,
                           days: float = 30.0, before: float) -> Spectrum | None:
        """Per-frequency median of the last ``limit`` spectra whose noise, hum and band
        measures were not flagged (same frequency grid and unit as the newest of them), or None
        when there is none."""
        rows = self._one_all(
            "SELECT s.unit, s.freqs, s.density FROM files f JOIN spectra s ON s.file_id = f.id "
            "WHERE f.rig = ? AND f.mode = ? AND f.status = 'ok' "
            "AND f.superseded = 0 AND f.recorded_at < ? AND f.recorded_at >= ? "
            "AND s.channel = ? AND NOT EXISTS (SELECT 1 FROM measures m WHERE "
            "m.file_id = f.id AND m.channel = s.channel AND m.flagged = 1 AND "
            "(m.name LIKE 'noise%' OR m.name LIKE 'hum%' OR m.name LIKE 'band%')) ORDER BY f.recorded_at DESC, f.id DESC LIMIT ?",
            (rig, mode, before, before - days * 86400.0, channel, int(limit)))
        if not rows:
            return None
        unit, freqs, _ = rows[0]
        same = [np.frombuffer(d, dtype="<f4") for u, f, d in rows if u == unit and f == freqs]
        median = np.median(np.vstack(same).astype(np.float64), axis=0)
        return Spectrum(freqs_hz=_from_f32(freqs), density=tuple(float(x) for x in median),
                        unit=unit)

    def good_file_count(self, rig: str, mode: str) -> int:
        """Files of the rig/mode that can give values to the baseline: ok and current."""
        return int(self._one("SELECT count(*) FROM files WHERE rig = ? AND mode = ? AND "
                             "status = 'ok' AND superseded = 0",
                             (rig, mode))[0])

    # --- one processed file ---------------------------------------------------------------------

    def commit_file(self, rig: str, fm: FileMeasures, *, analysed_at: float,
                    findings: Iterable[Finding] = (), alert_states: Iterable[dict] = (),
                    messages: Iterable[Message] = (), charts: Iterable[dict] = ()) -> int:
        """Store everything of one processed file in ONE transaction; returns the file id.

        Content already stored for the rig (same sha256, current row) is not stored again
        (unless the old row was an error and this one is ok, which re-measures it): for the
        same path the row's size and mtime are brought up to date and its id returned; another
        path gets a row of its own, status 'skipped' pointing to the first (``extra.same_as``,
        no measures, so history counts the content once), or an error row like the first's.
        Otherwise an older row of the same rig/path is marked superseded. ``charts``: the drift
        charts' new states ({mode, channel, measure, rule, start_at, state, ref}) after this
        file.
        """
        charts = list(charts)
        findings = list(findings)
        alert_states = list(alert_states)
        messages = list(messages)
        any_bad, named = _bad_targets(findings)
        path, raw = _path_key(fm.path)
        self._kept = True                     # this write says below which rows it changes
        try:
            return self._commit_file(rig, fm, analysed_at, findings, alert_states, messages,
                                     charts, any_bad, named, path, raw)
        finally:
            self._kept = False

    def _commit_file(self, rig: str, fm: FileMeasures, analysed_at: float,
                     findings: list, alert_states: list, messages: list, charts: list,
                     any_bad: bool, named: set, path: str, raw: bytes | None) -> int:
        with self._write() as conn:
            replaces: list[int] = []
            if fm.sha256:
                same = conn.execute("SELECT id, status FROM files WHERE rig = ? AND sha256 = ? "
                                    "AND path = ? AND path_bytes IS ? AND superseded = 0",
                                    (rig, fm.sha256, path, raw)).fetchone()
                if same is not None and not (same[1] == "error" and fm.status == "ok"):
                    conn.execute("UPDATE files SET size = ?, mtime = ? WHERE id = ?",
                                 (_plain(fm.size), _plain(fm.mtime), same[0]))
                    return int(same[0])               # touched, or committed again
                row = conn.execute("SELECT id, status FROM files WHERE rig = ? AND sha256 = ? "
                                   "AND superseded = 0 AND status != 'skipped' "
                                   "ORDER BY id DESC LIMIT 1", (rig, fm.sha256)).fetchone()
                if row is not None:
                    if not (row[1] == "error" and fm.status == "ok"):
                        first = int(row[0])
                        if row[1] == "ok":            # a copy: its own row, pointing to the first
                            fm = _copy_of(fm, first, conn)
                            findings, alert_states, messages, any_bad = [], [], [], False
                            named = set()
                    else:
                        replaces.append(int(row[0]))
            gone = conn.execute("UPDATE files SET superseded = 1 WHERE rig = ? AND path = ? AND "
                                "path_bytes IS ? AND superseded = 0", (rig, path, raw)).rowcount
            for old in replaces:
                conn.execute("UPDATE files SET superseded = 1 WHERE id = ?", (old,))
            if gone or replaces:              # rows may have left the learning rows
                self._forget(rig)
            if fm.status == "ok":             # rows joined at its time
                self._forget(rig, fm.mode, file_time(fm.recorded_at, fm.mtime,
                                                     float(analysed_at)))
            file_id = self._insert_file(conn, rig, fm, path, analysed_at, any_bad)
            if raw is not None:
                conn.execute("UPDATE files SET path_bytes = ? WHERE id = ?", (raw, file_id))
            for ch in fm.channels:
                self._insert_channel(conn, file_id, ch, named)
            conn.executemany(_INSERT_FINDING, [self._finding_row(file_id, f) for f in findings])
            self._upsert_alerts(conn, alert_states, analysed_at)
            self._queue(conn, messages, analysed_at)
            self._upsert_charts(conn, rig, charts, analysed_at)
            if self._before_commit is not None:
                self._before_commit()
        return file_id

    @staticmethod
    def _insert_file(conn: sqlite3.Connection, rig: str, fm: FileMeasures, path: str,
                     analysed_at: float, flagged: bool) -> int:
        recorded_at = file_time(fm.recorded_at, fm.mtime, float(analysed_at))
        if fm.recorded_at is not None:
            aware = isinstance(fm.recorded_at, datetime) and fm.recorded_at.tzinfo is not None
            source = "header_tz" if aware else "header"
        else:
            source = "mtime" if fm.mtime is not None else "analysed"
        cur = conn.execute(
            "INSERT INTO files (rig, path, size, mtime, sha256, recorded_at, time_source, "
            "analysed_at, status, error_kind, error, mode, format, fs_hz, duration_s, n_sweeps, "
            "gap_free, notes, extra, flagged, superseded) "
            "VALUES (?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,?,0)",
            (rig, path, _plain(fm.size), _plain(fm.mtime), fm.sha256, recorded_at, source,
             float(analysed_at), fm.status, fm.error_kind,
             None if fm.error is None else printable(fm.error), fm.mode, fm.format,
             _plain(fm.fs_hz), _plain(fm.duration_s), _plain(fm.n_sweeps),
             None if fm.gap_free is None else int(bool(fm.gap_free)),
             _dumps([printable(n) if isinstance(n, str) else n for n in fm.notes]),
             _dumps(fm.extra or {}), int(flagged)))
        return int(cur.lastrowid)

    @staticmethod
    def _insert_channel(conn: sqlite3.Connection, file_id: int, ch: ChannelMeasures,
                        named: set[tuple[int | None, str]]) -> None:
        idx = int(ch.index)
        conn.execute("INSERT INTO channels (file_id, channel, name, unit, dimension, notes) "
                     "VALUES (?,?,?,?,?,?)",
                     (file_id, idx, ch.name, ch.unit, ch.dimension, _dumps(list(ch.notes))))
        rows = []
        for key, m in ch.measures.items():
            value, kind, text = _encode_value(m.value)
            flagged = (idx, key) in named or (None, key) in named
            rows.append((file_id, idx, key, value, m.unit, kind, text, int(flagged)))
        conn.executemany("INSERT INTO measures (file_id, channel, name, value, unit, kind, json, "
                         "flagged) VALUES (?,?,?,?,?,?,?,?)", rows)
        if ch.spectrum is not None:
            sp = ch.spectrum
            if len(sp.freqs_hz) != len(sp.density):
                raise StoreError(f"{file_id}: channel {idx} spectrum has {len(sp.freqs_hz)} "
                                 f"frequencies but {len(sp.density)} densities")
            conn.execute("INSERT INTO spectra (file_id, channel, unit, freqs, density) "
                         "VALUES (?,?,?,?,?)",
                         (file_id, idx, sp.unit, _f32(sp.freqs_hz), _f32(sp.density)))

    @staticmethod
    def _finding_row(file_id: int, f: Finding) -> tuple:
        """The findings row of one finding (``_INSERT_FINDING``'s parameters)."""
        return (file_id, f.rig, f.mode, None if f.channel is None else int(f.channel),
                f.measure, f.rule, f.kind, int(bool(f.bad)), f.severity, _real(f.value), f.unit,
                None if f.limit_text is None else printable(f.limit_text),
                None if f.hint is None else printable(f.hint))

    @staticmethod
    def _upsert_alerts(conn: sqlite3.Connection, states: Iterable[dict], now: float) -> None:
        for st in states:
            ch = st.get("channel")
            announced = _plain(st.get("announced"))
            conn.execute(
                "INSERT INTO alerts (key, rig, mode, channel, measure, rule, state, state_json, "
                "opened_at, updated_at, resolved_at, announced) VALUES (?,?,?,?,?,?,?,?,?,?,?,?) "
                "ON CONFLICT(key) DO UPDATE SET rig = excluded.rig, mode = excluded.mode, "
                "channel = excluded.channel, measure = excluded.measure, rule = excluded.rule, "
                "state = excluded.state, state_json = excluded.state_json, "
                "opened_at = excluded.opened_at, updated_at = excluded.updated_at, "
                "resolved_at = excluded.resolved_at, announced = excluded.announced",
                (str(st["key"]), st.get("rig"), st.get("mode"),
                 None if ch is None else int(ch), st.get("measure"), st.get("rule"),
                 st.get("state"), _dumps(_printable_path(st)), _real(st.get("opened_at")),
                 float(now), _real(st.get("resolved_at")),
                 int(announced) if isinstance(announced, (bool, int)) else
                 (None if announced is None else int(bool(announced)))))

    @staticmethod
    def _queue(conn: sqlite3.Connection, messages: Iterable[Message], now: float) -> None:
        for m in messages:
            conn.execute(
                "INSERT OR IGNORE INTO outbox (alert_key, transition, kind, priority, rig, title, "
                "body, created_at, status, attempts, next_at, attachment_name, attachment, "
                "targets) VALUES (?,?,?,?,?,?,?,?,'pending',0,?,?,?,?)",
                (m.alert_key, int(m.transition), m.kind, int(m.priority), m.rig,
                 None if m.title is None else printable(m.title),
                 None if m.body is None else printable(m.body), float(now), float(now),
                 getattr(m, "attachment_name", None), getattr(m, "attachment", None),
                 _dumps(list(m.targets)) if getattr(m, "targets", ()) else None))

    def commit_alerts(self, alert_states: Iterable[dict] = (), messages: Iterable[Message] = (),
                      *, now: float | None = None) -> None:
        """Alert states and outbox rows without a file (mute ends, digests), one transaction.

        ``now`` (Unix seconds) stamps updated_at/created_at; None takes the current time.
        """
        import time
        now = time.time() if now is None else float(now)
        with self._write() as conn:
            self._upsert_alerts(conn, list(alert_states), now)
            self._queue(conn, list(messages), now)

    # --- alerts -----------------------------------------------------------------------------------

    def alert_states(self, rig: str | None = None) -> dict[str, dict]:
        """{key: the state dict as stored} for one rig (every rig when None)."""
        sql, params = "SELECT key, state_json FROM alerts", ()
        if rig is not None:
            sql, params = sql + " WHERE rig = ?", (rig,)
        return {k: json.loads(s) for k, s in self._one_all(sql + " ORDER BY key", params)}

    _OPEN = "state NOT IN ('ok', 'suspect')"

    def open_alerts(self, rig: str | None = None) -> list[dict[str, Any]]:
        """Alerts in any state but 'ok' and 'suspect', oldest opening first."""
        sql, params = f"SELECT * FROM alerts WHERE {self._OPEN}", []
        if rig is not None:
            sql += " AND rig = ?"
            params.append(rig)
        return [_alert_row(r) for r in self._rows(sql + " ORDER BY opened_at, key", params)]

    def recent_alerts(self, since: float, rig: str | None = None) -> list[dict[str, Any]]:
        """Alerts back to 'ok' with resolved_at >= since, newest first."""
        sql, params = "SELECT * FROM alerts WHERE resolved_at >= ? AND state = 'ok'", [since]
        if rig is not None:
            sql += " AND rig = ?"
            params.append(rig)
        return [_alert_row(r) for r in self._rows(sql + " ORDER BY resolved_at DESC", params)]

    # --- outbox ----------------------------------------------------------------------------------

    def outbox_due(self, now: float, limit: int = 50) -> list[dict[str, Any]]:
        """Pending rows with next_at <= now, oldest first."""
        return self._rows("SELECT * FROM outbox WHERE status = 'pending' AND next_at <= ? "
                          "ORDER BY created_at, id LIMIT ?", (now, int(limit)))

    def mark_sent(self, id: int, now: float) -> None:
        with self._write() as conn:
            conn.execute("UPDATE outbox SET status = 'sent', sent_at = ?, attempts = attempts + 1"
                         " WHERE id = ?", (now, id))

    def mark_retry(self, id: int, now: float, next_at: float, error: str) -> None:
        """One more failed attempt; try again at ``next_at``. ``error`` must be redacted."""
        with self._write() as conn:
            conn.execute("UPDATE outbox SET attempts = attempts + 1, next_at = ?, last_error = ?"
                         " WHERE id = ? AND status = 'pending'", (next_at, error, id))

    def mark_stuck(self, id: int, now: float, error: str) -> None:
        """Give up retrying; the row stays, shown by ``qcd alerts`` and the report."""
        with self._write() as conn:
            conn.execute("UPDATE outbox SET status = 'stuck', attempts = attempts + 1, "
                         "last_error = ?, next_at = ? WHERE id = ? AND status = 'pending'",
                         (error, now, id))

    def outbox_row(self, alert_key: str, transition: int = 0) -> dict[str, Any] | None:
        """The outbox row of (alert_key, transition), whatever its status, or None."""
        rows = self._rows("SELECT * FROM outbox WHERE alert_key = ? AND transition = ?",
                          (alert_key, int(transition)))
        return rows[0] if rows else None

    def last_outbox(self, kind: str) -> dict[str, Any] | None:
        """The newest outbox row of ``kind`` (by created_at), or None."""
        rows = self._rows("SELECT * FROM outbox WHERE kind = ? ORDER BY created_at DESC, id DESC "
                          "LIMIT 1", (kind,))
        return rows[0] if rows else None

    def outbox_counts(self) -> dict[str, int]:
        counts = {"pending": 0, "sent": 0, "stuck": 0}
        for status, n in self._one_all("SELECT status, count(*) FROM outbox GROUP BY status"):
            counts[status] = int(n)
        return counts

    def stuck_rows(self) -> list[dict[str, Any]]:
        return self._rows("SELECT * FROM outbox WHERE status = 'stuck' ORDER BY created_at, id")

    # --- mutes -----------------------------------------------------------------------------------

    def add_mute(self, rig_glob: str, rule_glob: str, start_at: float, end_at: float | None,
                 reason: str, now: float) -> int:
        """Mute messages of rigs/rules matching the globs; end_at None: until resolved."""
        if end_at is not None and end_at <= start_at:
            raise StoreError(f"{self.path}: a mute must end after it starts")
        with self._write() as conn:
            cur = conn.execute("INSERT INTO mutes (rig_glob, rule_glob, start_at, end_at, "
                               "reason, created_at) VALUES (?,?,?,?,?,?)",
                               (rig_glob, rule_glob, float(start_at),
                                None if end_at is None else float(end_at), reason or "",
                                float(now)))
            return int(cur.lastrowid)

    def active_mutes(self, now: float) -> list[Mute]:
        rows = self._one_all("SELECT id, rig_glob, rule_glob, start_at, end_at, reason FROM "
                             "mutes WHERE start_at <= ? AND (end_at IS NULL OR end_at > ?) "
                             "ORDER BY start_at, id", (now, now))
        return [Mute(*r) for r in rows]

    def end_mute(self, id: int, now: float) -> bool:
        """End a mute now; False when it had already ended (or does not exist)."""
        with self._write() as conn:
            cur = conn.execute("UPDATE mutes SET end_at = ? WHERE id = ? AND "
                               "(end_at IS NULL OR end_at > ?)", (now, id, now))
            return cur.rowcount == 1

    # --- logbook -------------------------------------------------------------------------------

    def add_note(self, rig: str, text: str, at: float, *, kind: str = "note",
                 now: float | None = None) -> int:
        """Write a logbook note for ``rig`` about something done at ``at`` (Unix seconds);
        ``kind`` says what wrote it ('note' for ``qcd note``, 'relearn' for a re-learn)."""
        import time
        text = " ".join(str(text).split())
        if not text or not rig:
            raise StoreError(f"{self.path}: a note needs a rig and a text")
        with self._write() as conn:
            cur = conn.execute("INSERT INTO notes (rig, at, text, kind, created_at) "
                               "VALUES (?,?,?,?,?)", (rig, float(at), text, kind,
                                                      time.time() if now is None else float(now)))
            return int(cur.lastrowid)

    def notes(self, rig: str | None = None, since: float | None = None,
              until: float | None = None) -> list[dict[str, Any]]:
        """Logbook notes (id, rig, at, text, kind, created_at) with since <= at < until,
        oldest first."""
        where, params = [], []
        for clause, value in (("rig = ?", rig), ("at >= ?", since), ("at < ?", until)):
            if value is not None:
                where.append(clause)
                params.append(value)
        sql = "SELECT * FROM notes" + (" WHERE " + " AND ".join(where) if where else "")
        return self._rows(sql + " ORDER BY at, id", params)

    # --- heartbeat -------------------------------------------------------------------------------

    def beat(self, pid: int, host: str, started_at: float, now: float, queue_len: int,
             state: dict | None = None) -> None:
        with self._write() as conn:
            conn.execute("INSERT INTO heartbeat (id, pid, host, started_at, beat_at, queue_len, "
                         "state_json) VALUES (1,?,?,?,?,?,?) ON CONFLICT(id) DO UPDATE SET "
                         "pid = excluded.pid, host = excluded.host, "
                         "started_at = excluded.started_at, beat_at = excluded.beat_at, "
                         "queue_len = excluded.queue_len, state_json = excluded.state_json",
                         (int(pid), host, float(started_at), float(now), int(queue_len),
                          _dumps(state or {})))

    def heartbeat(self) -> dict[str, Any] | None:
        """{pid, host, started_at, beat_at, queue_len, state} of the last beat, or None."""
        rows = self._rows("SELECT pid, host, started_at, beat_at, queue_len, state_json "
                          "FROM heartbeat WHERE id = 1")
        if not rows:
            return None
        row = rows[0]
        row["state"] = json.loads(row.pop("state_json") or "{}")
        return row

    # --- reads for the report --------------------------------------------------------------------

    def rigs(self) -> list[str]:
        """Names of the rigs with stored files, alerts or notes, sorted."""
        return [r[0] for r in self._one_all(
            "SELECT rig FROM files UNION SELECT rig FROM alerts WHERE rig IS NOT NULL "
            "UNION SELECT rig FROM notes ORDER BY 1")]

    def files(self, rig: str | None = None, since: float | None = None,
              until: float | None = None, *, include_superseded: bool = False,
              or_analysed: bool = False) -> list[dict[str, Any]]:
        """File rows (notes/extra decoded) with since <= recorded_at < until, oldest first;
        ``or_analysed``: also those measured since ``since`` (a copied-in old recording)."""
        where, params = [], []
        if not include_superseded:
            where.append("superseded = 0")
        if rig is not None:
            where.append("rig = ?")
            params.append(rig)
        if since is not None and or_analysed:
            where.append("(recorded_at >= ? OR analysed_at >= ?)")
            params += [since, since]
        elif since is not None:
            where.append("recorded_at >= ?")
            params.append(since)
        if until is not None:
            where.append("recorded_at < ?")
            params.append(until)
        sql = "SELECT * FROM files" + (" WHERE " + " AND ".join(where) if where else "")
        rows = self._rows(sql + " ORDER BY recorded_at, id", params)
        for r in rows:
            r["notes"] = json.loads(r["notes"])
            r["extra"] = json.loads(r["extra"])
            r["gap_free"] = None if r["gap_free"] is None else bool(r["gap_free"])
            r["flagged"], r["superseded"] = bool(r["flagged"]), bool(r["superseded"])
        return rows

    def files_measured_with_odd_times(self, rig: str, since: float, *, trust_from: float,
                                      ahead_s: float = 86400.0) -> list[dict[str, Any]]:
        """Current files measured at or after ``since`` whose recorded time cannot be right:
        before ``trust_from`` (a clock reset to 1980 or 1970) or more than ``ahead_s`` after
        they were measured. Same row form as ``files``."""
        rows = self._rows("SELECT * FROM files WHERE superseded = 0 AND rig = ? AND "
                          "analysed_at >= ? AND (recorded_at < ? OR recorded_at > analysed_at "
                          "+ ?) ORDER BY analysed_at, id", (rig, since, trust_from, ahead_s))
        for r in rows:
            r["notes"] = json.loads(r["notes"])
            r["extra"] = json.loads(r["extra"])
            r["gap_free"] = None if r["gap_free"] is None else bool(r["gap_free"])
            r["flagged"], r["superseded"] = bool(r["flagged"]), bool(r["superseded"])
        return rows

    def measure_series(self, rig: str, measure: str, *, channel: int | None = None,
                       since: float | None = None
                       ) -> list[tuple[float, float, str, bool, int, str]]:
        """[(recorded_at, value, unit, flagged, file_id, path)] of current ok files, oldest first."""
        sql = ("SELECT f.recorded_at, m.value, m.unit, m.flagged, f.id, f.path FROM files f "
               "JOIN measures m ON m.file_id = f.id WHERE f.rig = ? AND f.status = 'ok' AND "
               "f.superseded = 0 AND m.name = ? AND m.value IS NOT NULL")
        params: list[Any] = [rig, measure]
        if channel is not None:
            sql += " AND m.channel = ?"
            params.append(channel)
        if since is not None:
            sql += " AND f.recorded_at >= ?"
            params.append(since)
        rows = self._one_all(sql + " ORDER BY f.recorded_at, f.id, m.channel", params)
        return [(float(t), float(v), u, bool(fl), int(i), p) for t, v, u, fl, i, p in rows]

    def channel_names(self, rig: str, since: float | None = None) -> dict[int, str]:
        """{channel: its name in the rig's latest current file holding it} (files recorded at
        or after ``since``), by channel number."""
        sql = ("SELECT c.channel, c.name FROM channels c JOIN files f ON f.id = c.file_id "
               "WHERE f.rig = ? AND f.superseded = 0")
        params: list[Any] = [rig]
        if since is not None:
            sql += " AND f.recorded_at >= ?"
            params.append(since)
        names: dict[int, str] = {}
        for ch, name in self._one_all(sql + " ORDER BY f.recorded_at, f.id", params):
            names[int(ch)] = "" if name in (None, "?") else name       # '?': the header has none
        return dict(sorted(names.items()))

    def spectrum(self, file_id: int, channel: int) -> Spectrum | None:
        row = self._one("SELECT unit, freqs, density FROM spectra WHERE file_id = ? AND "
                        "channel = ?", (file_id, channel))
        if row is None:
            return None
        return Spectrum(freqs_hz=_from_f32(row[1]), density=_from_f32(row[2]), unit=row[0])

    def findings(self, file_id: int) -> list[dict[str, Any]]:
        rows = self._rows("SELECT * FROM findings WHERE file_id = ? ORDER BY id", (file_id,))
        for r in rows:
            r["bad"] = bool(r["bad"])
        return rows

    def measured(self, file_id: int) -> FileMeasures | None:
        """A stored file as the FileMeasures it was committed from (values exactly as they
        were; without spectra, whose store is float32), or None."""
        rows = self._rows("SELECT * FROM files WHERE id = ?", (file_id,))
        if not rows:
            return None
        f = rows[0]
        values: dict[int, dict[str, Measure]] = {}
        for ch, name, value, unit, kind, text in self._one_all(
                "SELECT channel, name, value, unit, kind, json FROM measures WHERE file_id = ? "
                "ORDER BY rowid", (file_id,)):
            values.setdefault(int(ch), {})[name] = Measure(name, _decode_value(value, kind, text),
                                                           unit)
        channels = tuple(
            ChannelMeasures(index=int(c), name=name or "", unit=unit or "", dimension=dim or "",
                            measures=values.get(int(c), {}), notes=tuple(json.loads(notes)))
            for c, name, unit, dim, notes in self._one_all(
                "SELECT channel, name, unit, dimension, notes FROM channels WHERE file_id = ? "
                "ORDER BY channel", (file_id,)))
        recorded = None
        if f["time_source"] in ("header", "header_tz") and f["recorded_at"] is not None:
            recorded = datetime.fromtimestamp(f["recorded_at"], timezone.utc)
            if f["time_source"] == "header":
                recorded = recorded.replace(tzinfo=None)      # naive, as the header gave it
        return FileMeasures(
            path=f["path"], status=f["status"], error=f["error"], error_kind=f["error_kind"],
            mode=f["mode"] or "unknown", format=f["format"] or "", fs_hz=f["fs_hz"],
            duration_s=f["duration_s"], n_sweeps=f["n_sweeps"],
            gap_free=None if f["gap_free"] is None else bool(f["gap_free"]), recorded_at=recorded,
            size=f["size"], mtime=f["mtime"], sha256=f["sha256"], channels=channels,
            notes=tuple(json.loads(f["notes"])), extra=json.loads(f["extra"]))


def _copy_of(fm: FileMeasures, first: int, conn: sqlite3.Connection) -> FileMeasures:
    """The row of a file whose content is already stored as file ``first``: 'skipped'."""
    from dataclasses import replace
    where = conn.execute("SELECT path FROM files WHERE id = ?", (first,)).fetchone()[0]
    return replace(fm, status="skipped", error_kind=None, channels=(),
                   error=f"{printable(fm.path)}: same content as {where} (file {first}), "
                         f"not measured again",
                   extra={**(fm.extra or {}), "same_as": first})


def _printable_path(st: dict) -> dict:
    """An alert state whose file path is shown escaped when its name is not UTF-8."""
    p = st.get("path")
    if isinstance(p, str) and path_bytes(p) is not None:
        return {**st, "path": printable(p)}
    return st


def _alert_row(r: dict[str, Any]) -> dict[str, Any]:
    r["details"] = json.loads(r.pop("state_json"))
    if r.get("announced") is not None:
        r["announced"] = bool(r["announced"])
    return r
