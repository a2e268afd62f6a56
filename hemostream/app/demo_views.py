"""The demo's two live views, fed from the published outputs: the compact text
:class:`Summary` (``--plain``, or no terminal) and the rich unit dashboard
(:func:`demo_dashboard`), whose acknowledge and audio-pause keys send ``cmd`` messages."""

from __future__ import annotations

import asyncio
import threading
from collections import deque
from dataclasses import dataclass, field
from typing import Any, Callable

from rich.console import Console

from ..core.display import fmt_value
from ..core.rules.phrases import phrase
from ..core.wire import bed_topic, command_body, encode, is_status_topic, split_topic
from ..dashboard import Dashboard, Screen, UnitView
from ..live.inproc import InprocBroker
from ..live.service import Service
from .watch import unit_view


@dataclass
class Summary:
    """The compact live view: the latest published figures of every bed."""

    beds: dict[str, dict] = field(default_factory=dict)
    events: deque = field(default_factory=lambda: deque(maxlen=6))
    health: dict | None = None
    outputs: int = 0

    def apply(self, topic: str, payload: Any) -> None:
        if not isinstance(payload, dict):
            return
        t = split_topic(topic)
        if t is None:
            return
        self.outputs += 1
        if is_status_topic(t):
            if payload.get("kind") == "health":
                self.health = payload
            return
        b = self.beds.setdefault(f"{t.unit}/{t.bed}", {"values": {}, "alarms": None})
        if t.kind == "derived":
            b["time"] = payload.get("time")
            for p, v in (payload.get("measured") or {}).items():
                if isinstance(v, list) and v:
                    b["values"][p] = v[0]
            b["values"].update(payload.get("values") or {})
            # a value that is not ok (an artifact, a device status) is named, not shown
            marks = payload.get("quality")
            b["marks"] = {p: m["quality"] for p, m in marks.items()
                          if isinstance(m, dict) and m.get("quality") not in (None, "ok")
                          } if isinstance(marks, dict) else {}
        elif t.kind == "alarm":
            if "state" in payload:
                b["alarms"] = payload["state"]
            elif "event" in payload:
                ev = payload["event"]
                self.events.append(f"{ev.get('time', '')[11:19]} {t.bed} "
                                   f"{ev.get('rule', ev.get('alarm_id', '?'))} "
                                   f"{ev.get('transition', '')} ({ev.get('priority', '')})")

    def lines(self) -> list[str]:
        out = []
        for key in sorted(self.beds):
            b = self.beds[key]
            v = dict(b["values"])
            if "MAP" not in v:        # a measured mean pressure when no MAP was derived
                mean = v.get("ABP_MEAN", v.get("NIBP_MEAN"))
                if mean is not None:
                    v["MAP"] = mean
            marks = b.get("marks") or {}
            if "MAP" in marks or "ABP_MEAN" in marks:
                marks.setdefault("MAP", marks.get("ABP_MEAN") or marks["MAP"])
            shown = " ".join(f"{p} ({marks[p]})" if p in marks else f"{p} {fmt_value(p, v[p])}"
                             for p in ("HR", "MAP", "CVP", "CO", "CI", "SVR", "SI", "SPO2")
                             if p in v or p in marks)
            st = b["alarms"]
            alarms = ""
            if isinstance(st, dict) and st.get("count"):
                names = [a.get("phrase") or phrase(str(a.get("rule") or a.get("id") or "?"))
                         for a in st.get("alarms", []) if isinstance(a, dict)]
                alarms = f"  ALARM {st.get('highest')}: {', '.join(names[:3])}"
            out.append(f"  {key:<18} {shown or '(waiting for values)'}{alarms}")
        for e in self.events:
            out.append(f"  event {e}")
        h = self.health
        if h:
            out.append(f"  pipeline: {h.get('messages_per_s', 0):.0f} msg/s, stored "
                       f"{h.get('stored')}, rejected {h.get('rejected_total')}, duplicates "
                       f"{h.get('duplicates')}, db write {h['db_write_ms']['last']:.1f} ms")
        return out


@dataclass
class DemoDashboard:
    """The rich unit dashboard of the demo, fed from the published outputs (:meth:`feed`),
    redrawn on its own thread; acknowledge and audio pause keys send ``cmd`` messages the same
    way ``hemostream ack`` does."""

    dashboard: Dashboard
    model: UnitView
    lock: threading.Lock
    stop: threading.Event = field(default_factory=threading.Event)
    thread: threading.Thread | None = None

    def feed(self, topic: str, payload: Any) -> None:
        with self.lock:
            self.model.apply(topic, payload)

    def start(self) -> "DemoDashboard":
        self.thread = threading.Thread(target=self.dashboard.run, args=(self.stop,),
                                       daemon=True, name="dashboard")
        self.thread.start()
        return self

    def alive(self) -> bool:
        return self.thread is not None and self.thread.is_alive()

    def close(self, timeout: float = 5.0) -> None:
        self.stop.set()
        if self.thread is not None:
            self.thread.join(timeout)


def demo_dashboard(svc: Service, clock: Callable[[], float], loop: asyncio.AbstractEventLoop,
                   source: str, operator: str | None, broker: InprocBroker | None,
                   watcher, console: Console | None = None) -> DemoDashboard:
    """The demo's dashboard (not started): the same model as ``watch`` builds, with the
    configured maximum ages of ``svc.cfg``."""
    model = unit_view(svc.cfg)
    lock = threading.Lock()

    def send_command(bed_key: str, action: str, alarm_id: str) -> None:
        data = encode(command_body(action, alarm_id, operator or "demo", clock()))
        cmd_topic = bed_topic(bed_key, "cmd")
        if broker is not None:
            loop.call_soon_threadsafe(broker.publish, cmd_topic, data, 1, False)
        else:
            loop.call_soon_threadsafe(watcher.publish, cmd_topic, data, 1, False)

    def status() -> dict:
        h = svc.last_health or {}
        return {"connected": svc.t.connected, "rate": h.get("messages_per_s", 0.0),
                "lag_s": (h.get("lag_s") or {}).get("ingest_max")}

    dash = Dashboard(model, Screen(unit="", source=source, operator=operator,
                                   unit_names={u.id: u.name for u in svc.cfg.units if u.name}),
                     clock=clock, send_command=send_command, status=status, lock=lock,
                     console=console)
    return DemoDashboard(dash, model, lock)
