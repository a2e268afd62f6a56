"""``hemostream run`` with ``[workers] enabled = true``: this process is one of several
workers sharing the configured units through PostgreSQL leases (docs/workers.md)."""

from __future__ import annotations

import asyncio
import logging
import signal

from ..core.config import Config
from ..live.health import status_payload
from ..live.mqtt import BrokerSettingsError, MqttTransport
from ..live.service import status_topic
from ..live.workers import Pool

log = logging.getLogger("hemostream.live")


def transport_for(unit_cfg: Config) -> MqttTransport:
    """One unit's MQTT transport: its own client id, persistent session and will."""
    offline = status_payload(unit_cfg.instance, "offline", None, reason="connection lost")
    return MqttTransport(unit_cfg.broker, will=(status_topic(unit_cfg), offline))


def run_workers(cfg: Config, hl7_listen: str | None = None) -> int:
    if hl7_listen or cfg.intake.hl7.listen:
        log.error("the HL7 listener runs in a single `hemostream run`, not in a worker "
                  "sharing units (docs/workers.md): run one for it without [workers]")
        return 2
    if not cfg.store.url.startswith("postgresql"):
        log.error("workers share units through PostgreSQL leases: store.url (or --db) must "
                  "be a postgresql+psycopg:// URL, not %s", cfg.store.url.split(":", 1)[0])
        return 2
    try:
        MqttTransport(cfg.broker)       # the broker settings, checked once before anything
        pool = Pool(cfg, transport_for)
    except (BrokerSettingsError, ValueError) as e:
        log.error("%s", e)
        return 2
    log.info("worker %s: broker %s, unit client ids %s-<unit> (QoS 1, persistent "
             "sessions, MQTT %s)", pool.name, cfg.broker.url, cfg.broker.client_id,
             cfg.broker.protocol)

    async def main() -> int:
        loop = asyncio.get_running_loop()
        for sig in (signal.SIGINT, signal.SIGTERM):
            loop.add_signal_handler(sig, pool.stop)
        return await pool.run()

    return asyncio.run(main())
