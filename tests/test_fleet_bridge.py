"""The broker configs in deploy/ run as written, on real Mosquitto brokers.

Two Mosquitto processes on free 127.0.0.1 ports: a *gateway* running
deploy/mosquitto/gateway.conf with deploy/fleet/bridge.conf dropped in, and a *central*
broker running deploy/fleet/central-standin.conf. Only ports and file locations are
substituted (each substitution must find its text, so the test notices when a config
changes shape). Certificates come from deploy/mosquitto/make-certs.sh, passwords from
mosquitto_passwd, and every message is sent and received by mosquitto_pub / mosquitto_sub,
clients independent of zeroline. Topic remapping and bridge behaviour are as documented
for mosquitto.conf(5) (`topic pattern direction qos local-prefix remote-prefix`,
`cleansession false`).
"""

from __future__ import annotations

import os
import shutil
import signal
import socket
import subprocess
import tempfile
import time
from collections.abc import Iterator
from pathlib import Path

import pytest

from conftest import require_executable

ROOT = Path(__file__).resolve().parent.parent
DEPLOY = ROOT / "deploy"
PASSWORDS = {
    "zeroline": "zl-local-pw",
    "site1": "site1-pw",
    "gw01": "gw01-bridge-pw",
    "fleet-ops": "fleet-ops-pw",
}
TOPIC = "zeroline/site1-no2/corrected"
CENTRAL_TOPIC = "gw01/" + TOPIC


def _free_port() -> int:
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        port: int = sock.getsockname()[1]
        return port


def _localise(text: str, replacements: dict[str, str]) -> str:
    for old, new in replacements.items():
        assert old in text, f"the config no longer contains {old!r}"
        text = text.replace(old, new)
    return text


def _readable_by_mosquitto(path: Path, mode: int) -> None:
    """Mosquitto drops to user `mosquitto` before it reads password, ACL and key files."""
    path.chmod(mode)
    if os.geteuid() == 0:
        shutil.chown(path, group="mosquitto")


class Broker:
    """One mosquitto process with a config file; stopped by `stop`, restartable."""

    def __init__(self, program: str, config: Path, port: int, log: Path) -> None:
        self.program, self.config, self.port, self.log = program, config, port, log
        self.process: subprocess.Popen[bytes] | None = None

    def start(self) -> None:
        with self.log.open("ab") as log:
            self.process = subprocess.Popen(
                [self.program, "-c", str(self.config)], stdout=log, stderr=subprocess.STDOUT
            )
        deadline = time.monotonic() + 5
        while time.monotonic() < deadline:
            assert self.process.poll() is None, self.log.read_text()
            try:
                socket.create_connection(("127.0.0.1", self.port), timeout=0.2).close()
                return
            except OSError:
                time.sleep(0.02)
        raise AssertionError(f"mosquitto did not listen on {self.port}:\n{self.log.read_text()}")

    def stop(self) -> None:
        if self.process is not None and self.process.poll() is None:
            self.process.send_signal(signal.SIGTERM)  # clean stop: persistence is saved
            try:
                self.process.wait(timeout=5)
            except subprocess.TimeoutExpired:
                self.process.kill()
                self.process.wait()
        self.process = None


