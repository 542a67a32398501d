"""``qcd scan``: measure the files named now and print a table (qcd.table) or JSON lines; with
--store, store, judge and alert as the service does (qcd.pipeline); with --cluster, measure
on a Dask cluster (qcd.cluster). Imports qcd.errors and qcd.table at the top and the rest of
qcd (below cli) on first use, so that ``qcd scan`` starts fast.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from qcd.errors import EXIT_FAILED, EXIT_OK, ConfigError, printable
from qcd.table import _scan_header, _scan_row, _scan_width

if TYPE_CHECKING:
    from qcd.results import FileMeasures

__all__: list[str] = []


def _scan_files(paths: list[Path]) -> list[Path]:
    """Files named and the recordings under folders (``intake.recordings_in``), in argument
    order. ConfigError (exit 2) for a path that does not exist."""
    from qcd.intake import recordings_in
    out: list[Path] = []
    seen: set[Path] = set()
    for p in paths:
        if not p.exists():
            raise ConfigError(None, "", f"no such file or folder: {p}")
        for q in recordings_in(p):
            if q not in seen:
                seen.add(q)
                out.append(q)
    return out


def _cmd_scan(args: argparse.Namespace) -> int:
    if args.workers < 1:
        raise ConfigError(None, "workers", f"needs at least 1, got {args.workers}")
    if (args.cluster or args.path_map) and not args.store:
        raise ConfigError(None, "--cluster" if args.cluster else "--path-map",
                          "needs --store (the cluster measures, this process stores)")
    if args.path_map and not args.cluster:
        raise ConfigError(None, "--path-map", "needs --cluster")
    if args.store:
        # measure -> store -> judge -> alerts -> delivery, as the service does (qcd.pipeline)
        import time

        from qcd.config import find_config, load_config
        from qcd.pipeline import scan
        from qcd.ruleset import load_rules
        from qcd.store import Store
        if not args.rig:
            raise ConfigError(None, "rig", "scan --store needs --rig NAME (a rig of the config)")
        cfg = load_config(find_config(args.config))
        rig = next((r for r in cfg.rigs if r.name == args.rig), None)
        if rig is None:
            known = ", ".join(r.name for r in cfg.rigs) or "none"
            raise ConfigError(cfg.path, "rig", f"no rig named {args.rig!r} (rigs: {known})")
        if args.pulse or args.mains or args.mode:
            from dataclasses import replace as _replace

            from qcd.config import parse_pulse
            rig = _replace(rig, test_pulse=parse_pulse(args.pulse) if args.pulse else
                           rig.test_pulse, mains_hz=args.mains or rig.mains_hz,
                           mode=args.mode or rig.mode)
        rules = load_rules(cfg.rules)
        sender = None
        if cfg.notify or cfg.notify_config is not None:
            from qcd.notify import Sender
            sender = Sender.from_config(cfg)
        if args.cluster:
            return _scan_cluster(args, cfg, rig, rules, sender)
        files = _scan_files(list(args.paths))

        def said(fm) -> None:
            what = ("ok" if fm.status == "ok" else f"copy: {fm.error}" if fm.status == "skipped"
                    else f"error ({fm.error_kind}): {fm.error}")
            print(printable(f"stored  {fm.path}  {what}"), flush=True)
        with Store(cfg.database) as store:
            res = scan(files, rig, store, rules, clock=time.time, sender=sender, on_file=said,
                       workers=args.workers, keep_files=False)
        code = _said_stored(res, rig, rules, sender)
        if not files:
            print("qcd scan: no *.abf files found", file=sys.stderr)
        return code
    import json

    from qcd.config import RigConfig, parse_pulse
    from qcd.pipeline import measure_all
    # no config: the declared pulse, mains and mode of the command line, for an unnamed rig
    rig = RigConfig("", (), test_pulse=parse_pulse(args.pulse) if args.pulse else None,
                    mains_hz=args.mains, mode=args.mode)
    files = _scan_files(list(args.paths))
    progress = sys.stderr.isatty() and len(files) > 1
    width = _scan_width(files)
    if not args.json:
        print(_scan_header(width))
    failed = 0
    results = measure_all(files, rig, args.workers, digest=False)
    try:
        for i, fm in enumerate(results, 1):
            if progress:
                print("\r" + " " * 79 + "\r", end="", file=sys.stderr)
            failed += fm.status != "ok"
            if args.json:
                print(json.dumps(fm.to_json()), flush=True)
            else:
                print(printable(_scan_row(fm, width, args.mains)), flush=True)
            if progress and i < len(files):
                print(f"\rqcd scan: {i}/{len(files)} files, {failed} failed", end="",
                      file=sys.stderr, flush=True)
    finally:
        results.close()                      # stops the worker processes
    if progress:
        print("\r" + " " * 79 + "\r", end="", file=sys.stderr, flush=True)
    if not files:
        print("qcd scan: no *.abf files found", file=sys.stderr)
    return EXIT_FAILED if failed else EXIT_OK


def _archive_files(paths: list[Path]) -> list[str]:
    """``_scan_files`` for an archive: absolute, resolved paths (workers have their own working
    folder; the service stores files under its resolved folders) kept as strings, a third of
    a Path's memory."""
    import os

    from qcd.intake import recordings_in
    out: list[str] = []
    seen: set[str] = set()
    for p in paths:
        if not p.exists():
            raise ConfigError(None, "", f"no such file or folder: {p}")
        for q in recordings_in(Path(os.path.realpath(p))):
            s = os.path.realpath(q)
            if s not in seen:
                seen.add(s)
                out.append(s)
    return out


