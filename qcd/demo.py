"""The demo lab: an invented four-rig lab, its recordings as real ABF1 files, and a run of the
real pipeline over them (store, judge, alerts, apprise delivery to a local file, report).

The recordings come from the signal models of qcd.synth. Imports numpy, apprise, qcd.synth
and, for the run, qcd.config, qcd.ruleset, qcd.watch (the service), qcd.notify, qcd.store and
qcd.report.
"""
from __future__ import annotations

import math
import os
import shutil
import sys
import tempfile
import time
from dataclasses import dataclass, field
from datetime import datetime, timedelta, timezone
from pathlib import Path
from typing import Callable, Iterable

import numpy as np

from qcd.synth import (MAINS_HZ, STEP_LEN_S, STEP_START_S, field_trace, seal_sweeps,
                       whole_cell_sweeps, write_abf1)

__all__ = ["LAB_NAME", "RigPlan", "FileSpec", "LabPlan", "plan_lab", "synthesize", "build_lab",
           "run_demo", "DemoResult", "demo_config_text", "write_sample_set", "SAMPLE_END"]

LAB_NAME = "retina and slice physiology lab"
# Acquisition settings of the invented rigs (common practice: fs = 5-10 x the Bessel corner).
_PATCH_FS = 10_000.0
_PATCH_FC = 2_000.0
_FIELD_FS = 20_000.0
_FIELD_FC = 2_000.0
_FIELD_DURATION_S = 4.0


# ----------------------------------------------------------------------------- the lab plan

@dataclass(frozen=True)
class RigPlan:
    name: str
    kind: str            # 'whole_cell' | 'cell_attached' | 'field'
    fault: str           # 'none' | 'ground' | 'headstage' | 'seal'
    fault_day: int | None  # 0-based simulated day the fault starts (None: healthy)
    description: str


@dataclass(frozen=True)
class FileSpec:
    rig: str
    relpath: str         # under the lab folder: '<rig>/<date>_cellNN.abf'
    recorded_at: float   # Unix seconds, UTC
    day: int
    index: int           # file number of the day (1-based)
    faulty: bool         # the scripted fault shows in this file
    params: dict = field(default_factory=dict)


@dataclass(frozen=True)
class LabPlan:
    start: float         # Unix seconds of day 0, 00:00 UTC
    days: int
    files_per_day: int
    rigs: tuple[RigPlan, ...]
    files: tuple[FileSpec, ...]

    def day_start(self, day: int) -> float:
        return self.start + 86400.0 * day

    @property
    def end(self) -> float:
        return self.day_start(self.days)


def _fault_days(days: int, files_per_day: int) -> tuple[int, int, int]:
    """(ground starts, headstage fails, seal lost): after the rigs' learning phase (10 files)."""
    learn = math.ceil(12 / files_per_day) + 1
    ground = max(learn, round(days * 0.35))
    headstage = max(learn + 1, round(days * 0.55))
    seal = max(learn + 1, round(days * 0.75))
    return min(ground, days - 1), min(headstage, days - 1), min(seal, days - 1)


