"""`hemostream validate`: how good are these rules, on a cohort of simulated patients.

For each clinical scenario it simulates N patients (seeded; see docs/simulators.md for what
each scenario means, checked for every seed by tests/test_sim_scenarios_hold.py), replays
them through a configuration exactly as `hemostream replay` does, and reports per rule:

- sensitivity: of the patients in whom the scenario says the rule (or one of a group of
  rules) must fire, the share in which it was raised after the marked onset;
- detection delay after the onset (median, 90th percentile, maximum), in minutes;
- false alarms per bed-day: raises in scenarios where the rule must not fire;
- alarm burden per bed-day: every raise of the rule, over every simulated bed-day.

The expectations (:data:`TARGETS`, :data:`QUIET`) are the scenarios' meanings, not tuned to
the results. The figures describe the rules on simulated patients, not a clinical
validation. It runs in the benchmark suite (a full cohort takes minutes); CI runs a tiny one.
"""

from __future__ import annotations

import json
import statistics
import tempfile
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterable

import numpy as np
from simulators.scenario import load_scenario
from simulators.ward import generate, write_recording

from ..core.config import Config
from ..replay import replay_file
from ..review.periods import build_periods
from ..review.queries import alarm_rows, load_beds, notes
from ..store import open_engine
from .scenarios import SCENARIOS

DAY_S = 86400.0

#: scenario -> what must be flagged after its marked onset: (target name, rules any of which
#: counts as the detection)
TARGETS: dict[str, list[tuple[str, frozenset[str]]]] = {
    # a failing right heart: venous pressure backs up while output falls
    "rv_failure": [("right_heart_mismatch", frozenset({"right_heart_mismatch"}))],
    # hemorrhage: the shock index rises before pressure falls (ATLS class II-III)
    "hemorrhage": [("shock_index_high", frozenset({"shock_index_high"}))],
    # a failing left heart: wedge pressure backs up while output falls
    "lv_failure": [("left-sided failure flagged",
                    frozenset({"left_heart_mismatch", "PAWP_high", "PAP_MEAN_high",
                               "low_output"}))],
    # vasodilation: resistance falls, output rises
    "vasodilation": [("vasodilation_pattern", frozenset({"vasodilation_pattern"}))],
}

#: scenario -> rules that must not fire there ("*" = no physiological alarm at all)
QUIET: dict[str, frozenset[str]] = {
    "stable": frozenset({"*"}),
    "bolus_responder": frozenset({"right_heart_mismatch"}),
    "bolus_nonresponder": frozenset({"right_heart_mismatch"}),
    "hemorrhage": frozenset({"right_heart_mismatch"}),
    "vasodilation": frozenset({"right_heart_mismatch"}),
}



@dataclass
class RuleFigures:
    rule: str
    targeted: int = 0               # patients in whom it must fire
    detected: int = 0
    delays_s: list[float] = field(default_factory=list)
    raises: int = 0                 # every raise, every scenario
    false_raises: int = 0           # raises where the rule must not fire
    quiet_bed_days: float = 0.0     # bed-days of the scenarios where it must not fire

    def as_dict(self, bed_days: float) -> dict[str, Any]:
        d = sorted(self.delays_s)
        return {
            "rule": self.rule,
            "targeted": self.targeted, "detected": self.detected,
            "sensitivity": round(self.detected / self.targeted, 3) if self.targeted else None,
            "delay_min": ({"median": round(statistics.median(d) / 60, 1),
                           "p90": round(float(np.percentile(d, 90)) / 60, 1),
                           "max": round(d[-1] / 60, 1)} if d else None),
            "false_per_bed_day": (round(self.false_raises / self.quiet_bed_days, 2)
                                  if self.quiet_bed_days else None),
            "burden_per_bed_day": round(self.raises / bed_days, 2) if bed_days else None,
            "delays_s": [round(x, 1) for x in d],
        }


def evaluate(scenario: str, beds: dict[int, Any], periods: list[Any],
             onsets: dict[int, float], figures: dict[str, RuleFigures]) -> float:
    """Add one scenario's replay to ``figures``; return its bed-days. Pure."""
    bed_days = sum(b.span_s for b in beds.values()) / DAY_S
    physio = [p for p in periods if p.category == "physiological"]
    quiet = QUIET.get(scenario, frozenset())
    seen = {p.rule for p in physio}
    for rule in seen | {r for _, rs in TARGETS.get(scenario, []) for r in rs}:
        figures.setdefault(rule, RuleFigures(rule))
    for p in physio:
        f = figures[p.rule]
        f.raises += 1
        if "*" in quiet or p.rule in quiet:
            f.false_raises += 1
    for name, rules in TARGETS.get(scenario, []):
        f = figures.setdefault(name, RuleFigures(name))
        for bed_id in beds:
            onset = onsets.get(bed_id)
            if onset is None:
                continue
            f.targeted += 1
            starts = [p.start for p in physio
                      if p.bed_id == bed_id and p.rule in rules and p.start >= onset]
            if starts:
                f.detected += 1
                f.delays_s.append(min(starts) - onset)
    return bed_days


