"""alerts: the lifecycle semantics (open after open_after_files, clear after
resolve_after_files, flap guard, reminders, mutes, inhibition, learning, digest), checked file
by file with chosen times."""
from __future__ import annotations

from dataclasses import dataclass, replace

from hypothesis import given, settings as hsettings, strategies as st

from qcd.alerts import AlertState, advance, flush_digest, tick
from qcd.ruleset import RuleSettings
from qcd.judge import Finding

SET = RuleSettings()
H = 3600.0


def F(bad: bool, *, rule="hum_jump", kind="drift", measure="hum_rms", rig="rig-a", clear=True,
      open_after_files=2, resolve_after_files=3, remind_h=24.0, learning=False, value=1.0, channel=0):
    return Finding(rig=rig, mode="voltage_clamp", channel=channel, measure=measure, rule=rule,
                   kind=kind, bad=bad, severity="warning", value=value, unit="pA",
                   limit_text="normal 0.1-0.12 pA", hint="check grounding", clear=clear,
                   open_after_files=open_after_files, resolve_after_files=resolve_after_files, remind_h=remind_h,
                   learning=learning, path=f"/data/{rig}/cell.abf")


@dataclass
class MuteRow:
    id: int
    rig_glob: str
    rule_glob: str
    start_at: float
    end_at: float | None
    reason: str = ""


def run(seq, *, states=None, mutes=(), t0=0.0, dt=600.0, **kw):
    """Feed one finding per file; return states, all messages and per-file message lists."""
    states = dict(states or {})
    per_file = []
    now = t0
    for bad in seq:
        fs = bad if isinstance(bad, list) else [F(bad, **kw)]
        states, msgs = advance(states, fs, mutes, now, SET)
        states = {k: v.to_dict() for k, v in states.items()}     # round-trip as the store does
        per_file.append(msgs)
        now += dt
    return states, [m for ms in per_file for m in ms], per_file


def test_opens_after_for_files_consecutive_bad_files_with_one_message():
    _, msgs, per = run([True, False, True, True])
    assert [len(m) for m in per] == [0, 0, 0, 1]          # suspect is never announced
    (m,) = msgs
    assert m.kind == "firing" and "rig-a" in m.title and "hum_rms" in m.title
    assert "rig-a" in m.body and "/data/rig-a/cell.abf" in m.body and "1 pA" in m.body
    assert "normal 0.1-0.12 pA" in m.body and "check grounding" in m.body


def test_hard_limit_with_for_files_1_opens_at_once():
    _, msgs, per = run([True], open_after_files=1, kind="limit", rule="gigaseal")
    assert len(per[0]) == 1 and per[0][0].kind == "firing"


def test_clears_after_clear_files_good_files_beyond_clear_level():
    seq = [True, True] + [False] * 2 + [False] * 3
    kws = {}
    states, msgs, per = run(seq, **kws)
    assert [len(m) for m in per] == [0, 1, 0, 0, 1, 0, 0]
    assert per[4][0].kind == "resolved" and per[4][0].priority < per[1][0].priority


def test_good_values_short_of_the_clear_level_keep_it_open():
    states, _, _ = run([True, True])
    fs = [F(False, clear=False)] * 5
    states, _, per = run(fs and [[f] for f in fs], states=states, t0=1e5)
    assert all(not m for m in per)
    assert AlertState.from_dict(next(iter(states.values()))).state == "open"


def test_resolved_only_for_announced_alerts():
    mute = [MuteRow(1, "rig-a", "*", 0.0, 1e4)]
    states, msgs, _ = run([True, True], mutes=mute)
    assert msgs == []
    states, msgs, _ = run([False] * 3, states=states, mutes=mute, t0=2e3)
    assert msgs == []                                    # never announced: no resolved message