def _scan_cluster(args: argparse.Namespace, cfg, rig, rules, sender) -> int:
    """``scan --store --cluster``: qcd.cluster measures, this process stores (one writer)."""
    import time

    from qcd.cluster import Progress, backfill, connect, parse_path_map, parse_target
    from qcd.store import Store
    target = parse_target(args.cluster)
    path_map = parse_path_map(args.path_map)
    files = _archive_files(list(args.paths))
    progress: list[Progress] = []

    def started(total: int, skipped: int) -> None:
        print(f"qcd scan: rig {rig.name}: {total} file(s) to measure on {target}"
              + (f", {skipped} already stored (skipped)" if skipped else ""), flush=True)
        progress.append(Progress(total))

    def said(fm) -> None:
        progress[0](fm)
    with Store(cfg.database) as store, connect(target, quiet=not args.debug) as client:
        print(f"qcd scan: rig {rig.name}: {len(files)} file(s) found; skipping the stored ones "
              f"and ordering the rest by recording time", flush=True)
        res = backfill(files, rig, store, rules, client=client, clock=time.time, sender=sender,
                       on_file=said, path_map=path_map, on_start=started)
    return _said_stored(res, rig, rules, sender)


def _said_stored(res, rig, rules, sender) -> int:
    """What a ``scan --store`` did (inline, workers or cluster), and its exit code."""
    print(f"qcd scan: rig {rig.name}: {res.count - len(res.failed)} of {res.count} "
          f"file(s) measured and stored" + _failed_text(res.failed))
    for a in res.opened:
        print(f"alert opened: {a['measure']} channel {a['channel']} (rule {a['rule']}, "
              f"mode {a['mode']})")
    for mode, n in res.learning.items():
        print(f"learning ({mode}): {n} of {rules.settings.learning_files} files; history "
              f"checks send no messages until then")
    if res.digest is not None:
        print(f"digest queued: {res.digest.title}")
    ob = res.outbox
    print(f"messages: {ob.get('sent', 0)} sent, {ob.get('pending', 0)} pending, "
          f"{ob.get('stuck', 0)} stuck" + ("" if sender else " (no notification targets)"))
    return EXIT_FAILED if res.failed or ob.get("stuck", 0) else EXIT_OK


def _failed_text(failed: list[FileMeasures]) -> str:
    """'; 3 could not be read (bad signature 2, truncated 1) and are stored with the reason'."""
    if not failed:
        return ""
    kinds: dict[str, int] = {}
    for fm in failed:
        k = (fm.error_kind or "error").replace("_", " ")
        kinds[k] = kinds.get(k, 0) + 1
    detail = ", ".join(f"{k} {n}" for k, n in sorted(kinds.items()))
    return (f"; {len(failed)} could not be read ({detail}) and are stored with the reason "
            f"(qcd report lists them)")
