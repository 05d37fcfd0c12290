"""blockyard.train.allocator: freed step memory is kept, checked against glibc's documented behaviour.

Source: the mallopt(3) manual page (Linux man-pages): M_TRIM_THRESHOLD, "when the amount of
contiguous free memory at the top of the heap grows sufficiently large, free(3) employs sbrk(2) to
release this memory back to the system"; freshly mapped pages are zero-filled on first touch, which
getrusage counts as minor page faults. Each check runs in a fresh process, as the settings are
process-wide and are applied once.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest
from _helpers import child_env

# Allocate eight 16 MiB blocks (every page written), free them, five times; report the minor page
# faults of the last three rounds and what keep_freed_memory said (or "default" when not called).
_PROGRAM = """
import json, resource, sys
import torch
from blockyard.train.allocator import keep_freed_memory
said = keep_freed_memory() if sys.argv[1] == "keep" else "default"
faults = []
for _ in range(6):
    before = resource.getrusage(resource.RUSAGE_SELF).ru_minflt
    blocks = [torch.ones(4 * 2**20) for _ in range(8)]
    del blocks
    faults.append(resource.getrusage(resource.RUSAGE_SELF).ru_minflt - before)
print(json.dumps({"said": said, "faults": sum(faults[3:])}))
"""


def _run(mode: str, **env: str) -> dict:
    out = subprocess.run([sys.executable, "-c", _PROGRAM, mode], capture_output=True, text=True, check=True,
                         env=child_env(**env), timeout=120)
    return json.loads(out.stdout.strip().splitlines()[-1])


@pytest.mark.slow
@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="glibc malloc settings: Linux only")
def test_kept_memory_is_not_page_faulted_in_again():
    kept = _run("keep")
    if kept["said"].startswith("unchanged"):
        pytest.skip(kept["said"])  # musl or another libc: nothing to check
    assert kept["said"].startswith("glibc") and "trim threshold 2 GiB" in kept["said"]
    # The contrast: the same program with glibc's initial mmap threshold (128 KiB) fixed through its
    # environment variable maps every block and unmaps it on free, so all 3 x 32,768 pages of 4 KiB
    # fault again. (glibc's own default is dynamic and depends on the order of earlier frees: 0 or
    # 98,208 faults in six runs of this program, 3,500-33,000 per training step, see
    # blockyard/train/allocator.py.)
    trimmed = _run("default", MALLOC_MMAP_THRESHOLD_="131072")
    pages = 3 * 128 * 2**20 // os.sysconf("SC_PAGE_SIZE")
    assert trimmed["faults"] > 0.9 * pages, trimmed
    assert kept["faults"] < 0.05 * pages, kept


@pytest.mark.slow
def test_users_own_malloc_settings_are_left_alone():
    got = _run("keep", GLIBC_TUNABLES="glibc.malloc.trim_threshold=1048576")
    assert got["said"] == "unchanged: malloc configured by the user through GLIBC_TUNABLES"
    got = _run("keep", MALLOC_TRIM_THRESHOLD_="1048576")
    assert got["said"] == "unchanged: malloc configured by the user through MALLOC_TRIM_THRESHOLD_"
