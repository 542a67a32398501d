"""The commands that show what qcd knows: status, report, export, trend and alerts read the
store (through qcd.status, qcd.report, qcd.export), compare measures two sets of recordings
(qcd.compare). Each ``_cmd_<name>(args) -> int`` calls the library and prints; imports
qcd.errors at the top and the rest of qcd (below cli) on first use.
"""
from __future__ import annotations

import argparse
import sys

from qcd.errors import EXIT_FAILED, EXIT_OK, ConfigError, StoreError

__all__: list[str] = []


def _cmd_status(args: argparse.Namespace) -> int:
    import time
    from qcd.config import find_config, load_config
    from qcd.status import format_status, status
    from qcd.store import Store
    cfg = load_config(find_config(args.config))
    if not cfg.database.is_file():
        print(f"qcd status: no database at {cfg.database}: the service has never run with "
              f"this config", file=sys.stderr)
        return EXIT_FAILED
    with Store(cfg.database) as store:
        now = time.time()
        st = status(store, now)
    if st.get("read_error") and not st.get("heartbeat"):
        raise StoreError(st["read_error"])       # nothing to show: one line
    print(format_status(st, now, zones={r.name: r.timezone for r in cfg.rigs},
                        lab_zone=cfg.timezone))
    return EXIT_OK if st["alive"] and not (st.get("storing_failed") or st.get("read_error")) \
        else EXIT_FAILED


def _zones(args: argparse.Namespace) -> tuple[dict[str, str | None], str | None]:
    """({rig: its time zone}, the lab's zone) of the config (None: this computer's zone)."""
    from qcd.config import find_config, load_config
    cfg = load_config(find_config(args.config))
    return {r.name: r.timezone for r in cfg.rigs}, cfg.timezone


def _report_store(args: argparse.Namespace, name: str):
    """The configured database opened for reading, or None (message printed) when absent."""
    from qcd.config import find_config, load_config
    from qcd.store import Store
    cfg = load_config(find_config(args.config))
    if not cfg.database.exists():
        print(f"qcd {name}: no database yet at {cfg.database} (start 'qcd watch' first)",
              file=sys.stderr)
        return None
    return Store(cfg.database)


def _cmd_report(args: argparse.Namespace) -> int:
    import json
    import time

    from qcd.report import build_report, parse_since, render_html, render_text
    now = time.time()
    zones, lab_zone = _zones(args)
    since = parse_since(args.since, now, lab_zone)
    store = _report_store(args, "report")
    if store is None:
        return EXIT_FAILED
    with store:
        known = store.rigs()
        for rig in args.rig or ():
            if rig not in known:
                raise ConfigError(None, "--rig", f"no files stored for rig {rig!r} "
                                  f"(known: {', '.join(known) or 'none'})")
        report = build_report(store, now, since, args.rig, zones=zones, lab_zone=lab_zone)
        if args.html:
            args.html.write_text(render_html(report), encoding="utf-8")
    if args.json:
        print(json.dumps(report.to_json(), indent=1, default=str))
    else:
        print(render_text(report))
    sys.stdout.flush()
    if args.html:
        print(f"HTML report written to {args.html}", file=sys.stderr if args.json else sys.stdout)
    bad = any(r.open_alerts or r.n_error for r in report.rigs) or report.outbox.get("stuck")
    return EXIT_FAILED if bad else EXIT_OK


