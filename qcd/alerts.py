"""Alert lifecycle (pure): (states, findings, mutes, now, settings) -> (states, messages).

Key = (rig, mode, channel, measure, rule); states ok -> suspect -> open -> ok. Opening counts
consecutive bad files, clearing counts good files beyond the clear level, a flap guard quiets
unstable keys, reminders repeat at most every remind_h while bad files arrive. Mutes,
inhibition and the learning phase hold messages back; the state machine always runs. One
file's events become ONE message; a backlog (``batch=True`` + ``flush_digest``) becomes one
digest. Every event has a number (``seq``) so an outbox row is unique on (key, transition).
Imports only the standard library (qcd.judge's Finding and the rule settings as types).
"""
from __future__ import annotations

import fnmatch
from dataclasses import asdict, dataclass, field, fields
from typing import TYPE_CHECKING, Any, Iterable, Mapping

from qcd.units import readable
from qcd.zones import local_text

if TYPE_CHECKING:
    from qcd.ruleset import RuleSettings
    from qcd.judge import Finding

__all__ = ["AlertState", "Message", "Mute", "advance", "flush_digest", "tick", "resolve",
           "PRIORITY"]

# Outbox priorities: firing above reminders above resolved (resolved are lower priority).
PRIORITY = {"firing": 2, "unstable": 2, "digest": 2, "reminder": 1, "resolved": 0}


@dataclass
class AlertState:
    """The lifecycle of one key; ``to_dict()``/``from_dict()`` are what the store keeps."""
    key: str
    rig: str
    mode: str
    channel: int
    measure: str
    rule: str
    kind: str = "limit"
    severity: str = "warning"
    state: str = "ok"                  # the machine: ok | suspect | open
    seq: int = 0                       # number of the last event (outbox transition)
    bad_run: int = 0
    clear_run: int = 0
    opened_at: float | None = None
    resolved_at: float | None = None
    updated_at: float | None = None
    announced: bool = False            # this episode's opening has been sent
    last_sent_at: float | None = None
    flapping: bool = False
    changes: list[int] = field(default_factory=list)   # 1 per file with an open/resolve change
    stable_files: int = 0
    muted: str = ""                    # why the last message was held: mute|learning|inhibited
    mutes: list[int] = field(default_factory=list)     # until-resolved mutes used this episode
    spent: list[int] = field(default_factory=list)     # until-resolved mutes whose episode ended
    pending_resolved: bool = False     # batch mode: resolved, to be reported in the digest
    bad_files: int = 0                 # bad files in this episode
    value: float | None = None
    unit: str = ""
    limit_text: str = ""
    hint: str = ""
    path: str = ""
    open_after_files: int = 2
    resolve_after_files: int = 3
    remind_h: float = 24.0
    learning: bool = False
    headline: str = ""
    channel_name: str = ""

    def to_dict(self) -> dict[str, Any]:
        """Plain dict; ``state`` is 'open' while the flap guard holds the key open.

        What ``dataclasses.asdict`` gives (same keys, order and values, the lists copied),
        made directly: asdict's recursive deep copy was a good part of storing a file."""
        lists = (self.changes, self.mutes, self.spent)
        if all(type(v) is list and all(type(x) is int for x in v) for v in lists):
            d = {name: getattr(self, name) for name in _STATE_FIELDS}
            d["changes"], d["mutes"], d["spent"] = (list(v) for v in lists)
        else:
            d = asdict(self)
        d["machine"] = self.state
        if self.flapping:
            d["state"] = "open"
        return d

    @classmethod
    def from_dict(cls, d: Mapping[str, Any]) -> "AlertState":
        """Inverse of to_dict; extra keys are ignored."""
        data = dict(d)
        if "machine" in data:
            data["state"] = data["machine"]
        names = {f.name for f in fields(cls)}
        kw = {k: v for k, v in data.items() if k in names}
        for k in ("changes", "mutes", "spent"):
            kw[k] = list(kw.get(k) or [])
        kw["announced"] = bool(kw.get("announced", False))
        kw["flapping"] = bool(kw.get("flapping", False))
        return cls(**kw)

    @classmethod
    def new(cls, f: Finding) -> "AlertState":
        return cls(key=f.key, rig=f.rig, mode=f.mode, channel=f.channel, measure=f.measure,
                   rule=f.rule, kind=f.kind)