def test_mute_suppresses_messages_but_state_runs_and_end_sends_one_message():
    mute = [MuteRow(1, "rig-*", "hum_*", 0.0, 5000.0)]
    states, msgs, _ = run([True, True, True], mutes=mute)
    assert msgs == []
    s = AlertState.from_dict(next(iter(states.values())))
    assert s.state == "open" and not s.announced and s.muted == "mute"
    states2, msgs = tick(states, mute, 4000.0, SET)        # still muted
    assert msgs == []
    states2, msgs = tick(states, mute, 6000.0, SET)        # mute over: one message
    assert len(msgs) == 1 and msgs[0].kind == "firing" and "held back" in msgs[0].body
    states3, msgs = tick({k: v.to_dict() for k, v in states2.items()}, mute, 7000.0, SET)
    assert msgs == []                                         # and only one


def test_mute_for_other_rule_or_rig_does_not_mute():
    _, msgs, _ = run([True, True], mutes=[MuteRow(1, "rig-b", "*", 0, None), MuteRow(2, "*", "seal*", 0, None)])
    assert len(msgs) == 1


def test_until_resolved_mute_covers_one_episode():
    mute = [MuteRow(7, "rig-a", "*", 0.0, None)]
    states, msgs, _ = run([True, True, True, False, False, False], mutes=mute)
    assert msgs == []
    states, msgs, _ = run([True, True], states=states, mutes=mute, t0=1e5)
    assert len(msgs) == 1                                     # next episode is announced


def test_reminder_only_after_remind_hours_and_only_while_bad_files_arrive():
    states, msgs, _ = run([True, True], dt=600.0)
    assert len(msgs) == 1
    # bad files every 2 h: reminders at most every 24 h
    states, msgs, per = run([True] * 30, states=states, t0=1200.0, dt=2 * H)
    assert [m.kind for m in msgs] == ["reminder", "reminder"]
    sent = [i for i, m in enumerate(per) if m]
    assert (sent[1] - sent[0]) * 2 * H >= 24 * H
    # no files for 3 days, then a good-but-not-clear file: no reminder without a bad file
    states, msgs, _ = run([[F(False, clear=False)]], states=states, t0=1e6)
    assert msgs == []


def test_flap_guard_sends_one_unstable_message_then_quiet_until_stable():
    cycle = [True, False, False, False]                        # for 1 / clear 3: 2 changes per 4
    states, msgs, per = run(cycle * 5, open_after_files=1)
    kinds = [m.kind for m in msgs]
    assert kinds.count("unstable") == 1
    first_unstable = kinds.index("unstable")
    assert all(k != "firing" and k != "resolved" for k in kinds[first_unstable + 1:])
    s = AlertState.from_dict(next(iter(states.values())))
    assert s.flapping and s.to_dict()["state"] == "open"
    # stable (good) for 21 files: leaves the guard with one resolved message
    states, msgs, _ = run([False] * 21, states=states, t0=1e6, open_after_files=1)
    assert [m.kind for m in msgs] == ["resolved"]
    assert not AlertState.from_dict(next(iter(states.values()))).flapping


def test_one_file_with_many_findings_gives_one_message():
    fs = [F(True, open_after_files=1, measure=m, rule=m + "_jump") for m in ("hum_rms", "noise_rms", "noise_pp")]
    _, msgs = advance({}, fs, [], 0.0, SET)
    (m,) = msgs
    assert m.title == ("qcd rig-a: 3 new alerts: hum_rms on channel 0, noise_pp on channel 0, "
                       "noise_rms on channel 0")
    assert all(x in m.body for x in ("hum_rms", "noise_rms", "noise_pp"))


def test_rig_level_finding_inhibits_measure_alerts_then_they_are_announced():
    rigf = F(True, kind="rig", rule="clipping", measure="clipping_fraction", open_after_files=1)
    hum = F(True, open_after_files=1)
    states, msgs = advance({}, [rigf, hum], [], 0.0, SET)
    (m,) = msgs
    assert "clipping_fraction" in m.body and "hum_rms" not in m.body
    states = {k: v.to_dict() for k, v in states.items()}
    rig_ok = replace(rigf, bad=False)
    for i in range(3):                                           # clipping clears after 3 files
        states, msgs = advance(states, [rig_ok, hum], [], 600.0 * (i + 1), SET)
        states = {k: v.to_dict() for k, v in states.items()}
    bodies = "".join(m.body for m in msgs)
    assert "RESOLVED: clipping_fraction" in bodies and "hum_rms" in bodies


