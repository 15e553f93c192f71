"""The worker allocator setting: applied once per process, on glibc only, results unchanged."""

from __future__ import annotations

import platform
import subprocess
import sys

import pytest

GLIBC = platform.system() == "Linux" and platform.libc_ver()[0] == "glibc"


@pytest.mark.skipif(not GLIBC, reason="mallopt is glibc's")
def test_thresholds_are_accepted_and_applied_once():
    # In a fresh interpreter: the setting changes the whole process, so keep it out of pytest's.
    # glibc's mallopt returns 1 on success and 0 on error (man 3 mallopt).
    code = ("from periodscan.engine import allocator as a; "
            "print(a.keep_freed_memory(), a.keep_freed_memory(), a._applied)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                         check=True).stdout.split()
    assert out == ["True", "True", "True"]