_STATE_FIELDS = tuple(f.name for f in fields(AlertState))


@dataclass(frozen=True)
class Message:
    """One outbox row: unique on (alert_key, transition)."""
    alert_key: str
    transition: int
    kind: str                 # firing | reminder | resolved | unstable | digest
    priority: int
    rig: str
    title: str
    body: str
    attachment_name: str | None = None   # a file sent along where the target takes one
    attachment: str | None = None        # its text (the daily report's HTML page)
    targets: tuple[str, ...] = ()        # apprise URLs or tags to send to; () = every target


@dataclass(frozen=True)
class Mute:
    """Messages of matching rigs/rules held back from start_at until end_at (a stored row)."""
    id: int
    rig_glob: str
    rule_glob: str
    start_at: float
    end_at: float | None          # None: until the muted alerts resolve
    reason: str


@dataclass(frozen=True)
class _Event:
    what: str                 # opened | reminder | resolved | unstable | stable | late | relearned
    state: AlertState
    seq: int
    note: str = ""


def _mute_for(s: AlertState, mutes: Iterable[Mute], now: float) -> Mute | None:
    """The first mute that holds this key's messages now (until-resolved ones once per episode)."""
    for mute in mutes:
        start, end = mute.start_at, mute.end_at
        if now < start or (end is not None and now >= end):
            continue
        if not fnmatch.fnmatchcase(s.rig, mute.rig_glob):
            continue
        if not fnmatch.fnmatchcase(s.rule, mute.rule_glob):
            continue
        if end is None and mute.id in s.spent:
            continue
        return mute
    return None


def _inhibited(s: AlertState, states: Mapping[str, AlertState], rig_bad: set[str]) -> bool:
    """Rig-level trouble mutes a rig's measure alerts; a hard limit mutes drift on its measure;
    an announced history alert mutes a second history rule on the same measure."""
    if s.kind == "rig":
        return False
    if s.rig in rig_bad:
        return True
    for o in states.values():
        if o is s or o.rig != s.rig or o.state != "open":
            continue
        if o.kind == "rig":
            return True
        same = (o.mode, o.channel, o.measure) == (s.mode, s.channel, s.measure)
        if s.kind == "drift" and o.kind == "limit" and same:
            return True
        # two history rules on one measure (a slow EWMA drift, then a z jump): the one that
        # spoke first speaks for both, so one change at the rig gives one alert message
        if s.kind == "drift" and o.kind == "drift" and same and o.announced and not s.announced:
            return True
    return False


def _mute_reason(s: AlertState, states: Mapping[str, AlertState], mutes: Iterable[Mute],
                 rig_bad: set[str], now: float) -> str:
    if s.learning and s.kind == "drift":
        return "learning"
    mute = _mute_for(s, mutes, now)
    if mute is not None:
        if mute.end_at is None and mute.id not in s.mutes:
            s.mutes.append(mute.id)
        return "mute"
    if _inhibited(s, states, rig_bad):
        return "inhibited"
    return ""


