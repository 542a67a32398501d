"""Outbox -> apprise: send due rows, retry with back-off, mark stuck after a day; notify-test.

Delivery is at least once: a row is marked sent right after apprise reports success, so only a
crash between the send and that mark can send it again (once) on the next start; a failed send
stays pending and is retried (30 s doubling to 1 h), and after 24 h it is marked ``stuck``,
never dropped. Targets are sent to one by one, and within one running Sender a target that
accepted a message is not sent it again while another target is down.
Imports apprise, qcd.config (redact), qcd.errors; the Store it is given as a type.
"""
from __future__ import annotations

import json
import logging
import tempfile
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable

import apprise

from qcd.config import redact, redact_text
from qcd.errors import DeliveryError

if TYPE_CHECKING:
    from qcd.config import Config
    from qcd.store import Store

__all__ = ["Sender", "SendResult", "Delivery", "deliver_due", "backoff_s", "BACKOFF_START_S",
           "BACKOFF_CAP_S", "STUCK_AFTER_S", "test_targets"]

log = logging.getLogger(__name__)

BACKOFF_START_S = 30.0
BACKOFF_CAP_S = 3600.0
STUCK_AFTER_S = 24 * 3600.0

_TYPE = {"firing": apprise.NotifyType.WARNING, "unstable": apprise.NotifyType.WARNING,
         "digest": apprise.NotifyType.WARNING, "reminder": apprise.NotifyType.INFO,
         "report": apprise.NotifyType.INFO,
         "resolved": apprise.NotifyType.SUCCESS, "test": apprise.NotifyType.INFO}


def backoff_s(attempts: int) -> float:
    """Wait before the next try after ``attempts`` failed ones: 30 s, 60 s, ... capped at 1 h."""
    return min(BACKOFF_START_S * 2.0 ** max(0, int(attempts)), BACKOFF_CAP_S)


@dataclass(frozen=True)
class SendResult:
    ok: bool
    status: str               # SUCCESS, FAILURE, PARTIAL, TIMEOUT
    detail: str               # redacted reasons from apprise's log, '' on success


@dataclass(frozen=True)
class Delivery:
    """What one deliver_due call did."""
    sent: int = 0
    retried: int = 0
    stuck: int = 0


