"""The live dashboard: key handling (pure), a key reader, and a steady 2 Hz redraw.

No key changes data except through the audited command path: acknowledge and audio pause
are handed to ``send_command(bed_key, action, alarm_id)``, which the caller wires to the same
path as ``hemostream ack`` (an MQTT ``cmd`` message, or the in-process pipeline's command
input), and the alarm state changes only when the service says so.
"""

from __future__ import annotations

import os
import select
import sys
import threading
import time
from dataclasses import dataclass, replace
from typing import Callable

from rich.console import Console
from rich.live import Live

from .model import UnitView
from .render import Screen, bed_screen, unit_screen

Command = tuple[str, str, str]          # (bed key, action, alarm id)


@dataclass(frozen=True)
class UIState:
    selected: int = 0                   # index into the sorted beds
    detail: bool = False
    alarm_index: int = 0                # selected alarm in the detail view
    quit: bool = False
    message: str = ""
    #: (alarm id, action) sent and not yet reflected in the alarm state: not sent twice
    pending: frozenset = frozenset()


def _done(a: dict, action: str) -> bool:
    """Whether the alarm state already shows ``action`` done."""
    return bool(a.get("acknowledged") if action == "acknowledge"
                else a.get("acknowledged") or a.get("audio_paused_until"))


def _prune(pending: frozenset, view: UnitView) -> frozenset:
    """Drop what the service has since carried out (or whose alarm is gone)."""
    if not pending:
        return pending
    live = {(a.get("id") or a.get("rule")): a for b in view.beds.values() for a in b.alarms}
    return frozenset((i, act) for i, act in pending
                     if i in live and not _done(live[i], act))


def handle_key(state: UIState, key: str, view: UnitView, cols: int = 2,
               operator: str | None = None) -> tuple[UIState, Command | None]:
    """Apply one key; return the new state and the command to send, if any.

    Keys: arrows or h/j/k/l move, enter opens a bed, esc or backspace goes back, tab cycles
    the alarms of the open bed, a acknowledges and p pauses the audio of the selected alarm
    (the open bed's chosen one, or the selected tile's highest), q quits.
    """
    beds = view.sorted_beds()
    n = len(beds)
    s = replace(state, message="")
    if key in ("q", "Q", "ctrl-c"):
        return replace(s, quit=True), None
    if n == 0:
        return s, None
    sel = min(s.selected, n - 1)
    if not s.detail:
        step = {"left": -1, "h": -1, "right": 1, "l": 1, "up": -cols, "k": -cols,
                "down": cols, "j": cols}.get(key)
        if step is not None:
            return replace(s, selected=max(0, min(n - 1, sel + step))), None
        if key == "enter":
            return replace(s, selected=sel, detail=True, alarm_index=0), None
    else:
        if key in ("esc", "backspace"):
            return replace(s, detail=False), None
        if key in ("tab", "down", "j"):
            na = len(beds[sel].alarms)
            return replace(s, alarm_index=(s.alarm_index + 1) % na if na else 0), None
        if key in ("up", "k"):
            na = len(beds[sel].alarms)
            return replace(s, alarm_index=(s.alarm_index - 1) % na if na else 0), None
    if key in ("a", "p"):
        bed = beds[sel]
        if not bed.alarms:
            return replace(s, selected=sel, message=f"{bed.bed}: no active alarm"), None
        if not operator:
            return replace(s, message="no operator name: start with --operator NAME"), None
        action = "acknowledge" if key == "a" else "pause_audio"
        word = "acknowledgement" if key == "a" else "audio pause"
        pending = _prune(s.pending, view)
        s = replace(s, selected=sel, pending=pending)

        def ident(a: dict) -> str:
            return a.get("id") or a.get("rule")
        if s.detail:                # the chosen alarm of the open bed
            alarm = bed.alarms[min(s.alarm_index, len(bed.alarms) - 1)]
            if _done(alarm, action):
                return replace(s, message=f"{alarm.get('rule')} on {bed.bed} is already "
                               + ("acknowledged" if alarm.get("acknowledged")
                                  else "audio paused")), None
        else:                       # the highest-priority alarm not yet dealt with
            todo = [a for a in bed.alarms if not _done(a, action)]
            if not todo:
                return replace(s, message=f"{bed.bed}: every active alarm is already "
                               + ("acknowledged" if key == "a" else
                                  "acknowledged or audio paused")), None
            alarm = todo[0]         # bed.alarms is sorted highest priority first
        if (ident(alarm), action) in pending:
            return replace(s, message=f"{word} of {alarm.get('rule')} on {bed.bed} already "
                           "sent; waiting for the service to confirm"), None
        return (replace(s, pending=pending | {(ident(alarm), action)},
                        message=f"{word} of {alarm.get('rule')} "
                        f"({alarm.get('priority', '?')}) on {bed.bed} sent as {operator}"),
                (bed.key, action, ident(alarm)))
    return s, None