def _step(s: AlertState, f: Finding, now: float, settings: RuleSettings) -> list[str]:
    """Advance one key by one file; the raw events ('opened', 'resolved', 'reminder', ...)."""
    for name in ("severity", "value", "unit", "limit_text", "hint", "path", "open_after_files",
                 "resolve_after_files", "remind_h", "learning", "headline", "channel_name"):
        setattr(s, name, getattr(f, name))
    s.updated_at = now
    events: list[str] = []
    change = False
    if f.bad:
        s.clear_run = 0
        s.bad_run += 1
        if s.state == "ok":
            s.state = "suspect"
            s.bad_files = 0
        s.bad_files += 1
        if s.state == "suspect" and s.bad_run >= max(1, f.open_after_files):
            s.state, s.opened_at, s.resolved_at = "open", now, None
            s.announced = s.announced and s.flapping     # the flap guard's message still holds
            change = True
            events.append("opened")
        elif s.state == "open" and s.announced and s.last_sent_at is not None and \
                now - s.last_sent_at >= f.remind_h * 3600.0:
            events.append("reminder")
    else:
        s.bad_run = 0
        if s.state == "suspect":
            s.state = "ok"
        elif s.state == "open":
            s.clear_run = s.clear_run + 1 if f.clear else 0
            if s.clear_run >= max(1, f.resolve_after_files):
                s.state, s.resolved_at, s.clear_run = "ok", now, 0
                change = True
                events.append("resolved")
    window = settings.flap_window
    s.changes = (s.changes + [1 if change else 0])[-window:]
    if s.flapping:
        s.stable_files = 0 if change else s.stable_files + 1
        if s.stable_files >= window:
            s.flapping, s.changes, s.stable_files = False, [], 0
            return ["stable"]
        return []
    if sum(s.changes) >= settings.flap_changes:
        s.flapping, s.stable_files = True, 0
        return ["unstable"]
    return events


def _load(states: Mapping[str, AlertState | dict]) -> dict[str, AlertState]:
    return {k: (v if isinstance(v, AlertState) else AlertState.from_dict(v))
            for k, v in states.items()}


def advance(states: Mapping[str, AlertState | dict], findings: Iterable[Finding],
            mutes: Iterable[Mute], now: float, settings: RuleSettings, *,
            batch: bool = False, zones: Mapping[str, str | None] | None = None
            ) -> tuple[dict[str, AlertState], list[Message]]:
    """One file's findings -> (all states, messages: at most one per rig).

    ``states`` maps key -> AlertState or its dict. With ``batch`` no message is made: openings
    stay unannounced and announced resolutions are kept for ``flush_digest``. ``zones``
    (rig -> IANA zone, None: this computer's) says in which zone a rig's messages give times
    (UTC for a rig it does not name).
    """
    out = _load(states)
    mutes = list(mutes)
    findings = list(findings)
    rig_bad = {f.rig for f in findings if f.kind == "rig" and f.bad}
    raw: list[tuple[str, AlertState]] = []
    for f in findings:
        s = out.get(f.key)
        if s is None:
            if not f.bad:
                continue            # a key that was never bad needs no state
            s = out[f.key] = AlertState.new(f)
        for what in _step(s, f, now, settings):
            raw.append((what, s))
    events: list[_Event] = []
    for what, s in raw:
        s.seq += 1
        if what == "resolved":
            s.mutes, s.spent = [], sorted(set(s.spent) | set(s.mutes))
        if what == "resolved":      # resolutions are held only by a mute
            reason = "mute" if _mute_for(s, mutes, now) is not None else ""
        else:
            reason = _mute_reason(s, out, mutes, rig_bad, now)
        if what == "resolved":
            was = s.announced
            s.announced = False
            if not was:
                continue
            if batch:
                s.pending_resolved = True
                continue
            if reason:
                s.muted = reason
                continue
            events.append(_Event("resolved", s, s.seq))
            continue
        if what == "stable":
            if s.state == "ok" and s.announced:
                s.announced = False
                if not batch and not reason:
                    events.append(_Event("resolved", s, s.seq))
            continue
        if batch or reason:
            s.muted = reason or s.muted
            continue
        if what in ("opened", "unstable"):
            s.announced = True
        s.last_sent_at, s.muted = now, ""
        events.append(_Event(what, s, s.seq))
    if not batch:
        done = {e.state.key for e in events}
        events += _late(out, mutes, rig_bad, now, skip=done)
        events += _riders(out, events, mutes, rig_bad, now)
    return out, _group(events, now, zones)


# a reminder may come this share of its interval early when the rig gets a message anyway
_RIDE_EARLY = 0.5