def test_hard_limit_alert_mutes_drift_on_same_measure():
    lim = F(True, kind="limit", rule="access_high", measure="access_resistance", open_after_files=1)
    drift = F(True, kind="drift", rule="access_rise", measure="access_resistance", open_after_files=1)
    _, msgs = advance({}, [lim, drift], [], 0.0, SET)
    (m,) = msgs
    assert "rule access_high" in m.body and "access_rise" not in m.body


def test_second_history_rule_on_an_announced_measure_stays_quiet_until_the_first_resolves():
    # one change at the rig, seen first by the slow EWMA rule and a file later by the z rule:
    # one alert message, not two (inhibition, OPERATIONS §1 semantics 7)
    ewma = F(True, rule="noise_drift", measure="noise_rms", open_after_files=1)
    jump = F(True, rule="noise_jump", measure="noise_rms", open_after_files=1)
    states, msgs = advance({}, [ewma], [], 0.0, SET)
    assert len(msgs) == 1 and "noise_drift" in msgs[0].body
    states = {k: v.to_dict() for k, v in states.items()}
    states, msgs = advance(states, [ewma, jump], [], 600.0, SET)
    assert msgs == []                                    # the jump opened, but quietly
    assert AlertState.from_dict(states[jump.key].to_dict()).state == "open"
    states = {k: v.to_dict() for k, v in states.items()}
    # the drift rule clears; the jump is still bad: now it is announced
    calm = replace(ewma, bad=False)
    bodies = ""
    for i in range(3):
        states, msgs = advance(states, [calm, jump], [], 1200.0 + 600.0 * i, SET)
        states = {k: v.to_dict() for k, v in states.items()}
        bodies += "".join(m.body for m in msgs)
    assert "RESOLVED: noise_rms" in bodies and "rule noise_jump" in bodies


def test_learning_phase_suppresses_drift_messages_but_state_runs():
    states, msgs, _ = run([True, True, True], learning=True)
    assert msgs == []
    assert AlertState.from_dict(next(iter(states.values()))).state == "open"
    states, msgs, _ = run([True], states=states, t0=1e4, learning=False)
    assert len(msgs) == 1 and msgs[0].kind == "firing"


def test_backlog_gives_one_digest():
    states: dict = {}
    for i in range(200):
        fs = [F(i % 50 >= 10, rig=r, measure=m, rule=m + "_x") for r in ("rig-a", "rig-b")
              for m in ("hum_rms", "noise_rms")]
        states, msgs = advance(states, fs, [], float(i), SET, batch=True)
        assert msgs == []
        states = {k: v.to_dict() for k, v in states.items()}
    states, digest = flush_digest(states, [], 300.0, SET)
    assert digest is not None and digest.kind == "digest"
    assert "4 open" in digest.title and "rig-a" in digest.title and "rig-b" in digest.title
    states, again = flush_digest({k: v.to_dict() for k, v in states.items()}, [], 301.0, SET)
    assert again is None


def test_transitions_are_unique_per_key():
    _, msgs, _ = run([True, True, False, False, False, True, True, False, False, False])
    ids = [(m.alert_key, m.transition) for m in msgs]
    assert len(ids) == 4 and len(set(ids)) == 4


def test_state_dict_round_trips():
    states, _, _ = run([True, True, True])
    d = next(iter(states.values()))
    assert AlertState.from_dict(d).to_dict() == d
    for name in ("key", "rig", "mode", "channel", "measure", "rule", "state", "opened_at",
                 "resolved_at", "announced"):
        assert name in d


@hsettings(max_examples=150, deadline=None)
@given(st.lists(st.tuples(st.booleans(), st.booleans()), min_size=1, max_size=80),
       st.integers(1, 3), st.integers(1, 4))