class Fleet:
    """A gateway broker bridged to a central broker, from the deploy/ files."""

    def __init__(self, folder: Path, program: str, made_certs: Path) -> None:
        self.folder = folder
        self.local_port, self.tls_port, self.central_port = (_free_port() for _ in range(3))
        certs = folder / "certs"
        shutil.copytree(made_certs, certs)
        _readable_by_mosquitto(certs / "server.key", 0o640)
        self.ca = certs / "ca.crt"
        (folder / "conf.d").mkdir()
        for name in ("gateway-data", "central-data"):
            (folder / name).mkdir()
            if os.geteuid() == 0:
                shutil.chown(folder / name, user="mosquitto")
        self._password_files()
        self._acl_files()
        self.gateway = Broker(program, self._gateway_config(), self.local_port, folder / "gw.log")
        self.central = Broker(
            program, self._central_config(), self.central_port, folder / "central.log"
        )

    def _password_files(self) -> None:
        for name, users in (
            ("passwd", ("zeroline", "site1")),
            ("passwd-central", ("gw01", "fleet-ops")),
        ):
            path = self.folder / name
            for user in users:
                create = ["-c"] if not path.exists() else []
                subprocess.run(
                    ["mosquitto_passwd", *create, "-b", str(path), user, PASSWORDS[user]],
                    check=True,
                    capture_output=True,
                )
            _readable_by_mosquitto(path, 0o640)

    def _acl_files(self) -> None:
        for source, name in (
            (DEPLOY / "mosquitto" / "acl", "acl"),
            (DEPLOY / "fleet" / "acl-central", "acl-central"),
        ):
            shutil.copy(source, self.folder / name)
            _readable_by_mosquitto(self.folder / name, 0o640)

    def _gateway_config(self) -> Path:
        f = self.folder
        text = _localise(
            (DEPLOY / "mosquitto" / "gateway.conf").read_text(),
            {
                "/etc/mosquitto/passwd": str(f / "passwd"),
                "/etc/mosquitto/acl": str(f / "acl"),
                "/etc/mosquitto/certs/": f"{f / 'certs'}/",
                "/var/lib/mosquitto/": f"{f / 'gateway-data'}/",
                "listener 1883 127.0.0.1": f"listener {self.local_port} 127.0.0.1",
                "listener 8883": f"listener {self.tls_port} 127.0.0.1",
                "/etc/mosquitto/conf.d": str(f / "conf.d"),
            },
        )
        bridge = _localise(
            (DEPLOY / "fleet" / "bridge.conf").read_text(),
            {
                "address central.fleet.example:8883": f"address 127.0.0.1:{self.central_port}",
                "CHANGE-ME-bridge-password": PASSWORDS["gw01"],
                "/etc/mosquitto/certs/fleet-ca.crt": str(self.ca),
                "restart_timeout 5 60": "restart_timeout 1 2",  # a fast test, same mechanism
            },
        )
        bridge_path = f / "conf.d" / "bridge-central.conf"
        bridge_path.write_text(bridge)
        _readable_by_mosquitto(bridge_path, 0o640)
        path = f / "gateway.conf"
        path.write_text(text)
        return path

    def _central_config(self) -> Path:
        f = self.folder
        text = _localise(
            (DEPLOY / "fleet" / "central-standin.conf").read_text(),
            {
                "/etc/mosquitto/passwd": str(f / "passwd-central"),
                "/etc/mosquitto/acl-central": str(f / "acl-central"),
                "/etc/mosquitto/certs/": f"{f / 'certs'}/",
                "/var/lib/mosquitto/": f"{f / 'central-data'}/",
                "listener 8883": f"listener {self.central_port} 127.0.0.1",
            },
        )
        path = f / "central.conf"
        path.write_text(text)
        return path

    # --- clients --------------------------------------------------------------------------

    def publish_local(self, topic: str, message: str, user: str = "zeroline") -> int:
        """mosquitto_pub on the gateway's loopback listener, QoS 1; its exit code."""
        return subprocess.run(
            [
                "mosquitto_pub",
                "-h",
                "127.0.0.1",
                "-p",
                str(self.local_port),
                "-q",
                "1",
                "-u",
                user,
                "-P",
                PASSWORDS[user],
                "-i",
                f"test-pub-{user}",
                "-t",
                topic,
                "-m",
                message,
            ],
            capture_output=True,
            timeout=10,
        ).returncode

    def local_sub_start(self, *topics: str) -> subprocess.Popen[str]:
        """mosquitto_sub on the gateway's listener as zeroline, QoS 1, waiting (at most 8 s)
        for one message on any of `topics`; read it with `communicate()`."""
        filters = [part for topic in topics for part in ("-t", topic)]
        return subprocess.Popen(
            [
                "mosquitto_sub",
                "-h",
                "127.0.0.1",
                "-p",
                str(self.local_port),
                "-u",
                "zeroline",
                "-P",
                PASSWORDS["zeroline"],
                "-q",
                "1",
                *filters,
                "-v",
                "-C",
                "1",
                "-W",
                "8",
            ],
            stdout=subprocess.PIPE,
            text=True,
        )

    def central_sub(self, topic: str, count: int, client_id: str | None = None) -> str:
        """mosquitto_sub on the central broker (TLS, as the fleet's operations user), QoS 1;
        the lines received. `count` 0: subscribe and leave (registers a persistent session)."""
        session = ["-c", "-i", client_id] if client_id else []
        until = ["-E"] if count == 0 else ["-C", str(count), "-W", "8"]
        result = subprocess.run(
            [
                "mosquitto_sub",
                "-h",
                "127.0.0.1",
                "-p",
                str(self.central_port),
                "--cafile",
                str(self.ca),
                "-u",
                "fleet-ops",
                "-P",
                PASSWORDS["fleet-ops"],
                "-q",
                "1",
                *session,
                "-t",
                topic,
                "-v",
                *until,
            ],
            capture_output=True,
            text=True,
            timeout=15,
        )
        return result.stdout

    def wait_bridge_up(self) -> None:
        """The bridge's retained notification on the central broker says "1"."""
        deadline = time.monotonic() + 8
        while time.monotonic() < deadline:
            if self.central_sub("gw01/bridge/state", 1).strip() == "gw01/bridge/state 1":
                return
            time.sleep(0.2)
        raise AssertionError("the bridge did not connect:\n" + (self.folder / "gw.log").read_text())


@pytest.fixture(scope="module")
def certificates() -> Iterator[Path]:
    """One CA and server certificate from make-certs.sh for the module (key generation is
    the slow part of setting up the brokers)."""
    require_executable("openssl", "openssl")
    folder = Path(tempfile.mkdtemp(prefix="zeroline-certs-"))
    try:
        subprocess.run(
            ["sh", str(DEPLOY / "mosquitto" / "make-certs.sh"), str(folder / "certs"), "localhost"],
            check=True,
            capture_output=True,
        )
        yield folder / "certs"
    finally:
        shutil.rmtree(folder, ignore_errors=True)