def _riders(out: dict[str, AlertState], events: list[_Event], mutes: list[Mute],
            rig_bad: set[str], now: float) -> list[_Event]:
    """Reminders that ride along with a message the rig gets anyway: an open, announced alert
    of that rig whose reminder is due or nearly (at least ``_RIDE_EARLY`` of ``remind_h``
    since its last message) and which is not on its way back (no clear file since its last
    bad one, ``clear_run`` 0), though this file was not bad for it (a reading that cannot
    tell, or no finding). Without this, one fault seen by two measures sends a message a day
    for each, at different hours; with it the rig's reminders come together, one message a
    day."""
    rigs = {e.state.rig for e in events}
    done = {e.state.key for e in events}
    riders = []
    for s in sorted(out.values(), key=lambda x: x.key):
        if s.rig not in rigs or s.key in done or s.state != "open" or not s.announced \
                or s.flapping or s.last_sent_at is None:
            continue
        if now - s.last_sent_at < _RIDE_EARLY * s.remind_h * 3600.0 or s.clear_run:
            continue
        if _mute_reason(s, out, mutes, rig_bad, now):
            continue
        s.seq += 1
        s.last_sent_at, s.muted = now, ""
        riders.append(_Event("reminder", s, s.seq))
    return riders


def resolve(states: Mapping[str, AlertState | dict], keys: Iterable[str], now: float,
            why: str, *, zones: Mapping[str, str | None] | None = None
            ) -> tuple[dict[str, AlertState], list[Message]]:
    """Resolve the open (or suspect) alerts of ``keys`` by hand, saying ``why`` (a re-learn):
    (all states, one message per rig for those whose opening had been announced)."""
    out = _load(states)
    events = []
    for key in sorted(set(keys)):
        s = out.get(key)
        if s is None or (s.state == "ok" and not s.flapping):
            continue
        was_open = s.state == "open" or s.flapping
        s.state, s.bad_run, s.clear_run = "ok", 0, 0
        s.flapping, s.stable_files, s.changes = False, 0, []
        if was_open:
            s.resolved_at = now
        s.updated_at = now
        s.seq += 1
        s.mutes, s.spent = [], sorted(set(s.spent) | set(s.mutes))
        if s.announced:
            events.append(_Event("relearned", s, s.seq, why))
        s.announced = False
    return out, _group(events, now, zones)


def _late(out: dict[str, AlertState], mutes: list[Mute], rig_bad: set[str], now: float,
          skip: set[str] = frozenset()) -> list[_Event]:
    """Open keys never announced (held by a mute that ended, inhibition, learning): announce."""
    events = []
    for s in sorted(out.values(), key=lambda x: x.key):
        if s.key in skip or s.state != "open" or s.announced:
            continue
        if _mute_reason(s, out, mutes, rig_bad, now):
            continue
        s.seq += 1
        s.announced, s.last_sent_at = True, now
        events.append(_Event("unstable" if s.flapping else "late", s, s.seq))
        s.muted = ""
    return events


def tick(states: Mapping[str, AlertState | dict], mutes: Iterable[Mute], now: float,
         settings: RuleSettings, *, zones: Mapping[str, str | None] | None = None
         ) -> tuple[dict[str, AlertState], list[Message]]:
    """No new file: announce open alerts whose mute has ended (one message per rig)."""
    out = _load(states)
    return out, _group(_late(out, list(mutes), set(), now), now, zones)


