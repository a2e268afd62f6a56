"""``hemostream simulate``: run a scenario and write (or publish) its recording.

The ``hemostream`` command registers this module's :func:`add_parser`; to try it alone::

    python -m simulators.cli simulate --scenario hemorrhage --beds 4 --duration 2h --out ward.jsonl
"""

from __future__ import annotations

import argparse
import sys
import time
from typing import Any, Iterator, Protocol

from hemostream.core.argtypes import number_above, whole_number


__all__ = ["add_parser", "run", "main"]

_EPILOG = """\
examples:
  hemostream simulate --list
  hemostream simulate --scenario demo --out demo.jsonl
  hemostream simulate --scenario hemorrhage --beds 4 --duration 1h30m --seed 7 --out bleed.jsonl
  hemostream simulate --scenario my-ward.toml --duration 8h --out -  | gzip > ward.jsonl.gz

Durations: 90s, 30m, 2h, 1h30m. The same scenario, beds, duration and seed give the same
recording byte for byte. Scenario files are described in docs/simulators.md.
"""


class Publisher(Protocol):
    """``publisher(lines, url, speed[, give_up_s=...]) -> exit status``."""

    def __call__(self, lines: Iterator[dict], url: str, speed: float | None,
                 give_up_s: float = ...) -> int: ...


