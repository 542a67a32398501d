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


def test_scan_table_fits_100_columns(tmp_path, capsys):
    folder, _ = _good(tmp_path, "vc_model_cell_step.abf", "cc_steps.abf",
                      "fast_100khz_temperature.abf", "vc_tight_seal_noisy.abf")
    (folder / "a_very_long_file_name_of_a_broken_recording.abf").write_bytes(b"x" * 10)
    assert main(["scan", str(folder)]) == 1
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 6                           # header + one row per file
    assert all(len(line) <= 100 for line in lines)
    assert "noise_rms" in lines[0]
    row = next(line for line in lines if line.startswith("vc_model_cell_step"))
    assert "VC" in row and "Ra" in row and "pA" in row
    assert any("@60" in line for line in lines if line.startswith("fast_100khz"))


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