def plan_lab(days: int = 21, files_per_day: int = 3, end: datetime | None = None,
             seed: int = 7) -> LabPlan:
    """The scenario: four rigs, ``days`` days of ``files_per_day`` files each, ending the day
    before ``end`` (default: today, UTC). Deterministic for a seed."""
    if days < 6:
        raise ValueError("the demo lab needs at least 6 days (learning phase plus faults)")
    end = end or datetime.now(timezone.utc)
    last = datetime(end.year, end.month, end.day, tzinfo=timezone.utc)
    start = (last - timedelta(days=days)).timestamp()
    g, h, s = _fault_days(days, files_per_day)
    rigs = (
        RigPlan("patch-1", "whole_cell", "none", None,
                "whole-cell patch rig, healthy throughout"),
        RigPlan("patch-2", "whole_cell", "headstage", h,
                "whole-cell patch rig whose headstage fails: broadband noise steps up"),
        RigPlan("patch-3", "cell_attached", "seal", s,
                "cell-attached rig: on one day a seal is lost during the recording"),
        RigPlan("field-1", "field", "ground", g,
                "field-recording rig whose ground slowly degrades: mains hum creeps up"),
    )
    rng = np.random.default_rng(seed)
    files: list[FileSpec] = []
    for rig in rigs:
        for day in range(days):
            day0 = start + 86400.0 * day
            hours = np.sort(rng.uniform(9.0, 19.0, files_per_day))
            for i, hour in enumerate(hours, start=1):
                date = datetime.fromtimestamp(day0, tz=timezone.utc).strftime("%Y-%m-%d")
                stem = "slice" if rig.kind == "field" else "cell"
                params, faulty = _file_params(rng, rig, day, i)
                files.append(FileSpec(rig.name, f"{rig.name}/{date}_{stem}{i:02d}.abf",
                                      round(day0 + hour * 3600.0, 3), day, i, faulty, params))
    files.sort(key=lambda f: f.recorded_at)
    return LabPlan(start, days, files_per_day, rigs, tuple(files))


def _file_params(rng: np.random.Generator, rig: RigPlan, day: int, index: int) -> tuple[dict, bool]:
    """Per-file circuit and noise values: a rig's normal scatter plus its scripted fault."""
    jitter = lambda s: float(math.exp(rng.normal(0.0, s)))  # noqa: E731 - lognormal scatter
    p: dict = {"seed": int(rng.integers(0, 2**31)), "hum_phase": float(rng.uniform(0, 6.28))}
    faulty = False
    if rig.kind in ("whole_cell", "cell_attached"):
        p["noise_sd"] = 1.2e-12 * jitter(0.05)                     # A, 2 kHz band
        p["hum_amps"] = tuple(a * jitter(0.10) for a in (0.35e-12, 0.10e-12, 0.06e-12))
        p["holding"] = -40e-12 * jitter(0.06)
    if rig.kind == "whole_cell":
        p.update(ra=11e6 * jitter(0.12), rm=450e6 * jitter(0.15), cm=30e-12 * jitter(0.10))
        if rig.fault == "headstage" and day >= rig.fault_day:
            p["noise_sd"] *= 3.5                                     # broadband step
            faulty = True
    elif rig.kind == "cell_attached":
        p["holding"] = -2e-12 * jitter(0.10)
        p["noise_sd"] = 0.35e-12 * jitter(0.06)
        seal = 12e9 * jitter(0.06)
        seals = [seal] * 10
        if rig.fault == "seal" and day == rig.fault_day and index == 2:
            # the seal holds for three sweeps, then gives way to about 150 MOhm
            seals = [seal] * 3 + [max(150e6, seal * math.exp(-1.6 * (k + 1)))
                                  for k in range(7)]
            faulty = True
        p["seals"] = tuple(seals)
    else:  # field
        p["noise_sd"] = 12e-6 * jitter(0.06)                         # V, 2 kHz band
        growth = 1.0
        if rig.fault == "ground" and day >= rig.fault_day:
            growth = min(12.0, 1.4 ** (day - rig.fault_day + 1))     # creeping ground fault
            faulty = True
        p["hum_amps"] = tuple(a * growth * jitter(0.10) for a in (4e-6, 1.2e-6, 1.6e-6))
        p["offset"] = 0.2e-3 * rng.normal()
    return p, faulty


