"""Shared fixtures: the mock stand on a real pseudo-terminal, and running the CLI as a user."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest


def run_cli(*args: str, log_dir=None, timeout: float = 240, input: str | None = None,
            env_extra: dict | None = None, preexec_fn=None) -> subprocess.CompletedProcess:
    """Run `tetherloop ARGS` in a child process, as a user would."""
    env = dict(os.environ)
    if log_dir is not None:
        env["TETHERLOOP_LOG_DIR"] = str(log_dir)
    env.update(env_extra or {})
    return subprocess.run([sys.executable, "-m", "agent.cli", *args], capture_output=True,
                          text=True, timeout=timeout, input=input if input is not None else "",
                          env=env, preexec_fn=preexec_fn)


@pytest.fixture
def mock_pty():
    """Factory: start the mock board on a pty; stopped at the end of the test."""
    from mock_device.runner import start_mock
    handles = []

    def start(scenario="gimbal-quad", speed=5.0, seed=1, **kw):
        h = start_mock(scenario, transport="pty", speed=speed, seed=seed, **kw)
        handles.append(h)
        return h

    yield start
    for h in handles:
        h.stop()


def wait_for(cond, timeout: float = 60.0, poll: float = 0.01) -> bool:
    """Poll ``cond()`` until it is true or ``timeout`` seconds pass; True when it became true."""
    import time
    end = time.monotonic() + timeout
    while time.monotonic() < end:
        if cond():
            return True
        time.sleep(poll)
    return False
