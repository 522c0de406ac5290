"""The service fixes glibc's malloc thresholds (streamrate.heap)."""

from __future__ import annotations

import os
import subprocess
import sys

import pytest

from streamrate.heap import fix_malloc_thresholds

PROBE = "from streamrate.heap import fix_malloc_thresholds as f; print(f())"


def _libc_is_glibc() -> bool:
    return sys.platform.startswith("linux") and os.confstr("CS_GNU_LIBC_VERSION") is not None


@pytest.mark.skipif(not _libc_is_glibc(), reason="mallopt is glibc's")
def test_the_thresholds_are_set_in_a_fresh_process() -> None:
    env = {k: v for k, v in os.environ.items() if not k.startswith("MALLOC_")}
    out = subprocess.run([sys.executable, "-c", PROBE], env=env, capture_output=True, text=True)
    assert out.stdout.strip() == "True", out.stderr


def test_a_threshold_set_by_the_user_is_left_alone() -> None:
    env = {**os.environ, "MALLOC_MMAP_THRESHOLD_": "65536"}
    out = subprocess.run([sys.executable, "-c", PROBE], env=env, capture_output=True, text=True)
    assert out.stdout.strip() == "False", out.stderr


def test_it_can_be_called_twice() -> None:
    first = fix_malloc_thresholds()
    assert fix_malloc_thresholds() == first