def synthesize(spec: FileSpec, kind: str) -> tuple[np.ndarray, float, str, bool]:
    """(sweeps in display unit, fs, unit, gap_free) for one planned file."""
    p = spec.params
    rng = np.random.default_rng(p["seed"])
    if kind == "whole_cell":
        a = whole_cell_sweeps(rng, n_sweeps=10, fs=_PATCH_FS, fc=_PATCH_FC, ra=p["ra"],
                              rm=p["rm"], cm=p["cm"], noise_sd=p["noise_sd"],
                              hum_amps=p["hum_amps"], holding=p["holding"],
                              hum_phase=p["hum_phase"])
        return a * 1e12, _PATCH_FS, "pA", False
    if kind == "cell_attached":
        a = seal_sweeps(rng, n_sweeps=len(p["seals"]), fs=_PATCH_FS, fc=_PATCH_FC,
                        seals=p["seals"], noise_sd=p["noise_sd"], hum_amps=p["hum_amps"],
                        holding=p["holding"], hum_phase=p["hum_phase"])
        return a * 1e12, _PATCH_FS, "pA", False
    a = field_trace(rng, fs=_FIELD_FS, fc=_FIELD_FC, duration_s=_FIELD_DURATION_S,
                    noise_sd=p["noise_sd"], hum_amps=p["hum_amps"], offset=p["offset"],
                    hum_phase=p["hum_phase"])
    return a * 1e3, _FIELD_FS, "mV", True


def _build_one(folder: str, spec: FileSpec, kind: str) -> str:
    sweeps, fs, unit, gap_free = synthesize(spec, kind)
    path = Path(folder) / spec.relpath
    write_abf1(path, sweeps, fs, unit, spec.recorded_at, gap_free=gap_free)
    return str(path)


def build_lab(folder: Path, plan: LabPlan,
              progress: Callable[[int, int], None] | None = None,
              workers: int = 1) -> list[Path]:
    """Write every planned file under ``folder``; returns their paths, oldest first.

    ``workers`` > 1 writes in that many processes (the files are independent)."""
    from qcd.workers import imap
    kinds = {r.name: r.kind for r in plan.rigs}
    jobs = [(str(folder), spec, kinds[spec.rig]) for spec in plan.files]
    out: list[Path] = []
    for n, p in enumerate(imap(_build_one, jobs, workers if len(jobs) > 8 else 1), start=1):
        out.append(Path(p))
        if progress:
            progress(n, len(jobs))
    return out


# ----------------------------------------------------------------------------- the run

_SCHEMA = "qcdfile"
_REGISTERED = False


def _register_file_schema(echo: Callable[[str], None] | None) -> None:
    """An apprise schema ``qcdfile:///abs/path/alerts.log``: appends each message to the file."""
    global _REGISTERED, _ECHO
    _ECHO = echo
    if _REGISTERED:
        return
    from apprise.decorators import notify

    @notify(on=_SCHEMA, name="qcd demo alert log")
    def _append(body, title, notify_type, meta, *args, **kwargs):  # noqa: ANN001
        host = meta.get("host") or ""
        path = Path(("/" + host if host else "") + (meta.get("fullpath") or ""))
        sim = _SIM_NOW[0]
        when = datetime.fromtimestamp(sim if sim is not None else time.time(), tz=timezone.utc)
        stamp = when.strftime("%Y-%m-%d %H:%M") + (" UTC (simulated clock)" if sim else " UTC")
        with open(path, "a", encoding="utf-8") as f:
            f.write(f"--- {stamp} [{notify_type}] {title}\n{body}\n\n")
        if _ECHO:
            _ECHO(f"      message {when.strftime('%m-%d %H:%M')}: {title}")
        return True

    _REGISTERED = True


_ECHO: Callable[[str], None] | None = None
_SIM_NOW: list[float | None] = [None]     # the demo's simulated clock, for the log's stamps


