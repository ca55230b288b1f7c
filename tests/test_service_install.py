"""README "Installing as a service (systemd)", performed as far as a machine without systemd as
PID 1 allows: the README's own command lines, run with the paths moved into a scratch root; the
unit checked by `systemd-analyze verify`; the credential directory that systemd's LoadCredential=
would make, emulated; then `fecproxy check` and a daemon pair run as an unprivileged user (setpriv)
that cannot read the key file itself, passing traffic with the key.

Needs root (to change users) and setpriv (util-linux); skipped otherwise, with the reason.
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
import socket
import subprocess
import sys
import sysconfig
import tempfile
import time
from pathlib import Path

import pytest
from support.processes import Child

ROOT = Path(__file__).resolve().parents[1]
UNIT = ROOT / "deploy" / "systemd" / "fecproxy@.service"
#: The unprivileged account that stands in for `useradd --system fecproxy` (present on Debian).
SERVICE_USER, SERVICE_GROUP = "nobody", "nogroup"
#: Seconds for a datagram to cross the pair on loopback (imports done); generous for a shared box.
DELIVERY_TIMEOUT_S = 20.0

pytestmark = pytest.mark.slow


def readme_install_steps() -> list[str]:
    """The indented command lines of README's service section."""
    text = (ROOT / "README.md").read_text()
    section = text[text.index("### Installing as a service (systemd)") : text.index("### Configuration")]
    return [line[4:].split("   #")[0].strip() for line in section.splitlines() if line.startswith("    ")]


def test_readme_steps_keep_the_key_root_s_and_pass_it_as_a_credential():
    steps = readme_install_steps()
    keygen = next(step for step in steps if " keygen " in step)
    assert keygen.endswith("/etc/fecproxy/link.key")
    assert "LoadCredential=link.key:/etc/fecproxy/link.key" in UNIT.read_text().splitlines()
    assert any(step.startswith("systemd-analyze verify") for step in steps)


def _traversable_by_others(path: Path) -> bool:
    return all(os.stat(part).st_mode & 0o005 == 0o005 for part in [path, *path.parents] if part.exists())


def _interpreter_for_others() -> str:
    """This interpreter if another user may run it, else the system's of the same version."""
    for candidate in (sys.executable, f"/usr/bin/python{sys.version_info.major}.{sys.version_info.minor}"):
        if Path(candidate).exists() and _traversable_by_others(Path(os.path.realpath(candidate)).parent):
            return candidate
    pytest.skip("no Python interpreter of this version that another user may run")


def _free_udp_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_DGRAM) as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@pytest.fixture
def scratch_root():
    if os.geteuid() != 0 or shutil.which("setpriv") is None:
        reason = "needs root and setpriv (util-linux) to run the daemon as an unprivileged user"
        if os.environ.get("CI") == "true":
            pytest.fail(reason)
        pytest.skip(reason)
    site = Path(sysconfig.get_paths()["purelib"])
    if not (_traversable_by_others(ROOT) and _traversable_by_others(site)):
        pytest.skip("the checkout or the installed packages are not readable by other users")
    root = Path(tempfile.mkdtemp(prefix="fecproxy-install-"))
    root.chmod(0o755)
    try:
        yield root
    finally:
        shutil.rmtree(root, ignore_errors=True)


def _run_as_service_user(argv: list[str], env: dict[str, str]) -> list[str]:
    setpriv = ["setpriv", f"--reuid={SERVICE_USER}", f"--regid={SERVICE_GROUP}", "--clear-groups"]
    return setpriv + ["env", *(f"{key}={value}" for key, value in env.items())] + argv


