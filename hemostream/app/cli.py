"""The ``hemostream`` command: every subcommand is registered here, the composition root.

Size: every subcommand's parser and small handler sit in this one composition root for now;
to be split by command group (issue 16).

``replay``, ``query`` and ``check-config`` (storage and the core), ``run`` and ``ack`` (the
live service over a broker), ``demo`` (:mod:`.demo`), ``watch`` (:mod:`.watch`), ``compare``
and ``report`` (implemented in :mod:`hemostream.review`), ``db`` (:mod:`hemostream.store.cli`)
and, when the simulators are
installed, ``simulate``.
"""

from __future__ import annotations

import argparse
import json
import logging
import os
import signal
import sys
import time
from pathlib import Path
from typing import TYPE_CHECKING, Any

from .. import CAUTION
from ..consoles import LazyConsole
from ..core.argtypes import number_above, whole_number
from ..core.quality import QUALITIES
from ..kinds import KINDS
from ..review.cli import add_parsers as add_review_parsers
from ..store.cli import add_parser as add_db_parser
from .scenarios import SCENARIOS
from .status import add_parser as add_status_parser

if TYPE_CHECKING:
    from ..core.config import Config

# Each handler imports what its command uses, on first use (``python -X importtime``): a
# query or ``--help`` does not load the live service, rich, HL7, the simulators or the core's
# configuration models (docs/performance.md, "The 24-hour query"). The parsers are all built
# here from light modules, so every subcommand, option and help text stays as it was.

try:
    from simulators.cli import add_parser as add_simulate_parser
except ImportError:              # the simulators are a separate, optional package
    add_simulate_parser = None

log = logging.getLogger("hemostream.live")


#: standard error (rich, made on first use)
err = LazyConsole(stderr=True, soft_wrap=True)


def live_config(path: str | None) -> Config:
    """The named configuration, or the shipped default (configs/default.toml) for the live
    commands."""
    from ..config import load_for_command

    return load_for_command(path, shipped_default=True)


