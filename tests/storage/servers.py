"""Real redis-server processes for storage tests: one server with chosen options, or a local cluster."""

from __future__ import annotations

import os
import shutil
import signal
import subprocess
import time
from dataclasses import dataclass, field
from pathlib import Path

import pytest
import redis
from conftest import free_port


def binary(name: str = "redis-server") -> str:
    if name == "redis-server" and os.environ.get("HOTBASIS_REDIS_SERVER"):
        return os.environ["HOTBASIS_REDIS_SERVER"]
    found = shutil.which(name)
    if not found and name == "redis-cli" and os.environ.get("HOTBASIS_REDIS_SERVER"):
        sibling = Path(os.environ["HOTBASIS_REDIS_SERVER"]).with_name("redis-cli")
        found = str(sibling) if sibling.exists() else None
    if not found:
        pytest.fail(
            f"{name} is not installed; `bash deploy/local.sh test` installs it (apt-get redis-server)"
        )
    return found


@dataclass
class RedisProcess:
    """One redis-server on 127.0.0.1:port with its files under ``workdir``; restartable on both."""

    workdir: Path
    port: int
    options: list[str] = field(default_factory=list)
    proc: subprocess.Popen | None = None

    def start(self, timeout: float = 15.0) -> None:
        self.workdir.mkdir(parents=True, exist_ok=True)
        args = [binary(), "--port", str(self.port), "--bind", "127.0.0.1", "--dir", str(self.workdir),
                "--save", "", "--daemonize", "no", "--loglevel", "warning", *self.options]  # fmt: skip
        self.proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        client = redis.Redis(host="127.0.0.1", port=self.port, socket_timeout=1)
        deadline = time.monotonic() + timeout
        try:
            while time.monotonic() < deadline:
                if self.proc.poll() is not None:
                    raise RuntimeError(f"redis-server on port {self.port} exited with {self.proc.returncode}")
                try:
                    client.ping()
                    return
                except (redis.ConnectionError, redis.TimeoutError):  # BusyLoading is a ConnectionError
                    time.sleep(0.05)
            raise RuntimeError(f"redis-server on port {self.port} did not answer within {timeout} s")
        finally:
            client.close()

    def signal(self, sig: int) -> None:
        assert self.proc is not None
        self.proc.send_signal(sig)

    def kill(self) -> None:
        """kill -9: no shutdown, no final fsync; only what is already on disk survives."""
        if self.proc is not None and self.proc.poll() is None:
            self.proc.send_signal(signal.SIGCONT)  # a stopped process must run to die
            self.proc.kill()
            self.proc.wait(timeout=10)

    def stop(self) -> None:
        if self.proc is None or self.proc.poll() is not None:
            return
        self.proc.send_signal(signal.SIGCONT)
        self.proc.terminate()
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()

    @property
    def url(self) -> str:
        return f"redis://127.0.0.1:{self.port}/0"


def start_single(workdir: Path, options: list[str] | None = None) -> RedisProcess:
    """A redis-server on a free port (retried if another process takes the port first)."""
    for _ in range(5):
        server = RedisProcess(workdir, free_port(), list(options or []))
        try:
            server.start()
            return server
        except RuntimeError:
            server.stop()
    pytest.fail("could not start redis-server on a free port")


def start_cluster(workdir: Path, masters: int = 3, timeout: float = 60.0) -> list[RedisProcess]:
    """``masters`` cluster-enabled servers joined by ``redis-cli --cluster create``, no replicas."""
    nodes: list[RedisProcess] = []
    try:
        for k in range(masters):
            opts = ["--cluster-enabled", "yes", "--cluster-config-file", "nodes.conf",
                    "--cluster-node-timeout", "5000", "--appendonly", "no"]  # fmt: skip
            nodes.append(start_single(workdir / f"node{k}", opts))
        addresses = [f"127.0.0.1:{n.port}" for n in nodes]
        subprocess.run(
            [
                binary("redis-cli"),
                "--cluster",
                "create",
                *addresses,
                "--cluster-replicas",
                "0",
                "--cluster-yes",
            ],
            check=True,
            stdout=subprocess.DEVNULL,
            stderr=subprocess.PIPE,
            timeout=timeout,
        )
        deadline = time.monotonic() + timeout
        for node in nodes:  # every node must see the whole cluster, not only the first one
            client = redis.Redis(host="127.0.0.1", port=node.port)
            while client.execute_command("CLUSTER INFO").get("cluster_state") != "ok":
                if time.monotonic() > deadline:
                    raise RuntimeError("the cluster did not reach cluster_state:ok")
                time.sleep(0.1)
            client.close()
        return nodes
    except BaseException:
        for node in nodes:
            node.stop()
        raise