def test_alerts_never_open_a_key_twice_without_a_resolve_between(seq, open_after_files, resolve_after_files):
    # SEMANTICS: opens after open_after_files consecutive bad files, clears after resolve_after_files clear files
    states: dict = {}
    opened = False
    bad_run = clear_run = 0
    sent_open = 0
    for i, (bad, clear) in enumerate(seq):
        f = F(bad, clear=clear, open_after_files=open_after_files, resolve_after_files=resolve_after_files)
        before = AlertState.from_dict(states[f.key]).state if f.key in states else "ok"
        states, msgs = advance(states, [f], [], i * 60.0, SET)
        s = states[f.key] if f.key in states else None
        states = {k: v.to_dict() for k, v in states.items()}
        after = s.state if s else "ok"
        bad_run = bad_run + 1 if bad else 0
        clear_run = (clear_run + 1 if (not bad and clear) else 0) if before == "open" else 0
        if before != "open" and after == "open":
            assert not opened, "opened twice without a resolve"
            assert bad_run >= open_after_files
            opened = True
        if before == "open" and after != "open":
            assert clear_run >= resolve_after_files
            opened = False
        if before != "open" and bad_run >= open_after_files:
            assert after == "open"
        for m in msgs:
            if m.kind == "firing":
                sent_open += 1
                assert opened


_MACHINE = ("state", "bad_run", "clear_run", "opened_at", "resolved_at", "flapping")


@hsettings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.booleans(), st.booleans()), min_size=1, max_size=60),
       st.floats(0, 3e4))
def test_mute_changes_messages_never_states(seq, mute_end):
    # SEMANTICS 1: mutes suppress messages only; the state machine keeps running
    mute = [MuteRow(1, "rig-*", "*", 0.0, mute_end)]
    a: dict = {}
    b: dict = {}
    for i, (bad, clear) in enumerate(seq):
        f = F(bad, clear=clear)
        now = i * 600.0
        a, ma = advance(a, [f], [], now, SET)
        b, mb = advance(b, [f], mute, now, SET)
        if now < mute_end:
            assert mb == []
        for key in a:
            assert {n: getattr(a[key], n) for n in _MACHINE} == \
                {n: getattr(b[key], n) for n in _MACHINE}
        a = {k: v.to_dict() for k, v in a.items()}
        b = {k: v.to_dict() for k, v in b.items()}


@hsettings(max_examples=100, deadline=None)
@given(st.lists(st.tuples(st.booleans(), st.floats(60.0, 12 * H)), min_size=2, max_size=60))
def test_reminders_only_on_bad_files_and_at_least_remind_hours_apart(seq):
    # SEMANTICS 6: remind at most every remind_h, and only while bad files keep arriving
    states: dict = {}
    now, last_sent = 0.0, None
    for bad, gap in seq:
        now += gap
        f = F(bad, open_after_files=1)
        states, msgs = advance(states, [f], [], now, SET)
        states = {k: v.to_dict() for k, v in states.items()}
        for m in msgs:
            if m.kind == "reminder":
                assert bad and last_sent is not None and now - last_sent >= 24 * H
            if m.kind in ("reminder", "firing"):
                last_sent = now


def test_many_channels_give_a_short_title():
    fs = [F(True, open_after_files=1, channel=c, kind="limit", rule="alias_risk", measure="alias_risk")
          for c in range(16)]
    _, (m,) = advance({}, fs, [], 0.0, SET)
    assert m.title == "qcd rig-a: 16 new alerts: alias_risk on 16 channels"
    assert m.body.count("OPEN: alias_risk") == 16


@hsettings(max_examples=60, deadline=None)
@given(st.lists(st.lists(st.booleans(), min_size=3, max_size=3), min_size=1, max_size=40))
def test_backlog_flush_announces_each_open_key_once(rows):
    # SEMANTICS 5: a backlog produces one digest; nothing is announced twice
    states: dict = {}
    for i, bads in enumerate(rows):
        fs = [F(b, measure=f"m{j}", rule=f"m{j}_x", open_after_files=1) for j, b in enumerate(bads)]
        states, msgs = advance(states, fs, [], i * 60.0, SET, batch=True)
        assert msgs == []
        states = {k: v.to_dict() for k, v in states.items()}
    out, digest = flush_digest(states, [], 1e6, SET)
    open_keys = {k for k, s in out.items() if s.state == "open"}
    if open_keys:
        assert digest is not None
        assert digest.body.count("OPEN") + digest.body.count("UNSTABLE") == len(open_keys)
        assert all(out[k].announced for k in open_keys)
    else:
        assert digest is None
    _, again = flush_digest({k: v.to_dict() for k, v in out.items()}, [], 1e6 + 1, SET)
    assert again is None