def setup_logging(level: str) -> None:
    from ..core.redact import RedactingFilter

    logging.basicConfig(level=getattr(logging, level.upper()), stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    for h in logging.getLogger().handlers:      # no password in any line, whoever logs it
        h.addFilter(RedactingFilter())
    # paho logs packet summaries (topics, sizes) at debug; never payloads
    logging.getLogger("hemostream.live.paho").setLevel(
        logging.DEBUG if level.upper() == "DEBUG" else logging.WARNING)


# --------------------------------------------------------------------------- argument types

#: a number above 0; a whole number 0 or more (the shared wording, :mod:`..core.argtypes`)
positive_float = number_above(0)
non_negative_int = whole_number(0)


def duration(text: str) -> float:
    """Seconds from 90, 90s, 10m, 2h or 1h30m (as ``simulate --duration`` takes them)."""
    import re
    s = text.strip().lower().replace(" ", "")
    try:
        v = float(s)
    except ValueError:
        m = re.fullmatch(r"(?:(\d+(?:\.\d+)?)h)?(?:(\d+(?:\.\d+)?)m)?(?:(\d+(?:\.\d+)?)s)?", s)
        if not s or m is None or not any(m.groups()):
            raise argparse.ArgumentTypeError(
                f"expected a duration such as 90, 90s, 10m, 2h or 1h30m, got {text!r}") from None
        h, mi, se = (float(g) if g else 0.0 for g in m.groups())
        v = h * 3600 + mi * 60 + se
    if not v > 0:
        raise argparse.ArgumentTypeError(f"expected a duration above 0, got {text!r}")
    return v


# --------------------------------------------------------------------------- replay, query

def cmd_replay(args) -> int:
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn, TimeRemainingColumn

    from ..config import load_for_command
    from ..intake.hl7 import cli as hl7_cli
    from ..replay import replay_file
    from ..store import StoreError

    cfg = load_for_command(args.config)
    path = Path(args.recording)
    if not path.is_file():
        err.print(f"[red]error:[/] recording {str(path)!r} does not exist or is not a file")
        return 2
    if hl7_cli.looks_like_hl7(path):            # a file of HL7 v2 messages (docs/hl7.md)
        return hl7_cli.replay_command(path, args.db, args.config, args.json)
    url = args.db or cfg.store.url
    show = err.is_terminal and path.stat().st_size > 2_000_000 and not args.quiet
    try:
        with Progress(TextColumn("replaying"), BarColumn(), TextColumn("{task.percentage:>3.0f}%"),
                      TimeRemainingColumn(), console=err.real, disable=not show,
                      transient=True) as prog:
            task = prog.add_task("replay", total=path.stat().st_size)
            summary = replay_file(path, url, cfg, speed=args.speed,
                                  progress=lambda d, t: prog.update(task, completed=d))
    except StoreError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    except OSError as e:
        err.print(f"[red]error:[/] cannot read {str(path)!r}: {e.strerror or e}")
        return 1
    if args.json:
        print(json.dumps(summary.as_dict(), indent=2))
        return 0
    out = Console(soft_wrap=True)
    out.print(f"CAUTION: {CAUTION}", highlight=False)
    out.print(f"[bold]replayed[/] {summary.path} into {summary.db_url}")
    out.print(f"  lines {summary.lines}   messages stored {summary.messages}   "
              f"observations {summary.observations}   duplicates dropped {summary.duplicates}"
              f"   late {summary.late}")
    out.print(f"  derived values computed {summary.derived_computed}, stored "
              f"{summary.derived_stored}   alarm events {summary.alarm_events}")
    out.print(f"  rejected {summary.rejected_total}"
              + "".join(f"\n    {k}: {v}" for k, v in summary.rejected.items()))
    out.print(f"  {summary.seconds:.2f} s, {summary.messages_per_s:,.0f} lines/s")
    if summary.duplicates:
        out.print(f"  {summary.duplicates} message(s) were already in the database (or came "
                  "twice) and were not stored again")
    if summary.rejects_known:
        out.print(f"  {summary.rejects_known} of the rejects were already in the database "
                  "(from an earlier replay) and were not stored again")
    out.print(f"  see them with: hemostream query rejected --db {summary.db_url}"
              if summary.rejected_total else
              f"  see them with: hemostream query derived --db {summary.db_url}")
    return 0


def cmd_query(args) -> int:
    from .. import query
    from ..store import open_engine

    if args.db and args.config is None:     # the built-in defaults would only give store.url
        url = args.db
    else:
        from ..config import load_for_command

        cfg = load_for_command(args.config)     # checked even when --db overrides it
        url = args.db or cfg.store.url
    if url.startswith("sqlite:///") and not Path(url[len("sqlite:///"):]).exists():
        err.print(f"[red]error:[/] database file {url[len('sqlite:///'):]!r} does not exist")
        return 1
    try:
        since = query.parse_since(args.since) if args.since else None
    except ValueError as e:
        err.print(f"[red]error:[/] {e}")
        return 2
    try:
        engine = open_engine(url, create=False)
        quality = None
        if args.quality:
            quality = [q.strip() for q in args.quality.split(",") if q.strip()]
            bad = [q for q in quality if q not in QUALITIES]
            if bad or args.kind not in ("observations", "derived"):
                err.print(f"[red]error:[/] --quality: " + (
                    f"unknown {', '.join(map(repr, bad))}; one or more (comma-separated) of "
                    f"{', '.join(QUALITIES)}" if bad else
                    "applies to observations and derived values only"), highlight=False)
                return 2
        n = query.output(engine, args.kind, args.bed, args.param, since, args.limit, quality,
                         args.format)
    except BrokenPipeError:
        return 0
    except Exception as e:
        from ..store import StoreError      # the writer's; imported only when something failed

        if not isinstance(e, StoreError):
            raise
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    if args.format == "table":
        err.print(f"{n} row(s)")
    # stderr: jsonl and csv stay data (plain text, as the console printed it: no markup)
    print(f"CAUTION: {CAUTION}", file=sys.stderr)
    return 0


def broker_problems(data: dict, cfg: Config | None) -> list[str]:
    """The broker settings as ``run`` checks them: URL (scheme, host, numeric port), then
    the password source and TLS files."""
    from ..live.mqtt import BrokerSettingsError, MqttTransport, parse_broker_url

    broker = data.get("broker") if isinstance(data.get("broker"), dict) else {}
    if isinstance(broker.get("url"), str):
        try:
            parse_broker_url(broker["url"])
        except BrokerSettingsError as e:
            return [f"broker.url: {e}"]
    if cfg is not None:
        try:
            MqttTransport(cfg.broker)
        except BrokerSettingsError as e:
            return [f"broker: {e}"]
    return []


def cmd_check_config(args) -> int:
    from ..config import check_config_file

    bad = 0
    for f in args.files:
        problems = check_config_file(f, broker_problems)
        if problems:
            bad += 1
            print("\n".join(f"{f}: {p}" for p in problems))
        else:
            print(f"{f}: ok")
    return 1 if bad else 0


# --------------------------------------------------------------------------- run

def cmd_run(args) -> int:
    import asyncio

    from ..config import with_overrides
    from ..intake.hl7.mllp import Hl7ServiceIntake
    from ..live.health import status_payload
    from ..live.mqtt import BrokerSettingsError, MqttTransport
    from ..live.service import Service, status_topic
    from .workers import run_workers

    cfg = with_overrides(live_config(args.config), args.broker, args.db)
    setup_logging(args.log_level)
    log.info("%s", CAUTION)
    if cfg.workers.enabled:
        return run_workers(cfg, args.hl7_listen)
    offline = status_payload(cfg.instance, "offline", None, reason="connection lost")
    try:
        transport = MqttTransport(cfg.broker, will=(status_topic(cfg), offline))
    except BrokerSettingsError as e:
        log.error("%s", e)
        return 2
    log.info("connecting to the broker at %s as client %r (QoS 1, persistent session, "
             "acknowledged after storing); Ctrl-C or SIGTERM stops the service",
             transport.address, cfg.broker.client_id)
    svc = Service(cfg, transport)
    listen = args.hl7_listen or cfg.intake.hl7.listen
    if listen:
        try:
            svc.intakes.append(Hl7ServiceIntake(svc.submit_external, cfg.intake.hl7, listen))
        except ValueError as e:
            log.error("--hl7-listen / intake.hl7.listen: %s", e)
            return 2

    async def main() -> int:
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.add_signal_handler(sig, svc.stop)
        return await svc.run()

    return asyncio.run(main())


# --------------------------------------------------------------------------- ack

def cmd_ack(args) -> int:
    import asyncio

    from pydantic import ValidationError

    from ..config import with_overrides
    from ..core.wire import ID_RE, command_body, encode, topic
    from ..live.mqtt import BrokerSettingsError, MqttTransport
    from ..live.transport import TransportError

    cfg = with_overrides(live_config(args.config), args.broker)
    unit, _, bed = args.bed.rpartition("/")
    if not unit:
        if len(cfg.units) == 1:
            unit = cfg.units[0].id
        else:
            print("error: --bed needs UNIT/BED (the configuration does not name exactly one "
                  "unit)", file=sys.stderr)
            return 2
    if not (ID_RE.match(unit) and ID_RE.match(bed)):
        print(f"error: --bed {args.bed!r}: unit and bed must be 1-32 characters of "
              "A-Z a-z 0-9 - _", file=sys.stderr)
        return 2
    action = "pause_audio" if args.pause_audio else "acknowledge"
    try:
        body = command_body(action, args.alarm, args.by, time.time())
    except ValidationError as e:
        print(f"error: {e.errors(include_url=False)[0]['loc'][0]}: "
              f"{e.errors(include_url=False)[0]['msg']}", file=sys.stderr)
        return 2
    cmd_topic = topic(unit, bed, "cmd")
    client_id = f"hemostream-ack-{os.getpid()}"
    try:
        t = MqttTransport(cfg.broker.model_copy(update={"client_id": client_id}),
                          persistent=False)
    except BrokerSettingsError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2

    alarm_topic = topic(unit, bed, "alarm")

    async def send() -> str | None:
        """Publish the command and wait for the service's word on it (None: no word)."""
        await t.connect()
        try:
            await t.subscribe([alarm_topic], 1)       # before sending: the answer may be fast
            await t.publish_wait(cmd_topic, encode(body), 1, False, timeout=10)
            deadline = time.monotonic() + args.wait

            async def answer() -> str | None:
                async for m in t.messages():
                    try:
                        c = json.loads(m.payload).get("command")
                    except (ValueError, AttributeError):
                        continue
                    if (isinstance(c, dict) and c.get("alarm") == args.alarm
                            and c.get("by") == args.by and c.get("action") == action
                            and c.get("time") == body["time"]):
                        return str(c.get("result"))
                return None
            try:
                return await asyncio.wait_for(answer(), max(0.0, deadline - time.monotonic()))
            except asyncio.TimeoutError:
                return None
        finally:
            await t.disconnect()

    try:
        result = asyncio.run(send())
    except TransportError as e:
        print(f"error: {e}", file=sys.stderr)
        return 1
    where = f"{action} of {args.alarm!r} on {unit}/{bed} by {args.by}"
    if result is None:
        print(f"error: no hemostream service applied or refused the {where} within "
              f"{args.wait:g} s (is `hemostream run` serving unit {unit}? was the command "
              "allowed by the broker's ACL?); the alarm's state is unchanged as far as is "
              "known", file=sys.stderr)
        return 1
    if result != "applied":
        print(f"error: {where}: {result}", file=sys.stderr)
        return 1
    print(f"{where}: applied, stored for audit; the new alarm state is on {alarm_topic}")
    return 0


# --------------------------------------------------------------------------- demo

def cmd_demo(args) -> int:
    import asyncio

    from ..config import with_overrides
    from ..live.mqtt import BrokerSettingsError, parse_broker_url
    from .demo import demo_lines, run_demo

    cfg = with_overrides(live_config(args.config))
    db = args.db or "sqlite:///hemostream-demo.db"
    setup_logging("DEBUG" if args.verbose else "WARNING")
    if db.startswith("sqlite:///"):
        Path(db[len("sqlite:///"):]).parent.mkdir(parents=True, exist_ok=True)
    dashboard = not args.plain and sys.stdout.isatty() and sys.stdin.isatty()
    if args.broker:
        try:
            parse_broker_url(args.broker)
        except BrokerSettingsError as e:
            print(f"error: --broker: {e}", file=sys.stderr)
            return 2
    if args.scenario:
        try:
            demo_lines(args.scenario, 1.0, args.seed)
        except ValueError as e:
            print(f"error: --scenario {args.scenario!r}: {e}", file=sys.stderr)
            return 2
    result = asyncio.run(run_demo(cfg, db, speed=args.speed, duration_s=args.duration,
                                  scenario=args.scenario, seed=args.seed,
                                  broker_url=args.broker, every_s=args.every,
                                  dashboard=dashboard, operator=args.operator))
    if result.get("fatal"):
        print(f"error: {result['fatal']}", file=sys.stderr)
    return result["exit"]


# --------------------------------------------------------------------------- watch

def cmd_watch(args) -> int:
    from ..config import load_for_command, with_overrides
    from ..core.wire import ID_RE
    from ..live.mqtt import BrokerSettingsError
    from .watch import run_watch

    cfg = with_overrides(load_for_command(args.config), broker=args.broker)
    if not ID_RE.match(args.unit):
        print(f"error: --unit {args.unit!r}: 1-32 characters of A-Z a-z 0-9 - _",
              file=sys.stderr)
        return 2
    if args.once is None and not sys.stdout.isatty():
        print("error: the live dashboard needs a terminal; use --once SECONDS for text",
              file=sys.stderr)
        return 2
    try:
        w, h = (int(x) for x in args.size.lower().split("x"))
    except ValueError:
        print(f"error: --size {args.size!r}: expected WIDTHxHEIGHT, e.g. 120x40",
              file=sys.stderr)
        return 2
    try:
        return run_watch(cfg, args.unit, args.operator, args.once, (w, h))
    except BrokerSettingsError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2


# --------------------------------------------------------------------------- simulate

def publish_lines(lines, url: str, speed: float | None, give_up_s: float = 120.0) -> int:
    """``simulate --publish``: stream recording lines to a broker at QoS 1 (the live shell);
    counts what the broker acknowledged and says what was not delivered."""
    from ..live.mqtt import BrokerSettingsError, parse_broker_url
    from ..live.publish import PublishError, publish_until_stopped
    from ..live.transport import TransportError

    try:
        parse_broker_url(url)
    except BrokerSettingsError as e:
        err.print(f"[red]error:[/] --publish: {e}", highlight=False)
        return 2
    try:
        s = publish_until_stopped(lines, url, speed, give_up_s=give_up_s,
                                  say=lambda text: err.print(text, highlight=False))
    except PublishError as e:
        err.print(f"[red]error:[/] {e}; gave up: {e.summary.words()}", highlight=False)
        return 1
    except TransportError as e:
        err.print(f"[red]error:[/] {e}", highlight=False)
        return 1
    if s.stopped:
        err.print(f"stopped publishing to {url}: {s.words()}", highlight=False)
        return 130
    err.print(f"published to {url}: {s.words()}", highlight=False)
    return 0


class _Hl7Commands:
    """The HL7 intake's command module (``simulate --format hl7``), imported when used."""

    def __getattr__(self, name: str) -> Any:
        from ..intake.hl7 import cli as hl7_cli

        return getattr(hl7_cli, name)


# --------------------------------------------------------------------------- parsers

def add_store_parsers(sub) -> None:
    """``replay``, ``query``, ``check-config``."""
    r = sub.add_parser("replay", help="push a recording through the pipeline into a database",
                       description="Replay a recording (JSON Lines, one MQTT message per line) "
                       "through the processing core and store the results. Bad lines become "
                       "rejects with a reason; the exit status is 0 unless the file or the "
                       "database cannot be used.", epilog=CAUTION)
    r.add_argument("recording", help="recording file (.jsonl)")
    r.add_argument("--config", metavar="FILE", help="TOML configuration (default: built-in "
                   "defaults, see configs/default.toml)")
    r.add_argument("--db", metavar="URL", help="database URL, e.g. sqlite:///ward.db or "
                   "postgresql+psycopg://127.0.0.1/test (default: the config's store.url)")
    r.add_argument("--speed", type=positive_float, metavar="N", help="pace the replay at N x real "
                   "time (default: as fast as possible)")
    r.add_argument("--json", action="store_true", help="print the summary as JSON")
    r.add_argument("--quiet", action="store_true", help="no progress bar")
    r.set_defaults(func=cmd_replay)

    q = sub.add_parser("query", help="list stored rows", description="List stored rows, "
                       "oldest first. Times are RFC 3339 UTC; values are in canonical units. "
                       "The table shows the main columns; jsonl and csv carry every field "
                       "(provenance of derived values, alarm details, rejected bytes).")
    q.add_argument("kind", choices=KINDS)
    q.add_argument("--db", metavar="URL", help="database URL (default: the config's store.url)")
    q.add_argument("--config", metavar="FILE", help="TOML configuration")
    q.add_argument("--bed", metavar="BED", help="bed id, or UNIT/BED")
    q.add_argument("--param", metavar="P", help="parameter (or rule id for alarms)")
    q.add_argument("--since", metavar="TIME", help="RFC 3339 time, e.g. 2026-12-01T08:00:00Z")
    q.add_argument("--limit", type=non_negative_int, metavar="N", help="at most N rows")
    q.add_argument("--quality", metavar="Q[,Q]", help="observations and derived values of "
                   "these qualities only: ok, questionable, artifact, calibrating, test, "
                   "invalid (e.g. --quality ok)")
    q.add_argument("--format", choices=("table", "jsonl", "csv"), default="table")
    q.set_defaults(func=cmd_query)

    c = sub.add_parser("check-config", help="validate configuration files",
                       description="Report every problem in the given TOML configuration "
                       "files with its file, key and what was expected.")
    c.add_argument("files", nargs="+", metavar="FILE")
    c.set_defaults(func=cmd_check_config)


def add_live_parsers(sub) -> None:
    """``run``, ``ack``, ``demo``."""
    r = sub.add_parser(
        "run", help="the live service: subscribe to a broker, store, derive, alarm, publish",
        description="Subscribe at QoS 1 with a persistent session to the obs, admit, note and "
        "cmd topics of the configured units; acknowledge each message to the broker only "
        "after it is stored; publish derived values, alarm state and events, and health. "
        "Stops cleanly on Ctrl-C or SIGTERM. The broker password comes from the environment "
        "variable or file named in the configuration, never from the command line.",
        epilog=CAUTION)
    r.add_argument("--config", metavar="FILE", help="TOML configuration (default: the shipped "
                   "configs/default.toml: every unit, default rules and limits)")
    r.add_argument("--broker", metavar="URL", help="mqtt://host:port or mqtts://host:port "
                   "(overrides broker.url; a user name may go before the host, a password "
                   "never)")
    r.add_argument("--db", metavar="URL", help="database URL (overrides store.url)")
    r.add_argument("--hl7-listen", metavar="HOST:PORT",
                   help="also accept HL7 v2 (IHE PCD-01 ORU^R01) over MLLP here, acknowledged "
                   "after storing (overrides intake.hl7.listen; see docs/hl7.md)")
    r.add_argument("--log-level", default="info",
                   choices=("debug", "info", "warning", "error"))
    r.set_defaults(func=cmd_run)

    a = sub.add_parser("ack", help="acknowledge (or pause the audio of) an alarm over MQTT",
                       description="Publish one command on hemo/<unit>/<bed>/cmd at QoS 1; "
                       "hemostream stores it for audit with who sent it and what became of "
                       "it.", epilog=CAUTION)
    a.add_argument("--bed", required=True, metavar="UNIT/BED",
                   help="the bed, e.g. SDU4/bed-02 (BED alone when the config has one unit)")
    a.add_argument("--alarm", required=True, metavar="ID",
                   help="alarm id as published on the alarm topic, or a rule id")
    a.add_argument("--by", required=True, metavar="NAME", help="who acknowledges")
    a.add_argument("--pause-audio", action="store_true",
                   help="pause the alarm's audio instead of acknowledging it")
    a.add_argument("--wait", type=float, default=10.0, metavar="SECONDS",
                   help="how long to wait for the service to apply or refuse it (default 10); "
                   "the exit status is 0 only when it was applied")
    a.add_argument("--broker", metavar="URL", help="broker URL (overrides broker.url)")
    a.add_argument("--config", metavar="FILE",
                   help="configuration with the broker section (credentials, TLS files)")
    a.set_defaults(func=cmd_ack)

    d = sub.add_parser("demo", help="a simulated ward through the live pipeline, no broker "
                       "needed", description="Stream a simulated ward through the same "
                       "pipeline as `run` (an in-process broker by default), store it in a "
                       "SQLite file and show a live summary. Ctrl-C ends it cleanly.",
                       epilog=CAUTION)
    d.add_argument("--db", metavar="URL",
                   help="database URL (default: sqlite:///hemostream-demo.db)")
    d.add_argument("--broker", metavar="URL", help="run the demo through this real broker")
    d.add_argument("--config", metavar="FILE", help="TOML configuration (default: shipped)")
    d.add_argument("--speed", type=positive_float, default=10.0, metavar="N",
                   help="N x real time (default 10; 1 for real time)")
    d.add_argument("--duration", type=duration, metavar="D",
                   help="stop after this much of the scenario, e.g. 600, 90s, 10m, 1h30m "
                   "(default: all of it)")
    d.add_argument("--scenario", metavar="NAME", help="simulator scenario (default: the "
                   "demo ward)")
    d.add_argument("--seed", type=int, default=0)
    d.add_argument("--every", type=positive_float, default=2.0, metavar="SECONDS",
                   help="how often the summary is printed (wall clock)")
    d.add_argument("--plain", action="store_true", help="print the compact summary even "
                   "on a terminal (instead of the unit dashboard)")
    d.add_argument("--operator", metavar="NAME", help="name sent with acknowledge / pause "
                   "audio from the dashboard (stored for audit)")
    d.add_argument("-v", "--verbose", action="store_true", help="log the pipeline too")
    d.set_defaults(func=cmd_demo)


def add_watch_parser(sub) -> None:
    """``watch``."""
    w = sub.add_parser(
        "watch", help="show a unit's live dashboard from the broker (read-only)",
        description="The unit dashboard on any machine: subscribes to the service's alarm "
                    "and derived topics of one unit (subscribe rights are enough). The keys "
                    "a and p acknowledge or pause the audio of the selected alarm by "
                    "publishing a cmd message, as 'hemostream ack' does.", epilog=CAUTION)
    w.add_argument("--broker", metavar="URL", help="mqtt://host:port or mqtts://host:port "
                   "(default: the config's broker.url)")
    w.add_argument("--unit", required=True, metavar="U", help="unit id, e.g. SDU4")
    w.add_argument("--config", metavar="FILE", help="TOML configuration (broker security "
                   "settings: username, password_env/password_file, ca_file ...)")
    w.add_argument("--operator", metavar="NAME", help="who acknowledges (recorded for "
                   "audit); without it the acknowledge keys are off")
    w.add_argument("--once", type=float, metavar="SECONDS", help="collect for SECONDS, print "
                   "one screen as text and exit (for scripts and checks)")
    w.add_argument("--size", default="120x40", metavar="WxH",
                   help="screen size for --once (default 120x40)")
    w.set_defaults(func=cmd_watch)


def build_parser() -> argparse.ArgumentParser:
    p = argparse.ArgumentParser(
        prog="hemostream",
        description="Hemodynamic monitoring stream processor: checks and stores bedside "
                    "vitals messages (wire format v1), derives MAP, CI, SVR, shock index and "
                    "more, and keeps every observation and rejected message for audit.",
        epilog=CAUTION)
    sub = p.add_subparsers(dest="command", metavar="COMMAND", required=True)
    add_store_parsers(sub)
    add_live_parsers(sub)
    add_watch_parser(sub)
    add_review_parsers(sub)
    add_db_parser(sub)
    add_status_parser(sub)
    if add_simulate_parser is not None:
        add_simulate_parser(sub, publisher=publish_lines, hl7=_Hl7Commands())
        add_validate_parser(sub)
    return p


# --------------------------------------------------------------------------- validate

_cohort_size = whole_number(1, what="a whole number of patients")


def add_validate_parser(sub) -> None:
    v = sub.add_parser(
        "validate", help="the rules on a cohort of simulated patients: sensitivity, delay, "
        "false alarms",
        description="Simulate N patients per clinical scenario (seeded), replay them through "
        "a configuration as `replay` does, and report per rule: sensitivity where the "
        "scenario says it must fire, detection delay after the marked onset (median, 90th "
        "percentile, maximum), false alarms per bed-day where it must not fire, and alarm "
        "burden per bed-day. Simulated patients, not a clinical validation; a full cohort "
        "takes minutes.", epilog=CAUTION)
    v.add_argument("--config", metavar="FILE", help="TOML configuration to judge (default: "
                   "the shipped rules)")
    v.add_argument("--per-scenario", type=_cohort_size, default=30, metavar="N",
                   help="patients per scenario (default 30)")
    v.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0)")
    v.add_argument("--scenarios", metavar="LIST", default=",".join(SCENARIOS),
                   help=f"comma-separated scenario ids (default: {','.join(SCENARIOS)})")
    v.add_argument("--json", metavar="FILE", help="also write the figures as JSON")
    v.add_argument("--html", metavar="FILE", help="also write an HTML page with a delay "
                   "distribution per rule")
    v.set_defaults(func=cmd_validate)


