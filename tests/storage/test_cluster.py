"""The API's core scenarios against a real 3-master Redis Cluster (redis-py's cluster client).

The scenarios are the API suite's own test functions, imported here so they are
collected a second time with ``redis_url`` and ``rclient`` pointing at the
cluster: the same assertions, a different store topology.
"""

from __future__ import annotations

import pytest
import redis
from api.test_models import (  # noqa: F401  (collected again here, against the cluster)
    test_create_solves_cold_and_stores_version_one,
    test_delete,
    test_get_returns_document_and_result,
    test_history_keeps_the_last_twenty_versions,
    test_list_is_paginated,
    test_other_tenants_get_404,
)
from api.test_patch import (  # noqa: F401
    test_concurrent_patches_are_serialized_and_none_is_lost,
    test_idempotency_key_replays_without_applying_again,
    test_idempotent_create_and_recovery_after_a_lost_record,
    test_if_match,
    test_profitable_variable_is_reoptimized_warm_by_primal_simplex,
    test_violated_constraint_is_reoptimized_warm_by_dual_simplex,
)
from conftest import auth, juice_network
from redis.cluster import ClusterNode, RedisCluster

from service.store import Store, connect

from .servers import start_cluster

pytestmark = pytest.mark.slow


@pytest.fixture(scope="module")
def cluster(tmp_path_factory):
    nodes = start_cluster(tmp_path_factory.mktemp("cluster"))
    yield nodes
    for node in nodes:
        node.stop()


@pytest.fixture
def redis_url(cluster):
    url = "redis+cluster://" + ",".join(f"127.0.0.1:{n.port}" for n in cluster[:2])
    client = connect(url)
    client.flushall()  # the cluster client sends FLUSHALL to every primary
    client.close()
    return url


class AllPrimaries(RedisCluster):
    """The tests' own cluster client: KEYS always asks every primary.

    (redis-py routes a pattern that contains a hash tag, such as ``{hbi:*``, to
    one slot's node; the tests mean every key in the cluster.)
    """

    def keys(self, pattern="*", **kwargs):
        kwargs.setdefault("target_nodes", RedisCluster.PRIMARIES)
        return super().keys(pattern, **kwargs)


@pytest.fixture
def rclient(redis_url, cluster):
    client = AllPrimaries(startup_nodes=[ClusterNode("127.0.0.1", n.port) for n in cluster])
    yield client
    client.close()


def test_the_url_selects_the_cluster_client_and_keys_spread_over_the_masters(app, client, rclient, cluster):
    assert isinstance(app.extensions["hotbasis"].service.store.r, RedisCluster)
    ids = [
        client.post("/v1/models", json=juice_network(), headers=auth()).get_json()["id"] for _ in range(12)
    ]
    # every key of one model is in one slot (hash tag), and the models spread over the 3 masters
    slots = {mid: {rclient.keyslot(k) for k in rclient.keys(f"{{hb:{mid}}}*")} for mid in ids}
    assert all(slots.values())
    assert all(len(s) == 1 for s in slots.values())
    owners = set()
    for mid in ids:  # ask the owning master directly, without the cluster client
        port = rclient.get_node_from_key(Store._head(mid)).port
        plain = redis.Redis(host="127.0.0.1", port=port)
        assert plain.exists(Store._head(mid), Store._ver(mid, 1)) == 2
        plain.close()
        owners.add(port)
    assert owners <= {n.port for n in cluster}
    assert len(owners) >= 2  # 12 random ids on 3 masters: all on one has probability 3 * 3**-12