def test_titles_read_as_sentences():
    from qcd.judge import judge
    from qcd.results import FileMeasures
    from qcd.ruleset import load_rules
    rules = load_rules()
    # an unreadable file, as the judge reports it
    (f,) = judge(FileMeasures("/d/x.abf", "error", error="/d/x.abf: bad signature",
                              error_kind="bad_signature"), "rig-b", lambda *a, **k: [], rules, 0.0)
    _, (m,) = advance({}, [f], [], 0.0, SET)
    assert m.title == "qcd rig-b: a file could not be read: bad signature"
    # a fixed limit: opened, still bad a day later, resolved
    seal = F(True, rule="gigaseal", kind="limit", measure="seal_resistance",
             open_after_files=1, resolve_after_files=1)
    seal = replace(seal, headline="below 1 GOhm", channel_name="IN 0")
    states, (m,) = advance({}, [seal], [], 0.0, SET)
    assert m.title == "qcd rig-a: seal_resistance on channel 0 (IN 0) is below 1 GOhm"
    states, (m,) = advance(states, [seal], [], 25 * H, SET)
    assert m.title == "qcd rig-a: seal_resistance on channel 0 (IN 0) is still below 1 GOhm"
    states, (m,) = advance(states, [replace(seal, bad=False)], [], 26 * H, SET)
    assert m.title == "qcd rig-a: seal_resistance on channel 0 (IN 0) resolved: back within " \
                      "its limit"
    # a drift finding
    hum = replace(F(True, open_after_files=1), headline="1.9x its normal")
    _, (m,) = advance({}, [hum], [], 0.0, SET)
    assert m.title == "qcd rig-a: hum_rms on channel 0 is 1.9x its normal"


def test_a_hint_two_alerts_share_is_said_once_after_them():
    # one file opens noise_rms and noise_rms_1k with the same noise-source hint: the message
    # says the hint once, after both; different hints, or an alert without one, keep their own
    two = [F(True, rule="noise_jump", measure="noise_rms"),
           F(True, rule="noise_1k_jump", measure="noise_rms_1k")]
    _, msgs, _ = run([two, two])
    (m,) = msgs
    assert m.body.count("check grounding") == 1
    assert m.body.endswith("For both alerts above: check grounding")
    assert m.body.index("noise_rms_1k") < m.body.index("check grounding")
    other = [two[0], replace(two[1], hint="check the headstage")]
    _, msgs, _ = run([other, other])
    (m,) = msgs
    assert m.body.count("check grounding") == 1 and m.body.count("check the headstage") == 1
    assert "For both" not in m.body
    bare = [two[0], replace(two[1], hint="")]
    _, msgs, _ = run([bare, bare])
    (m,) = msgs
    assert m.body.count("check grounding") == 1 and "For both" not in m.body
    (with_hint,) = [b for b in m.body.split("\n\n") if "check grounding" in b]
    assert with_hint.startswith("OPEN: noise_rms channel 0")


def _asdict_reference(s: AlertState) -> dict:
    # reference: the standard library's dataclasses.asdict, plus the documented machine/flap keys
    from dataclasses import asdict
    d = asdict(s)
    d["machine"] = s.state
    if s.flapping:
        d["state"] = "open"
    return d


