"""Artifact spans (configuration and detector): values that must not make trends, alarms or fluid-challenge results.

Three sources, per pressure *channel* (ABP, CVP, PAP, PAWP, NIBP; each with the parameters a
flush or zeroing of it spoils, derived ones included):

1. A note (``line_flush``, ``zeroing``, ``sample_draw`` by default) opens a span of
   ``duration_s`` (default ``note_span_s``) for its ``param``'s channel, or for all invasive
   channels when it names none. Samples already in the open trend bucket from the note's time
   on are dropped too (a note is often entered a little after the fact).
2. A sample with status ``calibrating`` (the device says zeroing or flush in progress).
3. A flush or zeroing *signature* detected in the values (``auto_detect``):

   - a flat pulse pressure: SYS - DIA below ``flat_pulse_pressure`` (a flush shows the
     pressure bag as a square wave, a zeroing reads atmosphere: either way no pulse);
   - a value outside ``signature_outside`` (a flush reads about 300 mm[Hg], a zeroing 0);
   - a mean-only channel (CVP) dropping by ``zero_step`` or more to within ``zero_band`` of 0
     within 10 s of its previous value, and staying there;
   - an over-damped trace: the pulse pressure below ``damping_fraction`` of its slow
     reference (exponential average over ``damping_reference_s``) while the mean stays within
     ``damping_mean_tolerance`` of its own; only the systolic-dependent values
     (``damping_spoils``) are left out, the mean stays in use. A real fall in pressure moves
     the mean too and is not taken for damping.

   Common practice (from memory): these are the shapes a flushed or zeroed fluid-filled
   transducer system shows; the thresholds are the project's choice.

After a signature the channel stays excluded for ``post_hold_s`` (the trace rings and refills).
A signature that persists for ``suspected_after_s`` outside a noted span is the technical
condition ``artifact_suspected`` (a damped, clotted or open line; a zeroing left running).
"""

from __future__ import annotations

from typing import Annotated, Literal

from pydantic import BaseModel, Field, model_validator

from ..wire import PARAMS
from .common import STRICT, PosSeconds, Priority, Seconds, Span, check_params

__all__ = ["ArtifactConfig", "ArtifactState", "ArtifactDetector"]


# --------------------------------------------------------------------------- configuration


def _default_channels() -> dict[str, list[str]]:
    # A pressure channel and every value computed from it: a flush or zeroing of the channel
    # makes all of them wrong for its duration (derivations as in derive.py).
    return {
        "ABP": ["ABP_SYS", "ABP_DIA", "ABP_MEAN", "MAP", "SBP", "PP", "SVR", "SVRI", "SI",
                "MSI", "LVSWI"],
        "CVP": ["CVP", "SVR", "SVRI", "RVSWI"],
        "PAP": ["PAP_SYS", "PAP_DIA", "PAP_MEAN", "PVR", "RVSWI"],
        "PAWP": ["PAWP", "PVR", "LVSWI"],
        "NIBP": ["NIBP_SYS", "NIBP_DIA", "NIBP_MEAN"],
    }


NoteKind = Literal["line_flush", "zeroing", "sample_draw", "reposition"]
_SPAN_NOTES: tuple[NoteKind, ...] = ("line_flush", "zeroing", "sample_draw")
_RESET_NOTES: tuple[NoteKind, ...] = ("reposition",)


