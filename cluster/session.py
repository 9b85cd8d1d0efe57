"""Starting or joining Ray: the embedded local default (every socket on 127.0.0.1) or a cluster.

The local default needs nothing installed or started by hand. On these machines Ray 2.60 listens
on every interface unless ``RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER=0`` is in the environment before it
starts (checked here: with it, every port was on 127.0.0.1), so :func:`start_local` sets it.
"""

from __future__ import annotations

import os
import socket
import subprocess
import sys
from pathlib import Path
from dataclasses import dataclass

from selfplay.errors import ConfigError

LOCAL_ONLY_ENV = "RAY_ENABLE_WINDOWS_OR_OSX_CLUSTER"


@dataclass(frozen=True)
class RaySession:
    """What the launcher connected to."""

    local: bool
    address: str
    cpus: int


def local_only_environment() -> None:
    """Make a Ray started by this process bind to 127.0.0.1 only (must run before Ray starts)."""
    os.environ[LOCAL_ONLY_ENV] = "0"
    ray_constants = sys.modules.get("ray._private.ray_constants")
    if ray_constants is not None:
        # Ray read the variable when it was imported; the processes it starts read it again from
        # the environment, but this process decides the node address from the constant.
        ray_constants.ENABLE_RAY_CLUSTER = False
    # Keep Ray's own usage report from trying to reach the network.
    os.environ.setdefault("RAY_USAGE_STATS_ENABLED", "0")


def start_local(num_cpus: int) -> RaySession:
    """Start a private Ray instance on this machine, bound to 127.0.0.1, with ``num_cpus`` CPUs."""
    local_only_environment()
    import logging

    import ray

    # Ray turns token authentication on for a new local instance and says so with a WARNING on
    # every start; keep the authentication, drop the notice (a healthy start prints no warning)
    logging.getLogger("ray._private.authentication.authentication_token_setup").setLevel(logging.ERROR)
    ray.init(
        address="local",
        num_cpus=num_cpus,
        include_dashboard=False,
        _node_ip_address="127.0.0.1",
        configure_logging=True,
        logging_level="WARNING",
        log_to_driver=True,
    )
    return RaySession(local=True, address="local", cpus=num_cpus)


def split_address(address: str) -> tuple[str, int]:
    """``host:port`` of a Ray cluster's head (GCS) address, or ConfigError naming what is wrong."""
    text = address.strip()
    if text.startswith("ray://"):
        raise ConfigError(
            f"--address {address!r}: Ray client addresses (ray://) are not supported; run "
            "`selfplay run` on a node of the cluster and give the head's host:port (e.g. 10.0.0.5:6379)"
        )
    host, sep, port_text = text.rpartition(":")
    if not sep or not host:
        raise ConfigError(f"--address {address!r} is not host:port (e.g. 10.0.0.5:6379), nor 'auto'")
    try:
        port = int(port_text)
    except ValueError:
        raise ConfigError(f"--address {address!r}: port {port_text!r} is not a number") from None
    if not 0 < port < 65536:
        raise ConfigError(f"--address {address!r}: port {port} is out of range 1..65535")
    return host.strip("[]"), port


def check_reachable(address: str, timeout: float = 3.0) -> None:
    """Fail fast, with the address and the reason, when nothing listens at a ``host:port``."""
    host, port = split_address(address)
    try:
        with socket.create_connection((host, port), timeout=timeout):
            pass
    except socket.gaierror as exc:
        raise ConfigError(f"--address {address!r}: host {host!r} is unknown ({exc.strerror})") from None
    except (TimeoutError, socket.timeout):
        raise ConfigError(f"--address {address!r}: no answer from {host}:{port} within {timeout:g} s") from None
    except OSError as exc:
        raise ConfigError(
            f"--address {address!r}: cannot reach a Ray head at {host}:{port} ({exc.strerror or exc})"
        ) from None


def join_cluster(address: str) -> RaySession:
    """Connect this driver to a running Ray cluster (``host:port`` or ``auto``)."""
    if address != "auto":
        check_reachable(address)
    import ray

    try:
        ray.init(address=address, include_dashboard=False, logging_level="WARNING")
    except (ConnectionError, RuntimeError, ValueError) as exc:
        raise ConfigError(f"--address {address!r}: cannot join the Ray cluster: {exc}") from None
    cpus = int(ray.cluster_resources().get("CPU", 0))
    return RaySession(local=False, address=address, cpus=cpus)


def cluster_cpus() -> int:
    """CPUs the cluster has right now (all alive nodes)."""
    import ray

    return int(ray.cluster_resources().get("CPU", 0))


def local_helper_pids() -> set[int]:
    """Pids of the processes below this one (a local Ray's helpers: GCS, raylet, workers), from /proc."""
    parent: dict[int, int] = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            parent[int(stat.parent.name)] = int(stat.read_text().rsplit(")", 1)[1].split()[1])
        except (OSError, ValueError, IndexError):
            continue
    out: set[int] = set()
    frontier = {os.getpid()}
    while frontier:
        frontier = {pid for pid, pp in parent.items() if pp in frontier} - out
        out |= frontier
    return out


#: the reaper: reads "pid:starttime" items from stdin until the driver is gone (EOF, however the
#: driver ended), then ends those of them still running (a reused pid has another start time)
_REAPER = r"""
import os, signal, sys, time
pids = {}
for line in sys.stdin:
    for item in line.split():
        pid, start = item.split(":")
        pids[int(pid)] = start
time.sleep(0.5)
for pid, start in pids.items():
    try:
        with open(f"/proc/{pid}/stat") as f:
            now = f.read().rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        continue
    if now == start:
        try:
            os.kill(pid, signal.SIGKILL)
        except OSError:
            pass
"""

_reaper: "subprocess.Popen[bytes] | None" = None


def _start_time(pid: int) -> str | None:
    try:
        return Path(f"/proc/{pid}/stat").read_text().rsplit(")", 1)[1].split()[19]
    except (OSError, IndexError):
        return None


def note_helpers() -> set[int]:
    """Hand the local Ray's helper processes (everything below this process now) to the reaper,
    which ends them when this process is gone — also after a SIGKILL, when Ray cannot clean up
    itself (seen: its dashboard and runtime-env agents outlive a killed driver). Returns the pids."""
    global _reaper
    pids = local_helper_pids()
    if _reaper is None or _reaper.poll() is not None:
        _reaper = subprocess.Popen([sys.executable, "-c", _REAPER], stdin=subprocess.PIPE, start_new_session=True,
                                   stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    pids.discard(_reaper.pid)
    items = [f"{pid}:{start}" for pid in sorted(pids) if (start := _start_time(pid)) is not None]
    assert _reaper.stdin is not None
    _reaper.stdin.write((" ".join(items) + "\n").encode())
    _reaper.stdin.flush()
    return pids


def reaping() -> bool:
    """True when this process started a local Ray whose helpers the reaper watches."""
    return _reaper is not None


def shutdown() -> None:
    global _reaper
    import ray

    if ray.is_initialized():
        ray.shutdown()
    if _reaper is not None:
        assert _reaper.stdin is not None
        _reaper.stdin.close()  # the reaper ends what Ray left, then exits
        _reaper.wait(timeout=30)
        _reaper = None
