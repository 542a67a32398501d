"""What a qcd database holds, read straight from its SQLite tables for checks.

The store's own API has the reads the service needs; tests that check what was written (round
trips, flags, outbox rows) read the tables here, through the store's open connection.
"""
from __future__ import annotations

import json
from datetime import datetime, timezone
from typing import Any

from qcd.alerts import Mute
from qcd.codec import _decode_value   # the kinds as the store writes them
from qcd.results import ChannelMeasures, FileMeasures, Measure
from qcd.store import MIGRATIONS, Store


def _rows(store: Store, sql: str, params: tuple = ()) -> list[dict[str, Any]]:
    cur = store.db.conn.execute(sql, params)
    names = [d[0] for d in cur.description]
    return [dict(zip(names, row)) for row in cur.fetchall()]


def schema_steps(store: Store) -> list[str]:
    """Names of the applied schema steps, in order."""
    return [m.name for m in MIGRATIONS.applied(store.db)]


def outbox_rows(store: Store, alert_key: str | None = None) -> list[dict[str, Any]]:
    """Every outbox row (of one key), oldest first."""
    if alert_key is None:
        return _rows(store, "SELECT * FROM outbox ORDER BY created_at, id")
    return _rows(store, "SELECT * FROM outbox WHERE alert_key = ? ORDER BY created_at, id",
                 (alert_key,))


def has_content(store: Store, rig: str, sha256: str) -> bool:
    """A current (non-superseded) row of this rig holds this content."""
    return bool(_rows(store, "SELECT 1 FROM files WHERE rig = ? AND sha256 = ? AND "
                             "superseded = 0", (rig, sha256)))


def recent_mutes(store: Store, since: float) -> list[Mute]:
    """Mutes still open-ended or ending at or after ``since``."""
    return [Mute(**r) for r in _rows(
        store, "SELECT id, rig_glob, rule_glob, start_at, end_at, reason FROM mutes "
               "WHERE end_at IS NULL OR end_at >= ? ORDER BY start_at, id", (since,))]


def flagged_measures(store: Store, file_id: int) -> set[tuple[int, str]]:
    """{(channel, measure)} flagged by a bad finding."""
    return {(r["channel"], r["name"]) for r in _rows(
        store, "SELECT channel, name FROM measures WHERE file_id = ? AND flagged = 1",
        (file_id,))}


def file_measures(store: Store, file_id: int) -> dict[int, dict[str, tuple[Any, str]]]:
    """{channel: {name: (value, unit)}}, values exactly as FileMeasures carried them."""
    out: dict[int, dict[str, tuple[Any, str]]] = {}
    for r in _rows(store, "SELECT channel, name, value, unit, kind, json FROM measures "
                          "WHERE file_id = ? ORDER BY rowid", (file_id,)):
        out.setdefault(r["channel"], {})[r["name"]] = (_decode_value(r["value"], r["kind"], r["json"]),
                                                       r["unit"])
    return out


def load_file(store: Store, file_id: int) -> FileMeasures | None:
    """The stored file rebuilt as a FileMeasures (spectra as float32 gave them)."""
    rows = _rows(store, "SELECT * FROM files WHERE id = ?", (file_id,))
    if not rows:
        return None
    f = rows[0]
    measures = file_measures(store, file_id)
    channels = []
    for c in _rows(store, "SELECT channel, name, unit, dimension, notes FROM channels "
                          "WHERE file_id = ? ORDER BY rowid", (file_id,)):
        ch = c["channel"]
        ms = {k: Measure(k, v, u) for k, (v, u) in measures.get(ch, {}).items()}
        channels.append(ChannelMeasures(index=ch, name=c["name"], unit=c["unit"],
                                        dimension=c["dimension"], measures=ms,
                                        notes=tuple(json.loads(c["notes"])),
                                        spectrum=store.spectrum(file_id, ch)))
    recorded: datetime | None = None
    if f["time_source"] in ("header", "header_tz"):
        recorded = datetime.fromtimestamp(f["recorded_at"], timezone.utc)
        if f["time_source"] == "header":
            recorded = recorded.replace(tzinfo=None)
    return FileMeasures(
        path=f["path"], status=f["status"], error=f["error"], error_kind=f["error_kind"],
        mode=f["mode"], format=f["format"], fs_hz=f["fs_hz"], duration_s=f["duration_s"],
        n_sweeps=f["n_sweeps"], gap_free=None if f["gap_free"] is None else bool(f["gap_free"]),
        recorded_at=recorded, size=f["size"], mtime=f["mtime"], sha256=f["sha256"],
        channels=tuple(channels), notes=tuple(json.loads(f["notes"])),
        extra=json.loads(f["extra"]))


def seed_chart(store: Store, rig: str, chart: dict, now: float = 0.0) -> None:
    """Write one drift chart row as a re-learn or a file commit would (a known reference)."""
    with store._write() as conn:
        store._upsert_charts(conn, rig, [chart], now)
