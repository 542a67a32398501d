"""The commands that run and steer the service: watch, digest, relearn, rules, mute and note;
and those that set it up or show it: init, notify-test, demo. Each ``_cmd_<name>(args) ->
int`` calls the library (qcd.watch, qcd.digest, qcd.pipeline, qcd.store, ...) and prints;
imports qcd.errors at the top and the rest of qcd (below cli) on first use.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

from qcd.errors import EXIT_FAILED, EXIT_OK, EXIT_USAGE, ConfigError

__all__: list[str] = []


def _cmd_watch(args: argparse.Namespace) -> int:
    from qcd import watch
    from qcd.config import find_config, load_config
    from qcd.ruleset import load_rules
    cfg = load_config(find_config(args.config))
    if not cfg.rigs:
        raise ConfigError(cfg.path, "rig", "no [[rig]] tables: there is no folder to watch")
    if args.workers < 0:
        raise ConfigError(None, "--workers", f"expected 0 (automatic) or more, got {args.workers}")
    rules = load_rules(cfg.rules)
    with watch.ServiceLock(cfg.database):    # one service per database
        return _run_service(args, cfg, rules)


def _run_service(args: argparse.Namespace, cfg, rules) -> int:
    from qcd import digest, watch
    from qcd.store import Store
    log_path = watch.setup_logging(cfg.database, debug=args.debug)
    sender = watch.make_sender(cfg)
    with Store(cfg.database) as store:
        service = watch.Service(cfg, store, rules, sender=sender,
                                workers=args.workers or None, catch_up=not args.no_catch_up,
                                daily=digest.scheduler(cfg, store))
        print(f"qcd watch: {len(cfg.rigs)} rig(s), database {cfg.database}, log {log_path}, "
              f"{digest.describe(cfg)}; stop with Ctrl-C", file=sys.stderr)
        return service.run()


def _cmd_mute(args: argparse.Namespace) -> int:
    import fnmatch
    import time

    from qcd.config import find_config, load_config, parse_duration
    from qcd.store import Store

    cfg = load_config(find_config(args.config))
    now = time.time()
    if args.end is not None:
        if args.rig or args.duration:
            raise ConfigError(None, "--end", "give either RIG FOR (a new mute) or --end ID, "
                                             "not both")
        with Store(cfg.database) as store:
            mute = next((m for m in store.active_mutes(now) if m.id == args.end), None)
            if mute is None or not store.end_mute(args.end, now):
                ids = ", ".join(str(m.id) for m in store.active_mutes(now)) or "none"
                raise ConfigError(None, "--end", f"no active mute with ID {args.end} "
                                                 f"(active: {ids})")
        print(f"lifted mute {mute.id} ({_mute_scope(mute.rig_glob, mute.rule_glob)}); alerts "
              f"still open are announced by the running service within a minute")
        return EXIT_OK
    if not args.rig:
        with Store(cfg.database) as store:
            active = store.active_mutes(now)
        if not active:
            print("no active mutes")
        for m in active:
            print(f"mute {m.id}: {_mute_scope(m.rig_glob, m.rule_glob)} until "
                  f"{'its alerts resolve' if m.end_at is None else _local_time(m.end_at)}"
                  + (f" ({m.reason})" if m.reason else ""))
        return EXIT_OK
    if not args.duration:
        raise ConfigError(None, "FOR", "say for how long: 2h, 30m, 1d, or 'resolved'")
    until_resolved = args.duration.strip().lower() == "resolved"
    seconds = None if until_resolved else parse_duration(args.duration, "FOR")
    if not any(fnmatch.fnmatchcase(r.name, args.rig) for r in cfg.rigs):
        known = ", ".join(r.name for r in cfg.rigs) or "none"
        raise ConfigError(cfg.path, "RIG", f"no configured rig matches {args.rig!r} "
                          f"(configured: {known})")
    if args.rule != "*":
        from qcd.ruleset import load_rules, rule_names
        names = rule_names(load_rules(cfg.rules))
        if not any(fnmatch.fnmatchcase(n, args.rule) for n in names):
            raise ConfigError(None, "--rule", f"no rule matches {args.rule!r} (rules: "
                                              f"{', '.join(names)})")
    end_at = None if seconds is None else now + seconds
    with Store(cfg.database) as store:
        mid = store.add_mute(args.rig, args.rule, now, end_at, args.reason, now)
    until = "its open alerts resolve" if end_at is None else _local_time(end_at)
    print(f"muted {_mute_scope(args.rig, args.rule)} until {until} (mute {mid}; lift it early "
          f"with 'qcd mute --end {mid}'); alerts are still evaluated and shown by 'qcd alerts'")
    return EXIT_OK


def _mute_scope(rig_glob: str, rule_glob: str) -> str:
    return f"rig {rig_glob}" + ("" if rule_glob == "*" else f", rules {rule_glob}")


def _local_time(t: float) -> str:
    from datetime import datetime
    return datetime.fromtimestamp(t).astimezone().strftime("%Y-%m-%d %H:%M %Z")


def _cmd_note(args: argparse.Namespace) -> int:
    import time

    from qcd.config import find_config, load_config
    from qcd.report import note_line, parse_since
    from qcd.store import Store
    cfg = load_config(find_config(args.config))
    zone = cfg.rig(args.rig).timezone                 # ConfigError naming the known rigs
    now = time.time()
    if args.days <= 0:
        raise ConfigError(None, "--days", f"expected a number of days above 0, got {args.days:g}")
    with Store(cfg.database) as store:
        if not args.text:
            notes = store.notes(args.rig, since=now - args.days * 86400.0)
            print(f"{args.rig}: {len(notes) or 'no'} note(s) in the last {args.days:g} days")
            for n in notes:
                print(f"  {note_line(n, zone)}")
            return EXIT_OK
        at = now if args.at is None else parse_since(args.at, now, zone)
        if at > now + 60.0:
            raise ConfigError(None, "--at", f"{args.at!r} is in the future")
        text = " ".join(" ".join(args.text).split())
        nid = store.add_note(args.rig, text, at, now=now)
    print(f"noted for {args.rig}: {note_line({'at': at, 'text': text, 'kind': 'note'}, zone)} "
          f"(note {nid})")
    return EXIT_OK


def _cmd_digest(args: argparse.Namespace) -> int:
    import time

    from qcd import digest
    from qcd.config import find_config, load_config
    from qcd.store import Store
    if args.now == args.dry_run:
        raise ConfigError(None, "--now", "say --now (send one) or --dry-run (print it)")
    cfg = load_config(find_config(args.config))
    if not cfg.database.exists():
        print(f"qcd digest: no database yet at {cfg.database} (start 'qcd watch' first)",
              file=sys.stderr)
        return EXIT_FAILED
    now = time.time()
    with Store(cfg.database) as store:
        if args.dry_run:
            d = digest.build_digest(store, cfg, now)
        else:
            from qcd import notify, watch
            sender = watch.make_sender(cfg)
            if sender is None:
                raise ConfigError(cfg.path, "notify", "no targets to send the report to")
            d = digest.queue_now(store, cfg, now)
            res = notify.deliver_due(store, sender, now)
    if args.html:
        args.html.write_text(d.html, encoding="utf-8")
    print(d.title)
    print(d.body)
    if args.html:
        print(f"HTML page written to {args.html}")
    if args.now:
        print(f"sent: {res.sent} message(s)" + (f", {res.retried} to retry (see qcd alerts)"
                                                if res.retried else ""))
        return EXIT_OK if not res.retried and not res.stuck else EXIT_FAILED
    return EXIT_OK


def _cmd_relearn(args: argparse.Namespace) -> int:
    import time

    from qcd.pipeline import relearn
    from qcd.results import MEASURES
    from qcd.ruleset import load_rules
    from qcd.store import Store
    from qcd.config import find_config, load_config
    cfg = load_config(find_config(args.config))
    cfg.rig(args.rig)
    for m in args.measure or ():
        if m not in MEASURES:
            raise ConfigError(None, "--measure", f"unknown measure {m!r}")
    rules = load_rules(cfg.rules)
    now = time.time()
    why = " ".join(" ".join(args.why).split())
    with Store(cfg.database) as store:
        charts, resolved = relearn(store, rules, args.rig, now, now, measures=args.measure,
                                   channel=args.channel, why=why,
                                   zones={args.rig: cfg.rig(args.rig).timezone})
    what = ", ".join(sorted({f"{m} ch {c}" for _, c, m, _ in charts})) or "no chart stored yet"
    print(f"{args.rig}: re-learning from the next files: {what}; "
          f"{len(resolved)} open alert(s) resolved")
    return EXIT_OK


def _cmd_rules(args: argparse.Namespace) -> int:
    if args.check:
        return _rules_check(args.check)
    import time

    from qcd.charts import budget_lines
    from qcd.config import find_config, load_config
    from qcd.ruleset import load_rules
    from qcd.store import Store
    cfg = load_config(find_config(args.config))
    rules = load_rules(cfg.rules)
    now = time.time()
    rates = {}
    if not cfg.database.exists():
        print(f"no database yet at {cfg.database}: rates per day need the rigs' files",
              file=sys.stderr)
    else:
        with Store(cfg.database) as store:
            for rig in cfg.rigs:
                n = len(store.files(rig=rig.name, since=now - 30 * 86400.0))
                rates[rig.name] = n / 30.0
    for line in budget_lines(rules, rates):
        print(line)
    return EXIT_OK


def _cmd_init(args: argparse.Namespace) -> int:
    from qcd.config import starter_config

    path: Path = args.path
    if path.exists() and not args.force:
        print(f"qcd init: {path} exists already; pass --force to overwrite it", file=sys.stderr)
        return EXIT_USAGE
    if not path.parent.is_dir():
        print(f"qcd init: folder {path.parent} does not exist", file=sys.stderr)
        return EXIT_USAGE
    path.write_text(starter_config(), encoding="utf-8")
    print(f"wrote {path}: set the rig's folders, then run 'qcd watch --config {path}'")
    return EXIT_OK


def _cmd_notify_test(args: argparse.Namespace) -> int:
    from qcd.config import find_config, load_config
    from qcd.notify import test_targets
    cfg = load_config(find_config(args.config))
    if not cfg.notify and cfg.notify_config is None:
        raise ConfigError(cfg.path, "notify", "no notification targets configured")
    results = test_targets(cfg.notify, cfg.notify_config)      # every target, each on its own
    for target, state, reason in results:                     # targets come back redacted
        print(f"{state.upper() if state != 'accepted' else state:<10}  {target}"
              + (f": {reason}" if reason else ""))
    ok = sum(state == "accepted" for _, state, _ in results)
    print(f"{ok} of {len(results)} targets accepted the test message")
    return EXIT_OK if ok == len(results) else EXIT_FAILED


def _rules_check(paths: list[Path]) -> int:
    """``qcd rules --check FILE...``: load each file as the service would; one line per file."""
    from qcd.ruleset import load_rules
    for path in paths:
        rules = load_rules([path])           # ConfigError: file, rule, what was expected
        print(f"{path}: ok, {len(rules.limits)} limit and {len(rules.history)} history "
              f"rule(s)")
    return EXIT_OK


def _cmd_demo(args: argparse.Namespace) -> int:
    from qcd.demo import run_demo
    if not 6 <= args.days <= 120:
        raise ConfigError(None, "--days", f"expected 6 to 120 days, got {args.days}")
    if args.keep is not None and args.keep.exists() and not args.keep.is_dir():
        raise ConfigError(None, "--keep", f"{args.keep} exists and is not a folder")
    run_demo(args.keep, days=args.days)
    return EXIT_OK
