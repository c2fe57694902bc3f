"""Headless Chromium for the browser tests: pages opened as a reader would open them.

Needs Debian's ``chromium`` (installed by ``.ci/install-browser``). Without it the browser
tests skip locally and fail under CI (``CI`` set), so a CI machine without a browser cannot
pass silently. Importable from any test module: ``tests/conftest.py`` puts this folder on
the import path.
"""

from __future__ import annotations

import os
import signal
import subprocess
from pathlib import Path

import pytest

CHROMIUM = Path("/usr/bin/chromium")
TIMEOUT_SECONDS = 120
FLAGS = (
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
)


def require_chromium() -> None:
    """Skip the calling test without Chromium; fail it under CI."""
    if CHROMIUM.exists():
        return
    message = f"{CHROMIUM} is missing; run .ci/install-browser"
    if os.environ.get("CI"):
        pytest.fail(message)
    pytest.skip(message)


def run_chromium(profile: Path, *args: str) -> str:
    """Run Chromium once, kill its process group if it hangs, and return its stdout."""
    command = [str(CHROMIUM), *FLAGS, f"--user-data-dir={profile}", *args]
    with subprocess.Popen(
        command,
        stdout=subprocess.PIPE,
        stderr=subprocess.PIPE,
        text=True,
        start_new_session=True,
    ) as process:
        try:
            out, err = process.communicate(timeout=TIMEOUT_SECONDS)
        except subprocess.TimeoutExpired:
            os.killpg(process.pid, signal.SIGKILL)
            process.communicate()
            pytest.fail(f"chromium did not finish within {TIMEOUT_SECONDS} s")
    assert process.returncode == 0, err[-2000:]
    return out