def run_cohort(config: Config, per_scenario: int = 30, seed: int = 0,
               scenarios: Iterable[str] = SCENARIOS, duration_s: float | None = None,
               progress: Callable[[str, int, int], None] | None = None) -> dict[str, Any]:
    """Simulate, replay and evaluate; the result as a JSON-able dict."""
    scenarios = list(scenarios)
    figures: dict[str, RuleFigures] = {}
    quiet_days: list[tuple[frozenset[str], float]] = []
    total_days = 0.0
    per: dict[str, Any] = {}
    with tempfile.TemporaryDirectory(prefix="hemostream-validate-") as tmp:
        for k, name in enumerate(scenarios):
            if progress:
                progress(name, k, len(scenarios))
            sc = load_scenario(name)
            rec = Path(tmp) / f"{name}.jsonl"
            write_recording(generate(sc, beds=per_scenario, duration_s=duration_s, seed=seed),
                            rec)
            db = Path(tmp) / f"{name}.db"
            replay_file(rec, f"sqlite:///{db}", config)
            engine = open_engine(f"sqlite:///{db}", create=False)
            try:
                beds = load_beds(engine)
                periods, _ = build_periods(alarm_rows(engine))
                onsets: dict[int, float] = {}
                for n in notes(engine):
                    if n["kind"] == "deterioration_onset":
                        onsets.setdefault(n["bed_id"], float(n["time"]))
            finally:
                engine.dispose()
            days = evaluate(name, beds, periods, onsets, figures)
            total_days += days
            quiet_days.append((QUIET.get(name, frozenset()), days))
            per[name] = {"beds": len(beds), "bed_days": round(days, 3),
                         "physiological_raises": sum(1 for p in periods
                                                     if p.category == "physiological")}
        if progress:
            progress("", len(scenarios), len(scenarios))
    groups = {name for ts in TARGETS.values() for name, rules in ts if rules != {name}}
    for f in figures.values():            # where each rule must not fire, all scenarios seen
        if f.rule not in groups:
            f.quiet_bed_days = sum(d for q, d in quiet_days if "*" in q or f.rule in q)
    rules = sorted((f.as_dict(total_days) for f in figures.values()),
                   key=lambda r: (r["targeted"] == 0, r["rule"]))
    return {"per_scenario": per_scenario, "seed": seed, "bed_days": round(total_days, 3),
            "scenarios": per, "rules": rules,
            "note": "simulated patients (docs/simulators.md); not a clinical validation"}


# --------------------------------------------------------------------------- output

def table_rows(result: dict[str, Any]) -> list[list[str]]:
    def num(v: Any, fmt: str = "{:g}") -> str:
        return "-" if v is None else fmt.format(v)
    out = []
    for r in result["rules"]:
        d = r["delay_min"] or {}
        out.append([r["rule"],
                    f"{r['detected']}/{r['targeted']}" if r["targeted"] else "-",
                    num(r["sensitivity"], "{:.0%}"),
                    num(d.get("median")), num(d.get("p90")), num(d.get("max")),
                    num(r["false_per_bed_day"]), num(r["burden_per_bed_day"])])
    return out


HEADERS = ["rule", "detected", "sensitivity", "delay median (min)", "p90", "max",
           "false alarms / bed-day", "alarms / bed-day"]


def write_html(result: dict[str, Any], path: str | Path, caution: str) -> None:
    """A self-contained page: the table and, per rule with detections, a delay histogram."""
    import html
    rows = "".join("<tr>" + "".join(f"<td>{html.escape(c)}</td>" for c in r) + "</tr>"
                   for r in table_rows(result))
    plots = []
    for r in result["rules"]:
        if r["delays_s"]:
            plots.append(f"<h3>{html.escape(r['rule'])}: detection delay after onset</h3>"
                         + _histogram_svg([x / 60 for x in r["delays_s"]], "minutes"))
    page = f"""<!doctype html><html><head><meta charset="utf-8">
<title>hemostream validate</title>
<style>body{{font-family:sans-serif;margin:2em}}table{{border-collapse:collapse}}
td,th{{border:1px solid #999;padding:3px 8px;text-align:right}}td:first-child{{text-align:left}}
.caution{{border:1px solid #c60;padding:6px;background:#fff4e5}}</style></head><body>
<h1>Rules on a simulated cohort</h1>
<p class="caution">{html.escape(caution)} {html.escape(result['note'])}.</p>
<p>{result['per_scenario']} patients per scenario, seed {result['seed']},
{result['bed_days']:g} bed-days.</p>
<table><tr>{''.join(f'<th>{html.escape(h)}</th>' for h in HEADERS)}</tr>{rows}</table>
{''.join(plots)}
</body></html>"""
    Path(path).write_text(page, encoding="utf-8")


def _histogram_svg(values: list[float], unit: str, width: int = 420, height: int = 140) -> str:
    """A plain bar histogram as inline SVG (10 equal bins over the values' range)."""
    lo, hi = min(values), max(values)
    n_bins = 10
    span = (hi - lo) or 1.0
    counts = [0] * n_bins
    for v in values:
        counts[min(n_bins - 1, int((v - lo) / span * n_bins))] += 1
    top = max(counts)
    bw = (width - 40) / n_bins
    bars = "".join(
        f'<rect x="{30 + i * bw:.1f}" y="{height - 20 - c / top * (height - 40):.1f}" '
        f'width="{bw - 2:.1f}" height="{c / top * (height - 40):.1f}" fill="#4a7ab0"/>'
        for i, c in enumerate(counts) if c)
    return (f'<svg xmlns="http://www.w3.org/2000/svg" width="{width}" height="{height}">'
            f'{bars}<text x="30" y="{height - 4}" font-size="11">{lo:.1f}</text>'
            f'<text x="{width - 60}" y="{height - 4}" font-size="11">{hi:.1f} {unit}</text>'
            f'<text x="2" y="14" font-size="11">n={len(values)}</text></svg>')


def dump_json(result: dict[str, Any], path: str | Path) -> None:
    Path(path).write_text(json.dumps(result, indent=2) + "\n", encoding="utf-8")