def cmd_validate(args) -> int:
    from rich.console import Console
    from rich.progress import BarColumn, Progress, TextColumn
    from rich.table import Table
    from simulators.scenario import ScenarioError, load_scenario

    from ..config import load_for_command
    from . import validate as cohort

    names = [s.strip() for s in args.scenarios.split(",") if s.strip()]
    for n in names:
        try:
            load_scenario(n)
        except ScenarioError as e:
            err.print(f"[red]error:[/] --scenarios: {e}", highlight=False)
            return 2
    cfg = load_for_command(args.config)
    with Progress(TextColumn("{task.description}"), BarColumn(), console=err.real,
                  disable=not err.is_terminal, transient=True) as prog:
        task = prog.add_task("simulating", total=len(names))

        def step(name: str, done: int, total: int) -> None:
            prog.update(task, completed=done, description=f"simulating and replaying {name}")
        result = cohort.run_cohort(cfg, args.per_scenario, args.seed, names, progress=step)
    out = Console(soft_wrap=True, width=None if Console().is_terminal else 132)
    t = Table(title=f"rules on {args.per_scenario} simulated patients per scenario "
              f"({result['bed_days']:g} bed-days, seed {args.seed})")
    for h in cohort.HEADERS:
        t.add_column(h, justify="left" if h == "rule" else "right", no_wrap=h == "rule")
    for row in cohort.table_rows(result):
        t.add_row(*row)
    out.print(t)
    out.print(f"{CAUTION} Figures from simulated patients (docs/simulators.md), not a "
              "clinical validation.", highlight=False)
    try:
        if args.json:
            cohort.dump_json(result, args.json)
        if args.html:
            cohort.write_html(result, args.html, CAUTION)
    except OSError as e:
        err.print(f"[red]error:[/] cannot write the output: {e.strerror or e}")
        return 1
    return 0


def main(argv: list[str] | None = None) -> int:
    args = build_parser().parse_args(argv)
    return args.func(args) or 0


if __name__ == "__main__":
    sys.exit(main())