def flush_digest(states: Mapping[str, AlertState | dict], mutes: Iterable[Mute],
                 now: float, settings: RuleSettings, *,
                 zones: Mapping[str, str | None] | None = None
                 ) -> tuple[dict[str, AlertState], Message | None]:
    """After a backlog: ONE message listing what opened and what resolved, or None."""
    out = _load(states)
    # Opened during the backlog itself, not held back by a mute: say so plainly.
    events = [_Event("backlog", e.state, e.seq) if e.what == "late" else e
              for e in _late(out, list(mutes), set(), now)]
    for s in sorted(out.values(), key=lambda x: x.key):
        if s.pending_resolved:
            s.pending_resolved = False
            s.seq += 1
            events.append(_Event("resolved", s, s.seq))
    if not events:
        return out, None
    first = min(events, key=lambda e: (e.state.key, e.seq))
    rigs = sorted({e.state.rig for e in events})
    n_open = sum(e.what != "resolved" for e in events)
    n_res = len(events) - n_open
    title = (f"qcd digest of the files caught up on: {n_open} open, {n_res} resolved "
             f"({', '.join(rigs)})")
    body = _body(sorted(events, key=lambda e: (e.what == "resolved", e.state.key)), zones)
    return out, Message(alert_key=f"digest:{first.state.key}", transition=first.seq,
                        kind="digest", priority=PRIORITY["digest"] if n_open else
                        PRIORITY["resolved"], rig=rigs[0] if len(rigs) == 1 else "*",
                        title=title, body=body)


# --- message text ---------------------------------------------------------------------------------

_HEAD = {"opened": "OPEN", "late": "OPEN (held back until now)", "backlog": "OPEN",
         "reminder": "STILL BAD", "resolved": "RESOLVED", "unstable": "UNSTABLE",
         "relearned": "RESOLVED (re-learned)"}
_KIND = {"opened": "firing", "late": "firing", "backlog": "firing", "reminder": "reminder",
         "resolved": "resolved", "unstable": "unstable", "relearned": "resolved"}


def _when(t: float | None, zone: str | None = "UTC") -> str:
    """'2026-11-03 08:00 PST': the time in the rig's zone, the zone named."""
    return local_text(t, zone)


def _value(s: AlertState) -> str:
    """'6.09 uV': in the unit that reads best, as the report (the stored unit may be mV)."""
    return "-" if s.value is None else readable(s.value, s.unit, digits=4)


def _what(s: AlertState) -> str:
    name = f" ({s.channel_name})" if s.channel_name else ""
    where = "" if s.channel < 0 else f" channel {s.channel}{name}"
    return f"{s.measure}{where}" if s.measure != "file" else "file intake"


def _body(events: list[_Event], zones: Mapping[str, str | None] | None = None) -> str:
    """The events described one after another. When every one of several carries the same
    hint (one file's noise alerts share their noise-source hint), it is said once, after them."""
    hints = {e.state.hint if _shows_hint(e) else "" for e in events}
    shared = hints.pop() if len(events) > 1 and len(hints) == 1 else ""
    parts = [_describe(e, zones, hint=not shared) for e in events]
    if shared:
        both = "both alerts" if len(events) == 2 else f"all {len(events)} alerts"
        parts.append(f"For {both} above: {shared}")
    return "\n\n".join(parts)


def _shows_hint(e: _Event) -> bool:
    return e.what not in ("resolved", "relearned")


def _describe(e: _Event, zones: Mapping[str, str | None] | None = None, *,
              hint: bool = True) -> str:
    s = e.state
    zone = (zones or {}).get(s.rig, "UTC")
    lines = [f"{_HEAD[e.what]}: {_what(s)} on rig {s.rig} ({s.mode}; rule {s.rule}, {s.severity})",
             f"  file: {s.path}",
             f"  value: {_value(s)}; {'' if s.kind == 'drift' else 'limit: '}{s.limit_text}"]
    if e.what == "resolved":
        lines.append(f"  resolved after {s.resolve_after_files} good files; open since "
                     f"{_when(s.opened_at, zone)}")
    elif e.what == "relearned":
        lines.append(f"  resolved without good files: {e.note}; open since "
                     f"{_when(s.opened_at, zone)}")
    elif e.what == "unstable":
        lines.append("  this alert keeps opening and resolving: it stays open and quiet until "
                     "it has been stable for a while")
    elif e.what == "reminder":
        lines.append(f"  open since {_when(s.opened_at, zone)}, {s.bad_files} bad files so far")
    elif e.what == "late":
        lines.append(f"  open since {_when(s.opened_at, zone)} (messages were held back: mute, "
                     f"learning phase or a rig-level alert)")
    elif e.what == "backlog":
        lines.append(f"  open since {_when(s.opened_at, zone)} (found while catching up on files "
                     f"recorded earlier)")
    if hint and s.hint and _shows_hint(e):
        lines.append(f"  {s.hint}")
    return "\n".join(lines)


