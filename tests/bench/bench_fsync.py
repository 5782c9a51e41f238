"""PATCH latency with the AOF fsynced on every write against once a second, measured in one run.

    python -m tests.bench.bench_fsync [--patches 40] [--rows 2000] [--dir .local/bench-fsync]

For each policy (appendfsync always, everysec) a fresh redis-server with its
AOF under --dir (put it on the disk production would use; a tmpfs makes fsync
free), the Flask app in this process, then: a tiny model (7 variables) and a
generated supply-chain model (--rows), each PATCHed --patches times with a bound
change that stores a whole new version but needs no pivot, so the figures are
storage-bound. Prints the median and 90th percentile per model and policy.
"""

from __future__ import annotations

import argparse
import shutil
import statistics
import sys
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))  # tests/ for the shared helpers

from conftest import TENANT_KEYS, auth, juice_network  # noqa: E402
from storage.servers import start_single  # noqa: E402

from service.app import create_app  # noqa: E402
from service.document import to_document  # noqa: E402
from service.scenarios.supply_chain import sized  # noqa: E402


def run(policy: str, workdir: Path, patches: int, rows: int) -> dict[str, list[float]]:
    shutil.rmtree(workdir, ignore_errors=True)
    server = start_single(workdir, ["--appendonly", "yes", "--appendfsync", policy])
    try:
        keys = {key: tenant for tenant, key in TENANT_KEYS.items()}
        client = create_app({"REDIS_URL": server.url, "API_KEYS": keys, "LOG_LEVEL": "WARNING"}).test_client()
        out = {}
        big = to_document(sized(rows, seed=0))
        for label, doc in (("7 variables", juice_network()), (f"{rows} rows", big)):
            created = client.post("/v1/models?solution=none", json=doc, headers=auth())
            assert created.status_code == 201, created.get_json()
            mid = created.get_json()["id"]
            var = next(iter(doc["variables"]))
            times = []
            for i in range(patches):
                body = {"variables": {var: {"upper": 1e7 + i}}}
                t = time.perf_counter()
                resp = client.patch(
                    f"/v1/models/{mid}?fields=solve",
                    json=body,
                    headers={**auth(), "Content-Type": "application/merge-patch+json"},
                )
                times.append(time.perf_counter() - t)
                assert resp.status_code == 200, resp.get_json()
            out[label] = times
        return out
    finally:
        server.stop()


def main() -> None:
    ap = argparse.ArgumentParser()
    ap.add_argument("--patches", type=int, default=40)
    ap.add_argument("--rows", type=int, default=2000)
    ap.add_argument("--dir", default=".local/bench-fsync")
    args = ap.parse_args()
    base = Path(args.dir).resolve()
    print(f"{'model':<14} {'appendfsync':<12} {'median ms':>10} {'p90 ms':>8}")
    for policy in ("everysec", "always"):
        for label, times in run(policy, base / policy, args.patches, args.rows).items():
            ms = sorted(t * 1000 for t in times)
            p90 = ms[int(0.9 * (len(ms) - 1))]
            print(f"{label:<14} {policy:<12} {statistics.median(ms):>10.1f} {p90:>8.1f}")
    shutil.rmtree(base, ignore_errors=True)


if __name__ == "__main__":
    main()
