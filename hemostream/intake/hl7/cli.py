"""Command-line pieces of the HL7 intake, for the ``hemostream`` commands to call:

- :func:`looks_like_hl7` / :func:`replay_command`: ``hemostream replay FILE.hl7``
- :func:`publisher`: ``hemostream simulate --publish-hl7 HOST:PORT`` (a ``Publisher``)
- :func:`write_command`: ``hemostream simulate --format hl7 --out FILE``
"""

from __future__ import annotations

import asyncio
import json
import sys
import time
from datetime import datetime
from pathlib import Path
from typing import Any, Iterable, Iterator

from ...config import ConfigError
from ...store import StoreError
from .config import Hl7Config, load_config, split_host_port
from .files import pcd01_stream, replay_hl7_file, write_hl7_file
from .mllp import send_messages


def looks_like_hl7(path: str | Path) -> bool:
    """A ``.hl7`` file, or one whose first bytes are an MSH segment (framed or not)."""
    p = Path(path)
    if p.suffix.lower() == ".hl7":
        return True
    try:
        with open(p, "rb") as f:
            head = f.read(8).lstrip(b"\x0b\r\n ")
    except OSError:
        return False
    return head.startswith((b"MSH", b"FHS", b"BHS"))


def replay_command(path: str | Path, db_url: str | None, config_path: str | None,
                   as_json: bool = False, out=None) -> int:
    """``hemostream replay FILE.hl7``: 0 done, 1 store or file error, 2 bad configuration."""
    out = out or sys.stdout
    try:
        cfg, hcfg = load_config(config_path)
    except (ConfigError, ValueError) as e:
        print(f"error: {e}", file=sys.stderr)
        return 2
    if not hcfg.locations and not hcfg.locations_from_components:
        # a recording with no location map configured: read PV1-3 as unit ^ room ^ bed (as
        # `simulate --format hl7` writes it) rather than reject every message
        hcfg = hcfg.model_copy(update={"locations_from_components": True})
        print("note: no [intake.hl7] locations configured; reading PV1-3 as "
              "<unit>^<room>^<bed>", file=sys.stderr)
    try:
        s = replay_hl7_file(path, db_url or cfg.store.url, cfg, hcfg)
    except StoreError as e:
        print(f"error: {e}", file=sys.stderr)
        return 1
    except OSError as e:
        print(f"error: cannot read {str(path)!r}: {e.strerror or e}", file=sys.stderr)
        return 1
    if as_json:
        print(json.dumps(s.__dict__, indent=2), file=out)
        return 0
    rej = sum(s.rejected.values())
    print(f"replayed {s.path} (HL7 v2) into {s.db_url}", file=out)
    print(f"  messages {s.messages}   answers AA {s.answers['AA']}  AE {s.answers['AE']}  "
          f"AR {s.answers['AR']}   observations {s.observations}   duplicates dropped "
          f"{s.duplicates}", file=out)
    print(f"  rejected {rej}" + "".join(f"\n    {k}: {v}" for k, v in s.rejected.items()),
          file=out)
    print(f"  {s.seconds:.2f} s", file=out)
    return 0


def _paced(lines: Iterable[dict[str, Any]], speed: float) -> Iterator[dict[str, Any]]:
    """Lines at ``speed`` x real time by their ``rx`` (arrival) times."""
    first: float | None = None
    wall0 = 0.0
    for line in lines:
        rx = datetime.fromisoformat(line["rx"].replace("Z", "+00:00")).timestamp()
        if first is None:
            first, wall0 = rx, time.monotonic()
        delay = (rx - first) / speed - (time.monotonic() - wall0)
        if delay > 0:
            time.sleep(delay)
        yield line


def publisher(lines: Iterator[dict], target: str, speed: float,
              hl7_config: Hl7Config | None = None) -> int:
    """Send the ward stream as PCD-01 over MLLP to ``HOST:PORT``, each message waiting for its
    ACK (resent when none comes). Exit status 0 when every message was answered AA."""
    host, port = split_host_port(target)
    hcfg = hl7_config or Hl7Config(locations_from_components=True)
    msgs = pcd01_stream(_paced(lines, speed) if speed else lines, hcfg)
    try:
        counts = asyncio.run(send_messages(host, port, msgs))
    except ConnectionError as e:
        print(f"error: {e}", file=sys.stderr)
        return 1
    print("sent: " + ", ".join(f"{k} {v}" for k, v in sorted(counts.items())),
          file=sys.stderr)
    return 0 if set(counts) <= {"AA"} else 1


def write_command(lines: Iterable[dict[str, Any]], out: str,
                  hl7_config: Hl7Config | None = None) -> int:
    """``simulate --format hl7 --out FILE`` ('-' = standard output): the count written."""
    if out == "-":
        return write_hl7_file(lines, sys.stdout, hl7_config)
    return write_hl7_file(lines, out, hl7_config)
