"""Named points where a test can make the job die (SIGKILL) or hit a full disk.

``LABELER_FAILPOINT=after_labels`` kills the process at that point; ``enospc@write_labels``
raises "No space left on device" there instead. Used only by the fault tests; a no-op otherwise.
"""
from __future__ import annotations

import errno
import os
import signal
import sys

ENV = "LABELER_FAILPOINT"

# Stages end at "after_*"; "mid_*" sit inside writing an output, after part of it is on disk.
FAILPOINTS = ("after_lock", "after_items", "after_staging", "after_labels", "mid_labels_write",
              "mid_footprints_write", "after_outputs", "after_store", "mid_state_write", "after_state")
# Points where a write can fail with a full disk.
WRITE_POINTS = ("write_events", "write_labels", "write_footprints", "write_state")


def hit(name: str) -> None:
    want = os.environ.get(ENV)
    if not want:
        return
    if want == name:
        sys.stdout.flush()
        sys.stderr.flush()
        os.kill(os.getpid(), signal.SIGKILL)
    if want == f"enospc@{name}":
        raise OSError(errno.ENOSPC, f"No space left on device (simulated at {name})")
