"""Test helper: a private Mosquitto broker on a free loopback port.

Never the broker that may already run on port 1883: every test gets its own
process, config, persistence directory and log, under a temporary folder.

* :class:`MosquittoBroker` writes a config (``listener PORT 127.0.0.1``,
  ``allow_anonymous true``, ``persistence true`` with its own
  ``persistence_location``, a ``max_queued_messages`` sized for the test,
  since Mosquitto's default of 1000 silently drops beyond it), starts
  ``mosquitto -c``, waits until the port accepts connections, and supports
  ``stop()``/``start()``/``restart()`` on the same port and store.
* :func:`make_tls_files` generates a throw-away CA, a server certificate for
  127.0.0.1/localhost, a client certificate, and a second, unrelated CA, with
  the ``openssl`` command line tool (the ``cryptography`` package is not
  installed in the project venv).
* :func:`make_password_file` writes a Mosquitto password file with
  ``mosquitto_passwd``.
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import threading
import time
from dataclasses import dataclass
from pathlib import Path

MOSQUITTO_CANDIDATES = ("mosquitto", "/usr/sbin/mosquitto", "/usr/local/sbin/mosquitto")


def mosquitto_binary() -> str | None:
    for name in MOSQUITTO_CANDIDATES:
        found = shutil.which(name) or (name if os.path.isabs(name) and os.access(name, os.X_OK) else None)
        if found:
            return found
    return None


def free_port() -> int:
    """A TCP port on 127.0.0.1 that nothing listens on right now (never 1883)."""
    while True:
        with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as sock:
            sock.bind(("127.0.0.1", 0))
            port = sock.getsockname()[1]
        if port != 1883:
            return port


@dataclass(frozen=True)
class TlsFiles:
    ca_file: Path
    server_cert: Path
    server_key: Path
    client_cert: Path
    client_key: Path
    other_ca_file: Path  # a CA that signed nothing the broker presents


def _openssl(*args: str, cwd: Path) -> None:
    subprocess.run(["openssl", *args], cwd=cwd, check=True, capture_output=True, timeout=60)


def make_tls_files(directory: Path) -> TlsFiles:
    """Generate a CA, server and client certificates (EC P-256) with the openssl CLI."""
    if shutil.which("openssl") is None:
        raise RuntimeError("the openssl command is needed to generate test certificates")
    directory.mkdir(parents=True, exist_ok=True)
    ec = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    for name in ("ca", "other-ca"):
        _openssl(
            "req", "-x509", *ec, "-keyout", f"{name}.key", "-out", f"{name}.pem", "-days", "2",
            "-subj", f"/CN=leadline test {name}",
            "-addext", "basicConstraints=critical,CA:TRUE",
            "-addext", "keyUsage=critical,keyCertSign,cRLSign",
            "-addext", "subjectKeyIdentifier=hash",
            cwd=directory,
        )
    (directory / "server.ext").write_text(
        "basicConstraints=critical,CA:FALSE\n"
        "keyUsage=critical,digitalSignature,keyAgreement\n"
        "extendedKeyUsage=serverAuth\n"
        "subjectAltName=IP:127.0.0.1,DNS:localhost\n"
        "authorityKeyIdentifier=keyid\n"
        "subjectKeyIdentifier=hash\n"
    )
    (directory / "client.ext").write_text(
        "basicConstraints=critical,CA:FALSE\n"
        "keyUsage=critical,digitalSignature,keyAgreement\n"
        "extendedKeyUsage=clientAuth\n"
        "authorityKeyIdentifier=keyid\n"
        "subjectKeyIdentifier=hash\n"
    )
    for name, subject in (("server", "/CN=127.0.0.1"), ("client", "/CN=leadline-test-client")):
        _openssl("req", *ec, "-keyout", f"{name}.key", "-out", f"{name}.csr", "-subj", subject, cwd=directory)
        _openssl(
            "x509", "-req", "-in", f"{name}.csr", "-CA", "ca.pem", "-CAkey", "ca.key", "-CAcreateserial",
            "-out", f"{name}.pem", "-days", "2", "-extfile", f"{name}.ext",
            cwd=directory,
        )
    for key in directory.glob("*.key"):
        key.chmod(0o600)
    return TlsFiles(
        ca_file=directory / "ca.pem",
        server_cert=directory / "server.pem",
        server_key=directory / "server.key",
        client_cert=directory / "client.pem",
        client_key=directory / "client.key",
        other_ca_file=directory / "other-ca.pem",
    )


def make_password_file(path: Path, username: str, password: str) -> Path:
    """A Mosquitto password file made with ``mosquitto_passwd -b -c``."""
    tool = shutil.which("mosquitto_passwd")
    if tool is None:
        raise RuntimeError("mosquitto_passwd is needed to make a password file")
    subprocess.run([tool, "-b", "-c", str(path), username, password], check=True, capture_output=True, timeout=30)
    path.chmod(0o600)
    return path


class MosquittoBroker:
    """One private Mosquitto process (see the module docstring).

    Parameters
    ----------
    workdir : Path
        Holds the config, the persistence directory and the log.
    tls : TlsFiles, optional
        Serve TLS with these files instead of plain MQTT.
    require_certificate : bool
        With TLS: clients must present a certificate signed by the CA.
    password_file : Path, optional
        Turns anonymous access off and checks usernames and passwords.
    max_queued_messages : int
        Queue per offline persistent client (Mosquitto's default is 1000).
    max_inflight_messages : int
        Unacknowledged QoS 1 messages per client (Mosquitto's default is 20).
    """

    def __init__(
        self,
        workdir: Path,
        *,
        tls: TlsFiles | None = None,
        require_certificate: bool = False,
        password_file: Path | None = None,
        max_queued_messages: int = 200_000,
        max_inflight_messages: int = 1000,
        persistence: bool = True,
    ):
        binary = mosquitto_binary()
        if binary is None:
            raise RuntimeError("no mosquitto binary found")
        self.binary = binary
        self.workdir = Path(workdir)
        self.workdir.mkdir(parents=True, exist_ok=True)
        self.port = free_port()
        self.tls = tls
        self.config_path = self.workdir / "mosquitto.conf"
        self.log_path = self.workdir / "mosquitto.log"
        self.store_dir = self.workdir / "store"
        self.store_dir.mkdir(exist_ok=True)
        lines = [
            f"listener {self.port} 127.0.0.1",
            f"allow_anonymous {'false' if password_file else 'true'}",
            f"persistence {'true' if persistence else 'false'}",
            f"persistence_location {self.store_dir}/",
            "persistence_file mosquitto.db",
            "autosave_interval 60",
            f"max_queued_messages {max_queued_messages}",
            f"max_inflight_messages {max_inflight_messages}",
            "max_keepalive 120",
            f"log_dest file {self.log_path}",
            "log_type error",
            "log_type warning",
            "log_type notice",
            "log_type information",
            "connection_messages true",
        ]
        if os.geteuid() == 0:
            lines.append("user root")  # otherwise it drops to 'mosquitto' and cannot write the store
        if password_file is not None:
            lines.append(f"password_file {password_file}")
        if tls is not None:
            lines += [
                f"cafile {tls.ca_file}",
                f"certfile {tls.server_cert}",
                f"keyfile {tls.server_key}",
                f"require_certificate {'true' if require_certificate else 'false'}",
            ]
        self.config_path.write_text("\n".join(lines) + "\n")
        self._process: subprocess.Popen[bytes] | None = None

    # -- lifecycle ------------------------------------------------------------------
    def start(self, timeout_s: float = 10.0) -> "MosquittoBroker":
        if self.running:
            return self
        self._process = subprocess.Popen(
            [self.binary, "-c", str(self.config_path)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
        )
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            if self._process.poll() is not None:
                err = self._process.stderr.read().decode(errors="replace") if self._process.stderr else ""
                raise RuntimeError(f"mosquitto exited with {self._process.returncode}: {err}\n{self.log_text()}")
            try:
                with socket.create_connection(("127.0.0.1", self.port), timeout=0.2):
                    return self
            except OSError:
                time.sleep(0.05)
        self.stop()
        raise RuntimeError(f"mosquitto did not listen on {self.port} within {timeout_s} s\n{self.log_text()}")

    def stop(self, timeout_s: float = 10.0) -> None:
        """SIGTERM (Mosquitto saves its store on the way out), then wait."""
        process = self._process
        if process is None:
            return
        if process.poll() is None:
            process.send_signal(signal.SIGTERM)
            try:
                process.wait(timeout=timeout_s)
            except subprocess.TimeoutExpired:
                process.kill()
                process.wait(timeout=timeout_s)
        if process.stderr:
            process.stderr.close()
        self._process = None

    def restart(self, down_s: float = 0.0) -> None:
        self.stop()
        if down_s:
            time.sleep(down_s)
        self.start()

    @property
    def running(self) -> bool:
        return self._process is not None and self._process.poll() is None

    def log_text(self, tail_chars: int = 4000) -> str:
        try:
            return self.log_path.read_text(errors="replace")[-tail_chars:]
        except OSError:
            return ""

    def __enter__(self) -> "MosquittoBroker":
        return self.start()

    def __exit__(self, *exc: object) -> None:
        self.stop()


class QosOnePublisher:
    """A plain paho publisher for tests: QoS 1, paho's queue unbounded, resends after reconnects.

    ``published`` holds ``(topic, payload, monotonic time)`` in publish order.
    """

    def __init__(self, port: int, client_id: str = "leadline-test-publisher", *, tls_ca: Path | None = None,
                 max_inflight: int = 100):
        import paho.mqtt.client as mqtt
        from paho.mqtt.enums import CallbackAPIVersion

        self._mqtt = mqtt
        self.client = mqtt.Client(CallbackAPIVersion.VERSION2, client_id=client_id, protocol=mqtt.MQTTv311,
                                  clean_session=False)
        if tls_ca is not None:
            self.client.tls_set(ca_certs=str(tls_ca))
        self.client.max_inflight_messages_set(max_inflight)
        self.client.max_queued_messages_set(0)
        self.client.reconnect_delay_set(1, 2)
        connected = threading.Event()
        self.client.on_connect = lambda client, userdata, flags, rc, props: connected.set()
        self.client.connect_async("127.0.0.1", port, keepalive=30)
        self.client.loop_start()
        if not connected.wait(10):
            self.close()
            raise RuntimeError(f"test publisher could not connect to 127.0.0.1:{port}")
        self.infos: list = []
        self.published: list[tuple[str, bytes, float]] = []

    def publish(self, topic: str, payload: bytes | str, qos: int = 1, retain: bool = False) -> None:
        data = payload.encode() if isinstance(payload, str) else payload
        self.infos.append(self.client.publish(topic, data, qos=qos, retain=retain))
        self.published.append((topic, data, time.monotonic()))

    def wait_all(self, timeout_s: float = 30.0) -> bool:
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            # MQTTMessageInfo.is_published() raises for a message published while
            # disconnected (rc NO_CONN) even after paho sent it on reconnect.
            if all(info._published for info in self.infos):
                return True
            time.sleep(0.02)
        return False

    def close(self) -> None:
        self.client.disconnect()
        self.client.loop_stop()
