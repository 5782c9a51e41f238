"""Load comparison, measured in one run: hotbasis (warm re-optimization) against a stateless peer.

    bash deploy/local.sh up                     # the service, as it runs for users
    .venv/bin/python -m tests.load.run          # 16 clients x 60 s against each, then the table

Each of the N clients owns one ~2,000-row supply-chain model (sized(2000, seed=k)) and adds one
constraint that cuts off its current plan, again and again, without pause. Against hotbasis the
change is a PATCH; against the peer (tests/load/peer.py, scipy.optimize.linprog in two gunicorn
processes, one per core) the client sends the whole changed model. Setup (creating the models) is
not measured: the window starts when every client has its model.
"""

from __future__ import annotations

import argparse
import json
import os
import signal
import socket
import subprocess
import sys
import tempfile
import time
import urllib.request
from pathlib import Path

ROOT = Path(__file__).resolve().parents[2]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


def wait_ready(url: str, timeout: float = 60) -> None:
    deadline = time.monotonic() + timeout
    while True:
        try:
            with urllib.request.urlopen(url, timeout=2):
                return
        except urllib.error.HTTPError:
            return  # it answers
        except OSError:
            if time.monotonic() > deadline:
                raise SystemExit(f"{url} does not answer") from None
            time.sleep(0.2)


def run_locust(user_class: str, host: str, users: int, seconds: int, env: dict[str, str]) -> dict:
    with tempfile.TemporaryDirectory() as tmp:
        summary = Path(tmp) / "summary.json"
        locust = Path(sys.executable).parent / "locust"
        cmd = [
            str(locust) if locust.exists() else "locust",
            "-f", str(ROOT / "tests" / "load" / "locustfile.py"),
            "--headless", "-u", str(users), "-r", str(users), "-t", f"{seconds}s",
            "--host", host, "--only-summary", "--loglevel", "WARNING", "--exit-code-on-error", "0",
            user_class,
        ]  # fmt: skip
        subprocess.run(cmd, cwd=ROOT, env={**env, "LOAD_SUMMARY": str(summary)}, check=True)
        return json.loads(summary.read_text())


def default_key() -> str:
    keys = os.environ.get("HOTBASIS_API_KEYS", "")
    if keys:
        return keys.split(",")[0].split(":", 1)[1].strip()
    return (ROOT / ".local" / "api-keys").read_text().splitlines()[0].split(":", 1)[1].strip()


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--url", default="http://127.0.0.1:8750", help="hotbasis, started by local.sh up")
    parser.add_argument("--key", default=None, help="API key (default: .local/api-keys)")
    parser.add_argument("--users", type=int, default=16)
    parser.add_argument("--seconds", type=int, default=60, help="measured seconds per target")
    parser.add_argument("--setup-seconds", type=int, default=20, help="allowance for creating the models")
    parser.add_argument("--rows", type=int, default=2000)
    parser.add_argument("--only", choices=("both", "hotbasis", "peer"), default="both")
    parser.add_argument("--peer-workers", type=int, default=2)
    parser.add_argument("--json", help="also write the figures to this file")
    args = parser.parse_args(argv)

    env = {**os.environ, "LOAD_ROWS": str(args.rows), "PYTHONPATH": str(ROOT)}
    total = args.seconds + args.setup_seconds
    results: dict[str, dict] = {}
    if args.only in ("both", "hotbasis"):
        wait_ready(args.url + "/readyz")
        env["LOAD_API_KEY"] = args.key or default_key()
        results["hotbasis"] = run_locust("HotbasisClient", args.url, args.users, total, env)
    if args.only in ("both", "peer"):
        port = free_port()
        peer = subprocess.Popen(
            [sys.executable, "-m", "gunicorn", "-w", str(args.peer_workers), "-k", "sync",
             "-b", f"127.0.0.1:{port}", "--timeout", "300", "--log-level", "warning", "tests.load.peer:app"],
            cwd=ROOT, env=env,
        )  # fmt: skip
        try:
            wait_ready(f"http://127.0.0.1:{port}/")
            results["peer"] = run_locust("PeerClient", f"http://127.0.0.1:{port}", args.users, total, env)
        finally:
            peer.send_signal(signal.SIGTERM)
            peer.wait(timeout=30)

    print(f"\n{args.users} clients, ~{args.rows}-row models, one added constraint per change, "
          f"{args.seconds} s measured per target")  # fmt: skip
    print(
        f"{'target':<10} {'changes/s':>10} {'p50 ms':>8} {'p99 ms':>8} {'errors':>7} {'changes':>8} {'pivots':>7}"
    )
    for name, r in results.items():
        pivots = "" if r.get("mean_pivots") is None else f"{r['mean_pivots']:.1f}"
        print(f"{name:<10} {r['per_second']:>10.1f} {r['p50_ms'] or 0:>8.0f} {r['p99_ms'] or 0:>8.0f} "
              f"{r['errors']:>7} {r['changes_ok']:>8} {pivots:>7}")  # fmt: skip
    if len(results) == 2 and results["peer"]["per_second"]:
        print(
            f"throughput ratio hotbasis / peer: {results['hotbasis']['per_second'] / results['peer']['per_second']:.2f}"
        )
    if "hotbasis" in results:
        print("hotbasis methods:", results["hotbasis"]["methods"])
    if args.json:
        Path(args.json).write_text(json.dumps(results, indent=2))
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