def test_readme_install_steps_give_a_service_that_passes_traffic_with_a_key(scratch_root):
    etc = scratch_root / "etc" / "fecproxy"
    python = _interpreter_for_others()
    fecproxy = f"{shlex.quote(python)} -m fecproxy"
    env = {"PYTHONPATH": f"{ROOT}{os.pathsep}{sysconfig.get_paths()['purelib']}", "HOME": "/nonexistent"}
    ports = {name: _free_udp_port() for name in ("listen", "sender_link", "receiver_link", "forward")}
    # The configs an operator would have edited from the examples: a loopback pair with the key.
    configs = {
        "sender": f"role: sender\nlisten: 127.0.0.1:{ports['listen']}\n"
        f"link: {{bind: 127.0.0.1:{ports['sender_link']}, peer: 127.0.0.1:{ports['receiver_link']}}}\n"
        "fec: {block_size: 4, repair: 2, flush_ms: 20}\nauth: {key_file: link.key}\n",
        "receiver": f"role: receiver\nforward: 127.0.0.1:{ports['forward']}\n"
        f"link: {{bind: 127.0.0.1:{ports['receiver_link']}, peer: 127.0.0.1:{ports['sender_link']}}}\n"
        "fec: {block_size: 4, repair: 2, flush_ms: 20}\nauth: {key_file: link.key}\n",
    }
    for name, text in configs.items():
        (scratch_root / f"{name}.yaml").write_text(text)

    # README's lines, paths moved under the scratch root; useradd, the venv and systemctl are what
    # this machine cannot do (the user is `nobody`, the venv is this test's interpreter).
    done = []
    for step in readme_install_steps():
        if step.startswith(("useradd", "python3 -m venv", "systemctl")):
            continue
        command = (
            step.replace("/opt/fecproxy/bin/fecproxy", fecproxy)
            .replace("/etc/systemd/system/", f"{scratch_root}/")
            .replace("/etc/fecproxy", str(etc))
            .replace("-g fecproxy", f"-g {SERVICE_GROUP}")
            .replace("config/sender.yaml", str(scratch_root / "sender.yaml"))
            .replace("deploy/systemd/", f"{UNIT.parent}/")
        )
        if command.startswith("systemd-analyze"):
            continue  # below, once the unit points at this machine's files
        subprocess.run(command, shell=True, check=True, cwd=ROOT, env=os.environ | env, timeout=120)
        done.append(step.split()[0] if not step.startswith(("/opt", "fecproxy")) else " ".join(step.split()[:2]))
    assert any("keygen" in step for step in done) and any("check" in step for step in done)
    shutil.copy(scratch_root / "receiver.yaml", etc / "receiver.yaml")
    key = etc / "link.key"
    assert (key.stat().st_uid, key.stat().st_mode & 0o777) == (0, 0o600)  # root's own, as installed

    # systemd-analyze verify on the installed unit, pointed at this machine's entry point and key.
    unit = scratch_root / "fecproxy@.service"
    if shutil.which("systemd-analyze"):
        entry = shutil.which("fecproxy") or str(Path(sys.executable).parent / "fecproxy")
        unit.write_text(
            unit.read_text().replace("/opt/fecproxy/bin/fecproxy", entry).replace("/etc/fecproxy", str(etc))
        )
        instance = scratch_root / "fecproxy@sender.service"
        result = subprocess.run(
            ["systemd-analyze", "verify", str(instance)], capture_output=True, text=True, timeout=60
        )
        complaints = [line for line in (result.stdout + result.stderr).splitlines() if str(scratch_root) in line]
        assert result.returncode == 0 and complaints == [], result.stdout + result.stderr
    else:
        print("systemd-analyze not found: unit not verified")

    # What LoadCredential=link.key:/etc/fecproxy/link.key makes (systemd exec-credential.c,
    # write_credential): a 0400 copy; on a file system without ACLs, owned by the service user.
    [load] = [line for line in unit.read_text().splitlines() if line.startswith("LoadCredential=")]
    name, _, source = load.partition("=")[2].partition(":")
    assert Path(source) == key
    credentials = {}
    for instance in ("sender", "receiver"):
        folder = scratch_root / "run" / "credentials" / f"fecproxy@{instance}.service"
        folder.mkdir(parents=True)
        shutil.copy(key, folder / name)
        (folder / name).chmod(0o400)
        for path in (folder / name, folder):
            shutil.chown(path, SERVICE_USER, SERVICE_GROUP)
        folder.chmod(0o500)
        credentials[instance] = folder

    # The service user cannot read root's key file: without the credential the check fails ...
    plain = subprocess.run(
        _run_as_service_user([python, "-m", "fecproxy", "check", "-q", str(etc / "sender.yaml")], env),
        capture_output=True,
        text=True,
        timeout=60,
    )
    assert plain.returncode == 2 and "Permission denied" in plain.stderr, plain.stderr
    assert "LoadCredential=" in plain.stderr  # ... and says how a service gets the key
    # ... with it (as ExecStartPre runs it), it passes.
    for instance in ("sender", "receiver"):
        service_env = env | {"CREDENTIALS_DIRECTORY": str(credentials[instance])}
        argv = [python, "-m", "fecproxy", "check", "-q", str(etc / f"{instance}.yaml")]
        result = subprocess.run(_run_as_service_user(argv, service_env), capture_output=True, text=True, timeout=60)
        assert result.returncode == 0, result.stderr

    # The daemons as the unit's ExecStart runs them: traffic passes both ways with the key.
    server = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    client = socket.socket(socket.AF_INET, socket.SOCK_DGRAM)
    children = []
    try:
        server.bind(("127.0.0.1", ports["forward"]))
        server.settimeout(1.0)
        client.settimeout(1.0)
        for instance in ("receiver", "sender"):
            service_env = env | {"CREDENTIALS_DIRECTORY": str(credentials[instance])}
            argv = [python, "-m", "fecproxy", "run", str(etc / f"{instance}.yaml")]
            child = Child(_run_as_service_user(argv, service_env))
            children.append(child)
            child.wait_for(r"event=started", timeout=30)
        started = "\n".join(children[1].seen)
        assert re.search(r"fingerprint [0-9a-f]{16}", started), started
        delivered = reply = None
        deadline = time.monotonic() + DELIVERY_TIMEOUT_S
        while reply is None and time.monotonic() < deadline:
            client.sendto(b"reading 1", ("127.0.0.1", ports["listen"]))
            try:
                delivered, upstream = server.recvfrom(2048)
                server.sendto(b"ack 1", upstream)
                reply = client.recvfrom(2048)[0]
            except TimeoutError:
                continue
        assert (delivered, reply) == (b"reading 1", b"ack 1"), "\n".join(line for c in children for line in c.seen)
    finally:
        for child in children:
            child.stop()
        server.close()
        client.close()
