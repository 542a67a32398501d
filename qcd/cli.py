"""The command line: parse, call one library function, print, map errors to exit codes.

Exit codes: 0 all good, 1 some file failed (or an alert/delivery problem was found), 2 usage or
config error. A QcdError prints as one line; a traceback only with --debug.
Each command's body is a ``_cmd_<name>(args) -> int`` below; library code lives in its module.
Over 500 lines: the whole command surface (every option and its help) is one parser here.
"""
from __future__ import annotations

import argparse
import logging
import sys
from pathlib import Path
from typing import TYPE_CHECKING

from qcd import __version__
from qcd.errors import ConfigError, QcdError, StoreError, printable

if TYPE_CHECKING:
    from qcd.results import FileMeasures, Measure

__all__ = ["main", "build_parser"]

log = logging.getLogger("qcd")

EXIT_OK, EXIT_FAILED, EXIT_USAGE = 0, 1, 2


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # argparse exits 2 already; keep one clean line
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", "-c", type=Path, metavar="FILE",
                   help="qcd.toml to use (default: ./qcd.toml, then ~/.config/qcd/qcd.toml)")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")


def build_parser() -> argparse.ArgumentParser:
    """The whole command surface; every command's --help explains itself."""
    import textwrap
    parser = _Parser(
        prog="qcd",
        description=textwrap.fill(
            "Quality control for electrophysiology rigs: measures every finished recording "
            "(noise, mains hum, test-pulse resistances, drift), keeps each rig's history in "
            "SQLite, alerts the lab when a rig drifts, and writes a morning report.", 79),
        formatter_class=argparse.RawDescriptionHelpFormatter,
        epilog="Examples (each line one command):\n"
               "  qcd demo                        # the whole pipeline on an invented lab\n"
               "  qcd scan --json recordings/     # measure files now\n"
               "  qcd watch --config qcd.toml     # run the service\n"
               "  qcd <command> --help            # what each command does")
    parser.add_argument("--version", action="version", version=f"qcd {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)

    p = sub.add_parser("scan", help="measure recordings now and print the measures",
                       description="Measure files or folders (recursive, *.abf) and print one "
                                   "row per file, or one JSON object per file per line with "
                                   "--json. With --store, also store, judge and alert as the "
                                   "service would.",
                       epilog="Example: qcd scan --json --pulse -5,10,20 cell01.abf")
    p.add_argument("paths", nargs="+", type=Path, metavar="PATH", help="files or folders")
    p.add_argument("--json", action="store_true", help="one JSON object per file per line")
    p.add_argument("--pulse", metavar="AMP,START_MS,LENGTH_MS",
                   help="declared test step when the file has none: AMP in mV (voltage clamp) "
                        "or pA (current clamp), START and LENGTH in ms from the sweep start")
    p.add_argument("--mains", type=float, choices=(50.0, 60.0), metavar="HZ",
                   help="mains frequency of the building (50 or 60); default: found from data")
    p.add_argument("--mode", choices=("voltage_clamp", "current_clamp", "extracellular"),
                   help="recording mode when the headers cannot tell (no command channel); "
                        "default: from the headers")
    p.add_argument("--workers", type=int, default=1, metavar="N",
                   help="measure N files in parallel processes (default 1)")
    p.add_argument("--store", action="store_true",
                   help="store, judge, alert and deliver as the service does (needs --rig)")
    p.add_argument("--rig", metavar="NAME", help="rig the files belong to (with --store)")
    p.add_argument("--cluster", metavar="ADDRESS",
                   help="with --store: measure on a Dask cluster, tcp://HOST:PORT of a running "
                        "scheduler or local:N for N local worker processes; files already "
                        "stored are skipped, so a rerun continues (needs qcd-ephys[cluster])")
    p.add_argument("--path-map", action="append", default=[], metavar="CLIENT=WORKER",
                   help="with --cluster: the workers see files under CLIENT as under WORKER "
                        "(repeatable)")
    _common(p)

    p = sub.add_parser("watch", help="run the service: watch the rigs' folders",
                       description="Watch every rig folder of the config, measure each finished "
                                   "recording once, store, judge, alert and deliver. Catches up "
                                   "on files written while it was not running.",
                       epilog="Example: qcd watch --config C:/qcd/qcd.toml")
    p.add_argument("--no-catch-up", action="store_true",
                   help="skip the start-up scan of files not yet in the store")
    p.add_argument("--workers", type=int, default=0, metavar="N",
                   help="measuring processes (default: number of cores, at most 4)")
    _common(p)

    p = sub.add_parser("status", help="is the service alive; queue, last file per rig",
                       description="Read the heartbeat the running service leaves in the "
                                   "database: alive or not, queue length, the last file "
                                   "recorded per rig, open alerts, undelivered messages.",
                       epilog="Example: qcd status")
    _common(p)

    p = sub.add_parser("report", help="morning report of the recent runs",
                       description="Per rig: files since --since, each key measure against the "
                                   "rig's normal range, open alerts and likely noise sources.",
                       epilog="Example: qcd report --since 18h --html morning.html")
    p.add_argument("--since", default="18h", metavar="AGE",
                   help="how far back: 18h, 3d, 90m, or an ISO date (default 18h)")
    p.add_argument("--rig", metavar="NAME", action="append", help="only this rig (repeatable)")
    p.add_argument("--json", action="store_true", help="print the report as JSON")
    p.add_argument("--html", type=Path, metavar="FILE",
                   help="also write one self-contained HTML file with plots")
    _common(p)

    p = sub.add_parser("export", help="per-file verdicts and measures for analysis",
                       description="One row per stored file and channel with its measures and a "
                                   "verdict: pass, or fail with the limits it broke, by the "
                                   "rules the alerts use (fixed limits judged now, with the "
                                   "rules as they are; drift findings as the rig's history gave "
                                   "them when the file came in). With the rig's cell_pattern, "
                                   "files are grouped by cell with a verdict per cell. JSON "
                                   "Lines on stdout, or CSV with --csv FILE.",
                       epilog="Example: qcd export --since 7d --rig rig-b --csv rig-b.csv")
    p.add_argument("--since", metavar="AGE",
                   help="files recorded since: 7d, 18h, or an ISO date (default: all)")
    p.add_argument("--rig", metavar="NAME", action="append", help="only this rig (repeatable)")
    p.add_argument("--csv", type=Path, metavar="FILE", help="write CSV to FILE")
    p.add_argument("--rules", type=Path, metavar="FILE", action="append",
                   help="a rule file of inclusion criteria ([[limit]] tables) applied on top "
                        "of the config's rules (repeatable)")
    _common(p)

    p = sub.add_parser("trend", help="one measure's series for one rig",
                       description="Print a rig's values of one measure over time, with a "
                                   "terminal sparkline, or as CSV.",
                       epilog="Example: qcd trend rig-b hum_rms --days 30 --csv > hum.csv")
    p.add_argument("rig", metavar="RIG")
    p.add_argument("measure", metavar="MEASURE", help="e.g. noise_rms, hum_rms, access_resistance")
    p.add_argument("--channel", type=int, default=None, metavar="N", help="input channel")
    p.add_argument("--days", type=float, default=30.0, metavar="D", help="how far back (30)")
    p.add_argument("--csv", action="store_true", help="CSV on stdout")
    _common(p)

    p = sub.add_parser("compare", help="what a change at the rig did: before vs after",
                       description="Compare two recordings (or two sets) made before and after "
                                   "one change at the rig: noise per band and per mains "
                                   "harmonic in dB and in the measure's unit, which changes "
                                   "exceed the files' own variation, and the hint that fits.",
                       epilog="Example: qcd compare before.abf after.abf --html change.html")
    p.add_argument("before", type=Path, metavar="BEFORE", help="file or folder")
    p.add_argument("after", type=Path, metavar="AFTER", help="file or folder")
    p.add_argument("--channel", type=int, default=0, metavar="N", help="input channel (0)")
    p.add_argument("--mains", type=float, choices=(50.0, 60.0), metavar="HZ")
    p.add_argument("--json", action="store_true", help="print the comparison as JSON")
    p.add_argument("--html", type=Path, metavar="FILE", help="write the spectra overlaid")
    _common(p)

    p = sub.add_parser("alerts", help="open and recent alerts, undelivered messages",
                       description="List open alerts, alerts resolved recently, active "
                                   "mutes and messages still waiting in the outbox.",
                       epilog="Example: qcd alerts --days 7")
    p.add_argument("--days", type=float, default=7.0, metavar="D",
                   help="resolved alerts of the last D days (7)")
    p.add_argument("--rig", metavar="NAME", help="only this rig")
    _common(p)

    p = sub.add_parser("mute", help="hold back a rig's messages for a while",
                       description="Hold back the messages of a rig (glob) for a duration, or "
                                   "until its open alerts resolve. Alerts keep being evaluated; "
                                   "one still open when the mute ends is announced then. "
                                   "Without arguments: list the active mutes.",
                       epilog="Example: qcd mute rig-b 2h --reason 'replacing headstage'; "
                              "lift it early with: qcd mute --end 3")
    p.add_argument("rig", nargs="?", metavar="RIG", help="rig name or glob ('*' for all)")
    p.add_argument("duration", nargs="?", metavar="FOR",
                   help="2h, 30m, 1d, or 'resolved' (until its open alerts resolve)")
    p.add_argument("--rule", default="*", metavar="GLOB",
                   help="only rules whose name matches (default *)")
    p.add_argument("--reason", default="", help="why (shown in qcd alerts and the report)")
    p.add_argument("--end", type=int, metavar="ID",
                   help="lift the active mute ID now (IDs: qcd mute, or qcd alerts)")
    _common(p)

    p = sub.add_parser("note", help="write a note in a rig's logbook",
                       description="Write what was done at a rig (a new headstage, a new bath "
                                   "ground, a moved rig) in its logbook. Notes are marked on "
                                   "the report's trend plots, listed in the report and shown "
                                   "between the values of qcd trend. Without TEXT: list the "
                                   "rig's notes.",
                       epilog="Example: qcd note rig-b replaced the headstage --at 2h")
    p.add_argument("rig", metavar="RIG", help="a configured rig")
    p.add_argument("text", nargs="*", metavar="TEXT", help="what was done (no quotes needed)")
    p.add_argument("--at", metavar="WHEN",
                   help="when it was done: an age (2h, 1d: that long ago) or an ISO date and "
                        "time (default: now)")
    p.add_argument("--days", type=float, default=30.0, metavar="D",
                   help="without TEXT: the notes of the last D days (30)")
    _common(p)

    p = sub.add_parser("digest", help="send or print the daily report now",
                       description="The daily report that 'qcd watch' sends once a day at "
                                   "[digest] at: the rigs ranked by severity, one line each, "
                                   "with the HTML page attached where the target takes "
                                   "attachments. --now queues and sends one by hand (it does "
                                   "not replace the day's); --dry-run prints it instead.",
                       epilog="Example: qcd digest --dry-run --html today.html")
    p.add_argument("--now", action="store_true", help="send one now through the outbox")
    p.add_argument("--dry-run", action="store_true", help="print it; send nothing")
    p.add_argument("--html", type=Path, metavar="FILE", help="also write the page it attaches")
    _common(p)

    p = sub.add_parser("relearn", help="accept a rig's new normal after an intentional change",
                       description="After an intentional change at a rig (new headstage, moved "
                                   "rig, new filter setting): the references of its drift "
                                   "charts learn again from the next files, its open history "
                                   "alerts on those measures resolve with a message saying "
                                   "why, and a logbook note marks it on the trend plots. An "
                                   "alert that resolves by itself never re-learns.",
                       epilog="Example: qcd relearn rig-b new headstage --measure noise_rms")
    p.add_argument("rig", metavar="RIG", help="a configured rig")
    p.add_argument("why", nargs="*", metavar="WHY", help="what changed (no quotes needed)")
    p.add_argument("--measure", action="append", metavar="M",
                   help="only this measure (repeat for more; default: every measure)")
    p.add_argument("--channel", type=int, metavar="N", help="only channel N")
    _common(p)

    p = sub.add_parser("rules", help="the history rules' false-alarm rates; check rule files",
                       description="Without --check: for each history rule, its limit and how "
                                   "often it signals on a rig in control, in files and in days "
                                   "at each rig's observed file rate (last 30 days). With "
                                   "--check: check rule files as the service loads them (known "
                                   "measures and modes, limits in the measure's quantity), each "
                                   "after the packaged default rules, as qcd.toml's 'rules' "
                                   "list would load it.",
                       epilog="Example: qcd rules --config qcd.toml (or: qcd rules --check "
                              "rules/my-lab.toml)")
    p.add_argument("--check", nargs="+", type=Path, metavar="FILE",
                   help="rule files to check (exit 2 at the first wrong rule)")
    _common(p)

    p = sub.add_parser("init", help="write a commented starter qcd.toml",
                       description="Write a starter config with one example rig to edit.",
                       epilog="Example: qcd init qcd.toml")
    p.add_argument("path", nargs="?", type=Path, default=Path("qcd.toml"), metavar="FILE")
    p.add_argument("--force", action="store_true", help="overwrite an existing file")
    _common(p)

    p = sub.add_parser("notify-test", help="send a test message to the configured targets",
                       description="Send one test message through every configured target and "
                                   "say which ones accepted it.",
                       epilog="Example: qcd notify-test --config qcd.toml")
    _common(p)

    p = sub.add_parser("demo", help="run the whole pipeline on a generated demo lab",
                       description="Generate an invented four-rig lab with a few weeks of "
                                   "recordings (one slowly degrading ground, one failing "
                                   "headstage, one seal lost mid-recording, one healthy rig) in "
                                   "a temporary folder, run the real service over it, deliver "
                                   "the alerts to a local file, and print the morning report.",
                       epilog="Example: qcd demo --keep demo-lab")
    p.add_argument("--keep", type=Path, metavar="DIR",
                   help="build the lab in DIR and keep it (default: a temporary folder); DIR "
                        "must be new, empty or an earlier demo's")
    p.add_argument("--days", type=int, default=21, metavar="N", help="days of recordings (21)")
    _common(p)

    return parser


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


_SCAN_MODES = {"voltage_clamp": "VC", "current_clamp": "CC", "extracellular": "EXT",
               "unknown": "?"}
# (header over, header, width, measure): the scan table's number columns, values in the units
# the headers name ('unit' is the channel's own: pA in voltage clamp, mV otherwise)
_SCAN_COLUMNS = (("noise", "rms", 8, "noise_rms"), ("noise", "rms_1k", 8, "noise_rms_1k"),
                 ("mains", "hum", 8, "hum_rms"), ("mains", "Hz", 5, "line_hz"),
                 ("access", "MOhm", 7, "access_resistance"),
                 ("membrane", "MOhm", 8, "membrane_resistance"),
                 ("capacitance", "pF", 11, "membrane_capacitance"),
                 ("seal", "GOhm", 6, "seal_resistance"), ("input", "MOhm", 6, "input_resistance"))
_SCAN_NAME_MAX = 27          # the table then fits 120 columns


def _short_name(name: str, width: int) -> str:
    """``name`` cut from the middle to ``width`` characters, keeping more of its end (where
    names of one series differ: cell01_0003.abf)."""
    if len(name) <= width:
        return name
    tail = (2 * (width - 3) + 2) // 3
    return name[:width - 3 - tail] + "..." + name[len(name) - tail:]


def _scan_width(files: list[Path]) -> int:
    return max(8, min(_SCAN_NAME_MAX, max((len(f.name) for f in files), default=8)))


def _scan_header(width: int) -> str:
    top = " " * (width + 10)
    low = f"{'file':<{width}} {'mode':<4} {'unit':<4}"
    for over, head, w, _ in _SCAN_COLUMNS:
        top += f" {over if head != 'Hz' and (over, head) != ('noise', 'rms_1k') else '':>{w}}"
        low += f" {head:>{w}}"
    return f"{top.rstrip()}\n{low} status"


def _scan_number(m: Measure | None, width: int, digits: int = 3) -> str:
    if m is None or isinstance(m.value, bool) or not isinstance(m.value, (int, float)):
        return f"{'-':>{width}}"
    text = f"{m.value:.{digits}g}"
    if "e+" in text and abs(m.value) < 10 ** (width - 1):
        text = f"{m.value:.0f}"                        # 1542, not 1.54e+03
    return f"{text:>{width}}"


def _scan_row(fm: FileMeasures, width: int, mains_hz: float | None = None) -> str:
    """One row of the scan table; an error row says the whole reason."""
    name = _short_name(Path(fm.path).name, width)
    if fm.status != "ok":
        err = (fm.error or "").replace(str(fm.path) + ": ", "")
        return f"{name:<{width}} {'':4} {'':4} error ({fm.error_kind}): {err}"
    prim = fm.extra.get("primary_channel")
    chans = {c.index: c for c in fm.channels}
    ch = chans.get(prim) or (fm.channels[0] if fm.channels else None)
    ms = dict(ch.measures) if ch else {}
    unit = next((ms[k].unit for k in ("noise_rms", "holding", "hum_rms") if k in ms),
                ch.unit if ch else "")                # the unit the values are given in
    if "line_hz" not in ms and mains_hz and "hum_rms" in ms:
        from qcd.results import Measure as _M
        ms["line_hz"] = _M("line_hz", mains_hz, "Hz")          # the declared frequency
    cells = []
    for _, _, w, measure in _SCAN_COLUMNS:
        if measure == "hum_rms" and "hum_rms" not in ms and "hum_rms_max" in ms:
            cells.append(f"{'<' + _scan_number(ms['hum_rms_max'], w - 1).strip():>{w}}")
        else:
            cells.append(_scan_number(ms.get(measure), w, 4 if measure == "line_hz" else 3))
    return (f"{name:<{width}} {_SCAN_MODES.get(fm.mode, '?'):<4} {unit[:4]:<4} "
            + " ".join(cells) + " ok")


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
        failed = res.failed
        print(f"qcd scan: rig {rig.name}: {res.count - len(failed)} of {res.count} "
              f"file(s) measured and stored" + _failed_text(failed))
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
        if not files:
            print("qcd scan: no *.abf files found", file=sys.stderr)
        return EXIT_FAILED if failed or ob.get("stuck", 0) else EXIT_OK
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


_COMMANDS = {
    "scan": _cmd_scan, "watch": _cmd_watch, "status": _cmd_status, "report": _cmd_report,
    "trend": _cmd_trend, "export": _cmd_export, "compare": _cmd_compare, "alerts": _cmd_alerts,
    "mute": _cmd_mute, "note": _cmd_note, "digest": _cmd_digest, "relearn": _cmd_relearn,
    "rules": _cmd_rules, "init": _cmd_init, "notify-test": _cmd_notify_test, "demo": _cmd_demo,
}


# Options whose value may start with '-' (a negative pulse amplitude): argparse would take
# '--pulse -5,10,20' for two options, so the value is joined to its option first.
_SIGNED_VALUES = ("--pulse",)


def _join_signed(argv: list[str]) -> list[str]:
    out: list[str] = []
    i = 0
    while i < len(argv):
        a = argv[i]
        if a in _SIGNED_VALUES and i + 1 < len(argv) and argv[i + 1][:1] == "-" and \
                argv[i + 1][1:2].isdigit():
            out.append(f"{a}={argv[i + 1]}")
            i += 2
            continue
        out.append(a)
        i += 1
    return out


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``qcd`` command."""
    parser = build_parser()
    args = parser.parse_args(_join_signed(list(sys.argv[1:] if argv is None else argv)))
    if not args.command:
        parser.print_help()
        return EXIT_USAGE
    logging.basicConfig(level=logging.DEBUG if args.debug else logging.WARNING,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    from qcd.config import SECRET_FILTER
    for handler in logging.getLogger().handlers:      # secrets masked in every line, --debug too
        handler.addFilter(SECRET_FILTER)
    try:
        return _COMMANDS[args.command](args)
    except ConfigError as e:
        if args.debug:
            raise
        print(f"qcd {args.command}: {e}", file=sys.stderr)
        return EXIT_USAGE
    except QcdError as e:
        if args.debug:
            raise
        print(f"qcd {args.command}: {e}", file=sys.stderr)
        return EXIT_FAILED
    except KeyboardInterrupt:
        print(f"qcd {args.command}: interrupted", file=sys.stderr)
        return 130
    except BrokenPipeError:   # ``qcd ... | head``: the reader left; stop quietly, as tools do
        _quiet_stdout()
        return EXIT_OK
    except OSError as e:      # a file or folder the user named: one line, path and reason
        if args.debug:
            raise
        print(f"qcd {args.command}: {_os_error_text(e)}", file=sys.stderr)
        if e.filename is None:
            _quiet_stdout()   # the output itself failed (a full disk): do not try it again
        return EXIT_FAILED


def _os_error_text(e: OSError) -> str:
    """'PATH: No such file or directory' (or 'writing the output: No space left on device')."""
    reason = e.strerror or str(e)
    if e.filename is None:
        return f"writing the output: {reason}"
    where = printable(e.filename)
    if e.filename2 is not None:
        where += f" -> {printable(e.filename2)}"
    return f"{where}: {reason}"


def _quiet_stdout() -> None:
    """Point stdout at devnull so the interpreter's final flush cannot raise again."""
    import os
    try:
        devnull = os.open(os.devnull, os.O_WRONLY)
        os.dup2(devnull, sys.stdout.fileno())
    except (OSError, ValueError):
        pass
