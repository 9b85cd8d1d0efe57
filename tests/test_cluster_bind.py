"""The embedded local Ray listens on 127.0.0.1 only (DESIGN.md, "Reliability rules": local mode
binds every socket to 127.0.0.1)."""

from __future__ import annotations

import ipaddress
import os

from pathlib import Path

import pytest

from cluster import session

pytestmark = [pytest.mark.ray, pytest.mark.slow]


def _descendants(root: int) -> set[int]:
    """Pids of every process below ``root`` (read from /proc)."""
    parent: dict[int, int] = {}
    for stat in Path("/proc").glob("[0-9]*/stat"):
        try:
            text = stat.read_text()
        except OSError:
            continue
        ppid = int(text.rsplit(")", 1)[1].split()[1])
        parent[int(stat.parent.name)] = ppid
    out, frontier = set(), {root}
    while frontier:
        frontier = {pid for pid, pp in parent.items() if pp in frontier} - out
        out |= frontier
    return out


def _socket_inodes(pid: int) -> set[int]:
    inodes = set()
    for fd in Path(f"/proc/{pid}/fd").glob("*"):
        try:
            target = os.readlink(fd)
        except OSError:
            continue
        if target.startswith("socket:["):
            inodes.add(int(target[8:-1]))
    return inodes


def _decode_addr(hex_addr: str) -> str:
    """An address of /proc/net/tcp{,6} (little-endian 32-bit words) as text."""
    raw = bytes.fromhex(hex_addr)
    words = b"".join(raw[i:i + 4][::-1] for i in range(0, len(raw), 4))
    return str(ipaddress.ip_address(words))


def _listening(pids: set[int]) -> list[tuple[str, int, int]]:
    """(ip, port, pid) of every TCP socket in LISTEN state (st 0A) held by one of ``pids``."""
    owner = {inode: pid for pid in pids for inode in _socket_inodes(pid)}
    out = []
    for table in ("/proc/net/tcp", "/proc/net/tcp6"):
        for line in Path(table).read_text().splitlines()[1:]:
            cols = line.split()
            local, state, inode = cols[1], cols[3], int(cols[9])
            if state == "0A" and inode in owner:
                ip_hex, port_hex = local.split(":")
                out.append((_decode_addr(ip_hex), int(port_hex, 16), owner[inode]))
    return out


def _is_loopback(ip: str) -> bool:
    addr = ipaddress.ip_address(ip)
    if isinstance(addr, ipaddress.IPv6Address) and addr.ipv4_mapped is not None:
        addr = addr.ipv4_mapped
    return addr.is_loopback


def test_local_ray_listens_on_loopback_only():
    import ray  # imported before the launcher sets the variable: start_local must still bind locally

    session.start_local(num_cpus=2)
    try:
        @ray.remote(num_cpus=1)
        def pid() -> int:
            return os.getpid()

        # Start a worker process or two so their listening sockets exist as well.
        worker_pids = set(ray.get([pid.remote() for _ in range(4)]))
        ray_pids = _descendants(os.getpid()) | worker_pids
        sockets = _listening(ray_pids)
        assert sockets, "found no listening socket of the Ray processes: the check would prove nothing"
        assert len({pid for _, _, pid in sockets}) >= 2, sockets
        public = [s for s in sockets if not _is_loopback(s[0])]
        assert public == [], f"Ray listens beyond 127.0.0.1: {public}"
    finally:
        session.shutdown()
    assert os.environ[session.LOCAL_ONLY_ENV] == "0"


def test_bad_addresses_are_refused_before_connecting():
    from selfplay.errors import ConfigError

    with pytest.raises(ConfigError, match="not host:port"):
        session.split_address("nohostport")
    with pytest.raises(ConfigError, match="port 'x6379' is not a number"):
        session.split_address("10.0.0.5:x6379")
    with pytest.raises(ConfigError, match="out of range"):
        session.split_address("10.0.0.5:70000")
    # A port on this machine where nothing listens: refused at once, and the message names it.
    import socket

    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        free_port = s.getsockname()[1]
    with pytest.raises(ConfigError, match=f"127.0.0.1:{free_port}"):
        session.check_reachable(f"127.0.0.1:{free_port}")
