"""The deployment kit in deploy/: a hardened systemd unit that systemd itself accepts, and
paths, users and variable names that agree across the unit, the example config, the
broker files and the guide.

systemd's own `systemd-analyze verify` and `systemd-analyze security --offline` are the
outside judges of the unit (systemd.exec(5), systemd.service(5)); the rest is consistency
between our files, so a rename in one place that was forgotten in another fails here.
"""

from __future__ import annotations

import re
import subprocess
from pathlib import Path

from conftest import require_executable
from zeroline import cli
from zeroline.config import Config, load_config

ROOT = Path(__file__).resolve().parent.parent
DEPLOY = ROOT / "deploy"
UNIT = DEPLOY / "zeroline.service"
EXAMPLE = DEPLOY / "zeroline.yaml"
INSTALLED_CONFIG = "/etc/zeroline/zeroline.yaml"
# Paths the deploy/ files name for zeroline itself (not Mosquitto's own files).
ZEROLINE_PATH = re.compile(r"(?:/etc/zeroline|/var/lib/zeroline|/opt/zeroline)[\w./-]*")


def parse_unit(text: str) -> dict[str, list[tuple[str, str]]]:
    """A systemd unit as {section: [(key, value), ...]}; repeated keys are kept in order
    (ExecReload=, SystemCallFilter= may appear more than once)."""
    sections: dict[str, list[tuple[str, str]]] = {}
    current: list[tuple[str, str]] | None = None
    for number, line in enumerate(text.splitlines(), 1):
        stripped = line.strip()
        if not stripped or stripped[0] in "#;":
            continue
        if stripped.startswith("[") and stripped.endswith("]"):
            current = sections.setdefault(stripped[1:-1], [])
            continue
        assert current is not None and "=" in stripped, f"line {number}: {line!r}"
        key, value = stripped.split("=", 1)
        current.append((key.strip(), value.strip()))
    return sections


def _service() -> dict[str, list[str]]:
    values: dict[str, list[str]] = {}
    for key, value in parse_unit(UNIT.read_text())["Service"]:
        values.setdefault(key, []).append(value)
    return values


def _one(values: dict[str, list[str]], key: str) -> str:
    assert len(values.get(key, [])) == 1, f"{key}= should be set exactly once"
    return values[key][0]


def _example() -> Config:
    return load_config(EXAMPLE)


def test_parse_unit_keeps_repeated_keys() -> None:
    """The small parser keeps order and repeats, and skips comments."""
    parsed = parse_unit("# c\n[Service]\nA=1\n; c\nA=2\nB = x=y\n")
    assert parsed == {"Service": [("A", "1"), ("A", "2"), ("B", "x=y")]}


def test_unit_is_hardened() -> None:
    """A dedicated user, a read-only system with one writable state directory, no privileges
    to gain and none held."""
    service = _service()
    expected = {
        "User": "zeroline",
        "Group": "zeroline",
        "ProtectSystem": "strict",
        "ProtectHome": "yes",
        "PrivateTmp": "yes",
        "PrivateDevices": "yes",
        "NoNewPrivileges": "yes",
        "StateDirectory": "zeroline",
        "ReadWritePaths": "/var/lib/zeroline",
        "CapabilityBoundingSet": "",
        "RestrictSUIDSGID": "yes",
        "KillSignal": "SIGTERM",
        "Restart": "on-failure",
        "RestartPreventExitStatus": "2",
        "EnvironmentFile": "-/etc/zeroline/zeroline.env",
    }
    for key, value in expected.items():
        assert _one(service, key) == value, key
    assert "DynamicUser" not in service  # a static user: see the unit's header comment
    assert "OPENBLAS_NUM_THREADS=1" in _one(service, "Environment").split()


def test_unit_waits_long_enough_for_the_final_snapshot_and_backs_off() -> None:
    """SIGTERM drains and snapshots: at least a minute before SIGKILL; restarts are delayed
    and bounded by a start limit."""
    service = _service()
    assert _duration(_one(service, "TimeoutStopSec")) >= 60
    assert _duration(_one(service, "RestartSec")) >= 5
    unit = dict(parse_unit(UNIT.read_text())["Unit"])
    assert int(unit["StartLimitBurst"]) >= 1 and _duration(unit["StartLimitIntervalSec"]) > 0


