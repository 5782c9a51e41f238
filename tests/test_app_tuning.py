"""Process-wide tuning done by create_app: glibc's malloc settings (service.app.tune_malloc)."""

from __future__ import annotations

import os
import platform
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
PROBE = "from service.app import tune_malloc; print(tune_malloc(), tune_malloc())"


def _probe(**env: str) -> str:
    out = subprocess.run(
        [sys.executable, "-c", PROBE], cwd=ROOT, env={**os.environ, **env}, capture_output=True, text=True, check=True
    )
    return out.stdout.strip()


@pytest.mark.skipif(platform.system() != "Linux" or platform.libc_ver()[0] != "glibc", reason="glibc only")
def test_malloc_settings_apply_once_per_process():
    assert _probe() == "True False"  # applied by the first call (mallopt accepted all three), not again


def test_malloc_tuning_can_be_turned_off():
    assert _probe(HOTBASIS_MALLOC_TUNING="0") == "False False"
