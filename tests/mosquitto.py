"""A real Mosquitto broker for the live tests, with its own generated configuration.

One broker process listens on 127.0.0.1 only, on free ports, with four listeners:

    anon    anonymous MQTT over TCP (no password, no ACL)
    auth    username and password (password file) and an ACL
    tls     TLS with a CA made by the tests, plus username and password and the ACL
    mtls    TLS that requires a client certificate; its common name is the user name

Certificates are made with the ``openssl`` command (a test CA, a server certificate for
127.0.0.1/localhost and a client certificate for the user ``hemostream``); the password file
with ``mosquitto_passwd``, which the Debian ``mosquitto`` package ships. Persistence is on
(in the broker's own temporary directory), so a restart keeps sessions and queued messages.

Where the broker is missing the tests skip on a developer's machine, and FAIL under CI=true.
"""

from __future__ import annotations

import getpass
import os
import shutil
import signal
import socket
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest

MOSQUITTO = shutil.which("mosquitto") or "/usr/sbin/mosquitto"
MOSQUITTO_PASSWD = shutil.which("mosquitto_passwd") or "/usr/bin/mosquitto_passwd"
OPENSSL = shutil.which("openssl") or "/usr/bin/openssl"

#: user -> password (test-only secrets, generated configuration)
USERS = {
    "hemostream": "svc-pass-7Q2",
    "gw-sdu9-bed-01": "gw1-pass-K8d",
    "gw-sdu9-bed-02": "gw2-pass-M3x",
    "console-1": "console-pass-R5t",
}

#: the ACL of the ``auth``, ``tls`` and ``mtls`` listeners: gateways publish only their own
#: bed's input topics; hemostream reads every input and writes the outputs; a console sends
#: commands and reads the outputs
ACL = """\
user hemostream
topic read hemo/+/+/obs
topic read hemo/+/+/admit
topic read hemo/+/+/note
topic read hemo/+/+/cmd
topic write hemo/+/+/alarm
topic write hemo/+/+/derived
topic readwrite hemo/_svc/#

user gw-sdu9-bed-01
topic write hemo/SDU9/bed-01/obs
topic write hemo/SDU9/bed-01/admit
topic write hemo/SDU9/bed-01/note

user gw-sdu9-bed-02
topic write hemo/SDU9/bed-02/obs
topic write hemo/SDU9/bed-02/admit
topic write hemo/SDU9/bed-02/note

user console-1
topic write hemo/+/+/cmd
topic read hemo/+/+/alarm
topic read hemo/+/+/derived
topic read hemo/_svc/+/status
"""


def require_broker() -> None:
    """Skip (developer machine) or fail (CI=true) when the broker binaries are missing."""
    missing = [p for p in (MOSQUITTO, MOSQUITTO_PASSWD, OPENSSL) if not os.access(p, os.X_OK)]
    if not missing:
        return
    msg = (f"needs {', '.join(missing)} (Debian packages mosquitto and openssl); "
           "the live tests spawn a real broker")
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail(msg + " - CI must install them", pytrace=False)
    pytest.skip(msg)


def free_ports(n: int) -> list[int]:
    socks = []
    try:
        for _ in range(n):
            s = socket.socket()
            s.bind(("127.0.0.1", 0))
            socks.append(s)
        return [s.getsockname()[1] for s in socks]
    finally:
        for s in socks:
            s.close()


def _run(*cmd: str, cwd: Path) -> None:
    r = subprocess.run(cmd, cwd=cwd, capture_output=True, text=True, timeout=60)
    if r.returncode != 0:
        raise RuntimeError(f"{' '.join(cmd)} failed: {r.stderr.strip()}")


def make_certificates(d: Path) -> None:
    """A throw-away CA, a server certificate for 127.0.0.1 and a client certificate."""
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    _run(OPENSSL, "req", "-x509", *ec, "-keyout", "ca.key", "-out", "ca.crt", "-days", "2",
         "-subj", "/CN=hemostream test CA", "-addext", "basicConstraints=critical,CA:TRUE",
         "-addext", "keyUsage=critical,keyCertSign,cRLSign", cwd=d)
    for name, cn, ext in (("server", "localhost",
                           "subjectAltName=IP:127.0.0.1,DNS:localhost\n"
                           "extendedKeyUsage=serverAuth\n"),
                          ("client", "hemostream", "extendedKeyUsage=clientAuth\n")):
        (d / f"{name}.ext").write_text(ext)
        _run(OPENSSL, "req", *ec, "-keyout", f"{name}.key", "-out", f"{name}.csr",
             "-subj", f"/CN={cn}", cwd=d)
        _run(OPENSSL, "x509", "-req", "-in", f"{name}.csr", "-CA", "ca.crt", "-CAkey",
             "ca.key", "-CAcreateserial", "-out", f"{name}.crt", "-days", "2", "-extfile",
             f"{name}.ext", cwd=d)
    for f in d.glob("*.key"):
        f.chmod(0o600)


