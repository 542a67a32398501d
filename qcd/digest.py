"""The daily report ("digest"): once a day, at the lab's local time (``[digest] at``), the
service queues the report of the period since the last one in the outbox: a short text body
(rigs ranked by severity, one line each: state, what changed, the hint) with the
self-contained HTML page attached where the target takes attachments.

Exactly one a day: the outbox row's key is ``daily-report|<local date>`` and the outbox keeps
(key, transition) unique, so a restart, a second service or a retry never queues another.
A report whose time passed while the service was not running is queued when it starts,
saying it is late (once reports have begun: a new installation sends its first on time). ``qcd digest --now`` queues one by hand (its own key), ``--dry-run``
prints it.

Imports qcd.report (the report's data and page), qcd.alerts (Message), qcd.zones; the Store
it is given.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import TYPE_CHECKING, Any, Callable

from qcd.alerts import PRIORITY, Message
from qcd.report import Report, build_report, render_html, summary_line
from qcd.zones import local_date, local_day_start, local_text, zone_name

if TYPE_CHECKING:
    from qcd.config import Config
    from qcd.store import Store

__all__ = ["KIND", "Digest", "build_digest", "digest_text", "last_due", "queue_due",
           "queue_now", "scheduler", "describe", "LATE_AFTER_S", "DEFAULT_PERIOD_S"]

KIND = "report"                    # the outbox kind of daily reports
LATE_AFTER_S = 15 * 60.0           # queued this long after its time: it says it is late
DEFAULT_PERIOD_S = 24 * 3600.0     # the period when no report was sent before
MAX_PERIOD_S = 7 * 86400.0         # after a long break the report covers the last week


@dataclass(frozen=True)
class Digest:
    key: str                       # outbox key: 'daily-report|2026-11-03'
    title: str
    body: str                      # the short text summary
    html: str                      # the whole report page (self-contained)
    attachment_name: str
    since: float
    due_at: float | None           # the scheduled time it is for (None: by hand)
    late: bool
    report: Report


def last_due(now: float, at: str, zone: str | None) -> float:
    """The latest scheduled time (``at`` local, HH:MM) not after ``now``."""
    today = local_day_start(now, zone, at)
    if today <= now:
        return today
    return local_day_start(now - 86400.0, zone, at)  # yesterday's (DST-aware via the wall clock)


def _since(store: Store, now: float) -> float:
    last = store.last_outbox(KIND)
    if last is None:
        return now - DEFAULT_PERIOD_S
    return max(float(last["created_at"]), now - MAX_PERIOD_S)


def digest_text(report: Report, *, late_note: str = "", attachment: str = "") -> str:
    """The message body: the period, then one line per rig, worst first (state, what changed,
    the hint)."""
    z = report.timezone
    out = [f"qcd daily report, {local_text(report.since, z)} to "
           f"{local_text(report.generated_at, z)}"]
    if late_note:
        out.append(late_note)
    bad = [s for s in report.summary if s.severity >= 2]
    out.append(f"{len(report.summary)} rig(s); " + (f"{len(bad)} need attention:" if bad else
                                                   "none needs attention."))
    for i, s in enumerate(report.summary, start=1):
        out.append(f"{i}. {summary_line(s)}")
    if report.outbox.get("stuck"):
        out.append(f"{report.outbox['stuck']} message(s) could not be delivered: see qcd alerts")
    if attachment:
        out.append(f"The full report with plots is attached ({attachment}) where this channel "
                   f"takes attachments; else run: qcd report --html report.html")
    return "\n".join(out)


def build_digest(store: Store, config: Config, now: float, *, due_at: float | None = None,
                 since: float | None = None) -> Digest:
    """The report of the period since the last daily report (24 h for the first one)."""
    zone = config.timezone
    since = _since(store, now) if since is None else since
    zones = {r.name: r.timezone for r in config.rigs}
    report = build_report(store, now, since, zones=zones, lab_zone=zone)
    day = local_date(due_at if due_at is not None else now, zone)
    late = due_at is not None and now - due_at > LATE_AFTER_S
    late_note = ""
    if late:
        late_note = (f"Late: this report was due at {local_text(due_at, zone)}; the service "
                     f"was not running then and sends it now that it has started.")
    name = f"qcd-report-{day}.html"
    bad = [s for s in report.summary if s.severity >= 2]
    head = (f"{len(bad)} rig(s) need attention: " + ", ".join(s.rig for s in bad[:4])
            + (" ..." if len(bad) > 4 else "")) if bad else "all rigs as usual"
    title = f"qcd daily report {day}{' (late)' if late else ''}: {head}"[:160]
    key = f"daily-report|{day}" if due_at is not None else f"daily-report-by-hand|{now:.3f}"
    return Digest(key, title, digest_text(report, late_note=late_note, attachment=name),
                  render_html(report), name, since, due_at, late, report)


def _message(d: Digest, targets: tuple[str, ...]) -> Message:
    return Message(alert_key=d.key, transition=0, kind=KIND, priority=PRIORITY["reminder"],
                   rig="*", title=d.title, body=d.body, attachment_name=d.attachment_name,
                   attachment=d.html, targets=tuple(targets))


def queue_due(store: Store, config: Config, now: float) -> Digest | None:
    """Queue today's report when its time has passed and it is not queued yet (also the one a
    stopped service missed: it says it is late); None when nothing is due."""
    dc = config.digest
    if dc is None or not dc.enabled:
        return None
    due_at = last_due(now, dc.at, config.timezone)
    key = f"daily-report|{local_date(due_at, config.timezone)}"
    if store.outbox_row(key) is not None:
        return None
    if now - due_at > LATE_AFTER_S and store.last_outbox(KIND) is None:
        return None              # never sent one: nothing was missed; the first comes on time
    d = build_digest(store, config, now, due_at=due_at)
    store.commit_alerts((), [_message(d, dc.targets)], now=now)
    return d


def queue_now(store: Store, config: Config, now: float) -> Digest:
    """A report by hand (``qcd digest --now``): queued at once, not counted as the day's."""
    d = build_digest(store, config, now)
    targets = config.digest.targets if config.digest is not None else ()
    store.commit_alerts((), [_message(d, targets)], now=now)
    return d


def scheduler(config: Config, store: Store) -> Callable[[float], Any] | None:
    """The service's daily step (``watch.Service(daily=...)``), None without ``[digest]``."""
    if config.digest is None or not config.digest.enabled:
        return None
    return lambda now: queue_due(store, config, now)


def describe(config: Config) -> str:
    """'daily report at 07:30 Europe/Berlin' for the service's start line."""
    dc = config.digest
    if dc is None or not dc.enabled:
        return "no daily report ([digest] not set)"
    return f"daily report at {dc.at} {zone_name(config.timezone)}"