class ArtifactConfig(BaseModel):
    """Values left out of trends, limits, patterns and fluid-challenge evaluation."""

    model_config = STRICT
    #: note kinds that open an artifact span for their ``param`` (or ``note_all_channels``)
    note_kinds: list[NoteKind] = Field(default_factory=lambda: list(_SPAN_NOTES))
    #: span length when the note gives no ``duration_s``
    note_span_s: Seconds = 60.0
    #: note kinds after which the trends of the note's channel restart (the reading's
    #: reference changed: a transducer levelled again)
    trend_reset_note_kinds: list[NoteKind] = Field(default_factory=lambda: list(_RESET_NOTES))
    #: channels a note without ``param`` concerns (the invasive, transducer-based ones)
    note_all_channels: list[str] = Field(
        default_factory=lambda: ["ABP", "CVP", "PAP", "PAWP"])
    #: channel -> parameters a flush/zeroing of it spoils (first entries: the measured ones)
    channels: dict[str, list[str]] = Field(default_factory=_default_channels)
    #: detect flush/zeroing signatures without a note
    auto_detect: bool = True
    #: a channel whose SYS - DIA is below this is flat (flush square wave, zeroing, damping)
    flat_pulse_pressure: dict[str, Annotated[float, Field(ge=0)]] = Field(
        default_factory=lambda: {"ABP": 5.0, "PAP": 2.0})
    #: values outside these ranges are flush or zero signatures, not physiology (mm[Hg]);
    #: tighter than ingest plausibility on purpose (common practice, from memory: a flush
    #: reads the pressure bag, about 300 mm[Hg]; a zeroing reads 0)
    signature_outside: dict[str, Span] = Field(default_factory=lambda: {
        "ABP_SYS": Span(low=30, high=260), "ABP_MEAN": Span(low=15, high=220),
        "PAP_MEAN": Span(low=3, high=80), "CVP": Span(low=-5, high=40)})
    #: a drop to about zero (|value| <= zero_band) by at least this step from the previous
    #: value is a zeroing signature (for mean-only channels such as CVP)
    zero_step: dict[str, Annotated[float, Field(gt=0)]] = Field(
        default_factory=lambda: {"CVP": 4.0})
    zero_band: Annotated[float, Field(ge=0)] = 1.0
    #: over-damped trace (air bubble, clot, kinked line): the pulse pressure falls below this
    #: fraction of its slow reference while the mean stays within damping_mean_tolerance of
    #: its own; systolic and diastolic are then wrong, the mean is not (common practice,
    #: from memory). Channels need SYS, DIA and MEAN values.
    damping_fraction: dict[str, Annotated[float, Field(gt=0, lt=1)]] = Field(
        default_factory=lambda: {"ABP": 0.75})
    damping_mean_tolerance: Annotated[float, Field(gt=0, lt=1)] = 0.15
    #: time constant of the slow references of pulse pressure and mean (exponential average)
    damping_reference_s: PosSeconds = 300.0
    #: what a damped trace spoils (the rest of the channel, its mean and what is computed
    #: from the mean, stays in use)
    damping_spoils: dict[str, list[str]] = Field(default_factory=lambda: {
        "ABP": ["ABP_SYS", "ABP_DIA", "SBP", "PP", "SI"]})
    #: values stay excluded this long after a signature was last seen (ringing, refill)
    post_hold_s: Seconds = 20.0
    #: a signature present longer than this (outside a noted span) is the technical condition
    #: ``artifact_suspected``
    suspected_after_s: Seconds = 20.0
    suspected_priority: Priority = "low"

    @model_validator(mode="after")
    def _consistent(self) -> "ArtifactConfig":
        for ch, plist in self.channels.items():
            check_params(plist, f"channels.{ch}")
        unknown = [c for c in self.note_all_channels if c not in self.channels]
        unknown += [c for c in self.flat_pulse_pressure if c not in self.channels]
        unknown += [c for c in self.damping_fraction if c not in self.channels]
        for ch, plist in self.damping_spoils.items():
            check_params(plist, f"damping_spoils.{ch}")
        if unknown:
            raise ValueError(f"channel(s) {unknown} are not defined in channels "
                             f"({list(self.channels)})")
        check_params(self.signature_outside, "signature_outside")
        check_params(self.zero_step, "zero_step")
        return self


# --------------------------------------------------------------------------- detector

EMPTY: frozenset[str] = frozenset()
#: why a channel is held out (the note kinds are said as they are: "sample_draw" ...)
CALIBRATING = "channel calibrating"
SIGNATURE = "flat or out-of-range trace"
DAMPED = "damped trace"
NOTE_WORDS = {"sample_draw": "sample draw (note)", "line_flush": "line flush (note)",
              "zeroing": "zeroing (note)"}
_RECENT_S = 10.0
_NINF = float("-inf")


class ArtifactState:
    """Per-bed artifact state."""

    __slots__ = ("note_until", "auto_until", "any_until", "sig_since", "prev", "ignored",
                 "cache_t", "cache", "damp_until", "ref", "note_why", "auto_why")

    def __init__(self) -> None:
        self.note_until: dict[str, float] = {}
        self.auto_until: dict[str, float] = {}
        self.any_until = float("-inf")
        self.sig_since: dict[str, float] = {}     # channel -> unexplained signature since
        self.prev: dict[str, tuple[float, float]] = {}  # param -> (time, last clean value)
        self.ignored: dict[str, None] = {}        # channels whose suspicion was acknowledged
        self.cache_t = float("nan")
        self.cache: frozenset[str] = EMPTY
        self.damp_until: dict[str, float] = {}    # channel -> damped values excluded until
        self.ref: dict[str, list[float]] = {}     # channel -> [time, pulse pressure, mean]
        self.note_why: dict[str, str] = {}        # channel -> kind of the note that opened it
        self.auto_why: dict[str, str] = {}        # channel -> what the detector saw