@pytest.fixture
def fleet(certificates: Path) -> Iterator[Fleet]:
    program = require_executable("mosquitto", "mosquitto")
    require_executable("mosquitto_pub", "mosquitto-clients")
    # Not pytest's tmp_path: its parents are private to root, and mosquitto reads its files
    # as user mosquitto.
    folder = Path(tempfile.mkdtemp(prefix="zeroline-fleet-"))
    folder.chmod(0o755)
    made = Fleet(folder, program, certificates)
    try:
        made.central.start()
        made.gateway.start()
        yield made
    finally:
        made.gateway.stop()
        made.central.stop()
        shutil.rmtree(folder, ignore_errors=True)


def test_gateway_broker_needs_a_password_and_serves_tls(fleet: Fleet) -> None:
    """gateway.conf: anonymous clients are refused on loopback; a logger publishing over TLS
    (checked against the CA from make-certs.sh) with its password reaches the daemon's user
    on loopback, and the ACL keeps it out of the daemon's output namespace."""
    anonymous = subprocess.run(
        [
            "mosquitto_pub",
            "-h",
            "127.0.0.1",
            "-p",
            str(fleet.local_port),
            "-t",
            "site/x",
            "-m",
            "1",
        ],
        capture_output=True,
        text=True,
        timeout=10,
    )
    assert anonymous.returncode != 0 and "not authorised" in anonymous.stderr.lower()

    subscriber = fleet.local_sub_start("site/#", "zeroline/#")
    time.sleep(0.3)  # let it subscribe
    logger = [
        "mosquitto_pub",
        "-h",
        "127.0.0.1",
        "-p",
        str(fleet.tls_port),
        "--cafile",
        str(fleet.ca),
        "-u",
        "site1",
        "-P",
        PASSWORDS["site1"],
        "-q",
        "1",
    ]
    # Refused by the ACL (site1 may only write site/site1/...): never delivered.
    subprocess.run([*logger, "-t", "zeroline/site1-no2/corrected", "-m", "fake"], timeout=10)
    published = subprocess.run(
        [*logger, "-t", "site/site1/no2/raw", "-m", '{"value": 41.5}'], timeout=10
    )
    out, _ = subscriber.communicate(timeout=10)
    assert published.returncode == 0
    assert out.strip() == 'site/site1/no2/raw {"value": 41.5}'


def test_bridge_namespaces_and_queues_while_central_is_down(fleet: Fleet) -> None:
    """bridge.conf: zeroline/... on the gateway arrives centrally as gw01/zeroline/... at
    QoS 1, other topics stay local, and a reading published while the central broker is
    down is delivered after it comes back (persistent bridge session, gateway queue), at
    least once."""
    fleet.wait_bridge_up()
    # A persistent central subscriber, so the central side queues for it across its restart.
    assert fleet.central_sub("gw01/zeroline/#", 0, client_id="fleet-archive") == ""

    assert fleet.publish_local("site/site1/no2/raw", "stays-local", user="site1") == 0
    assert fleet.publish_local(TOPIC, '{"corrected": 21.5}') == 0
    first = fleet.central_sub("gw01/zeroline/#", 1, client_id="fleet-archive")
    assert first.strip() == f'{CENTRAL_TOPIC} {{"corrected": 21.5}}'

    fleet.central.stop()
    assert fleet.publish_local(TOPIC, '{"corrected": 22.0}') == 0
    fleet.central.start()
    # QoS 1 is at least once: the first reading may come again (its PUBACK can be lost when
    # the subscriber leaves at once); zeroline's consumers skip such duplicates by time.
    later = []
    for _ in range(3):
        line = fleet.central_sub("gw01/zeroline/#", 1, client_id="fleet-archive").strip()
        later.append(line)
        if line.endswith("22.0}"):
            break
    assert later[-1] == f'{CENTRAL_TOPIC} {{"corrected": 22.0}}', later
    assert set(later[:-1]) <= {first.strip()}, later


def test_control_events_come_in_from_the_central_side(fleet: Fleet) -> None:
    """bridge.conf: gw01/zeroline/<channel>/control published centrally arrives on the
    gateway as zeroline/<channel>/control, where the daemon listens."""
    fleet.wait_bridge_up()
    subscriber = fleet.local_sub_start("zeroline/+/control")
    time.sleep(0.3)
    subprocess.run(
        [
            "mosquitto_pub",
            "-h",
            "127.0.0.1",
            "-p",
            str(fleet.central_port),
            "--cafile",
            str(fleet.ca),
            "-u",
            "fleet-ops",
            "-P",
            PASSWORDS["fleet-ops"],
            "-q",
            "1",
            "-t",
            "gw01/zeroline/site1-no2/control",
            "-m",
            '{"event": "cleaned"}',
        ],
        check=True,
        timeout=10,
    )
    out, _ = subscriber.communicate(timeout=10)
    assert out.strip() == 'zeroline/site1-no2/control {"event": "cleaned"}'
