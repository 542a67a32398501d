"""What `qcd status` shows: is the service alive (heartbeat age, pid), its queue, the last
file per rig, open alerts and the outbox, as a dict and as plain text.

Reads the store only. Imports qcd.workers (pid checks) and qcd.zones (local times).
"""
from __future__ import annotations

import socket
from typing import Any

from qcd.errors import StoreError
from qcd.workers import pid_alive
from qcd.zones import local_text

__all__ = ["status", "format_status"]


def status(store: Any, now: float, *, host: str | None = None) -> dict:
    """What `qcd status` shows: alive or not, queue, last file per rig, alerts, outbox."""
    hb = store.heartbeat()
    host = socket.gethostname() if host is None else host
    out: dict[str, Any] = {"alive": False, "reason": "the service has never run on this "
                                                     "database", "heartbeat": None}
    if hb:
        st = hb["state"]
        beat_s = float(st.get("beat_s", 5.0))
        age = now - float(hb["beat_at"])
        same_host = hb.get("host") == host
        pid_ok = pid_alive(int(hb.get("pid") or 0)) if same_host else True
        alive = (not st.get("stopped")) and age < 3 * beat_s and pid_ok
        trouble = st.get("storing_failed") if alive else None
        if trouble:
            reason = (f"storing is failing: {trouble.get('reason')} (since "
                      f"{_ago(now, trouble.get('since'))}, {trouble.get('failures')} failed "
                      f"attempt(s); the service runs, pid {hb.get('pid')} on {hb.get('host')})")
        elif alive:
            reason = f"alive (pid {hb.get('pid')} on {hb.get('host')}, last beat {age:.1f} s ago)"
        elif st.get("stopped"):
            reason = f"stopped cleanly {_ago(now, hb['beat_at'])}"
        elif not pid_ok:
            reason = (f"not running: pid {hb.get('pid')} is gone (last beat "
                      f"{_ago(now, hb['beat_at'])})")
        else:
            reason = (f"not responding: last beat {_ago(now, hb['beat_at'])} (expected every "
                      f"{beat_s:g} s)")
        out.update(alive=alive, reason=reason, heartbeat=hb, beat_age_s=age,
                   storing_failed=trouble,
                   queue_len=hb.get("queue_len"), intake=st.get("intake"),
                   measuring=st.get("measuring"), folders=st.get("folders", {}),
                   catch_up=st.get("catch_up"), counts=st.get("counts"))
    last: dict[str, Any] = {}
    out.update(last_file=last, open_alerts=[], outbox={}, read_error=None)
    try:                                       # the service's state is shown even when the
        for rig in store.rigs():               # rest of the database cannot be read
            files = store.files(rig=rig)           # oldest recording first
            if files:
                f = files[-1]                        # the last one recorded, whenever measured
                last[rig] = {"path": f.get("path"), "status": f.get("status"),
                             "recorded_at": f.get("recorded_at"),
                             "analysed_at": f.get("analysed_at"), "error": f.get("error")}
        out["open_alerts"] = list(store.open_alerts())
        out["outbox"] = store.outbox_counts()
    except StoreError as e:
        out["read_error"] = str(e)
    return out


def _when(t: float | None, zone: str | None) -> str:
    return "-" if t is None else local_text(float(t), zone)


def _ago(now: float, t: float | None) -> str:
    """'45 s ago', '12 min ago', '17 h ago', '3 days ago'."""
    if t is None:
        return "-"
    s = now - t
    if s < 0:
        return "in the future (check the clock)"
    if s < 120:
        return f"{s:.0f} s ago"
    if s < 7200:
        return f"{s / 60:.0f} min ago"
    if s < 172800:
        return f"{s / 3600:.0f} h ago"
    return f"{s / 86400:.0f} days ago"


def format_status(st: dict, now: float, *, zones: dict[str, str | None] | None = None,
                  lab_zone: str | None = None) -> str:
    """Plain text for the terminal; clock times in each rig's zone (``zones``, else
    ``lab_zone``; None: this computer's), the zone named."""
    zones = zones or {}
    lines = [f"service: {st['reason']}"]
    if st.get("alive"):
        intake = st.get("intake") or {}
        lines.append(f"queue: {st.get('queue_len', 0)} file(s) (settling live "
                     f"{intake.get('live', 0)}, backlog {intake.get('backlog', 0)}, measuring "
                     f"{st.get('measuring', 0)})")
        cu = st.get("catch_up") or {}
        if cu.get("total"):
            lines.append(f"catching up: {cu.get('done', 0)} of {cu['total']} files")
        for folder, state in (st.get("folders") or {}).items():
            lines.append(f"folder {folder}: {state}")
    if st.get("read_error"):
        lines.append(st["read_error"])
        return "\n".join(lines)
    if st["last_file"]:
        lines.append("last file recorded, per rig:")
        for rig, f in sorted(st["last_file"].items()):
            extra = f" ({f['error']})" if f.get("status") != "ok" and f.get("error") else ""
            lines.append(f"  {rig}: {f['path']}  {f['status']}{extra}, recorded "
                         f"{_when(f.get('recorded_at'), zones.get(rig, lab_zone))} "
                         f"({_ago(now, f.get('recorded_at'))}), measured "
                         f"{_ago(now, f.get('analysed_at'))}")
    else:
        lines.append("no files stored yet")
    alerts = st["open_alerts"]
    lines.append(f"open alerts: {len(alerts)}")
    for a in alerts[:20]:
        ch = a.get("channel")
        where = f" (channel {ch})" if isinstance(ch, int) and ch >= 0 else ""
        lines.append(f"  {a.get('rig')}: {a.get('measure') or ''} {a.get('rule') or ''}{where}, "
                     f"{a.get('state')} since "
                     f"{_when(a.get('opened_at'), zones.get(a.get('rig'), lab_zone))} "
                     f"({_ago(now, a.get('opened_at'))})")
    ob = st["outbox"]
    lines.append(f"messages: {ob.get('pending', 0)} pending, {ob.get('stuck', 0)} stuck, "
                 f"{ob.get('sent', 0)} sent")
    return "\n".join(lines)