def _duration(text: str) -> float:
    match = re.fullmatch(r"(\d+)\s*(s|min|)", text)
    assert match, f"unexpected duration {text!r}"
    return float(match[1]) * (60 if match[2] == "min" else 1)


def test_unit_checks_the_config_before_start_and_reload() -> None:
    """`zeroline check` runs before the daemon starts and before SIGHUP is sent; all three
    commands use the same program and the installed config path."""
    service = _service()
    check = _one(service, "ExecStartPre")
    run = _one(service, "ExecStart")
    program = check.split()[0]
    assert program.startswith("/") and program.endswith("/zeroline")
    assert check == f"{program} check -c {INSTALLED_CONFIG}"
    assert run == f"{program} run -c {INSTALLED_CONFIG}"
    assert service["ExecReload"] == [check, "/bin/kill -HUP $MAINPID"]


def _verifiable_copy(tmp_path: Path, text: str) -> Path:
    """The unit with its program replaced by an executable stand-in: `verify` checks that
    every Exec*= command exists, and zeroline is not installed under /opt here."""
    program = tmp_path / "zeroline"
    program.write_text("#!/bin/sh\nexit 0\n")
    program.chmod(0o755)
    path = tmp_path / "zeroline.service"
    path.write_text(text.replace("/opt/zeroline/venv/bin/zeroline", str(program)))
    return path


def _systemd_analyze() -> str:
    return require_executable("systemd-analyze", "systemd")


def test_systemd_analyze_verify_accepts_the_unit(tmp_path: Path) -> None:
    """systemd's own parser: no unknown key, no bad value, no missing command. It reports
    problems as warnings with exit code 0, so any output at all is a failure; a misspelt
    key shows that such output is produced."""
    analyze = _systemd_analyze()
    unit = _verifiable_copy(tmp_path, UNIT.read_text())
    good = subprocess.run([analyze, "verify", str(unit)], capture_output=True, text=True)
    assert good.returncode == 0 and (good.stdout + good.stderr).strip() == ""

    broken = tmp_path / "broken"
    broken.mkdir()
    text = UNIT.read_text().replace("ProtectHome=yes", "ProtectHme=yes")
    bad = subprocess.run(
        [analyze, "verify", str(_verifiable_copy(broken, text))], capture_output=True, text=True
    )
    assert "ProtectHme" in bad.stdout + bad.stderr


def test_systemd_security_rates_the_unit_ok(tmp_path: Path) -> None:
    """`systemd-analyze security` scores exposure 0 (locked down) … 10 (unprotected); the
    unit must stay at 2.0 or better ("OK")."""
    analyze = _systemd_analyze()
    unit = _verifiable_copy(tmp_path, UNIT.read_text())
    result = subprocess.run(
        [analyze, "security", "--offline=yes", "--no-pager", str(unit)],
        capture_output=True,
        text=True,
    )
    match = re.search(r"Overall exposure level for \S+: (\d+\.\d)", result.stdout)
    assert match, result.stdout + result.stderr
    assert float(match[1]) <= 2.0


def test_example_config_passes_zeroline_check() -> None:
    """The config the unit runs is valid as shipped."""
    assert cli.main(["check", "-c", str(EXAMPLE)]) == 0


def test_example_config_paths_match_the_unit() -> None:
    """state.dir is the unit's StateDirectory, the spool is inside a writable path, and
    every secret file is under /etc/zeroline."""
    config = _example()
    service = _service()
    assert config.state["dir"] == "/var/lib/" + _one(service, "StateDirectory")
    writable = [Path(p.lstrip("-")) for p in _one(service, "ReadWritePaths").split()]
    assert config.timeseries is not None
    spool = Path(config.timeseries["spool_dir"])
    assert any(spool == w or w in spool.parents for w in writable)
    for secret in _secret_paths(config):
        assert secret.startswith("/etc/zeroline/"), secret