@dataclass
class Mosquitto:
    """One broker process; ``start``/``stop``/``restart``/``kill`` it from a test."""

    dir: Path
    ports: dict[str, int] = field(default_factory=dict)
    proc: subprocess.Popen | None = None
    max_packet_size: int = 2 * 1024 * 1024

    def __post_init__(self) -> None:
        self.dir.mkdir(parents=True, exist_ok=True)
        p = free_ports(4)
        self.ports = dict(zip(("anon", "auth", "tls", "mtls"), p))
        make_certificates(self.dir)
        pw = self.dir / "passwd"
        pw.write_text("")
        for user, password in USERS.items():
            _run(MOSQUITTO_PASSWD, "-b", str(pw), user, password, cwd=self.dir)
        pw.chmod(0o600)
        (self.dir / "acl").write_text(ACL)
        (self.dir / "data").mkdir(exist_ok=True)
        d = self.dir
        secured = f"allow_anonymous false\npassword_file {d}/passwd\nacl_file {d}/acl\n"
        tls = f"cafile {d}/ca.crt\ncertfile {d}/server.crt\nkeyfile {d}/server.key\n"
        (d / "mosquitto.conf").write_text(
            "# generated by tests/mosquitto.py for one test session\n"
            f"user {getpass.getuser()}\n"
            "per_listener_settings true\n"
            "persistence true\n"
            f"persistence_location {d}/data/\n"
            "autosave_interval 3600\n"
            # a persistent session must hold everything published while hemostream is down
            "max_queued_messages 200000\n"
            "max_inflight_messages 100\n"
            f"max_packet_size {self.max_packet_size}\n"
            f"log_dest file {d}/mosquitto.log\n"
            "log_type error\nlog_type warning\nlog_type notice\nlog_type information\n"
            "connection_messages true\n"
            f"\nlistener {self.ports['anon']} 127.0.0.1\nallow_anonymous true\n"
            f"\nlistener {self.ports['auth']} 127.0.0.1\n{secured}"
            f"\nlistener {self.ports['tls']} 127.0.0.1\n{secured}{tls}"
            "require_certificate false\n"
            f"\nlistener {self.ports['mtls']} 127.0.0.1\nallow_anonymous false\n"
            f"acl_file {d}/acl\n{tls}require_certificate true\nuse_identity_as_username true\n")

    # ------------------------------------------------------------------ URLs

    def url(self, listener: str = "anon", user: str | None = None) -> str:
        scheme = "mqtts" if listener in ("tls", "mtls") else "mqtt"
        who = f"{user}@" if user else ""
        return f"{scheme}://{who}127.0.0.1:{self.ports[listener]}"

    @property
    def ca(self) -> str:
        return str(self.dir / "ca.crt")

    def log(self) -> str:
        try:
            return (self.dir / "mosquitto.log").read_text(errors="replace")
        except OSError:
            return ""

    # ------------------------------------------------------------------ process

    def start(self, timeout: float = 15.0) -> "Mosquitto":
        assert self.proc is None or self.proc.poll() is not None, "already running"
        self.proc = subprocess.Popen([MOSQUITTO, "-c", str(self.dir / "mosquitto.conf")],
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        deadline = time.monotonic() + timeout
        pending = set(self.ports.values())
        while pending:
            if self.proc.poll() is not None:
                raise RuntimeError(f"mosquitto exited with {self.proc.returncode}: "
                                   f"{self.proc.stderr.read().decode(errors='replace')}\n"
                                   f"{self.log()[-2000:]}")
            for port in list(pending):
                try:
                    socket.create_connection(("127.0.0.1", port), timeout=0.5).close()
                    pending.discard(port)
                except OSError:
                    pass
            if pending:
                if time.monotonic() > deadline:
                    self.kill()
                    raise RuntimeError(f"mosquitto did not open ports {sorted(pending)}")
                time.sleep(0.05)
        return self

    def stop(self, timeout: float = 15.0) -> None:
        """Clean stop (SIGTERM): Mosquitto writes its persistence file on the way out."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGTERM)
            try:
                self.proc.wait(timeout)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait(5)
        if self.proc is not None and self.proc.stderr:
            self.proc.stderr.close()

    def restart(self) -> None:
        self.stop()
        self.start()

    def kill(self) -> None:
        if self.proc is not None and self.proc.poll() is None:
            self.proc.kill()
            self.proc.wait(5)