class Sender:
    """All configured apprise targets as one: URLs and/or an apprise config file."""

    def __init__(self, urls: Iterable[str] = (), config_path: Any = None, *,
                 named_only: Iterable[str] = ()) -> None:
        """``named_only``: further URLs sent to only by messages that name them (a daily
        report's own targets), never by alerts."""
        named_only = tuple(str(u) for u in named_only if str(u) not in tuple(map(str, urls)))
        self._urls = tuple(str(u) for u in urls) + named_only
        self._apprise = apprise.Apprise()
        self._origin: list[str | None] = []         # the URL each service came from
        for url in self._urls:
            if not self._apprise.add(url):
                raise DeliveryError(f"notification target not understood by apprise: {redact(url)}")
            self._origin += [url] * (len(self._apprise) - len(self._origin))
        if config_path is not None:
            cfg = apprise.AppriseConfig()
            if not cfg.add(str(config_path)):
                raise DeliveryError(f"{config_path}: apprise config file cannot be read")
            self._apprise.add(cfg)
        self._services = list(self._apprise)       # plugin instances, kept (mail throttle)
        self._origin += [None] * (len(self._services) - len(self._origin))
        self._named_only = set(named_only)
        self._delivered: dict[Any, set[int]] = {}
        if not self._services:
            where = f" (config file {config_path} has no valid URL)" if config_path else ""
            raise DeliveryError("no notification targets configured" + where)

    @classmethod
    def from_config(cls, config: Config) -> "Sender":
        """From ``Config.notify`` URLs and ``Config.notify_config`` (and the daily report's
        own target URLs, sent to only by the daily report)."""
        digest = getattr(config, "digest", None)
        extra = [t for t in (digest.targets if digest else ()) if "://" in t]
        return cls(config.notify, config.notify_config, named_only=extra)

    def targets(self) -> list[str]:
        """The targets, redacted (safe to print)."""
        return [redact(s.url(privacy=True)) for s in self._services]

    def _clean(self, text: str) -> str:
        return redact_text(text, list(self._urls))

    def chosen(self, targets: Iterable[str] = ()) -> list[int]:
        """Indices of the services a message goes to: every target (not the named-only ones)
        for no ``targets``, else those whose URL is listed or that carry a listed tag.
        DeliveryError when ``targets`` match none."""
        targets = tuple(targets)
        if not targets:
            return [i for i, o in enumerate(self._origin) if o not in self._named_only]
        want = set(targets)
        out = [i for i, (svc, o) in enumerate(zip(self._services, self._origin))
               if o in want or want & set(getattr(svc, "tags", ()) or ())]
        if not out:
            raise DeliveryError("the message's targets match no configured target: "
                                + ", ".join(redact(t) if "://" in t else t for t in targets))
        return out

    def send(self, title: str, body: str, kind: str = "firing", *, key: Any = None,
             targets: Iterable[str] = (), attachment: tuple[str, str] | None = None
             ) -> SendResult:
        """Send to every target (or those ``targets`` name); ``ok`` only when all accepted.

        With ``key`` (an outbox row id) targets that already accepted this message are skipped
        on the next try, so one dead target does not make the others receive it again and
        again (remembered for the life of this Sender; after a restart all targets are tried).
        ``attachment`` (file name, text) goes along to targets that take attachments.
        """
        done = self._delivered.get(key, set()) if key is not None else set()
        failures = []
        chosen = set(self.chosen(targets))
        with tempfile.TemporaryDirectory(prefix="qcd-attach-") as tmp:
            attach = None
            if attachment is not None:
                path = Path(tmp) / Path(attachment[0]).name
                path.write_text(attachment[1], encoding="utf-8")
                attach = str(path)
            for i, service in enumerate(self._services):
                if i in done or i not in chosen:
                    continue
                ok, reason = self._send_one(service, title, body, kind, attach)
                if ok:
                    done.add(i)
                else:
                    failures.append(f"{redact(service.url(privacy=True))}: {reason}")
        if key is not None:
            if failures:
                self._delivered[key] = done
            else:
                self._delivered.pop(key, None)
        status = "SUCCESS" if not failures else "PARTIAL" if done else "FAILURE"
        return SendResult(not failures, status, self._clean("; ".join(failures)))

    @staticmethod
    def _send_one(service: Any, title: str, body: str, kind: str, attach: str | None
                  ) -> tuple[bool, str]:
        extra = {"attach": attach} if attach and getattr(service, "attachment_support",
                                                         False) else {}
        with apprise.LogCapture(level=logging.WARNING, fmt="%(message)s") as cap:
            try:
                ok = bool(service.notify(body=body, title=title,
                                         notify_type=_TYPE.get(kind, apprise.NotifyType.INFO),
                                         **extra))
            except Exception:                # a plugin bug is one failed target, not a crash
                log.exception("sending to %s", redact(service.url(privacy=True)))
                ok = False
        return ok, ("" if ok else " ".join(cap.getvalue().split()) or "not accepted")

    def test(self, title: str = "qcd test message",
             body: str = "This is a test message from qcd: the target is reachable.") -> list[tuple[str, bool]]:
        """Send a test message to each target on its own: [(redacted target, accepted)]."""
        out = []
        for service in self._services:
            try:
                ok = bool(service.notify(body=body, title=title,
                                         notify_type=apprise.NotifyType.INFO))
            except Exception:                # a plugin bug must not hide the other targets
                log.exception("test message to %s", redact(service.url(privacy=True)))
                ok = False
            out.append((redact(service.url(privacy=True)), ok))
        return out


