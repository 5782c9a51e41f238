"""redis+sentinel:// URLs: the app finds the primary through a real redis-sentinel process."""

from __future__ import annotations

import subprocess
import time

import pytest
import redis
from conftest import TENANT_KEYS, auth, free_port, juice_network

from service.app import create_app
from service.store import Store

from .servers import binary, start_single

pytestmark = pytest.mark.slow


def test_the_app_reaches_the_primary_named_by_the_sentinels(tmp_path):
    data = start_single(tmp_path / "primary")
    port = free_port()
    conf = tmp_path / "sentinel.conf"  # the sentinel rewrites its own config file, so it gets a copy
    conf.write_text(
        f"port {port}\nbind 127.0.0.1\ndir {tmp_path}\nsentinel monitor hbmain 127.0.0.1 {data.port} 1\n"
    )
    sentinel = subprocess.Popen(
        [binary(), str(conf), "--sentinel"], stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL
    )
    try:
        probe = redis.Redis(host="127.0.0.1", port=port, socket_timeout=1)
        deadline = time.monotonic() + 15
        while True:
            try:
                if probe.execute_command("SENTINEL GET-MASTER-ADDR-BY-NAME", "hbmain"):
                    break
            except redis.ConnectionError:
                pass
            assert time.monotonic() < deadline, "the sentinel did not come up"
            time.sleep(0.1)
        keys = {key: tenant for tenant, key in TENANT_KEYS.items()}
        app = create_app(
            {"TESTING": True, "REDIS_URL": f"redis+sentinel://127.0.0.1:{port}/hbmain/0", "API_KEYS": keys}
        )
        client = app.test_client()
        created = client.post("/v1/models", json=juice_network(), headers=auth())
        assert created.status_code == 201
        mid = created.get_json()["id"]
        assert client.get("/readyz").status_code == 200
        # the model is on the primary the sentinel named
        direct = redis.Redis(host="127.0.0.1", port=data.port)
        assert direct.hget(Store._head(mid), "version") == b"1"
        direct.close()
        probe.close()
    finally:
        sentinel.terminate()
        sentinel.wait(timeout=10)
        data.stop()