def demo_config_text(lab: Path) -> str:
    """The embedded demo config: four rigs, the packaged rules, delivery to alerts.log."""
    lab = Path(lab).resolve()
    log = (lab / "alerts.log").as_posix()
    return f'''# qcd demo lab: {LAB_NAME} (invented; made by qcd demo)
database = "qcd.sqlite"
notify = ["{_SCHEMA}://{log}"]
settle_seconds = 2
give_up_hours = 6
# the acquisition PCs' clocks (header times are read in this zone)
timezone = "UTC"

[[rig]]
name = "patch-1"
folders = ["patch-1"]
test_pulse = "-5,{STEP_START_S * 1e3:g},{STEP_LEN_S * 1e3:g}"
mains_hz = {MAINS_HZ:g}

[[rig]]
name = "patch-2"
folders = ["patch-2"]
test_pulse = "-5,{STEP_START_S * 1e3:g},{STEP_LEN_S * 1e3:g}"
mains_hz = {MAINS_HZ:g}

[[rig]]
name = "patch-3"
folders = ["patch-3"]
test_pulse = "10,{STEP_START_S * 1e3:g},{STEP_LEN_S * 1e3:g}"
mains_hz = {MAINS_HZ:g}

[[rig]]
name = "field-1"
folders = ["field-1"]
mains_hz = {MAINS_HZ:g}
'''


@dataclass(frozen=True)
class DemoResult:
    folder: Path
    database: Path
    html: Path | None
    alerts_log: Path
    n_files: int
    seconds: float
    report_text: str
    plan: LabPlan


def _printer(out) -> Callable[[str], None]:
    def p(text: str) -> None:
        print(text, file=out, flush=True)
    return p


DEMO_MARKER = ".qcd-demo"


def check_demo_folder(folder: Path) -> None:
    """ConfigError unless ``folder`` is new, empty, or one the demo made (its marker file):
    the demo replaces its rig folders, database and config there."""
    from qcd.errors import ConfigError
    if not folder.exists():
        return
    if not folder.is_dir():
        raise ConfigError(None, "--keep", f"{folder} exists and is not a folder")
    if (folder / DEMO_MARKER).is_file() or not any(folder.iterdir()):
        return
    raise ConfigError(None, "--keep", f"{folder} is not empty and was not made by qcd demo "
                      f"(no {DEMO_MARKER} file in it); the demo would replace what is there: "
                      f"name a new or empty folder")


