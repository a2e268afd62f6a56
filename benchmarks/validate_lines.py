"""The replay figure's baseline: bare pydantic validation of a recording's lines.

    python -m benchmarks.validate_lines RECORDING

Each line is validated from its raw bytes in one ``model_validate_json`` call against a line
model whose payload is the wire format's own model (``ObsMessage`` or ``AdmitMessage`` from
hemostream.core.wire: strict numbers, RFC 3339 times, the same constraints the pipeline
enforces). Nothing else happens: no topic parsing, no units, no storage. The harness times
this whole process (interpreter start-up and imports included) exactly as it times
``hemostream replay``, so the two rates compare like for like.
"""

from __future__ import annotations

import sys
from typing import Any

from pydantic import BaseModel, ConfigDict, StrictStr

from hemostream.core.wire import AdmitMessage, ObsMessage, Time


class ObsLine(BaseModel):
    model_config = ConfigDict(extra="ignore")
    rx: Time
    topic: StrictStr
    payload: ObsMessage


class OtherLine(BaseModel):
    model_config = ConfigDict(extra="ignore")
    rx: Time
    topic: StrictStr
    payload: AdmitMessage | dict[str, Any] | StrictStr


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    n = 0
    obs = ObsLine.model_validate_json
    other = OtherLine.model_validate_json
    with open(args[0], "rb") as f:
        for line in f:
            if not line.strip():
                continue
            # the topic is the second key of every recording line written by make_load.py
            if b'/obs"' in line[:120]:
                obs(line)
            else:
                other(line)
            n += 1
    print(n)
    return 0


if __name__ == "__main__":
    sys.exit(main())
