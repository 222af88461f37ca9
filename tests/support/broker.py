"""A real Mosquitto for integration tests: free port on 127.0.0.1, optional TLS and password,
kill/restart helpers, and thin wrappers around `mosquitto_pub` / `mosquitto_sub`.

Mosquitto started as root drops to user `mosquitto` before it reads the password file, the
TLS key and its persistence directory, so everything lives in a directory made by
`tempfile.mkdtemp` and opened up to that user (pytest's tmp_path is private to root).

The broker settings that lossless QoS 1 needs (see deploy/mosquitto-notes.md) are set:
`max_queued_messages 0` (no limit on what is queued for a slow or absent subscriber) and,
with `persistent=True`, persistence saved on every change so a SIGKILL loses as little as
Mosquitto allows.
"""

from __future__ import annotations

import contextlib
import os
import pwd
import shutil
import signal
import socket
import subprocess
import tempfile
import threading
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path

READY_TIMEOUT_S = 10.0


def free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return int(sock.getsockname()[1])


def wait_until(predicate: Callable[[], bool], timeout: float, interval: float = 0.02) -> bool:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if predicate():
            return True
        time.sleep(interval)
    return predicate()


def _open_to_mosquitto(path: Path) -> None:
    """Let user mosquitto read (and for directories, write) `path` when we are root."""
    if os.geteuid() != 0:
        return
    try:
        entry = pwd.getpwnam("mosquitto")
    except KeyError:
        return
    os.chown(path, entry.pw_uid, entry.pw_gid)


@dataclass
class TlsFiles:
    ca_cert: Path
    server_cert: Path
    server_key: Path
    other_ca_cert: Path  # a CA that did not sign the server certificate
    client_cert: Path
    client_key: Path


def make_tls(directory: Path) -> TlsFiles:
    """A throw-away CA, a server certificate for 127.0.0.1 signed by it, and a stranger CA."""

    def openssl(*args: str) -> None:
        subprocess.run(["openssl", *args], cwd=directory, check=True, capture_output=True)

    curve = ["-newkey", "ec", "-pkeyopt", "ec_paramgen_curve:prime256v1", "-nodes"]
    for name in ("ca", "other-ca"):
        openssl(
            "req",
            "-x509",
            *curve,
            "-keyout",
            f"{name}.key",
            "-out",
            f"{name}.crt",
            "-days",
            "2",
            "-subj",
            f"/CN=zeroline test {name}",
        )
    openssl("req", *curve, "-keyout", "server.key", "-out", "server.csr", "-subj", "/CN=127.0.0.1")
    (directory / "san.cnf").write_text("subjectAltName=IP:127.0.0.1,DNS:localhost\n")
    openssl(
        "x509",
        "-req",
        "-in",
        "server.csr",
        "-CA",
        "ca.crt",
        "-CAkey",
        "ca.key",
        "-CAcreateserial",
        "-out",
        "server.crt",
        "-days",
        "2",
        "-extfile",
        "san.cnf",
    )
    openssl("req", *curve, "-keyout", "client.key", "-out", "client.csr", "-subj", "/CN=gw01")
    openssl(
        "x509",
        "-req",
        "-in",
        "client.csr",
        "-CA",
        "ca.crt",
        "-CAkey",
        "ca.key",
        "-CAcreateserial",
        "-out",
        "client.crt",
        "-days",
        "2",
    )
    for name in ("ca.crt", "other-ca.crt", "server.crt", "server.key"):
        (directory / name).chmod(0o644)
        _open_to_mosquitto(directory / name)
    return TlsFiles(
        directory / "ca.crt",
        directory / "server.crt",
        directory / "server.key",
        directory / "other-ca.crt",
        directory / "client.crt",
        directory / "client.key",
    )


