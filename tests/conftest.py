"""Shared fixtures: a throwaway real redis-server, the Flask app and its test client."""

from __future__ import annotations

import os
import shutil
import socket
import subprocess
import time
from pathlib import Path

import pytest
import redis

TENANT_KEYS = {"acme": "acme-test-key-0123456789", "globex": "globex-test-key-9876543210"}


def free_port() -> int:
    with socket.socket(socket.AF_INET, socket.SOCK_STREAM) as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def start_redis(workdir: Path, appendonly: bool = False) -> tuple[subprocess.Popen, int]:
    """Start redis-server on a free loopback port with its files under ``workdir``."""
    binary = os.environ.get("HOTBASIS_REDIS_SERVER") or shutil.which("redis-server")
    if not binary:
        pytest.fail("redis-server is not installed; `bash deploy/local.sh test` installs it (apt-get)")
    workdir.mkdir(parents=True, exist_ok=True)
    for _ in range(5):
        port = free_port()
        args = [binary, "--port", str(port), "--bind", "127.0.0.1", "--dir", str(workdir), "--save", "",
                "--appendonly", "yes" if appendonly else "no", "--daemonize", "no", "--loglevel", "warning"]
        proc = subprocess.Popen(args, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE)
        client = redis.Redis(host="127.0.0.1", port=port)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and proc.poll() is None:
            try:
                client.ping()
                return proc, port
            except redis.ConnectionError:
                time.sleep(0.05)
        proc.kill()
        proc.wait()
    pytest.fail("could not start redis-server on a free port")


def stop_redis(proc: subprocess.Popen) -> None:
    proc.terminate()
    try:
        proc.wait(timeout=10)
    except subprocess.TimeoutExpired:
        proc.kill()
        proc.wait()


@pytest.fixture(scope="session")
def redis_server(tmp_path_factory):
    proc, port = start_redis(tmp_path_factory.mktemp("redis"))
    yield f"redis://127.0.0.1:{port}/0"
    stop_redis(proc)


@pytest.fixture
def redis_url(redis_server):
    client = redis.Redis.from_url(redis_server)
    client.flushall()
    client.close()
    return redis_server


@pytest.fixture
def rclient(redis_url):
    client = redis.Redis.from_url(redis_url)
    yield client
    client.close()


@pytest.fixture
def app(redis_url):
    from service.app import create_app

    return create_app(
        {
            "TESTING": True,
            "REDIS_URL": redis_url,
            "API_KEYS": {key: tenant for tenant, key in TENANT_KEYS.items()},
        }
    )


@pytest.fixture
def client(app):
    return app.test_client()


def auth(tenant: str = "acme") -> dict[str, str]:
    return {"Authorization": f"Bearer {TENANT_KEYS[tenant]}"}


def snapshot(client: redis.Redis) -> dict[bytes, bytes]:
    """Every key's serialized value: compare before and after to prove nothing changed."""
    return {key: client.dump(key) for key in sorted(client.keys("*"))}
