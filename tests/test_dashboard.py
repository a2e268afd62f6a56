"""The dashboard rendered to text (rich's recording console) for known states, and its keys."""

from rich.console import Console

from hemostream.dashboard import Screen, UIState, UnitView, bed_screen, handle_key, unit_screen
from hemostream.dashboard.render import CAUTION, CAUTION_SHORT

T0 = 1796112000.0          # 2026-12-01T08:00:00Z


def iso(t):
    from datetime import datetime, timezone
    return datetime.fromtimestamp(t, timezone.utc).isoformat().replace("+00:00", "Z")


def feed_bed(view, bed, t, hr=80, line=True, cuff_age=None, co=5.0):
    measured = {"HR": [hr, iso(t)], "SPO2": [97, iso(t)], "CVP": [8, iso(t)]}
    if line:
        measured |= {"ABP_SYS": [120, iso(t)], "ABP_DIA": [70, iso(t)],
                     "ABP_MEAN": [87, iso(t)], "CO": [co, iso(t)]}
    if cuff_age is not None:
        measured |= {"NIBP_SYS": [110, iso(t - cuff_age)], "NIBP_DIA": [65, iso(t - cuff_age)]}
    view.apply(f"hemo/SDU7/{bed}/derived", {
        "v": 1, "time": iso(t), "values": {"SI": hr / 120, "SVR": 1266.0, "CI": 2.6},
        "measured": measured, "trends": {"HR": "rising", "CVP": "falling"}})


def alarm(view, bed, t, aid, rule, priority, acked=False, paused=None, category="physiological"):
    view.apply(f"hemo/SDU7/{bed}/alarm", {"v": 1, "time": iso(t), "state": {"alarms": [
        {"id": aid, "rule": rule, "priority": priority, "category": category, "since": t - 60,
         "value": 1.1, "acknowledged": acked, "audio_paused_until": paused,
         "latched": False}]}})


def render(view, w, h, now, **kw):
    c = Console(width=w, height=h, record=True, force_terminal=True, color_system="truecolor")
    c.print(unit_screen(view, Screen(unit="SDU7", source="test"), now, w, h, **kw))
    return c


def make_unit(n):
    v = UnitView()
    for i in range(n):
        feed_bed(v, f"bed-{i + 1:02d}", T0)
    return v


def test_80x24_shows_four_beds_values_and_caution():
    v = make_unit(6)
    c = render(v, 80, 24, T0 + 1)
    text = c.export_text()
    lines = text.splitlines()
    assert len(lines) <= 24
    for bed in ("bed-01", "bed-02", "bed-03", "bed-04"):
        assert bed in text
    assert "HR 80↑" in text and "ABP 120/70 (87) line" in text and "CVP 8↓" in text
    assert "SVR 1266" in text and "SI 0.67" in text and "CI 2.6" in text
    assert CAUTION_SHORT in text
    assert "beds 1-4 of 6" in text


def test_200x50_shows_24_beds_and_full_caution():
    v = make_unit(24)
    text = render(v, 200, 50, T0 + 1).export_text()
    assert all(f"bed-{i:02d}" in text for i in range(1, 25))
    assert CAUTION in text
    assert len(text.splitlines()) <= 50


def test_stale_values_are_marked_not_current():
    v = UnitView()
    feed_bed(v, "bed-01", T0, line=False, cuff_age=20 * 60)    # cuff from 20 minutes ago
    text = render(v, 80, 24, T0 + 5).export_text()
    # cuff pressure max age 15 min (configs/default.toml): shown as stale with its age
    assert "NIBP 110/65" in text and "stale 20m" in text
    text = render(v, 80, 24, T0 + 120).export_text()
    assert "HR 80 stale 2m" in text                           # HR expected every 10 s


def test_priorities_colours_and_acknowledged_differ():
    v = make_unit(3)
    alarm(v, "bed-01", T0, "a1", "shock_index_high", "high")
    alarm(v, "bed-02", T0, "a2", "low_output", "medium", acked=True)
    alarm(v, "bed-03", T0, "a3", "feed_silent", "low", category="technical")
    c = render(v, 120, 40, T0 + 1)
    ansi = c.export_text(styles=True, clear=False)
    text = c.export_text(styles=False)
    # each alarm by its phrase (hemostream.core.rules.phrases), not its rule id
    assert "HIGH shock index high" in text and "MEDIUM low cardiac output (acknowledged)" in text
    assert "LOW technical: no data from a channel" in text
    assert "shock_index_high" not in text
    import re

    def sgr(word):   # the ANSI select-graphic-rendition codes drawn before ``word``
        m = re.search(r"\x1b\[([\d;]+)m" + re.escape(word), ansi)
        return set(m.group(1).split(";")) if m else set()
    # IEC 60601-1-8 convention (from memory): high red, medium yellow, low cyan;
    # ANSI codes (ECMA-48): 31 red, 33 yellow, 36 cyan, 5 blink, 2 faint, 3 italic
    assert {"31", "5"} <= sgr("HIGH ")                    # new high alarm: red, flashing
    assert "33" in sgr("MEDIUM ") and "5" not in sgr("MEDIUM ") and "2" in sgr("MEDIUM ")
    assert {"36", "3"} <= sgr("LOW ")                     # technical: cyan, in italics


