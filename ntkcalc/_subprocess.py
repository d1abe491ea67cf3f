"""Benchmark rows in fresh processes: each child's peak RSS and compile caches are its own."""

from __future__ import annotations

import json
import os
import subprocess
import sys


def run_child(module: str, argv: list[str], *, devices: int | None = None,
              timeout: float = 3600) -> dict:
    """Run ``python -m module *argv`` in a fresh process and parse the JSON object on the last
    line of its stdout. ``devices``: force that many host (CPU) devices in the child."""
    env = dict(os.environ)
    env.pop("XLA_FLAGS", None)
    if devices:
        env["XLA_FLAGS"] = f"--xla_force_host_platform_device_count={devices}"
    proc = subprocess.run([sys.executable, "-m", module, *argv], env=env, capture_output=True,
                          text=True, timeout=timeout)
    if proc.returncode != 0:
        raise RuntimeError(f"benchmark child `{module} {' '.join(argv)}` failed:\n"
                           f"{proc.stdout}\n{proc.stderr}")
    return json.loads(proc.stdout.strip().splitlines()[-1])
