"""An attempt's process tree: ending everything an attempt started, not only its child.

Standard library only (the attempt process loads this module as a file). The
attempt's child starts a session of its own, so killing its process group
ends what it started plainly (``subprocess.Popen``, ``sh -c "x &"``). A
descendant that calls ``setsid`` leaves that group; on Linux the fork server
makes itself a child subreaper (``PR_SET_CHILD_SUBREAPER``), so such a
process is re-parented to the server when its parent exits, and
:func:`end_tree` kills and reaps it. Elsewhere only the group is killed.
"""

from __future__ import annotations

import ctypes
import os
import signal
import sys
import time

PR_SET_PDEATHSIG = 1  # from <linux/prctl.h>
PR_SET_CHILD_SUBREAPER = 36  # from <linux/prctl.h>
TREE_GRACE = 5.0  # seconds the server spends killing what an attempt left behind

_state = {"subreaper": False}  # set by become_subreaper(): this process adopts its children's orphans


def become_subreaper() -> bool:
    """Make this process the child subreaper of its descendants (Linux); returns whether it is."""
    _state["subreaper"] = _prctl(PR_SET_CHILD_SUBREAPER, 1)
    return _state["subreaper"]


def _prctl(option: int, value: int) -> bool:
    """Linux ``prctl(option, value)``; False elsewhere or when it fails."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        libc = ctypes.CDLL(None, use_errno=True)
        return int(libc.prctl(option, value, 0, 0, 0)) == 0
    except (OSError, AttributeError):
        return False


def pdeathsig(sig: int) -> None:
    """Ask Linux to send ``sig`` to this process when its parent dies (no-op elsewhere)."""
    _prctl(PR_SET_PDEATHSIG, sig)


def children() -> set[int]:
    """This process's children (Linux ``/proc``), zombies included; empty elsewhere."""
    me = os.getpid()
    out: set[int] = set()
    try:
        for tid in os.listdir(f"/proc/{me}/task"):
            with open(f"/proc/{me}/task/{tid}/children") as fh:
                out.update(int(p) for p in fh.read().split())
        return out
    except OSError:
        pass
    try:
        names = os.listdir("/proc")
    except OSError:
        return out
    for name in names:  # kernels without the children file: the parent pid is field 4 of stat
        if not name.isdigit():
            continue
        try:
            with open(f"/proc/{name}/stat") as fh:
                fields = fh.read().rsplit(")", 1)[1].split()
        except (OSError, IndexError):
            continue
        if int(fields[1]) == me:
            out.add(int(name))
    return out


def end_tree(pgid: int, keep: set[int]) -> None:
    """Kill everything an attempt left behind once its child has exited.

    The child's process group goes first (what it started without a new session). With the
    server a child subreaper (Linux), a descendant that called ``setsid`` is re-parented here
    when its parent exits instead of to init, so every child of the server beyond ``keep``
    (what the user's module started at import) is the attempt's and is killed and reaped.
    """
    kill_group(pgid)
    if not _state["subreaper"]:
        return
    deadline = time.monotonic() + TREE_GRACE
    while True:
        left = children() - keep
        for pid in left:
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
        for pid in left:
            try:
                os.waitpid(pid, os.WNOHANG)
            except ChildProcessError:
                pass
        if not left or time.monotonic() > deadline:
            return
        time.sleep(0.01)  # a killed process's own children are re-parented here a moment later


def kill_group(pid: int) -> None:
    try:
        os.killpg(pid, signal.SIGKILL)
    except ProcessLookupError:
        pass
    except PermissionError:
        pass