def add_parser(subparsers: Any, publisher: Publisher | None = None, hl7: Any = None) -> None:
    """Register the ``simulate`` subcommand on an argparse subparsers object.

    ``publisher(lines, url, speed) -> exit status`` streams lines to an MQTT broker; the
    ``hemostream`` command passes its own (the simulators do not reach into the live shell).
    Without one, ``--publish`` explains that live publishing is not available. ``hl7`` is
    the HL7 intake's command module (``write_command``, ``publisher``), for ``--format hl7``
    and ``--publish-hl7``.
    """
    p = subparsers.add_parser(
        "simulate", help="simulate a ward from a scenario and write a recording",
        description="Simulate beds with a closed-loop model of the circulation (two "
        "Frank-Starling ventricles, systemic and pulmonary compartments, a baroreflex) "
        "following a scenario's time line, and write the monitors' messages as a recording "
        "in the wire format (JSON Lines, arrival order), ready for `hemostream replay`.",
        epilog=_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    p.add_argument("--scenario", metavar="NAME|FILE",
                   help="a shipped scenario id (see --list) or a scenario .toml file")
    p.add_argument("--list", action="store_true",
                   help="list the shipped scenarios with a one-line description and exit")
    p.add_argument("--beds", type=_positive_int, metavar="N",
                   help="number of beds; the scenario's beds are repeated with new patients "
                   "(default: the beds the scenario defines)")
    p.add_argument("--duration", type=_duration, metavar="D",
                   help="simulated time, e.g. 90s, 30m, 2h, 1h30m (default: the scenario's)")
    p.add_argument("--seed", type=int, default=0, metavar="S",
                   help="random seed for patients, artifacts and noise (default 0)")
    p.add_argument("--start", type=_start, metavar="TIME",
                   help="time of the first second, RFC 3339 (default: the scenario's, "
                   "2026-12-01T08:00:00Z unless it says otherwise)")
    p.add_argument("--out", metavar="RECORDING",
                   help="recording file to write (JSON Lines); '-' for standard output")
    p.add_argument("--publish", metavar="URL",
                   help="publish live to an MQTT broker (QoS 1), e.g. mqtt://localhost:1883"
                   + ("" if publisher else " (not available in this installation: use --out)")
                   + "; with --out as well, the recording is written as it is published")
    p.add_argument("--give-up-after", type=float, metavar="SECONDS",
                   help="with --publish: stop after this long without a broker connection "
                   "(default 120) and say how many messages were not delivered")
    p.add_argument("--format", choices=("jsonl", "hl7"), default="jsonl",
                   help="with --out: the wire format's JSON Lines (default), or HL7 v2 "
                   "ORU^R01 messages (IHE PCD-01, IEEE 11073 terms; see docs/hl7.md)")
    p.add_argument("--publish-hl7", metavar="HOST:PORT",
                   help="send the ward live as HL7 v2 over MLLP to a listener such as "
                   "`hemostream run --hl7-listen` (each message waits for its ACK)")
    p.add_argument("--speed", type=_positive_float, default=1.0, metavar="N",
                   help="with --publish or --publish-hl7: N times real time (default 1)")
    p.add_argument("--quiet", action="store_true", help="no progress bar or summary")
    p.set_defaults(func=run, publisher=publisher, hl7=hl7)


def run(args: argparse.Namespace) -> int:
    """Carry out ``simulate``; return the exit status (0 ok, 1 failed, 2 bad usage)."""
    from .scenario import ScenarioError, format_duration, list_scenarios, load_scenario

    if args.list:
        infos = list_scenarios()
        width = max(len(s.id) for s in infos)
        for s in infos:
            print(f"{s.id:<{width}}  {s.description}")
        return 0
    if not args.scenario:
        _error("--scenario NAME|FILE is required (or --list to see the scenarios)")
        return 2
    publisher = getattr(args, "publisher", None)
    if args.publish and publisher is None:
        _error("live publishing (--publish) is not available yet; write a recording with "
               "--out and replay it, or stream it with `hemostream replay --speed N`")
        return 2
    hl7: Any = getattr(args, "hl7", None)      # the HL7 intake's command module, or None
    if (args.format == "hl7" or args.publish_hl7) and hl7 is None:
        _error("HL7 output is not available in this installation")
        return 2
    if not args.out and not args.publish and not args.publish_hl7:
        _error("--out RECORDING is required (a file, or '-' for standard output), "
               "or --publish URL, or --publish-hl7 HOST:PORT")
        return 2
    try:
        scenario = load_scenario(args.scenario)
        plans = scenario.plan(args.beds)
    except ScenarioError as e:
        _error(str(e))
        return 2
    duration = int(args.duration if args.duration is not None else scenario.duration_s)
    from .ward import generate, write_recording

    if args.publish:
        assert publisher is not None              # checked above
        return _publish(args, scenario, duration, publisher)
    if args.publish_hl7:
        return int(hl7.publisher(generate(scenario, beds=args.beds, duration_s=duration,
                                          seed=args.seed, start=args.start),
                                 args.publish_hl7, args.speed) or 0)
    if args.format == "hl7":
        try:
            count = hl7.write_command(generate(scenario, beds=args.beds,
                                               duration_s=duration, seed=args.seed,
                                               start=args.start), args.out)
        except OSError as e:
            _error(f"cannot write {args.out!r}: {e.strerror or e}")
            return 1
        if not args.quiet and args.out != "-":
            print(f"wrote {args.out}: {count} HL7 v2 messages, {len(plans)} bed(s) of "
                  f"{scenario.unit}, {format_duration(duration)} simulated (scenario "
                  f"{scenario.id}, seed {args.seed})", file=sys.stderr)
        return 0

    show = not args.quiet and args.out != "-" and sys.stderr.isatty() \
        and duration * len(plans) >= 3600
    t0 = time.perf_counter()
    try:
        if show:
            from rich.console import Console
            from rich.progress import (BarColumn, Progress, TextColumn, TimeElapsedColumn,
                                       TimeRemainingColumn)
            with Progress(TextColumn(f"simulating {scenario.id}"), BarColumn(),
                          TextColumn("{task.percentage:>3.0f}%"), TimeElapsedColumn(),
                          TimeRemainingColumn(), console=Console(stderr=True),
                          transient=True) as prog:
                task = prog.add_task("sim", total=duration)
                lines = generate(scenario, beds=args.beds, duration_s=duration,
                                 seed=args.seed, start=args.start,
                                 progress=lambda done, total: prog.update(task, completed=done))
                count = write_recording(lines, args.out)
        else:
            count = write_recording(generate(scenario, beds=args.beds, duration_s=duration,
                                             seed=args.seed, start=args.start), args.out)
    except ScenarioError as e:
        _error(str(e))
        return 2
    except ValueError as e:              # an impossible patient in the scenario file
        _error(f"{args.scenario}: {e}")
        return 2
    except OSError as e:
        _error(f"cannot write {args.out!r}: {e.strerror or e}")
        return 1
    if not args.quiet and args.out != "-":
        secs = time.perf_counter() - t0
        print(f"wrote {args.out}: {count} lines, {len(plans)} bed(s) of {scenario.unit}, "
              f"{format_duration(duration)} simulated in {secs:.1f} s (scenario {scenario.id}, "
              f"seed {args.seed})", file=sys.stderr)
    return 0


def _publish(args: argparse.Namespace, scenario: Any, duration: int,
             publisher: Publisher) -> int:
    from .scenario import format_duration
    from .ward import dumps, generate

    lines: Iterator[dict] = generate(scenario, beds=args.beds, duration_s=duration,
                                     seed=args.seed, start=args.start)
    fh = None
    if args.out:
        try:
            fh = sys.stdout if args.out == "-" else open(args.out, "w", encoding="utf-8")
        except OSError as e:
            _error(f"cannot write {args.out!r}: {e.strerror or e}")
            return 1

        def tee(src: Iterator[dict]) -> Iterator[dict]:
            for line in src:
                fh.write(dumps(line) + "\n")
                yield line

        lines = tee(lines)
    if not args.quiet:
        print(f"publishing {scenario.id} to {args.publish} at {args.speed:g} x real time "
              f"({format_duration(duration)} simulated)", file=sys.stderr)
    try:
        if args.give_up_after is not None:
            return int(publisher(lines, args.publish, args.speed,
                                 give_up_s=args.give_up_after) or 0)
        return int(publisher(lines, args.publish, args.speed) or 0)
    finally:
        if fh is not None and fh is not sys.stdout:
            fh.close()


def _error(msg: str) -> None:
    print(f"hemostream simulate: error: {msg}", file=sys.stderr)


def _duration(text: str) -> float:
    from .scenario import parse_duration
    try:
        value = parse_duration(text)
    except ValueError as e:
        raise argparse.ArgumentTypeError(str(e)) from None
    if value < 1:
        raise argparse.ArgumentTypeError(f"duration {text!r} is shorter than 1 s")
    return value


_positive_int = whole_number(1, 10000)
_positive_float = number_above(0)


def _start(text: str):
    from datetime import datetime
    try:
        t = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise argparse.ArgumentTypeError(
            f"expected an RFC 3339 time such as 2026-12-01T08:00:00Z, got {text!r}") from None
    if t.tzinfo is None:
        raise argparse.ArgumentTypeError(f"time {text!r} needs a UTC offset (Z or +hh:mm)")
    return t


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(prog="hemostream")
    sub = parser.add_subparsers(dest="command", required=True)
    add_parser(sub)
    args = parser.parse_args(argv)
    return args.func(args)


if __name__ == "__main__":
    sys.exit(main())