def _secret_paths(config: Config) -> list[str]:
    broker, tls = config.broker, config.broker.get("tls") or {}
    candidates = [
        broker.get("password_file"),
        *(tls.get(k) for k in ("ca_file", "cert_file", "key_file")),
        config.http.get("token_file"),
        (config.timeseries or {}).get("token_file"),
    ]
    return [c for c in candidates if c]


def _layout_table() -> set[str]:
    """The paths listed in the README's files table (first cell, in backquotes)."""
    text = (DEPLOY / "README.md").read_text()
    return set(re.findall(r"^\| `(/[^`]+)` \|", text, flags=re.MULTILINE))


def _deploy_files() -> list[Path]:
    return sorted(p for p in DEPLOY.rglob("*") if p.is_file())


def test_every_zeroline_path_in_deploy_is_in_the_files_table() -> None:
    """Every /etc/zeroline, /var/lib/zeroline and /opt/zeroline path any deploy/ file names
    (the unit, the config and its comments, the guides) is one the README's files table
    lists, or lies inside a listed directory other than /etc/zeroline (where every file
    must be listed, with its owner and mode); and the config's own paths are listed."""
    listed = _layout_table()
    # Inside these anything goes (state files, the venv); in /etc/zeroline only listed files.
    open_dirs = [p for p in listed if p != "/etc/zeroline" and not Path(p).suffix]
    assert {INSTALLED_CONFIG, "/var/lib/zeroline", "/etc/zeroline/zeroline.env"} <= listed
    for path in _deploy_files():
        for named in ZEROLINE_PATH.findall(path.read_text()):
            named = named.rstrip(".")
            inside = named in listed or any(named.startswith(p + "/") for p in open_dirs)
            # Fleet examples name per-daemon variants such as /var/lib/zeroline-a.
            variant = path.name == "fleet.md" and re.search(r"zeroline-[a-z]\b", named)
            assert inside or variant, f"{path.relative_to(ROOT)} names {named}, not in the table"
    config = _example()
    for own in [config.state["dir"], *_secret_paths(config)]:
        assert own in listed, own


def test_environment_variables_agree() -> None:
    """The variables the config's comments and the guide offer for secrets are the ones
    the environment file example declares, and the config itself names none it lacks."""
    declared = set(
        re.findall(r"^#?(ZEROLINE_\w+)=", (DEPLOY / "zeroline.env.example").read_text(), re.M)
    )
    assert {"ZEROLINE_BROKER_PASSWORD", "ZEROLINE_TSDB_TOKEN"} <= declared
    for path in (EXAMPLE, DEPLOY / "README.md"):
        named = set(re.findall(r"\bZEROLINE_[A-Z_]+\b", path.read_text()))
        assert named <= declared, (path.name, named - declared)
    config = _example()
    for env in (config.broker.get("password_env"), (config.timeseries or {}).get("token_env")):
        assert env is None or env in declared


def test_broker_files_agree_with_the_example_config() -> None:
    """The daemon's broker user has an ACL entry that lets it read its channels' topics and
    write its output prefix; it connects to the broker's loopback listener."""
    config = _example()
    acl = (DEPLOY / "mosquitto" / "acl").read_text()
    user = config.broker["username"]
    block = acl.split(f"user {user}\n", 1)
    assert len(block) == 2, f"no `user {user}` block in deploy/mosquitto/acl"
    grants = re.findall(r"^topic (read|write|readwrite) (\S+)$", block[1].split("\nuser ")[0], re.M)
    assert ("readwrite", f"{config.output_prefix}/#") in grants
    reads = [t for access, t in grants if access in ("read", "readwrite")]
    for channel in config.channels:
        first_level = channel.topic.split("/")[0]
        assert f"{first_level}/#" in reads, channel.topic
    gateway = (DEPLOY / "mosquitto" / "gateway.conf").read_text()
    assert f"listener {config.broker['port']} {config.broker['host']}" in gateway