_ESCAPES = {"\x1b[A": "up", "\x1b[B": "down", "\x1b[C": "right", "\x1b[D": "left",
            "\x1bOA": "up", "\x1bOB": "down", "\x1bOC": "right", "\x1bOD": "left"}


def decode_keys(data: str) -> list[str]:
    """Turn raw terminal input into key names.

    >>> decode_keys("j\\x1b[Ca\\r\\x1b")
    ['j', 'right', 'a', 'enter', 'esc']
    """
    keys = []
    i = 0
    while i < len(data):
        for seq, name in _ESCAPES.items():
            if data.startswith(seq, i):
                keys.append(name)
                i += len(seq)
                break
        else:
            ch = data[i]
            i += 1
            keys.append({"\r": "enter", "\n": "enter", "\x1b": "esc", "\t": "tab",
                         "\x7f": "backspace", "\x03": "ctrl-c"}.get(ch, ch))
    return keys


class KeyReader:
    """Reads keys from the terminal in cbreak mode on a background thread."""

    def __init__(self) -> None:
        self.keys: list[str] = []
        self._lock = threading.Lock()
        self._stop = threading.Event()
        self._fd = sys.stdin.fileno() if sys.stdin.isatty() else None
        self._old = None

    def __enter__(self) -> "KeyReader":
        if self._fd is not None:
            import termios
            import tty
            self._old = termios.tcgetattr(self._fd)
            tty.setcbreak(self._fd)
            threading.Thread(target=self._run, daemon=True, name="keys").start()
        return self

    def __exit__(self, *exc) -> None:
        self._stop.set()
        if self._fd is not None and self._old is not None:
            import termios
            termios.tcsetattr(self._fd, termios.TCSADRAIN, self._old)

    def _run(self) -> None:
        while not self._stop.is_set():
            r, _, _ = select.select([self._fd], [], [], 0.1)
            if r:
                data = os.read(self._fd, 64).decode("utf-8", "replace")
                with self._lock:
                    self.keys.extend(decode_keys(data))

    def take(self) -> list[str]:
        with self._lock:
            keys, self.keys = self.keys, []
        return keys


class Dashboard:
    """Redraws ``view`` about twice a second until quit; the view is fed by someone else.

    ``lock`` guards the view when another thread feeds it; ``clock`` says what time it is
    (the wall clock live, the stream's time in a replayed demo); ``status`` returns the
    header figures (connected, rate, lag).
    """

    def __init__(self, view: UnitView, screen: Screen, *,
                 send_command: Callable[[str, str, str], None] | None = None,
                 clock: Callable[[], float] = time.time,
                 status: Callable[[], dict] | None = None,
                 lock: threading.Lock | None = None, refresh_hz: float = 2.0,
                 console: Console | None = None) -> None:
        self.view = view
        self.screen = screen
        self.send_command = send_command
        self.clock = clock
        self.status = status
        self.lock = lock or threading.Lock()
        self.period = 1.0 / refresh_hz
        self.console = console or Console()
        self.state = UIState()
        self.frames = 0

    def render(self):
        w, h = self.console.size
        now = self.clock()
        st = self.status() if self.status is not None else {}
        self.screen = replace(self.screen, **{k: v for k, v in st.items()
                                              if k in ("connected", "rate", "lag_s", "source")})
        # what the feed waits for (watch: the broker, the unit) unless a key result shows
        scr = replace(self.screen, message=self.state.message or st.get("notice", ""))
        with self.lock:
            beds = self.view.sorted_beds()
            if self.state.detail and beds:
                b = beds[min(self.state.selected, len(beds) - 1)]
                return bed_screen(self.view, scr, b, now, w, h, self.state.alarm_index)
            return unit_screen(self.view, scr, now, w, h, self.state.selected)

    def press(self, key: str) -> None:
        cols = max(1, self.console.size[0] // 38)
        with self.lock:
            self.state, cmd = handle_key(self.state, key, self.view, cols,
                                         self.screen.operator)
        if cmd is not None and self.send_command is not None:
            try:
                self.send_command(*cmd)
            except Exception as e:  # the screen says so; nothing else changes
                self.state = replace(self.state, message=f"command not sent: {e}")

    def run(self, stop: threading.Event | None = None) -> None:
        stop = stop or threading.Event()
        with KeyReader() as keys, Live(self.render(), console=self.console, screen=True,
                                       auto_refresh=False, transient=True) as live:
            while not stop.is_set() and not self.state.quit:
                t0 = time.monotonic()
                for k in keys.take():
                    self.press(k)
                live.update(self.render(), refresh=True)
                self.frames += 1
                stop.wait(max(0.0, self.period - (time.monotonic() - t0)))
