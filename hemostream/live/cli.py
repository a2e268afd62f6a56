"""The ``run``, ``ack`` and ``demo`` subcommands (registered by :mod:`hemostream.cli`)."""

from __future__ import annotations

import asyncio
import json
import logging
import os
import signal
import sys
from datetime import datetime, timezone
from pathlib import Path

from .. import CAUTION

log = logging.getLogger("hemostream.live")


def _config(path: str | None):
    """The named configuration, or the shipped default (configs/default.toml)."""
    from ..config import load_for_command
    return load_for_command(path, shipped_default=True)


def _with_overrides(cfg, broker: str | None = None, db: str | None = None):
    from ..config import with_overrides
    return with_overrides(cfg, broker, db)


def _logging(level: str) -> None:
    logging.basicConfig(level=getattr(logging, level.upper()), stream=sys.stderr,
                        format="%(asctime)s %(levelname)s %(name)s: %(message)s")
    from ..core.redact import RedactingFilter
    for h in logging.getLogger().handlers:      # no password in any line, whoever logs it
        h.addFilter(RedactingFilter())
    # paho logs packet summaries (topics, sizes) at debug; never payloads
    logging.getLogger("hemostream.live.paho").setLevel(
        logging.DEBUG if level.upper() == "DEBUG" else logging.WARNING)


# --------------------------------------------------------------------------- run

def cmd_run(args) -> int:
    from .health import status_payload
    from .mqtt import BrokerSettingsError, MqttTransport
    from .service import Service, status_topic

    cfg = _with_overrides(_config(args.config), args.broker, args.db)
    _logging(args.log_level)
    log.info("%s", CAUTION)
    offline = status_payload(cfg.instance, "offline", None, reason="connection lost")
    try:
        transport = MqttTransport(cfg.broker, will=(status_topic(cfg), offline))
    except BrokerSettingsError as e:
        log.error("%s", e)
        return 2
    log.info("broker %s as client %r (QoS 1, persistent session, acknowledged after "
             "storing)", transport.address, cfg.broker.client_id)
    svc = Service(cfg, transport)

    async def main() -> int:
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.add_signal_handler(sig, svc.stop)
        return await svc.run()

    return asyncio.run(main())


# --------------------------------------------------------------------------- ack

def cmd_ack(args) -> int:
    from ..core.wire import ID_RE, format_time
    from .mqtt import BrokerSettingsError, MqttTransport
    from .transport import TransportError

    cfg = _with_overrides(_config(args.config), args.broker)
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
    body = {"v": 1, "time": format_time(datetime.now(timezone.utc)), "action": action,
            "alarm": args.alarm, "by": args.by}
    from ..core.wire import CommandMessage
    from pydantic import ValidationError
    try:
        CommandMessage.model_validate(body)
    except ValidationError as e:
        print(f"error: {e.errors(include_url=False)[0]['loc'][0]}: "
              f"{e.errors(include_url=False)[0]['msg']}", file=sys.stderr)
        return 2
    topic = f"hemo/{unit}/{bed}/cmd"
    client_id = f"hemostream-ack-{os.getpid()}"
    try:
        t = MqttTransport(cfg.broker.model_copy(update={"client_id": client_id}),
                          persistent=False)
    except BrokerSettingsError as e:
        print(f"error: {e}", file=sys.stderr)
        return 2

    async def send() -> None:
        await t.connect()
        try:
            await t.publish_wait(topic, json.dumps(body, separators=(",", ":")).encode(), 1,
                                 False, timeout=10)
        finally:
            await t.disconnect()

    try:
        asyncio.run(send())
    except TransportError as e:
        print(f"error: {e}", file=sys.stderr)
        return 1
    print(f"sent {action} of {args.alarm!r} on {unit}/{bed} by {args.by} to {t.address}; "
          "hemostream stores it for audit and publishes the new alarm state on "
          f"hemo/{unit}/{bed}/alarm")
    return 0


# --------------------------------------------------------------------------- demo

def cmd_demo(args) -> int:
    from .demo import run_demo

    cfg = _with_overrides(_config(args.config))
    db = args.db or "sqlite:///hemostream-demo.db"
    _logging("DEBUG" if args.verbose else "WARNING")
    if db.startswith("sqlite:///"):
        Path(db[len("sqlite:///"):]).parent.mkdir(parents=True, exist_ok=True)
    dashboard = not args.plain and sys.stdout.isatty() and sys.stdin.isatty()
    result = asyncio.run(run_demo(cfg, db, speed=args.speed, duration_s=args.duration,
                                  scenario=args.scenario, seed=args.seed,
                                  broker_url=args.broker, every_s=args.every,
                                  dashboard=dashboard, operator=args.operator))
    if result.get("fatal"):
        print(f"error: {result['fatal']}", file=sys.stderr)
    return result["exit"]


# --------------------------------------------------------------------------- parsers

def add_parsers(sub) -> None:
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
    d.add_argument("--speed", type=float, default=10.0, metavar="N",
                   help="N x real time (default 10; 1 for real time)")
    d.add_argument("--duration", type=float, metavar="SECONDS",
                   help="stop after this much of the scenario (default: all of it)")
    d.add_argument("--scenario", metavar="NAME", help="simulator scenario (default: the "
                   "demo ward)")
    d.add_argument("--seed", type=int, default=0)
    d.add_argument("--every", type=float, default=2.0, metavar="SECONDS",
                   help="how often the summary is printed (wall clock)")
    d.add_argument("--plain", action="store_true", help="print the compact summary even "
                   "on a terminal (instead of the unit dashboard)")
    d.add_argument("--operator", metavar="NAME", help="name sent with acknowledge / pause "
                   "audio from the dashboard (stored for audit)")
    d.add_argument("-v", "--verbose", action="store_true", help="log the pipeline too")
    d.set_defaults(func=cmd_demo)