def _subject(s: AlertState) -> str:
    """'hum_rms on channel 0 (IN 0)', 'alias_risk', or 'a file' for the intake rule."""
    if s.measure == "file":
        return "a file"
    name = f" ({s.channel_name})" if s.channel_name else ""
    return s.measure + ("" if s.channel < 0 else f" on channel {s.channel}{name}")


def _predicate(s: AlertState, still: bool = False) -> str:
    """'is below 1 GOhm', 'is 1.9x its normal', 'is true on channels 0-14', or the intake's
    'could not be read: bad signature'; with ``still``: 'is still ...'."""
    head = s.headline or s.limit_text.split(";")[0]
    if s.measure == "file":
        return head + (" (again)" if still else "")
    head = head[3:] if head.startswith("is ") else head
    return f"is {'still ' if still else ''}{head}"


def _title(rig: str, events: list[_Event]) -> str:
    """A sentence: 'qcd rig-b: seal_resistance on channel 0 is below 1 GOhm'."""
    if len(events) == 1:
        e = events[0]
        s = e.state
        back = "read again" if s.measure == "file" else \
            "back to its normal" if s.kind == "drift" else "back within its limit"
        text = {"opened": f"{_subject(s)} {_predicate(s)}",
                "late": f"{_subject(s)} {_predicate(s)}",
                "backlog": f"{_subject(s)} {_predicate(s)}",
                "reminder": f"{_subject(s)} {_predicate(s, still=True)}",
                "resolved": f"{_subject(s)} resolved: {'files are ' if s.measure == 'file' else ''}"
                            f"{back}",
                "unstable": f"{_subject(s)} keeps going bad and good again (the alert stays "
                            f"open, quietly)",
                "relearned": f"{_subject(s)} resolved: its normal is being learned again"
                }[e.what]
        return f"qcd {rig}: {text}"[:160]
    by_measure: dict[str, set[int]] = {}
    for e in events:
        by_measure.setdefault(e.state.measure, set()).add(e.state.channel)
    names = []
    for measure, chans in sorted(by_measure.items()):
        label = "unreadable files" if measure == "file" else measure
        chans.discard(-1)
        if len(chans) > 1:
            label += f" on {len(chans)} channels"
        elif chans:
            label += f" on channel {min(chans)}"
        names.append(label)
    n_res = sum(e.what in ("resolved", "relearned") for e in events)
    n_rem = sum(e.what == "reminder" for e in events)
    n_new = len(events) - n_res - n_rem
    parts = [f"{n} {label}" for n, label in ((n_new, "new alerts" if n_new > 1 else "new alert"),
                                             (n_rem, "still open"), (n_res, "resolved")) if n]
    return f"qcd {rig}: {', '.join(parts)}: {', '.join(names)}"[:160]


def _group(events: list[_Event], now: float,
           zones: Mapping[str, str | None] | None = None) -> list[Message]:
    """One message per rig for one file's events."""
    by_rig: dict[str, list[_Event]] = {}
    for e in events:
        by_rig.setdefault(e.state.rig, []).append(e)
    out = []
    for rig, evs in sorted(by_rig.items()):
        evs.sort(key=lambda e: (-PRIORITY[_KIND[e.what]], e.state.key))
        first = min(evs, key=lambda e: (e.state.key, e.seq))
        kinds = [_KIND[e.what] for e in evs]
        kind = max(kinds, key=lambda k: PRIORITY[k])
        body = _body(evs, zones)
        out.append(Message(alert_key=first.state.key, transition=first.seq, kind=kind,
                           priority=PRIORITY[kind], rig=rig, title=_title(rig, evs), body=body))
    return out
