"""Helper processes' lifeline: a lower CPU priority than the server, and death with the parent.

Used by the training processes (``service.worker``) and the intake processes (``service.api.intake_process``):
both are children that must neither starve predictions nor outlive the process that started them.
"""

from __future__ import annotations

import ctypes
import os
import signal
import sys
import threading
import time


# Training processes run at a lower CPU priority than the server that spawned them (a niceness
# increment, POSIX nice(2)): on a small host the embedded worker shares the cores with the event loop,
# and at equal priority a training job starved predictions (the soak in tests/reliability saw latencies
# grow to seconds while a job ran; with the increment they stayed at milliseconds). Training then takes
# whatever CPU serving leaves, which is the right order for a service in other applications' request path.
TRAINING_NICENESS = 10


def lower_priority() -> None:
    try:
        os.nice(TRAINING_NICENESS)
    except (AttributeError, OSError):  # not POSIX, or not permitted: train at the normal priority
        pass


# A training process must not outlive the worker that started it: after a SIGKILL of the worker (or of
# the server that runs it embedded) its job is re-queued and trained again elsewhere, and an orphan would
# keep burning a core beside the re-run. Two lines of defence, both in the child:
# * Linux: prctl(PR_SET_PDEATHSIG, SIGKILL) (prctl(2)), through the C library with ctypes: the kernel
#   kills the child the moment its parent ends. It fires when the parent *thread* that started the child
#   ends, which here is the worker's own thread, alive for the whole job.
# * everywhere: a thread that checks every PARENT_CHECK_S whether the parent is still the process that
#   started it (os.getppid() changes to the reaper's pid once the parent is gone), then exits.
# A job's result goes back only through the pipe to the worker, and the worker publishes only while the
# catalog says it still holds the job (``Store.publish(holder=...)``), so even a surviving orphan could
# never publish: a job publishes at most one version.
PARENT_CHECK_S = 1.0
_PR_SET_PDEATHSIG = 1  # <linux/prctl.h>


def die_with_parent(parent_pid: int) -> None:
    if sys.platform.startswith("linux"):
        try:
            libc = ctypes.CDLL(None, use_errno=True)
            libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0)
        except (OSError, AttributeError):  # no usable C library: the watcher thread below still covers it
            pass
    if os.getppid() != parent_pid:  # the parent ended before the kernel was told to watch it
        os._exit(70)
    threading.Thread(target=_watch_parent, args=(parent_pid,), name="tikhon-lifeline", daemon=True).start()


def _watch_parent(parent_pid: int) -> None:
    while True:
        time.sleep(PARENT_CHECK_S)
        if os.getppid() != parent_pid:
            os._exit(70)