def run_demo(folder: Path | None = None, *, days: int = 21, files_per_day: int = 3,
             out=None, write_html: bool = True, workers: int | None = None,
             end: datetime | None = None) -> DemoResult:
    """Build the lab in ``folder`` (a new temporary folder when None) and run the real watch
    service over it with a simulated clock: each simulated day's recordings appear in the rig
    folders in the evening (one file per rig at a time, so a rig's files are stored in the
    order recorded whatever ``workers`` is), the service measures, judges and alerts, and its
    messages go through apprise to alerts.log. Ends with the morning report (text and HTML)."""
    from qcd import notify
    from qcd.config import load_config
    from qcd.ruleset import load_rules
    from qcd.report import build_report, render_html, render_text
    from qcd.store import Store
    from qcd.watch import Service, make_sender
    from qcd.workers import default_workers
    out = out or sys.stdout
    say = _printer(out)
    t_start = time.monotonic()
    folder = Path(folder) if folder else Path(tempfile.mkdtemp(prefix="qcd-demo-"))
    folder = folder.resolve()
    check_demo_folder(folder)
    folder.mkdir(parents=True, exist_ok=True)
    (folder / DEMO_MARKER).write_text("made by qcd demo: it may delete and rewrite this "
                                      "folder's demo files\n", encoding="utf-8")
    for stale in ("qcd.sqlite", "qcd.sqlite-wal", "qcd.sqlite-shm", "alerts.log",
                  "report.html", "qcd.log"):
        (folder / stale).unlink(missing_ok=True)
    staging = folder / ".incoming"
    for d in ("patch-1", "patch-2", "patch-3", "field-1", ".incoming"):
        shutil.rmtree(folder / d, ignore_errors=True)
        if not d.startswith("."):
            (folder / d).mkdir()
    plan = plan_lab(days, files_per_day, end=end)
    # workers=0: measure on the service thread, one file at a time, in arrival order
    n_workers = default_workers() if workers is None else max(0, workers)
    say(f"qcd demo: a {LAB_NAME} (invented), 4 rigs, {days} days, "
        f"{len(plan.files)} recordings")
    for r in plan.rigs:
        when = ("" if r.fault_day is None else
                f" (from {_date(plan.day_start(r.fault_day))})")
        say(f"  {r.name:8} {r.description}{when}")
    say(f"[1/3] writing the recordings (ABF1) to {folder} ...")
    last = [time.monotonic()]

    def progress(n: int, total: int) -> None:
        if n == total or time.monotonic() - last[0] > 3.0:
            last[0] = time.monotonic()
            say(f"      {n}/{total} files written")
    build_lab(staging, plan, progress, workers=max(1, n_workers))
    (folder / "qcd.toml").write_text(demo_config_text(folder), encoding="utf-8")
    (folder / "alerts.log").touch()
    config = load_config(folder / "qcd.toml")
    rules = load_rules(config.rules)
    _register_file_schema(say)
    sender = make_sender(config)
    say("[2/3] running the service day by day (simulated clock): measure, store, judge, "
        "alert, deliver ...")
    clock = plan.start + 8 * 3600.0
    by_day: dict[int, list[FileSpec]] = {}
    for f in plan.files:
        by_day.setdefault(f.day, []).append(f)
    with Store(config.database) as store:
        svc = Service(config, store, rules, sender=sender, workers=n_workers, catch_up=True,
                      progress_tty=False, rescan_s=600.0, beat_s=3600.0)
        try:
            svc.start(clock)
            for day in range(plan.days):
                clock = max(clock, plan.day_start(day) + 20 * 3600.0)
                for group in _rounds(by_day.get(day, ())):   # the day's acquisitions arrive
                    for f in group:
                        os.replace(staging / f.relpath, folder / f.relpath)
                    clock = _drain(svc, clock, config.settle_seconds, len(group))
                counts = store.outbox_counts()
                if day % max(1, plan.days // 7) == 0 or day == plan.days - 1:
                    say(f"      day {day + 1}/{plan.days} ({_date(plan.day_start(day))}): "
                        f"{len(store.files())} files stored, "
                        f"{counts.get('sent', 0)} message(s) sent")
        finally:
            svc.close(clock)
        for _ in range(3):                  # anything still due
            clock += 120.0
            _SIM_NOW[0] = clock
            notify.deliver_due(store, sender, clock)
        _SIM_NOW[0] = None
        say("[3/3] the morning report")
        report_at = plan.end + 7.5 * 3600.0
        since = plan.day_start(plan.days - 1)
        report = build_report(store, max(report_at, clock), since)
        text = render_text(report)
        html_path = None
        if write_html:
            html_path = folder / "report.html"
            html_path.write_text(render_html(report), encoding="utf-8")
    shutil.rmtree(staging, ignore_errors=True)
    seconds = time.monotonic() - t_start
    say("")
    say(text)
    say("")
    if html_path:
        say(f"HTML report: {html_path}")
    say(f"messages delivered to: {folder / 'alerts.log'}")
    say(f"demo lab: {folder} (config {folder / 'qcd.toml'})")
    say(f"  try: qcd report --config {folder / 'qcd.toml'} --since {days}d")
    say(f"       qcd trend --config {folder / 'qcd.toml'} --days {days + 1} field-1 hum_rms")
    say(f"done in {seconds:.1f} s")
    return DemoResult(folder, config.database, html_path, folder / "alerts.log",
                      len(plan.files), seconds, text, plan)


def _rounds(files: Iterable[FileSpec]) -> list[list[FileSpec]]:
    """The files in groups with one file per rig at most, each rig's in the order recorded.

    Each group is stored before the next arrives, so a rig's files are judged one after
    another in recording order however many processes measure them: the run is reproducible.
    """
    groups: list[list[FileSpec]] = []
    last: dict[str, int] = {}
    for f in sorted(files, key=lambda f: f.recorded_at):
        k = last.get(f.rig, -1) + 1
        if k == len(groups):
            groups.append([])
        groups[k].append(f)
        last[f.rig] = k
    return groups


def _drain(svc, clock: float, settle_s: float, files: int = 0, limit_s: float = 120.0) -> float:
    """Step the service until it has finished ``files`` more files (their folder events arrive
    on the observer's thread, a moment after the move) and has nothing left to do; returns the
    simulated clock."""
    target = sum(svc.counts.values()) + files
    idle = 0
    deadline = time.monotonic() + limit_s
    while time.monotonic() < deadline:
        clock += settle_s + 0.5
        _SIM_NOW[0] = clock
        busy = svc.step(clock)
        if svc.queue_len() == 0 and not busy and sum(svc.counts.values()) >= target:
            idle += 1
            if idle >= 2:
                break
        else:
            idle = 0
            if busy:
                continue
            if svc.workers and svc.queue_len() > len(svc.intake):
                svc.wait_idle()         # until a worker hands back a file
            else:
                time.sleep(0.003)       # its folder events are on their way
    return clock


def _date(t: float) -> str:
    return datetime.fromtimestamp(t, tz=timezone.utc).strftime("%Y-%m-%d")


# ----------------------------------------------------------------------------- committed sample

SAMPLE_END = datetime(2026, 11, 25, tzinfo=timezone.utc)   # fixed: the sample is reproducible


def write_sample_set(folder: Path) -> list[Path]:
    """The small committed set in demo_data/: one recording per rig and scripted state, and
    two before/after pairs for ``qcd compare``. Deterministic (fixed dates and seeds)."""
    folder = Path(folder)
    plan = plan_lab(21, 3, end=SAMPLE_END)
    kinds = {r.name: r.kind for r in plan.rigs}
    rigs = {r.name: r for r in plan.rigs}
    picks: list[FileSpec] = []
    for name, rig in rigs.items():
        files = [f for f in plan.files if f.rig == name]
        if rig.fault == "seal":
            picks += [files[0]] + [f for f in files if f.faulty]
        elif rig.fault_day is None:
            picks += [files[0], files[-1]]
        else:
            picks += [files[0], next(f for f in files if f.faulty), files[-1]]
    out = []
    for spec in picks:
        sweeps, fs, unit, gap_free = synthesize(spec, kinds[spec.rig])
        path = folder / "lab" / spec.relpath
        write_abf1(path, sweeps, fs, unit, spec.recorded_at, gap_free=gap_free)
        out.append(path)
    # before/after pairs: the same rig minutes apart, one thing changed in between
    last = plan.files[-1]
    field = [f for f in plan.files if f.rig == "field-1"][-1]
    bad = field.params
    fixed = dict(bad, hum_amps=tuple(a / 10.0 for a in bad["hum_amps"]), seed=bad["seed"] + 1)
    patch = [f for f in plan.files if f.rig == "patch-2"][-1]
    swapped = dict(patch.params, noise_sd=patch.params["noise_sd"] / 3.5,
                   seed=patch.params["seed"] + 1)
    pairs = (("ground_before.abf", field, bad, 0.0), ("ground_after.abf", field, fixed, 600.0),
             ("headstage_before.abf", patch, patch.params, 0.0),
             ("headstage_after.abf", patch, swapped, 900.0))
    for name, spec, params, later in pairs:
        s2 = FileSpec(spec.rig, name, last.recorded_at + 3600.0 + later, spec.day, 1, False,
                      params)
        sweeps, fs, unit, gap_free = synthesize(s2, kinds[spec.rig])
        path = folder / "compare" / name
        write_abf1(path, sweeps, fs, unit, s2.recorded_at, gap_free=gap_free)
        out.append(path)
    return out


if __name__ == "__main__":   # python -m qcd.demo DIR: write the committed sample set into DIR
    for p in write_sample_set(Path(sys.argv[1] if len(sys.argv) > 1 else "demo_data")):
        print(p)
