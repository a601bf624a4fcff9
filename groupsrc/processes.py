"""Which process owns what: owner tokens, dead owners, children that die with their parent.

Several things groupsrc leaves on disk while it works carry the name of the
process that made them (staging folders of a results folder, the lock of a
results folder, temporary files of the loading cache, the work folders of
``--memory``), so that a later run can tell a live run's files from those of a
run killed outright (SIGKILL, power loss) and remove only the latter.

The owner token is ``<host>-<pid>-<start>``: the first 8 hex digits of a hash
of the host name, the process id, and the process start time in clock ticks
since boot from ``/proc/<pid>/stat`` (0 where that is unavailable).  A token
is *provably dead* only when it names this host and its process no longer
exists, or the process id now belongs to a process started at another time;
tokens of other hosts (shared file systems) or of live processes never are.

Like :mod:`groupsrc.atomic`, this module imports nothing from the package.
"""

from __future__ import annotations

import hashlib
import os
import signal
import socket


def host_tag() -> str:
    """The first 8 hex digits of a hash of this machine's host name."""
    return hashlib.sha256(socket.gethostname().encode()).hexdigest()[:8]


def start_ticks(pid: int) -> int:
    """Start time of process ``pid`` in clock ticks since boot (0 if unknown)."""
    try:
        with open(f"/proc/{pid}/stat", encoding="ascii", errors="replace") as fh:
            text = fh.read()
        # the command name (field 2) is in parentheses and may hold spaces
        return int(text.rsplit(")", 1)[1].split()[19])
    except (OSError, ValueError, IndexError):
        return 0


def owner_token(pid: int | None = None) -> str:
    """``<host>-<pid>-<start>`` of process ``pid`` (default: this one)."""
    pid = os.getpid() if pid is None else pid
    return f"{host_tag()}-{pid}-{start_ticks(pid)}"


def token_pid(token: str) -> int | None:
    """The process id a token names, or None when it is not a token."""
    try:
        return int(token.split("-")[1])
    except (IndexError, ValueError):
        return None


def owner_is_dead(token: str) -> bool:
    """True only when ``token``'s process is provably gone (this host, no such process,
    or its id reused by a process started at another time)."""
    try:
        host, pid, start = token.split("-")[:3]
        pid, start = int(pid), int(start)
    except ValueError:
        return False
    if host != host_tag() or pid <= 0:
        return False
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return True
    except PermissionError:
        pass                   # exists, belongs to someone else
    except OSError:
        return False
    now = start_ticks(pid)
    return bool(start and now and now != start)    # the pid was reused


# ----------------------------------------------------------------------------
# child processes
# ----------------------------------------------------------------------------

#: prctl option asking the kernel to signal this process when its parent dies (Linux)
_PR_SET_PDEATHSIG = 1


def die_with_parent(parent_pid: int) -> bool:
    """Make this (child) process end when ``parent_pid``, its parent, ends.

    For worker processes of a pool (``initializer=die_with_parent,
    initargs=(os.getpid(),)``): on Linux the kernel sends the worker SIGKILL
    when the thread that forked it ends (``prctl(PR_SET_PDEATHSIG)``), so a
    parent killed outright leaves no worker behind; a parent already gone
    by the time the worker starts ends it at once.  Create such pools from the
    main thread (a worker forked by another thread dies with that thread).
    Returns False where the system offers no such request (the worker then
    lives until it finishes its task, as before).
    """
    armed = False
    try:
        import ctypes
        libc = ctypes.CDLL(None, use_errno=True)
        armed = libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) == 0
    except (OSError, AttributeError):
        armed = False
    if os.getppid() != parent_pid:     # the parent died before the request was made
        os._exit(1)
    return armed


__all__ = ["owner_token", "owner_is_dead", "token_pid", "host_tag", "start_ticks",
           "die_with_parent"]