def _hold(st: "ArtifactState", ch: str, t: float, until: float) -> None:
    """A detected signature on channel ``ch``: values are held out until ``until``, and the
    signature counts towards a suspected-artifact alarm unless a note explains it."""
    if until > st.any_until:
        st.any_until = until
    st.cache_t = float("nan")
    if st.note_until.get(ch, _NINF) >= t or ch in st.ignored:
        st.sig_since.pop(ch, None)
    elif ch not in st.sig_since:
        st.sig_since[ch] = t


class ArtifactDetector:
    def __init__(self, cfg: ArtifactConfig) -> None:
        self.cfg = cfg
        self.channels: dict[str, frozenset[str]] = {
            ch: frozenset(ps) for ch, ps in cfg.channels.items()}
        # measured parameter -> its channel (first channel that lists it)
        self.param_channel: dict[str, str] = {}
        for ch, ps in cfg.channels.items():
            for p in ps:
                if p in PARAMS and p not in self.param_channel:
                    self.param_channel[p] = ch
        self.measured: dict[str, tuple[str, ...]] = {
            ch: tuple(p for p in ps if p in PARAMS and self.param_channel.get(p) == ch)
            for ch, ps in cfg.channels.items()}
        self.flat = {ch: (f"{ch}_SYS", f"{ch}_DIA", v)
                     for ch, v in cfg.flat_pulse_pressure.items()}
        self.outside = {p: (s.low, s.high) for p, s in cfg.signature_outside.items()}
        self.zero_step = dict(cfg.zero_step)
        # channels that can show a signature, in configuration order, with their checks:
        # (channel, ((param, outside range or None, zero step or None), ...), flat check)
        plan = []
        for ch, measured in self.measured.items():
            if ch in self.flat or any(p in self.outside or p in self.zero_step
                                      for p in measured):
                plan.append((ch, tuple((p, self.outside.get(p), self.zero_step.get(p))
                                       for p in measured), self.flat.get(ch)))
        self._plan = tuple(plan)
        self.damp = {ch: (f"{ch}_SYS", f"{ch}_DIA", f"{ch}_MEAN", frac)
                     for ch, frac in cfg.damping_fraction.items()}
        self.damp_spoils = {ch: frozenset(ps) for ch, ps in cfg.damping_spoils.items()}

    # ------------------------------------------------------------------ notes and statuses

    def channels_for(self, param: str | None) -> list[str]:
        if param is None:
            return list(self.cfg.note_all_channels)
        if param in self.channels:
            return [param]
        ch = self.param_channel.get(param)
        if ch is not None:
            return [ch]
        # a channel prefix such as "ABP" written as "ABP_LINE", or a derived name
        return [c for c, ps in self.channels.items() if param in ps][:1]

    def note(self, st: ArtifactState, t: float, param: str | None,
             duration_s: float | None, kind: str | None = None) -> list[str]:
        """Open a noted span; return the channels it covers."""
        dur = self.cfg.note_span_s if duration_s is None else duration_s
        chs = self.channels_for(param)
        for ch in chs:
            if t + dur >= st.note_until.get(ch, _NINF):
                st.note_why[ch] = kind or "note"
            st.note_until[ch] = max(st.note_until.get(ch, float("-inf")), t + dur)
            st.sig_since.pop(ch, None)
            st.any_until = max(st.any_until, t + dur)
        st.cache_t = float("nan")
        return chs

    def affected(self, channels: list[str]) -> list[str]:
        out: dict[str, None] = {}
        for ch in channels:
            for p in self.cfg.channels[ch]:
                out[p] = None
        return list(out)

    # ------------------------------------------------------------------ per message

    def check(self, st: ArtifactState, t: float, fresh: dict[str, float],
              new: frozenset[str], nonvalid: dict[str, str]) -> frozenset[str]:
        """Update signatures from this message; return the parameters excluded at ``t``."""
        cfg = self.cfg
        if nonvalid:
            for p, s in nonvalid.items():
                if s == "calibrating":
                    ch = self.param_channel.get(p)
                    if ch is not None:
                        until = t + cfg.post_hold_s
                        st.auto_until[ch] = max(st.auto_until.get(ch, until), until)
                        st.auto_why[ch] = CALIBRATING
                        st.any_until = max(st.any_until, until)
                        st.cache_t = float("nan")
        if cfg.auto_detect:
            for ch, checks, fl in self._plan:
                hit = False
                seen = False
                for p, rng, step in checks:
                    if p not in new:
                        continue
                    seen = True
                    v = fresh.get(p)
                    if v is None:
                        continue
                    if rng is not None and not (rng[0] <= v <= rng[1]):
                        hit = True
                    if step is not None and -cfg.zero_band <= v <= cfg.zero_band:
                        pv = st.prev.get(p)
                        if pv is not None and pv[1] - v >= step:
                            in_sig = (ch in st.sig_since
                                      or st.auto_until.get(ch, _NINF) >= t)
                            if in_sig or t - pv[0] <= _RECENT_S:
                                hit = True
                if not seen:
                    continue
                if fl is not None and fl[0] in new and fl[1] in new:
                    sys_v, dia_v = fresh.get(fl[0]), fresh.get(fl[1])
                    if sys_v is not None and dia_v is not None and sys_v - dia_v < fl[2]:
                        hit = True
                dm = self.damp.get(ch)
                if dm is not None and not hit and dm[0] in new and dm[1] in new \
                        and dm[2] in new and self._damped(st, ch, dm, t, fresh):
                    # damped: systolic-dependent values out, the mean stays in use
                    until = t + cfg.post_hold_s
                    st.damp_until[ch] = until
                    _hold(st, ch, t, until)
                    continue
                if hit:
                    until = t + cfg.post_hold_s
                    if st.auto_until.get(ch, _NINF) < until:
                        st.auto_until[ch] = until
                    if st.auto_why.get(ch) != CALIBRATING or st.auto_until[ch] < t:
                        st.auto_why[ch] = SIGNATURE
                    _hold(st, ch, t, until)
                else:
                    if st.sig_since:
                        st.sig_since.pop(ch, None)
                    if st.ignored:
                        st.ignored.pop(ch, None)
                    for p, rng, step in checks:
                        if step is not None and p in new:
                            v = fresh.get(p)
                            if v is not None:
                                st.prev[p] = (t, v)
        return self.excluded(st, t)

    def _damped(self, st: ArtifactState, ch: str, dm: tuple, t: float,
                fresh: dict[str, float]) -> bool:
        """Compare pulse pressure and mean with their slow references; update the references
        with samples that are not damped."""
        sys_v, dia_v, mean_v = fresh.get(dm[0]), fresh.get(dm[1]), fresh.get(dm[2])
        if sys_v is None or dia_v is None or mean_v is None:
            return False
        pp = sys_v - dia_v
        ref = st.ref.get(ch)
        if ref is None:
            st.ref[ch] = [t, pp, mean_v]
            return False
        tol = self.cfg.damping_mean_tolerance
        if ref[1] > 0 and pp < dm[3] * ref[1] and abs(mean_v - ref[2]) <= tol * abs(ref[2]):
            return True
        a = min(1.0, max(0.0, t - ref[0]) / self.cfg.damping_reference_s)
        ref[0] = t
        ref[1] += a * (pp - ref[1])
        ref[2] += a * (mean_v - ref[2])
        return False

    def excluded(self, st: ArtifactState, t: float) -> frozenset[str]:
        if t > st.any_until:
            return EMPTY
        if t == st.cache_t:
            return st.cache
        out: set[str] = set()
        for ch, until in st.note_until.items():
            if until >= t:
                out |= self.channels[ch]
        for ch, until in st.auto_until.items():
            if until >= t:
                out |= self.channels[ch]
        for ch, until in st.damp_until.items():
            if until >= t:
                out |= self.damp_spoils.get(ch, self.channels[ch])
        res = frozenset(out) if out else EMPTY
        st.cache_t = t
        st.cache = res
        return res

    def reasons(self, st: ArtifactState, t: float) -> dict[str, str]:
        """Each parameter held out at ``t`` and why (a note's reason first: staff said so)."""
        if t > st.any_until:
            return {}
        out: dict[str, str] = {}
        for ch, until in st.damp_until.items():
            if until >= t:
                for p in self.damp_spoils.get(ch, self.channels[ch]):
                    out[p] = DAMPED
        for ch, until in st.auto_until.items():
            if until >= t:
                why = st.auto_why.get(ch, SIGNATURE)
                for p in self.channels[ch]:
                    out[p] = why
        for ch, until in st.note_until.items():
            if until >= t:
                kind = st.note_why.get(ch, "note")
                why = NOTE_WORDS.get(kind, f"{kind} (note)")
                for p in self.channels[ch]:
                    out[p] = why
        return out

    def suspected(self, st: ArtifactState, t: float) -> list[str]:
        """Channels whose unexplained signature has lasted ``suspected_after_s``."""
        after = self.cfg.suspected_after_s
        return [ch for ch, s in st.sig_since.items() if t - s >= after]