@dataclass
class Mosquitto:
    """One broker process; `kill()` is SIGKILL, `start()` again reuses port and files."""

    executable: str
    port: int = field(default_factory=free_port)
    tls: bool = False
    require_client_cert: bool = False
    username: str | None = None
    password: str | None = None
    persistent: bool = False
    max_inflight: int = 100  # at least the daemon's broker.inflight (deploy notes)
    directory: Path = field(default_factory=lambda: Path(tempfile.mkdtemp(prefix="zl-mosq-")))
    process: subprocess.Popen[bytes] | None = None
    tls_files: TlsFiles | None = None
    subscribers: list[Subscriber] = field(default_factory=list)  # stopped by cleanup()

    def __post_init__(self) -> None:
        self.directory.chmod(0o755)
        _open_to_mosquitto(self.directory)
        lines = [
            f"listener {self.port} 127.0.0.1",
            "max_queued_messages 0",
            f"max_inflight_messages {self.max_inflight}",
            f"log_dest file {self.directory / 'mosquitto.log'}",
            "log_type error",
            "log_type warning",
            "log_type notice",
        ]
        if self.username is not None:
            password_file = self.directory / "passwd"
            password_file.write_text("")
            subprocess.run(
                ["mosquitto_passwd", "-b", str(password_file), self.username, self.password or ""],
                check=True,
                capture_output=True,
            )
            password_file.chmod(0o600)
            _open_to_mosquitto(password_file)
            lines += ["allow_anonymous false", f"password_file {password_file}"]
        else:
            lines.append("allow_anonymous true")
        if self.tls:
            self.tls_files = make_tls(self.directory)
            lines += [
                f"cafile {self.tls_files.ca_cert}",
                f"certfile {self.tls_files.server_cert}",
                f"keyfile {self.tls_files.server_key}",
            ]
            if self.require_client_cert:
                lines.append("require_certificate true")
        if self.persistent:
            lines += [
                "persistence true",
                f"persistence_location {self.directory}/",
                "autosave_on_changes true",
                "autosave_interval 1",
            ]
        self.config_path = self.directory / "mosquitto.conf"
        self.config_path.write_text("\n".join(lines) + "\n")
        self.config_path.chmod(0o644)

    def start(self) -> None:
        self.process = subprocess.Popen(
            [self.executable, "-c", str(self.config_path)],
            stdout=subprocess.DEVNULL,
            stderr=subprocess.DEVNULL,
        )
        if not wait_until(self._accepts, READY_TIMEOUT_S):
            log = self.directory / "mosquitto.log"
            text = log.read_text() if log.exists() else "(no log)"
            self.stop()
            raise RuntimeError(f"mosquitto did not start on port {self.port}: {text[-2000:]}")

    def _accepts(self) -> bool:
        if self.process is not None and self.process.poll() is not None:
            return False
        with (
            contextlib.suppress(OSError),
            socket.create_connection(("127.0.0.1", self.port), timeout=0.2),
        ):
            return True
        return False

    def kill(self) -> None:
        """SIGKILL: no clean shutdown, no final persistence save."""
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGKILL)
            self.process.wait(5)

    def stop(self) -> None:
        if self.process is not None and self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(5)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(5)

    def cleanup(self) -> None:
        for subscriber in self.subscribers:
            subscriber.stop()
        self.stop()
        shutil.rmtree(self.directory, ignore_errors=True)

    def client_args(self) -> list[str]:
        """Connection arguments for mosquitto_pub / mosquitto_sub."""
        args = ["-h", "127.0.0.1", "-p", str(self.port)]
        if self.username is not None:
            args += ["-u", self.username, "-P", self.password or ""]
        if self.tls_files is not None:
            args += ["--cafile", str(self.tls_files.ca_cert)]
            if self.require_client_cert:
                args += ["--cert", str(self.tls_files.client_cert)]
                args += ["--key", str(self.tls_files.client_key)]
        return args


def publish_lines(broker: Mosquitto, topic: str, lines: list[str], *, qos: int = 1) -> None:
    """Publish each line as one message with `mosquitto_pub -l` (waits for its PUBACKs)."""
    data = "".join(line + "\n" for line in lines).encode()
    subprocess.run(
        ["mosquitto_pub", *broker.client_args(), "-q", str(qos), "-t", topic, "-l"],
        input=data,
        check=True,
        capture_output=True,
        timeout=60,
    )


def publish_one(broker: Mosquitto, topic: str, payload: bytes | str, *, qos: int = 1) -> None:
    """Publish one message (any bytes) with `mosquitto_pub -s` reading stdin."""
    data = payload.encode() if isinstance(payload, str) else payload
    subprocess.run(
        ["mosquitto_pub", *broker.client_args(), "-q", str(qos), "-t", topic, "-s"],
        input=data,
        check=True,
        capture_output=True,
        timeout=30,
    )


class Subscriber:
    """`mosquitto_sub -v` in the background; `lines` collects `topic payload` strings."""

    def __init__(self, broker: Mosquitto, *topics: str, client_id: str | None = None) -> None:
        args = ["mosquitto_sub", *broker.client_args(), "-q", "1", "-v"]
        if client_id is not None:
            args += ["-i", client_id, "-c"]  # persistent session
        for topic in topics:
            args += ["-t", topic]
        self.process = subprocess.Popen(args, stdout=subprocess.PIPE, stderr=subprocess.DEVNULL)
        broker.subscribers.append(self)  # mosquitto_sub retries forever: the broker stops it
        self.lines: list[str] = []
        self._lock = threading.Lock()
        self._reader = threading.Thread(target=self._read, daemon=True)
        self._reader.start()

    def _read(self) -> None:
        assert self.process.stdout is not None
        for raw in self.process.stdout:
            with self._lock:
                self.lines.append(raw.decode("utf-8", "replace").rstrip("\n"))

    def messages(self, suffix: str = "") -> list[tuple[str, str]]:
        with self._lock:
            pairs = [tuple(line.split(" ", 1)) for line in self.lines]
        return [(p[0], p[1] if len(p) > 1 else "") for p in pairs if p[0].endswith(suffix)]

    def wait_count(self, suffix: str, count: int, timeout: float) -> bool:
        return wait_until(lambda: len(self.messages(suffix)) >= count, timeout)

    def stop(self) -> None:
        if self.process.poll() is None:
            self.process.terminate()
            try:
                self.process.wait(5)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait(5)


@contextlib.contextmanager
def running(broker: Mosquitto) -> Iterator[Mosquitto]:
    broker.start()
    try:
        yield broker
    finally:
        broker.cleanup()
