"""Readers for the deployment files, shared by the tests in tests/deploy."""

from __future__ import annotations

import json
import shlex
import shutil
import sys
from dataclasses import dataclass, field
from pathlib import Path

import yaml

ROOT = Path(__file__).resolve().parents[2]
DEPLOY = ROOT / "deploy"
DOCKERFILE = DEPLOY / "Dockerfile"
COMPOSE = DEPLOY / "compose.yaml"
K8S = DEPLOY / "k8s"


@dataclass
class Dockerfile:
    """The instructions of a Dockerfile, continuation lines joined, comments dropped."""

    instructions: list[tuple[str, str]] = field(default_factory=list)

    @classmethod
    def read(cls, path: Path = DOCKERFILE) -> Dockerfile:
        out, pending = cls(), ""
        for raw in path.read_text().splitlines():
            line = raw.strip()
            if not pending and (not line or line.startswith("#")):
                continue
            if line.startswith("#"):  # a comment inside a continued instruction
                continue
            if line.endswith("\\"):
                pending += line[:-1] + " "
                continue
            full = (pending + line).strip()
            pending = ""
            word, _, rest = full.partition(" ")
            out.instructions.append((word.upper(), rest.strip()))
        return out

    def all(self, word: str) -> list[str]:
        return [rest for w, rest in self.instructions if w == word]

    def last(self, word: str) -> str | None:
        found = self.all(word)
        return found[-1] if found else None

    def argv(self, word: str) -> list[str]:
        """The exec form (JSON array) of CMD or ENTRYPOINT, or the shell form split like sh would."""
        rest = self.last(word)
        if rest is None:
            return []
        return json.loads(rest) if rest.startswith("[") else ["/bin/sh", "-c", rest]

    def command(self) -> list[str]:
        """What the container runs: ENTRYPOINT followed by CMD."""
        return self.argv("ENTRYPOINT") + self.argv("CMD")

    def env(self) -> dict[str, str]:
        """ENV key=value pairs (the form this project uses)."""
        out: dict[str, str] = {}
        for rest in self.all("ENV"):
            for item in shlex.split(rest):
                key, sep, value = item.partition("=")
                assert sep, f"ENV without '=': {rest}"
                out[key] = value
        return out

    def healthcheck_argv(self) -> list[str]:
        rest = self.last("HEALTHCHECK") or ""
        _, _, cmd = rest.partition("CMD ")
        return json.loads(cmd) if cmd.strip().startswith("[") else ["/bin/sh", "-c", cmd]


def k8s_documents() -> list[tuple[Path, dict]]:
    docs = []
    for path in sorted(K8S.glob("*.yaml")):
        for doc in yaml.safe_load_all(path.read_text()):
            if doc:
                docs.append((path, doc))
    return docs


def tool(name: str) -> str | None:
    """A console script installed beside this interpreter (the .venv), else on PATH."""
    beside = Path(sys.executable).parent / name
    return str(beside) if beside.exists() else shutil.which(name)