def test_alarm_list_orders_by_priority_then_newest():
    v = make_unit(3)
    alarm(v, "bed-01", T0, "a1", "low_output", "medium")
    alarm(v, "bed-02", T0 + 30, "a2", "shock_index_high", "high")
    alarm(v, "bed-03", T0 + 20, "a3", "hypovolemia_pattern", "medium")
    order = [(b.bed, a["rule"]) for b, a in v.alarm_list()]
    assert order == [("bed-02", "shock_index_high"), ("bed-03", "hypovolemia_pattern"),
                     ("bed-01", "low_output")]


def test_detail_view_lists_parameters_alarms_and_notes():
    v = make_unit(1)
    alarm(v, "bed-01", T0, "a1", "shock_index_high", "high")
    v.apply("hemo/SDU7/bed-01/note", {"v": 1, "time": iso(T0), "kind": "fluid_bolus",
                                      "volume_ml": 500})
    c = Console(width=100, height=40, record=True)
    c.print(bed_screen(v, Screen(unit="SDU7", source="test"), v.sorted_beds()[0], T0 + 1,
                       100, 40))
    text = c.export_text()
    assert "SDU7/bed-01 detail" in text and "ABP_SYS" in text and "fluid_bolus 500 mL" in text
    assert "HIGH shock index high" in text and "not a diagnosis" in text


def test_scripted_keys_move_open_and_acknowledge():
    v = make_unit(4)
    alarm(v, "bed-04", T0, "shock_index_high@SDU7/bed-04#1", "shock_index_high", "high")
    s, sent = UIState(), []
    for key in ["right", "down", "a", "enter", "tab", "p", "esc", "left", "q"]:
        s, cmd = handle_key(s, key, v, cols=2, operator="RN D. Ferreira")
        if cmd:
            sent.append(cmd)
        if key == "down":
            assert s.selected == 3                      # bed-04
        if key == "enter":
            assert s.detail
    assert sent == [("SDU7/bed-04", "acknowledge", "shock_index_high@SDU7/bed-04#1"),
                    ("SDU7/bed-04", "pause_audio", "shock_index_high@SDU7/bed-04#1")]
    assert s.quit and not s.detail and s.selected == 2


def test_keys_without_operator_or_alarm_send_nothing():
    v = make_unit(2)
    s, cmd = handle_key(UIState(), "a", v, operator="RN D. Ferreira")
    assert cmd is None and "no active alarm" in s.message
    alarm(v, "bed-01", T0, "x", "low_output", "medium")
    s, cmd = handle_key(UIState(), "a", v, operator=None)
    assert cmd is None and "operator" in s.message


def test_the_demo_dashboard_uses_the_configured_maximum_ages(tmp_path):
    """``[derive] max_age_s`` says when a value is too old to show as current; the demo's
    dashboard used the built-in ages whatever the configuration said (``watch`` did not)."""
    from hemostream.app.demo import demo_dashboard
    from hemostream.app.watch import unit_view
    from hemostream.core.config import Config, DeriveConfig
    from hemostream.live.inproc import InprocBroker
    from hemostream.live.service import Service

    cfg = Config(derive=DeriveConfig(max_age_s={"CVP": 5.0}))
    svc = Service(cfg, InprocBroker().client("hs-demo-test"),
                  db_url=f"sqlite:///{tmp_path / 'd.db'}")
    demo = demo_dashboard(svc, lambda: T0 + 10, None, "test", None, None, None,
                          console=Console(width=120, height=40, record=True))
    feed_bed(demo.model, "bed-01", T0)            # CVP measured at T0, shown at T0 + 10 s
    watch = unit_view(cfg)
    feed_bed(watch, "bed-01", T0)
    for view in (demo.model, watch):
        r, stale = view.bed("SDU7/bed-01").reading("CVP", T0 + 10)
        assert r.value == 8 and stale, "10 s old, configured maximum 5 s"
        r, stale = view.bed("SDU7/bed-01").reading("HR", T0 + 5)
        assert not stale                          # built-in 10 s where nothing is configured
    plain = UnitView()                            # the built-in 30 s for CVP: still current
    feed_bed(plain, "bed-01", T0)
    assert not plain.bed("SDU7/bed-01").reading("CVP", T0 + 10)[1]


def test_a_time_without_an_offset_is_not_guessed():
    """docs/wire-format.md: times are RFC 3339 with an explicit offset. A published message
    whose time has none is ignored (it was read as the viewer's local time before)."""
    v = UnitView()
    v.apply("hemo/SDU7/bed-01/derived", {"v": 1, "time": "2026-12-01T08:00:00",
                                         "values": {"SI": 0.7}})
    assert v.bed("SDU7/bed-01").values == {}
    v.apply("hemo/SDU7/bed-01/derived", {"v": 1, "time": "2026-12-01T09:00:00+01:00",
                                         "values": {"SI": 0.7}})
    assert v.bed("SDU7/bed-01").values["SI"].time == T0     # 09:00+01:00 is 08:00Z
