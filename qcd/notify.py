"""Outbox -> apprise: send due rows, retry with back-off, mark stuck after a day; notify-test.

Delivery is at least once: a row is marked sent right after apprise reports success, so only a
crash between the send and that mark can send it again (once) on the next start; a failed send
stays pending and is retried (30 s doubling to 1 h), and after 24 h it is marked ``stuck``,
never dropped. Targets are sent to one by one, and within one running Sender a target that
accepted a message is not sent it again while another target is down.

Every attempt has a deadline on the whole of it (``attempt_s``): a target that never answers,
or answers one byte at a time, costs at most that. An attempt past its deadline is left to
finish in its own thread; the message is not sent to that target again while it runs, and
counts as accepted if it ends in success, so a slow target rarely gets a message twice (it
may, when the late attempt fails after the target took it). The service delivers through a
``Courier``: a thread of its own, off the measuring path, that stopping does not wait for.
Imports apprise, qcd.config (redact), qcd.errors; the Store it is given as a type.
"""
from __future__ import annotations

import json
import logging
import shutil
import tempfile
import threading
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any, Iterable

import apprise

from qcd.config import redact, redact_text, register_secrets
from qcd.errors import DeliveryError

if TYPE_CHECKING:
    from qcd.config import Config
    from qcd.store import Store

__all__ = ["Sender", "SendResult", "Delivery", "deliver_due", "backoff_s", "BACKOFF_START_S",
           "BACKOFF_CAP_S", "STUCK_AFTER_S", "ATTEMPT_S", "test_targets", "Courier"]

log = logging.getLogger(__name__)

BACKOFF_START_S = 30.0
BACKOFF_CAP_S = 3600.0
STUCK_AFTER_S = 24 * 3600.0
ATTEMPT_S = 20.0           # deadline on one attempt to one target, connecting to the answer


class _Attempt:
    """One ``service.notify`` call in a daemon thread: (done, accepted, reason) when it ends."""

    def __init__(self, service: Any, title: str, body: str, kind: str,
                 attachment: tuple[str, str] | None = None) -> None:
        self.accepted = False
        self.reason = ""
        self.done = threading.Event()
        self._thread = threading.Thread(target=self._run,
                                        args=(service, title, body, kind, attachment),
                                        name="qcd-send", daemon=True)
        self._thread.start()

    def _run(self, service: Any, title: str, body: str, kind: str,
             attachment: tuple[str, str] | None) -> None:
        tmp = None
        extra = {}
        with apprise.LogCapture(level=logging.WARNING, fmt="%(message)s") as cap:
            try:
                if attachment is not None and getattr(service, "attachment_support", False):
                    # the file lives as long as this attempt, also one past its deadline
                    tmp = tempfile.mkdtemp(prefix="qcd-attach-")
                    path = Path(tmp) / Path(attachment[0]).name
                    path.write_text(attachment[1], encoding="utf-8")
                    extra = {"attach": str(path)}
                ok = bool(service.notify(body=body, title=title,
                                         notify_type=_TYPE.get(kind, apprise.NotifyType.INFO),
                                         **extra))
                reason = "" if ok else (" ".join(cap.getvalue().split()) or "not accepted")
            except Exception as e:           # a plugin bug is one failed target, not a crash
                log.exception("sending to %s", redact(service.url(privacy=True)))
                ok, reason = False, f"internal error in the target's plugin: {type(e).__name__}"
            finally:
                if tmp is not None:
                    shutil.rmtree(tmp, ignore_errors=True)
        self.accepted, self.reason = ok, reason
        self.done.set()

    def wait(self, seconds: float) -> bool:
        return self.done.wait(max(0.0, seconds))

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
                 named_only: Iterable[str] = (), attempt_s: float = ATTEMPT_S) -> None:
        """``named_only``: further URLs sent to only by messages that name them (a daily
        report's own targets), never by alerts. ``attempt_s``: the deadline on one attempt."""
        self.attempt_s = float(attempt_s)
        self._late: dict[tuple[Any, int], _Attempt] = {}   # attempts past their deadline
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
        register_secrets(list(self._urls) + [s.url(privacy=False) for s in self._services])
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
        timed_out = False
        chosen = set(self.chosen(targets))
        for i, service in enumerate(self._services):
            if i in done or i not in chosen:
                continue
            late = self._late.get((key, i)) if key is not None else None
            if late is not None:             # the last attempt ran past its deadline
                if not late.done.is_set():
                    timed_out = True
                    failures.append(f"{redact(service.url(privacy=True))}: the previous attempt "
                                    f"is still waiting for an answer")
                    continue
                del self._late[(key, i)]
                if late.accepted:            # it got through late: not sent again
                    done.add(i)
                    continue
            attempt = _Attempt(service, title, body, kind, attachment)
            if not attempt.wait(self.attempt_s):
                timed_out = True
                if key is not None:
                    self._late[(key, i)] = attempt
                failures.append(f"{redact(service.url(privacy=True))}: no answer within "
                                f"{self.attempt_s:g} s (the message may still arrive)")
            elif attempt.accepted:
                done.add(i)
            else:
                failures.append(f"{redact(service.url(privacy=True))}: {attempt.reason}")
        if key is not None:
            if failures:
                self._delivered[key] = done
            else:
                self._delivered.pop(key, None)
        status = ("SUCCESS" if not failures else "PARTIAL" if done else
                  "TIMEOUT" if timed_out else "FAILURE")
        return SendResult(not failures, status, self._clean("; ".join(failures)))

    def test(self, title: str = "qcd test message",
             body: str = "This is a test message from qcd: the target is reachable.") -> list[tuple[str, bool]]:
        """Send a test message to each target on its own: [(redacted target, accepted)]."""
        out = []
        for service in self._services:
            attempt = _Attempt(service, title, body, "test")
            ok = attempt.wait(self.attempt_s) and attempt.accepted
            out.append((redact(service.url(privacy=True)), ok))
        return out


