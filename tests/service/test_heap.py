"""service.heap: a freed block of scoring temporaries is reused, not faulted in again."""

from __future__ import annotations

import subprocess
import sys

import pytest

from service.heap import keep_heap

# A fresh interpreter each: the thresholds belong to the process. 16 MiB is a few
# requests' worth of numpy temporaries (4096 pages); the second block is where the
# default thresholds have the heap grow again and the fixed ones reuse the first.
SECOND_BLOCK_FAULTS = """
import resource, sys
import numpy as np
from service.heap import keep_heap
if sys.argv[1] == "kept":
    assert keep_heap()
np.ones(2**21)
before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
np.ones(2**21)
print(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
"""


def second_block_faults(mode: str) -> int:
    done = subprocess.run([sys.executable, "-c", SECOND_BLOCK_FAULTS, mode],
                          capture_output=True, text=True, check=True)
    return int(done.stdout)


def test_fixed_thresholds_reuse_a_freed_block() -> None:
    if not keep_heap():
        pytest.skip("the C library has no mallopt (not glibc)")
    assert second_block_faults("kept") < 50
    assert second_block_faults("default") > 200  # what the fix is for