def test_state_dict_is_exactly_dataclasses_asdict_with_copied_lists():
    # states from real lifecycles (open, flapping, muted episodes), compared key order included
    seen = []
    for seq, kw in (([True, True, True], {}), ([True, False, False, False] * 5,
                                              {"open_after_files": 1}),
                    ([True, True, False, False, False], {})):
        states, _, _ = run(seq, **kw)
        seen += [AlertState.from_dict(d) for d in states.values()]
    seen.append(replace(seen[0], mutes=[3, 4], spent=[1], changes=[1, 0, 1]))
    assert any(s.flapping for s in seen)
    for s in seen:
        d, ref = s.to_dict(), _asdict_reference(s)
        assert d == ref and list(d) == list(ref)
        for k in ("changes", "mutes", "spent"):     # copies: the dict never aliases the state
            assert d[k] == getattr(s, k) and d[k] is not getattr(s, k)
    # a list holding something else than ints goes through asdict itself
    odd = replace(seen[0], changes=[[1], 2])
    assert odd.to_dict() == _asdict_reference(odd)


def test_chart_state_dict_is_dataclasses_asdict():
    # reference: dataclasses.asdict
    from dataclasses import asdict
    from qcd.charts import ChartState
    for c in (ChartState(), ChartState(1.5, -0.25, 7, 1e9, 1e9 + 60.0)):
        assert c.to_dict() == asdict(c) and list(c.to_dict()) == list(asdict(c))
        assert ChartState.from_dict(c.to_dict()) == c


def test_a_due_reminder_rides_along_with_the_rigs_other_message_of_the_day():
    # one fault seen by two measures (common practice: a failing ground raises hum and noise).
    # A file an hour; both alerts open on file 1. A day later file 25 is bad for noise, but
    # its hum reading cannot tell (neither bad nor clear); file 26 is bad for both. The hum
    # reminder, due since hour 25, goes with the noise reminder in the rig's one message of
    # file 25, not in a second message an hour later.
    def noise(bad=True):
        return F(bad, rule="noise_jump", measure="noise_rms")

    def hum(bad=True, clear=False):
        return F(bad, rule="hum_jump", measure="hum_rms", clear=clear)
    seq = [[noise(), hum()], [noise(), hum()]] + [[]] * 23 + [[noise(), hum(False)],
                                                             [noise(), hum()]]
    states, _, per_file = run(seq, dt=H)
    assert len(per_file[1]) == 1 and "2 new alerts" in per_file[1][0].title
    (m,) = per_file[25]
    assert "noise_rms" in m.body and "hum_rms" in m.body and "2 still open" in m.title
    assert per_file[26] == []                     # the hum reminder was not sent twice
    # an alert on its way back (a clear file since its last bad one) does not ride along: a
    # day on, noise is bad again, the hum reads clear
    quiet = [[]] * 23 + [[noise(), hum(False, clear=True)]] * 2
    _, msgs, _ = run(quiet, states=states, t0=27 * H, dt=H)
    (m,) = msgs
    assert "noise_rms" in m.body and "hum_rms" not in m.body


def test_reminders_of_one_rig_due_hours_apart_come_together():
    # hum opened at 09:00, noise at 15:00 (two files, an hour apart each): without riding
    # along the rig gets two reminders a day, at 09:00 and 15:00. A reminder comes up to half
    # its interval early with the rig's other message, so from the next day on: one a day.
    def noise(bad=True):
        return F(bad, rule="noise_jump", measure="noise_rms")

    def hum(bad=True):
        return F(bad, rule="hum_jump", measure="hum_rms")
    seq = [[hum(), noise(False)], [hum(), noise(False)]] + [[]] * 4 + \
        [[hum(), noise()], [hum(), noise()]]          # hours 0, 1, then 6, 7
    day = [[]] * 16 + [[hum(), noise()]] + [[]] * 5 + [[hum(), noise()]] + [[]]   # 24 files
    states, _, per_file = run(seq + day * 3, t0=9 * H, dt=H)
    sent = [(i, m) for i, ms in enumerate(per_file) for m in ms]
    assert [i for i, _ in sent][:2] == [1, 7]         # the two openings
    later = [(i, m) for i, m in sent if i > 7]
    assert len(later) == 3, [i for i, _ in later]     # one a day for three days
    for _, m in later:
        assert "hum_rms" in m.body and "noise_rms" in m.body