def deliver_due(store: Store, sender: Sender, now: float, *, limit: int = 50,
                stop: threading.Event | None = None) -> Delivery:
    """Send the outbox rows due at ``now``; record sent, retry (back-off) or stuck.

    After the first failed send the call stops, so a dead target costs one attempt per call,
    not one per queued row; so does ``stop`` once set.
    """
    sent = retried = stuck = 0
    for row in store.outbox_due(now, limit=limit):
        if stop is not None and stop.is_set():
            break
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


def _try(service: Any, attempt_s: float = ATTEMPT_S) -> tuple[bool, str]:
    """Send the test message through one loaded target: (accepted, redacted reason)."""
    attempt = _Attempt(service, _TEST_TITLE, _TEST_BODY, "test")
    if not attempt.wait(attempt_s):
        return False, f"no answer within {attempt_s:g} s"
    return attempt.accepted, attempt.reason


def test_targets(urls: Iterable[str] = (), config_path: Any = None
                 ) -> list[tuple[str, str, str]]:
    """Send a test message to every target on its own, also when another cannot be loaded:
    [(redacted target, 'accepted' | 'failed' | 'not loaded', reason)]."""
    urls = tuple(str(u) for u in urls)
    register_secrets(urls)
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
            register_secrets([s.url(privacy=False) for s in one])
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


class Courier:
    """Delivers the outbox in a thread of its own, so a slow or hung target never holds up
    measuring, storing or stopping. ``clock()`` gives ``now`` (the service's clock);
    ``wake()`` asks for a pass right away (new messages); ``stop(wait_s)`` waits at most
    ``wait_s`` for a send under way, which otherwise finishes (or not) on its own: a message
    sent but not yet marked is sent again after a restart (at least once)."""

    def __init__(self, store: Store, sender: Sender, clock: Any, *,
                 interval_s: float = 1.0) -> None:
        self.store, self.sender, self.clock = store, sender, clock
        self.interval_s = float(interval_s)
        self._stop = threading.Event()
        self._wake = threading.Event()
        self._thread = threading.Thread(target=self._run, name="qcd-courier", daemon=True)

    def start(self) -> "Courier":
        self._thread.start()
        return self

    def wake(self) -> None:
        self._wake.set()

    def _run(self) -> None:
        while not self._stop.is_set():
            self._wake.clear()
            try:
                deliver_due(self.store, self.sender, self.clock(), stop=self._stop)
            except Exception:
                if self._stop.is_set():      # the store was closed under a late send
                    return
                log.exception("delivering notifications")
            self._wake.wait(self.interval_s)

    def stop(self, wait_s: float = 2.0) -> bool:
        """Stop; True when the thread ended within ``wait_s``."""
        self._stop.set()
        self._wake.set()
        if self._thread.is_alive():
            self._thread.join(wait_s)
        return not self._thread.is_alive()
