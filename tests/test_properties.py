"""Property tests: random and malformed input never crashes the core and is never lost.

Every input line must end up as a stored message, a stored reject or a counted duplicate.
"""

import json

from hypothesis import HealthCheck, given, settings, strategies as st

from hemostream.core.processor import Processor
from hemostream.replay import replay_file

PARAMS = ["HR", "ABP_SYS", "ABP_DIA", "CVP", "CO", "SV", "NIBP_SYS", "PAWP", "XX", ""]
UNITS = ["/min", "mm[Hg]", "kPa", "cm[H2O]", "L/min", "mL", "mmHg", "", "%"]
json_scalars = st.one_of(st.none(), st.booleans(), st.integers(-10**6, 10**6),
                         st.floats(allow_nan=True, allow_infinity=True), st.text(max_size=12))
anything = st.recursive(json_scalars, lambda c: st.lists(c, max_size=4)
                        | st.dictionaries(st.text(max_size=6), c, max_size=4), max_leaves=12)
times = st.sampled_from(["2026-12-01T10:00:00Z", "2026-12-01T10:00:01.5+01:00",
                         "2026-12-01T10:00:00", "garbage", "2026-12-01T11:00:00Z", 17])
observation = st.fixed_dictionaries(
    {"param": st.sampled_from(PARAMS), "value": st.one_of(st.floats(-100, 1000), json_scalars),
     "unit": st.sampled_from(UNITS)},
    optional={"status": st.sampled_from(["valid", "invalid", "calibrating", "weird"]),
              "time": times})
obs_payload = st.fixed_dictionaries(
    {"v": st.sampled_from([1, 1, 1, 2, "1"]), "device": st.sampled_from(["gw-1", "gw-2", ""]),
     "seq": st.one_of(st.integers(0, 5), st.just(-1)), "time": times,
     "obs": st.lists(observation, max_size=5)})
topics = st.sampled_from(["hemo/U1/b1/obs", "hemo/U1/b2/obs", "hemo/U1/b1/admit",
                          "hemo/U1/b1/note", "hemo/U1/b1/cmd", "hemo/U1/b 1/obs", "x/y",
                          "hemo/U1/b1/alarm", ""])
payloads = st.one_of(obs_payload, anything, st.text(max_size=40),
                     st.binary(max_size=40).map(lambda b: b.decode("latin-1")))


@settings(max_examples=300, deadline=None)
@given(st.lists(st.tuples(topics, payloads), min_size=1, max_size=12))
def test_core_accounts_for_every_message(items):
    p = Processor()
    for i, (topic, payload) in enumerate(items):
        p.feed(topic, payload if isinstance(payload, dict | str) else json.dumps(payload),
               1796119200.0 + i)
    c = p.counters
    out = p.drain()
    whole_rejects = [r for r in out.rejected if r["obs_index"] is None]
    assert len(out.messages) + len(whole_rejects) + c.duplicates == len(items)
    assert all(r["reason"] for r in out.rejected)


lines = st.one_of(
    st.tuples(st.sampled_from(["2026-12-01T10:00:00.1Z", "bad", None]), topics, payloads)
    .map(lambda t: json.dumps({"rx": t[0], "topic": t[1], "payload": t[2]})),
    st.text(min_size=1, max_size=30).filter(lambda s: s.strip() and "\n" not in s
                                            and "\r" not in s))


@settings(max_examples=25, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(st.lists(lines, min_size=1, max_size=20))
def test_replay_accounts_for_every_line(tmp_path_factory, recording):
    d = tmp_path_factory.mktemp("prop")
    f = d / "r.jsonl"
    f.write_text("\n".join(recording) + "\n", encoding="utf-8")
    s = replay_file(f, f"sqlite:///{d / 'p.db'}")
    from hemostream.store import TABLES, open_engine
    from sqlalchemy import func, select
    engine = open_engine(f"sqlite:///{d / 'p.db'}", create=False)
    with engine.connect() as c:
        r = TABLES["rejected"]
        whole = c.execute(select(func.count()).select_from(r)
                          .where(r.c.obs_index.is_(None))).scalar()
        msgs = c.execute(select(func.count()).select_from(TABLES["messages"])).scalar()
    engine.dispose()
    assert msgs + whole + s.duplicates == s.lines


@settings(max_examples=3000, deadline=None)
@given(st.one_of(st.floats(-2e9, 4e9), st.integers(-2 * 10**9, 4 * 10**9).map(
    lambda s: s + 0.0005), st.integers(0, 4 * 10**9).map(lambda s: s + 0.9999995)))
def test_time_text_is_what_the_standard_library_writes(t):
    """The cached formatter gives exactly Python's own RFC 3339 text (datetime's rounding to
    the microsecond, isoformat's cut to the millisecond), the reference here."""
    from datetime import datetime, timezone
    from hemostream.core.wire import format_epoch
    want = datetime.fromtimestamp(t, timezone.utc).isoformat(
        timespec="milliseconds").replace("+00:00", "Z")
    assert format_epoch(t) == want
