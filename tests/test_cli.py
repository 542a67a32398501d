"""The command line. Scan tests are the test_scan_* functions; other commands add their own."""
from __future__ import annotations

import json
import shutil
import subprocess
import sys

import pytest

from conftest import ROOT, abf
from qcd.cli import build_parser, main

SCAN_FIELDS = {"path", "status", "error", "mode", "channels"}


def _commands() -> list[str]:
    sub = next(a for a in build_parser()._actions if a.dest == "command")
    return sorted(sub.choices)


@pytest.mark.parametrize("command", _commands())
def test_scan_help_for_every_command_exits_zero(command, capsys):
    with pytest.raises(SystemExit) as e:
        main([command, "--help"])
    assert e.value.code == 0
    assert "Example:" in capsys.readouterr().out


def _good(tmp_path, *names):
    folder = tmp_path / "recs"
    (folder / "sub").mkdir(parents=True, exist_ok=True)
    out = []
    for i, name in enumerate(names):
        dst = folder / ("sub" if i % 2 else "") / name
        shutil.copyfile(abf(name), dst)      # copies live in tmp_path only
        out.append(dst)
    return folder, out


def _json_lines(text: str) -> list[dict]:
    return [json.loads(line) for line in text.splitlines() if line.strip()]


def test_scan_json_one_valid_line_per_file(tmp_path, capsys):
    folder, files = _good(tmp_path, "vc_model_cell_step.abf", "cc_steps.abf",
                          "gapfree_cc_slow_drift.abf")
    assert main(["scan", "--json", str(folder)]) == 0
    docs = _json_lines(capsys.readouterr().out)
    assert len(docs) == 3
    assert [d["path"] for d in docs] == sorted(d["path"] for d in docs)   # sorted walk
    for d in docs:
        assert SCAN_FIELDS <= d.keys() and d["status"] == "ok" and d["error"] is None
        for ch in d["channels"]:
            assert {"index", "name", "unit", "measures", "notes"} <= ch.keys()
            for name, m in ch["measures"].items():
                assert set(m) == {"value", "unit"}
                assert m["unit"].isascii()
    vc = next(d for d in docs if d["path"].endswith("vc_model_cell_step.abf"))
    ms = vc["channels"][0]["measures"]
    assert vc["mode"] == "voltage_clamp"
    assert ms["access_resistance"]["unit"] == "MOhm"
    assert isinstance(ms["spectral_lines"]["value"], list)
    for line in ms["spectral_lines"]["value"]:
        assert set(line) == {"freq_hz", "rms"}


def test_scan_exit_codes(tmp_path, capsys):
    folder, _ = _good(tmp_path, "cc_steps.abf")
    assert main(["scan", str(folder)]) == 0
    bad = folder / "broken.abf"
    bad.write_bytes(b"")
    assert main(["scan", str(folder)]) == 1
    out = capsys.readouterr()
    assert "broken.abf" in out.out and "error" in out.out
    assert main(["scan", str(tmp_path / "nowhere")]) == 2
    assert "nowhere" in capsys.readouterr().err
    assert main(["scan", "--pulse=5,1", str(folder)]) == 2
    with pytest.raises(SystemExit) as e:
        main(["scan"])                       # no PATH: argparse usage error
    assert e.value.code == 2