def deliver_due(store: Store, sender: Sender, now: float, *, limit: int = 50) -> Delivery:
    """Send the outbox rows due at ``now``; record sent, retry (back-off) or stuck.

    After the first failed send the call stops, so a dead target costs one attempt per call,
    not one per queued row.
    """
    sent = retried = stuck = 0
    for row in store.outbox_due(now, limit=limit):
        rid = row["id"]
        try:
            att = row.get("attachment")
            res = sender.send(row["title"] or "", row["body"] or "", row["kind"] or "firing",
                              key=rid, targets=json.loads(row.get("targets") or "[]"),
                              attachment=(row.get("attachment_name") or "report.html", att)
                              if att is not None else None)
            ok, error = res.ok, res.detail
        except DeliveryError as e:
            ok, error = False, str(e)
        except Exception as e:               # never let one row stop the service
            log.exception("sending outbox row %s", rid)
            ok, error = False, f"internal error while sending: {type(e).__name__}"
        if ok:
            store.mark_sent(rid, now)        # at once: a crash before this mark resends once
            sent += 1
            continue
        created = float(row["created_at"])
        attempts = int(row["attempts"] or 0)
        if now - created >= STUCK_AFTER_S:
            store.mark_stuck(rid, now, error)
            log.error("message %s (%s) undelivered for 24 h, marked stuck: %s", rid,
                      row["title"], error)
            stuck += 1
        else:
            wait = backoff_s(attempts)
            store.mark_retry(rid, now, now + wait, error)
            log.warning("message %s not delivered (%s); retry in %.0f s", rid, error, wait)
            retried += 1
        break
    return Delivery(sent, retried, stuck)


_TEST_TITLE = "qcd test message"
_TEST_BODY = "This is a test message from qcd: the target is reachable."


def _try(service: Any) -> tuple[bool, str]:
    """Send the test message through one loaded target: (accepted, redacted reason)."""
    with apprise.LogCapture(level=logging.WARNING, fmt="%(message)s") as cap:
        try:
            ok = bool(service.notify(body=_TEST_BODY, title=_TEST_TITLE,
                                     notify_type=apprise.NotifyType.INFO))
        except Exception as e:               # a plugin bug is one failed target
            log.exception("test message to %s", redact(service.url(privacy=True)))
            ok, reason = False, f"internal error in the target's plugin: {type(e).__name__}"
        else:
            reason = "" if ok else (" ".join(cap.getvalue().split()) or "not accepted")
    return ok, reason


def test_targets(urls: Iterable[str] = (), config_path: Any = None
                 ) -> list[tuple[str, str, str]]:
    """Send a test message to every target on its own, also when another cannot be loaded:
    [(redacted target, 'accepted' | 'failed' | 'not loaded', reason)]."""
    urls = tuple(str(u) for u in urls)
    out: list[tuple[str, str, str]] = []
    services: list[Any] = []
    for url in urls:
        one = apprise.Apprise()
        if not one.add(url):
            out.append((redact(url), "not loaded", "apprise does not understand this URL "
                                                    "(check its scheme and form)"))
            continue
        services.append(one[0])
        out.append((redact(url), "", ""))
    if config_path is not None:
        cfg = apprise.AppriseConfig()
        one = apprise.Apprise()
        if not cfg.add(str(config_path)) or not one.add(cfg) or not len(one):
            out.append((str(config_path), "not loaded", "the apprise config file cannot be "
                                                        "read or holds no valid URL"))
        else:
            for service in one:
                services.append(service)
                out.append((redact(service.url(privacy=True)), "", ""))
    it = iter(services)
    tested = []
    for target, state, reason in out:
        if state:
            tested.append((target, state, reason))
            continue
        ok, why = _try(next(it))
        tested.append((target, "accepted" if ok else "failed", redact_text(why, list(urls))))
    return tested
