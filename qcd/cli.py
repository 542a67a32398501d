"""The command line: parse, dispatch, map errors to exit codes; main() is the entry point.

Exit codes (qcd.errors): 0 all good, 1 some file failed (or an alert/delivery problem was
found), 2 usage or config error. A QcdError prints as one line; a traceback only with --debug.
Each command's body is a ``_cmd_<name>(args) -> int`` in qcd.scan, qcd.review or qcd.control
(imported when that command runs); library code lives in its module. Imports qcd.errors.
"""
from __future__ import annotations

import argparse
import logging
import sys
from collections.abc import Callable
from pathlib import Path

from qcd import __version__
from qcd.errors import EXIT_FAILED, EXIT_OK, EXIT_USAGE, ConfigError, QcdError, printable

__all__ = ["main", "build_parser"]

log = logging.getLogger("qcd")


class _Parser(argparse.ArgumentParser):
    def error(self, message: str) -> None:  # argparse exits 2 already; keep one clean line
        self.print_usage(sys.stderr)
        self.exit(EXIT_USAGE, f"{self.prog}: error: {message}\n")


def _common(p: argparse.ArgumentParser) -> None:
    p.add_argument("--config", "-c", type=Path, metavar="FILE",
                   help="qcd.toml to use (default: ./qcd.toml, then ~/.config/qcd/qcd.toml)")
    p.add_argument("--debug", action="store_true", help="show tracebacks and debug logging")


# textwrap.fill(..., 79) of the description, written out: importing textwrap and compiling
# its patterns is about 1.3 ms of every start (tests/test_cli.py checks it against the fill)
DESCRIPTION = (
    "Quality control for electrophysiology rigs: measures every finished recording\n"
    "(noise, mains hum, test-pulse resistances, drift), keeps each rig's history in\n"
    "SQLite, alerts the lab when a rig drifts, and writes a morning report.")


def build_parser() -> argparse.ArgumentParser:
    """The whole command surface; every command's --help explains itself."""
    parser = _Parser(
        prog="qcd",
        description=DESCRIPTION,
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


# The module holding each command's body, ``_cmd_<command>(args) -> int``, named by the stage
# it drives. main imports only the one it runs, so `qcd scan` loads no other command's module.
_COMMANDS = {
    "scan": "scan", "watch": "control", "status": "review", "report": "review",
    "trend": "review", "export": "review", "compare": "review", "alerts": "review",
    "mute": "control", "note": "control", "digest": "control", "relearn": "control",
    "rules": "control", "init": "control", "notify-test": "control", "demo": "control",
}


def _body(command: str) -> Callable[[argparse.Namespace], int]:
    """``_cmd_<command>`` of the module ``_COMMANDS`` names, imported on first use."""
    where = _COMMANDS[command]
    if where == "scan":
        from qcd import scan as module
    elif where == "review":
        from qcd import review as module
    else:
        from qcd import control as module
    return getattr(module, "_cmd_" + command.replace("-", "_"))


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
        return _body(args.command)(args)
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
