"""One orchestrator per campaign: the lock file in the campaign folder."""

from __future__ import annotations

import os
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import pytest

from sortie.errors import CampaignError
from sortie.lock import LOCK_NAME, CampaignLock

HOLD = """
import sys, time
from sortie.lock import CampaignLock
lock = CampaignLock(sys.argv[1]).acquire()
print("held", flush=True)
time.sleep(600)
"""


def _holder(directory: Path) -> subprocess.Popen[str]:
    proc = subprocess.Popen([sys.executable, "-c", HOLD, str(directory)], stdout=subprocess.PIPE, text=True)
    assert proc.stdout is not None and proc.stdout.readline().strip() == "held"
    return proc


def test_a_second_orchestrator_is_refused_with_the_holders_host_and_pid(tmp_path: Path) -> None:
    proc = _holder(tmp_path)
    try:
        with pytest.raises(CampaignError) as err:
            CampaignLock(tmp_path).acquire()
        message = str(err.value)
        assert f"pid {proc.pid}" in message and socket.gethostname() in message
        assert "\n" not in message
    finally:
        proc.kill()
        proc.wait()


def test_a_lock_left_by_a_killed_orchestrator_is_taken_over_with_a_message(tmp_path: Path) -> None:
    proc = _holder(tmp_path)
    os.kill(proc.pid, signal.SIGKILL)  # no clean-up runs: the file still names the dead holder
    proc.wait()
    assert str(proc.pid) in (tmp_path / LOCK_NAME).read_text()
    with CampaignLock(tmp_path) as lock:
        message = lock.stale_message()
        assert message is not None and f"pid {proc.pid}" in message
        assert str(os.getpid()) in (tmp_path / LOCK_NAME).read_text()


def test_a_cleanly_released_lock_is_not_reported_as_stale(tmp_path: Path) -> None:
    with CampaignLock(tmp_path):
        pass
    with CampaignLock(tmp_path) as again:
        assert again.stale_message() is None
    assert (tmp_path / LOCK_NAME).read_text() == ""


def test_the_lock_is_free_again_once_its_holder_ends(tmp_path: Path) -> None:
    proc = _holder(tmp_path)
    proc.terminate()
    proc.wait()
    started = time.monotonic()
    with CampaignLock(tmp_path):
        assert time.monotonic() - started < 1.0
