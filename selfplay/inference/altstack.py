"""Room for signal handlers on threads that run OpenVINO.

OpenVINO's CPU plugin gives the thread that compiles a model an alternate signal stack of exactly
the kernel's minimum for this CPU (``AT_MINSIGSTKSZ``: 20,144 bytes here once the AMX matrix
state is enabled). A signal handled on that stack — Python's own handlers run there, e.g. a
``SIGCHLD`` handler while a child process exits — then leaves no room for the handler itself and
the kernel kills the process with SIGSEGV (seen in the test suite). After each compile,
:func:`ensure_roomy_altstack` replaces a smaller alternate stack of the calling thread with one of
:data:`ALTSTACK_BYTES`; OpenVINO restores the stack it found when its compiled model is released.
"""

from __future__ import annotations

import ctypes
import sys
import threading

#: size of the alternate signal stack this module installs (bytes); the kernel's minimum with
#: the AMX state is about 20 KB, Python's handlers need a few KB more
ALTSTACK_BYTES = 256 * 1024
_SS_DISABLE = 2
#: thread id -> its stack memory, one per thread, reused and never freed: OpenVINO may later
#: restore a stack it saved, so a stack once installed must stay valid
_buffers: dict[int, ctypes.Array] = {}
_lock = threading.Lock()


class _StackT(ctypes.Structure):
    _fields_ = [("ss_sp", ctypes.c_void_p), ("ss_flags", ctypes.c_int), ("ss_size", ctypes.c_size_t)]


def current_altstack() -> tuple[int, int] | None:
    """(flags, size in bytes) of the calling thread's alternate signal stack; None off Linux."""
    if not sys.platform.startswith("linux"):
        return None
    libc = ctypes.CDLL(None, use_errno=True)
    old = _StackT()
    if libc.sigaltstack(None, ctypes.byref(old)) != 0:
        return None
    return old.ss_flags, old.ss_size


def ensure_roomy_altstack() -> bool:
    """Give the calling thread an alternate signal stack of :data:`ALTSTACK_BYTES` if it has a
    smaller one in place (a disabled one is left alone: handlers then use the thread's own
    stack). Returns True if a stack was installed."""
    now = current_altstack()
    if now is None:
        return False
    flags, size = now
    if flags & _SS_DISABLE or size >= ALTSTACK_BYTES:
        return False
    libc = ctypes.CDLL(None, use_errno=True)
    with _lock:
        buf = _buffers.setdefault(threading.get_ident(), ctypes.create_string_buffer(ALTSTACK_BYTES))
    new = _StackT(ctypes.cast(buf, ctypes.c_void_p), 0, ALTSTACK_BYTES)
    return libc.sigaltstack(ctypes.byref(new), None) == 0