def _cmd_export(args: argparse.Namespace) -> int:
    import time

    from qcd.config import find_config, load_config
    from qcd.export import render_csv, render_jsonl, summary, verdicts
    from qcd.report import parse_since
    from qcd.ruleset import load_rules
    from qcd.store import Store
    cfg = load_config(find_config(args.config))
    now = time.time()
    since = None if args.since is None else parse_since(args.since, now)
    extra = list(args.rules or ())
    for path in extra:
        if load_rules([path]).history:
            raise ConfigError(path, "history", "a history rule judges a file against the rig's "
                                               "history as it was when the file came in, so it "
                                               "cannot be applied afterwards: give only [[limit]] "
                                               "tables here")
    rules = load_rules(list(cfg.rules) + extra)
    if not cfg.database.exists():
        print(f"qcd export: no database yet at {cfg.database} (start 'qcd watch' first)",
              file=sys.stderr)
        return EXIT_FAILED
    with Store(cfg.database) as store:
        known = store.rigs()
        for rig in args.rig or ():
            if rig not in known:
                raise ConfigError(None, "--rig", f"no files stored for rig {rig!r} "
                                  f"(known: {', '.join(known) or 'none'})")
        rows = verdicts(store, rules, rigs=args.rig, since=since, config_rigs=cfg.rigs, now=now)
    if args.csv:
        args.csv.write_text(render_csv(rows), encoding="utf-8")
        print(f"wrote {args.csv}: {summary(rows)}")
    else:
        sys.stdout.write(render_jsonl(rows))
        print(f"qcd export: {summary(rows)}", file=sys.stderr)
    return EXIT_OK


def _cmd_trend(args: argparse.Namespace) -> int:
    import difflib
    import time

    from qcd.report import render_trend_csv, render_trend_text, trend_rows
    from qcd.results import MEASURES
    if not args.days > 0:
        raise ConfigError(None, "--days", f"expected a number of days above 0, got {args.days:g}")
    if args.measure not in MEASURES:
        close = difflib.get_close_matches(args.measure.lower(), list(MEASURES), n=3, cutoff=0.5)
        raise ConfigError(None, "MEASURE", f"unknown measure {args.measure!r}" + (
            f"; did you mean {' or '.join(close)}?" if close else
            " (the measure names are listed in the README's Measures table)"))
    zones, lab_zone = _zones(args)
    zone = zones.get(args.rig, lab_zone)
    store = _report_store(args, "trend")
    if store is None:
        return EXIT_FAILED
    with store:
        if args.rig not in store.rigs():
            raise ConfigError(None, "RIG", f"no files stored for rig {args.rig!r} "
                              f"(known: {', '.join(store.rigs()) or 'none'})")
        now = time.time()
        rows = trend_rows(store, args.rig, args.measure, channel=args.channel, days=args.days,
                          now=now)
        notes = store.notes(args.rig, since=now - args.days * 86400.0)
    if args.csv:
        sys.stdout.write(render_trend_csv(rows, zone))
    else:
        print(render_trend_text(args.rig, args.measure, rows, notes, zone))
    return EXIT_OK if rows else EXIT_FAILED


def _cmd_compare(args: argparse.Namespace) -> int:
    import json

    from qcd.compare import compare_paths, render_compare_html, render_compare_text
    for p in (args.before, args.after):
        if not p.exists():
            raise ConfigError(None, "", f"{p}: no such file or folder")
    c = compare_paths(args.before, args.after, channel=args.channel, mains_hz=args.mains)
    if args.json:
        print(json.dumps(c.to_json(), indent=1))
    else:
        print(render_compare_text(c))
    if args.html:
        args.html.write_text(render_compare_html(c), encoding="utf-8")
        print(f"HTML written to {args.html}", file=sys.stderr if args.json else sys.stdout)
    return EXIT_OK


def _cmd_alerts(args: argparse.Namespace) -> int:
    import time

    from qcd.config import find_config, load_config
    from qcd.report import build_alerts, render_alerts
    from qcd.store import Store
    cfg = load_config(find_config(args.config))
    if not cfg.database.exists():
        print(f"qcd alerts: no database yet at {cfg.database} (start 'qcd watch' first)",
              file=sys.stderr)
        return EXIT_FAILED
    with Store(cfg.database) as store:
        alerts = build_alerts(store, time.time(), days=args.days, rig=args.rig)
    print(render_alerts(alerts, secrets=cfg.notify,
                        zones={r.name: r.timezone for r in cfg.rigs}, lab_zone=cfg.timezone))
    return EXIT_FAILED if alerts.open or alerts.stuck else EXIT_OK