def test_scan_corrupt_file_among_good_ones_does_not_stop_the_scan(tmp_path, capsys):
    folder, files = _good(tmp_path, "vc_model_cell_step.abf", "cc_steps.abf")
    data = files[0].read_bytes()
    (folder / "b_cut.abf").write_bytes(data[:len(data) // 3])
    (folder / "c_sig.abf").write_bytes(b"NOPE" + data[4:])
    assert main(["scan", "--json", str(folder)]) == 1
    docs = {d["path"].rsplit("/", 1)[-1]: d for d in _json_lines(capsys.readouterr().out)}
    assert len(docs) == 4
    assert docs["b_cut.abf"]["status"] == "error" and docs["b_cut.abf"]["error_kind"] == "truncated"
    assert docs["c_sig.abf"]["error_kind"] == "bad_signature"
    assert "c_sig.abf" in docs["c_sig.abf"]["error"]
    assert docs["vc_model_cell_step.abf"]["status"] == "ok"
    assert docs["cc_steps.abf"]["status"] == "ok"


@pytest.mark.slow
def test_scan_workers_give_the_same_output(tmp_path, capsys):
    folder, _ = _good(tmp_path, "vc_model_cell_step.abf", "cc_steps.abf", "cc_steps_abf1.abf",
                      "four_channel_no_cell.abf")
    (folder / "zz_empty.abf").write_bytes(b"")
    assert main(["scan", "--json", str(folder)]) == 1
    one = capsys.readouterr().out
    assert main(["scan", "--json", "--workers", "2", str(folder)]) == 1
    two = capsys.readouterr().out
    assert one == two and len(one.splitlines()) == 5


def test_scan_table_has_labelled_columns_and_whole_names_and_errors(tmp_path, capsys):
    folder, _ = _good(tmp_path, "vc_model_cell_step.abf", "cc_steps.abf",
                      "fast_100khz_temperature.abf", "vc_tight_seal_noisy.abf",
                      "vc_units_A_no_protocol.abf")
    long = "2026-11-03_rig-b_slice04_cell02_0007.abf"
    (folder / long).write_bytes(b"x" * 10)
    assert main(["scan", str(folder)]) == 1
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 8                           # two header lines + one row per file
    top, head = lines[0], lines[1]
    for over, label in (("access", "MOhm"), ("membrane", "MOhm"), ("capacitance", "pF"),
                        ("seal", "GOhm"), ("input", "MOhm")):
        col = top.index(over) + len(over)            # each label right-aligned under its name
        assert head[col - len(label):col] == label, (over, label)
    rows = {line.split()[0]: line for line in lines[2:]}
    assert all(len(line) <= 120 for line in lines if "error" not in line)

    def cell(name: str, over: str) -> str:
        end = top.index(over) + len(over)
        return rows[name][:end].split()[-1]
    vc = "vc_model_cell_step.abf"                    # a model cell: 10 MOhm, 500 MOhm, 33 pF
    assert rows[vc].split()[1:3] == ["VC", "pA"]
    assert (cell(vc, "access"), cell(vc, "membrane"), cell(vc, "capacitance")) == \
        ("11", "500", "32.5")
    assert cell("vc_tight_seal_noisy.abf", "membrane") == "1542"      # not 1.54e+03
    assert cell("vc_units_A_no_protocol.abf", "seal") == "20.2"       # stored in A, shown pA
    assert rows["vc_units_A_no_protocol.abf"].split()[2] == "pA"
    assert cell("cc_steps.abf", "input") == "148"
    assert cell("fast_100khz_temperature.abf", "mains") == "4.6"      # hum at its 60 Hz line
    # a long name keeps its distinguishing end, and an error row says the whole reason
    short = next(k for k in rows if k.startswith("2026-11-"))
    assert short.endswith("cell02_0007.abf") and "..." in short and len(short) == 27
    err = rows[short]
    assert "error (" in err and err.rstrip().endswith(")") and len(err) > 120


def test_scan_takes_a_negative_pulse_as_a_separate_argument_and_declared_mains(tmp_path,
                                                                                capsys):
    folder, _ = _good(tmp_path, "vc_units_A_no_protocol.abf", "vc_cell_step.abf")
    assert main(["scan", "--json", "--pulse", "-5,10,20",
                 str(folder / "vc_units_A_no_protocol.abf")]) == 0
    (doc,) = _json_lines(capsys.readouterr().out)
    seal = doc["channels"][0]["measures"]["seal_resistance"]           # no protocol: declared
    assert seal["unit"] == "GOhm" and seal["value"] > 1.0
    # a short episodic baseline: hum only with the building's declared mains frequency
    assert main(["scan", str(folder / "sub" / "vc_cell_step.abf")]) == 0
    plain = capsys.readouterr().out.splitlines()[2].split()
    assert main(["scan", "--mains", "60", str(folder / "sub" / "vc_cell_step.abf")]) == 0
    declared = capsys.readouterr().out.splitlines()[2].split()
    assert plain[5:7] == ["-", "-"]
    assert float(declared[5]) > 0 and declared[6] == "60"


def test_scan_store_needs_rig_and_config(tmp_path, capsys):
    folder, _ = _good(tmp_path, "cc_steps.abf")
    assert main(["scan", "--store", str(folder)]) == 2
    assert "--rig" in capsys.readouterr().err


def test_scan_as_a_process_prints_no_traceback(tmp_path):
    bad = tmp_path / "bad.abf"
    bad.write_bytes(b"ABF2" + b"\xff" * 3000)
    proc = subprocess.run([sys.executable, "-m", "qcd", "scan", "--json", str(bad)],
                          capture_output=True, text=True, cwd=ROOT, timeout=120)
    assert proc.returncode == 1
    doc = json.loads(proc.stdout)
    assert doc["status"] == "error" and doc["error_kind"] in ("bad_header", "truncated")
    assert "Traceback" not in proc.stderr + proc.stdout


@pytest.mark.parametrize("command", _commands())
def test_every_command_has_a_body_in_the_module_cli_names(command):
    from qcd.cli import _COMMANDS, _body
    body = _body(command)
    assert body.__module__ == f"qcd.{_COMMANDS[command]}"
    assert body.__name__ == "_cmd_" + command.replace("-", "_")


def test_scan_help_loads_no_command_module_and_scan_only_its_own(tmp_path):
    # start-up time of `qcd scan`: a command's module is imported only when that command runs
    code = ("import sys\nfrom qcd.cli import main\ntry:\n    main(sys.argv[1:])\n"
            "except SystemExit:\n    pass\n"
            "print(' '.join(sorted(m for m in sys.modules if m.startswith(('qcd', 'numpy')))))")
    loaded = {}
    for args in (["scan", "--help"], ["scan", "--json", str(tmp_path / "none")]):
        proc = subprocess.run([sys.executable, "-c", code, *args], capture_output=True,
                              text=True, cwd=ROOT, timeout=120)
        loaded[args[1]] = set(proc.stdout.split("\n")[-2].split())
    assert loaded["--help"] == {"qcd", "qcd.cli", "qcd.errors"}
    assert {"qcd.scan", "qcd.table"} <= loaded["--json"]
    assert not {"qcd.review", "qcd.control"} & loaded["--json"]


# --- qcd mute ------------------------------------------------------------------------------------

def _mute_config(tmp_path):
    cfg = tmp_path / "qcd.toml"
    cfg.write_text('database = "qcd.sqlite"\n[[rig]]\nname = "rig-b"\nfolders = ["d"]\n')
    return ["--config", str(cfg)]


def test_mute_holds_a_rig_and_end_lifts_it_early(tmp_path, capsys):
    from qcd.store import Store
    c = _mute_config(tmp_path)
    assert main(["mute", "rig-b", "2h", "--rule", "hum_*", "--reason", "new headstage"] + c) == 0
    out = capsys.readouterr().out
    assert out.startswith("muted rig rig-b, rules hum_* until ") and "(mute 1;" in out
    assert "qcd mute --end 1" in out
    assert main(["mute"] + c) == 0                          # lists the active mutes by ID
    assert "mute 1: rig rig-b, rules hum_* until" in capsys.readouterr().out
    assert main(["mute", "--end", "1"] + c) == 0
    assert capsys.readouterr().out.startswith("lifted mute 1 (rig rig-b, rules hum_*)")
    with Store(tmp_path / "qcd.sqlite") as s:
        import time
        assert s.active_mutes(time.time()) == []
    assert main(["mute", "--end", "1"] + c) == 2            # already lifted: said so
    assert "no active mute with ID 1 (active: none)" in capsys.readouterr().err


@pytest.mark.parametrize("args, said", [
    (["rig-b", "2"], "'2' has no unit: say 2h"),
    (["rig-b", "2h", "--rule", "hum_jmp*"], "no rule matches 'hum_jmp*' (rules: "),
    (["rig-x", "2h"], "no configured rig matches 'rig-x' (configured: rig-b)"),
    (["rig-b"], "say for how long: 2h, 30m, 1d, or 'resolved'"),
    (["rig-b", "2h", "--end", "1"], "either RIG FOR (a new mute) or --end ID"),
])
def test_mute_refuses_what_it_cannot_honour(tmp_path, capsys, args, said):
    c = _mute_config(tmp_path)
    assert main(["mute"] + args + c) == 2
    err = capsys.readouterr().err
    assert said in err, err
    assert "Traceback" not in err
    if "--rule" in args:
        assert "hum_jump" in err                            # the rule names it could have meant


def test_scan_store_says_what_happened_to_each_file(tmp_path, capsys):
    folder, files = _good(tmp_path, "cc_steps.abf")
    data = files[0].read_bytes()
    for i in range(2):
        (folder / f"bad{i}.abf").write_bytes(b"NOPE" + data[4:])     # a wrong signature
    (folder / "cut.abf").write_bytes(data[:len(data) // 3])         # cut short
    cfg = tmp_path / "qcd.toml"
    cfg.write_text(f'database = "qcd.sqlite"\n[[rig]]\nname = "rigB"\nfolders = ["{folder}"]\n')
    assert main(["scan", "--store", "--rig", "rigB", "--config", str(cfg), str(folder)]) == 1
    out = capsys.readouterr().out
    assert ("qcd scan: rig rigB: 1 of 4 file(s) measured and stored; 3 could not be read (bad "
            "signature 2, truncated 1) and are stored with the reason") in out


def test_status_says_when_the_service_stopped_and_names_the_last_file_recorded(store):
    import os

    from qcd.results import FileMeasures
    from qcd.status import format_status, status
    now = 1_790_000_000.0
    store.beat(os.getpid(), "acq-pc", now - 20 * 3600, now - 17 * 3600, 0, {"stopped": True})
    for name, recorded, measured in (("late.abf", now - 3600, now - 7200),     # backfilled
                                     ("early.abf", now - 9000, now - 60)):
        store.commit_file("rig-b", FileMeasures(f"/d/{name}", "ok", mtime=recorded,
                                                sha256=name * 8), analysed_at=measured)
    text = format_status(status(store, now, host="acq-pc"), now)
    assert "service: stopped cleanly 17 h ago" in text
    # the clock time in the machine's zone (the suite runs in UTC: conftest), zone named
    assert "rig-b: /d/late.abf  ok, recorded 2026-09-21 13:13 UTC (60 min ago), measured 2 h ago" \
        in text


def test_top_level_help_gives_one_example_command_per_line(capsys):
    with pytest.raises(SystemExit):
        main(["--help"])
    out = capsys.readouterr().out
    examples = out.split("Examples (each line one command):\n", 1)[1].splitlines()
    assert [x.split()[:2] for x in examples] == [["qcd", "demo"], ["qcd", "scan"],
                                                 ["qcd", "watch"], ["qcd", "<command>"]]
    assert not any(" | " in x for x in examples)


def test_description_is_the_wrapped_text():
    # textwrap.fill at 79 columns as the reference for the written-out description
    import textwrap

    from qcd.cli import DESCRIPTION, build_parser
    assert DESCRIPTION == textwrap.fill(" ".join(DESCRIPTION.split()), 79)
    assert build_parser().description == DESCRIPTION
