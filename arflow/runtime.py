"""Process life of a run: stop signals, and worker processes that die with their parent.

Signals. The command line installs :func:`install_signal_handlers`: SIGTERM
and SIGINT (Ctrl-C) raise ``KeyboardInterrupt`` in the main thread and are
remembered (:func:`stop_signal`), so an interruption that surfaces as some
other error (DuckDB turns it into ``RuntimeError('Query interrupted')``) is
still reported as an interruption (exit 130). A statement that DuckDB runs
without returning to Python (a long scalar subquery, say) would only see the
signal when it ends, so a watcher thread woken by the signal itself
(``signal.set_wakeup_fd``) interrupts the connections a run registered with
:func:`watch_connection`. From just before the publishing
``COMMIT`` (:func:`hold_signals`) a stop signal is only recorded: a run whose
results committed finishes and exits with its real status.

Workers. :func:`bind_to_parent` runs first in every worker process: the
worker ignores Ctrl-C (the parent stops it), points its standard streams at
the null device (a scheduler reading the job's output to its end is not held
open by workers), asks Linux to kill it when the parent dies
(``prctl(PR_SET_PDEATHSIG)``) and, on every platform, watches its parent id
from a daemon thread and exits when it changes. :func:`stop_pool` ends a
pool's workers at once when the run is interrupted or fails.
"""

from __future__ import annotations

import os
import signal
import sys
import threading
from multiprocessing import context as mp_context
from collections.abc import Callable
from typing import Any

_STOP_SIGNALS = ("SIGTERM", "SIGINT")
_STOP_NUMBERS = frozenset(int(getattr(signal, n)) for n in _STOP_SIGNALS if hasattr(signal, n))


class _SignalState:
    installed = False
    signum: int | None = None
    holding = False


_state = _SignalState()
_watched: dict[int, Any] = {}
_watched_lock = threading.Lock()


def watch_connection(con: Any) -> None:
    """Interrupt ``con`` (anything with ``interrupt()``, e.g. a DuckDB connection) when a stop signal arrives."""
    with _watched_lock:
        _watched[id(con)] = con


def unwatch_connection(con: Any) -> None:
    """Stop watching ``con`` (call before closing it)."""
    with _watched_lock:
        _watched.pop(id(con), None)


def _interrupt_watched() -> None:
    if _state.holding:
        return
    with _watched_lock:
        connections = list(_watched.values())
    for con in connections:
        try:
            con.interrupt()
        except Exception:  # noqa: BLE001 - a closed connection has nothing to interrupt
            pass


def _start_wakeup_watcher() -> Callable[[], None]:
    """A daemon thread that interrupts watched connections as soon as a signal arrives; returns its stopper."""
    import socket

    try:
        reader, writer = socket.socketpair()
        writer.setblocking(False)
        previous_fd = signal.set_wakeup_fd(writer.fileno(), warn_on_full_buffer=False)
    except (OSError, ValueError):
        return lambda: None

    def watch() -> None:
        while True:
            try:
                data = reader.recv(64)
            except OSError:
                return
            if not data:
                return
            if any(b in _STOP_NUMBERS for b in data):
                _interrupt_watched()

    threading.Thread(target=watch, name="arflow-signal-watch", daemon=True).start()

    def stop() -> None:
        try:
            signal.set_wakeup_fd(previous_fd)
        except (OSError, ValueError):
            pass
        for sock in (writer, reader):
            try:
                sock.shutdown(socket.SHUT_RDWR)
            except OSError:
                pass
            sock.close()

    return stop


def _on_stop(signum: int, frame: Any) -> None:
    _state.signum = signum
    if _state.holding:
        return  # the run committed (or is committing): finish and exit with its status
    raise KeyboardInterrupt


def install_signal_handlers() -> Callable[..., None]:
    """Route SIGTERM and SIGINT through the run's handler; returns a function restoring the previous ones.

    Does nothing (and restores nothing) outside the main thread.
    """
    previous: dict[int, Any] = {}
    _state.signum, _state.holding = None, False
    for name in _STOP_SIGNALS:
        signum = getattr(signal, name, None)
        if signum is None:
            continue
        try:
            previous[signum] = signal.signal(signum, _on_stop)
        except ValueError:  # not the main thread
            break
    _state.installed = bool(previous)
    stop_watcher = _start_wakeup_watcher() if previous else (lambda: None)

    def restore(ignore: bool = False) -> None:
        """Put the previous handlers back (``ignore=True``: ignore stop signals from now on instead)."""
        for signum, handler in previous.items():
            signal.signal(signum, signal.SIG_IGN if ignore else handler)
        stop_watcher()
        _state.installed, _state.holding, _state.signum = False, False, None

    return restore


def stop_signal() -> int | None:
    """The stop signal received since the handlers were installed (None if none)."""
    return _state.signum


def signals_held() -> bool:
    """True from :func:`hold_signals` on (the publish is committing or committed)."""
    return _state.holding


def hold_signals() -> None:
    """From now on a stop signal is recorded, not raised (call just before ``COMMIT``)."""
    if _state.installed:
        _state.holding = True


def release_signals() -> None:
    """Undo :func:`hold_signals` after a failed ``COMMIT``; a signal that arrived meanwhile stays recorded."""
    _state.holding = False


# -- worker processes -------------------------------------------------------

_PR_SET_PDEATHSIG = 1
_WATCH_SECONDS = 0.25


def _set_parent_death_signal() -> bool:
    """Linux: the kernel sends SIGKILL to this process when its parent dies."""
    if not sys.platform.startswith("linux"):
        return False
    try:
        import ctypes
        import ctypes.util

        libc = ctypes.CDLL(ctypes.util.find_library("c") or "libc.so.6", use_errno=True)
        return libc.prctl(_PR_SET_PDEATHSIG, int(signal.SIGKILL), 0, 0, 0) == 0
    except (OSError, AttributeError):
        return False


def _watch_parent(parent: int) -> None:
    event = threading.Event()
    while not event.wait(_WATCH_SECONDS):
        if os.getppid() != parent:
            os._exit(70)


def bind_to_parent(parent: int) -> None:
    """Set up a worker process so that it never outlives ``parent`` (its pid) nor holds its output open."""
    try:
        signal.signal(signal.SIGINT, signal.SIG_IGN)  # the parent handles Ctrl-C and stops its workers
    except ValueError:
        pass
    if hasattr(signal, "pthread_sigmask"):
        signal.pthread_sigmask(signal.SIG_UNBLOCK, {signal.SIGINT})  # blocked since the launch (_WorkerProcess)
    try:
        null = os.open(os.devnull, os.O_RDWR)
        for fd in (0, 1, 2):
            os.dup2(null, fd)
        os.close(null)
    except OSError:
        pass
    _set_parent_death_signal()
    if os.getppid() != parent:  # the parent died before the death signal was armed
        os._exit(70)
    threading.Thread(target=_watch_parent, args=(parent,), name="arflow-parent-watch", daemon=True).start()


def stop_pool(pool: Any, timeout: float = 5.0) -> None:
    """End a ``ProcessPoolExecutor`` now: cancel queued chunks, terminate and reap its workers."""
    processes = list((getattr(pool, "_processes", None) or {}).values())
    try:
        pool.shutdown(wait=False, cancel_futures=True)
    except Exception:  # noqa: BLE001 - best effort on the way out
        pass
    for proc in processes:
        try:
            proc.terminate()
        except Exception:  # noqa: BLE001
            pass
    for proc in processes:
        try:
            proc.join(timeout)
            if proc.is_alive():
                proc.kill()
                proc.join(timeout)
        except Exception:  # noqa: BLE001
            pass


class _WorkerProcess(mp_context.SpawnProcess):
    """A spawned worker that does not re-run the parent's ``__main__``.

    Spawn normally imports the parent's main script in every child so that
    functions defined there can be unpickled; arflow's workers run only
    arflow's functions, and re-running a caller's script (one that calls the
    typed run call at module level, without an ``if __name__ == "__main__"``
    guard) would start the run again in each worker. While the child is
    launched (a few milliseconds, one launch at a time) ``__main__`` is
    replaced by an empty module, then put back.
    """

    def start(self) -> None:
        import types

        with _main_lock:
            main = sys.modules.get("__main__")
            sys.modules["__main__"] = types.ModuleType("__main__")
            # the child starts with SIGINT blocked (the mask survives fork and exec) until
            # :func:`bind_to_parent` ignores it: a Ctrl-C to the process group while a worker is
            # still starting would otherwise print its KeyboardInterrupt traceback on the job's
            # stderr. Here the signal waits a few milliseconds and is then delivered, not lost.
            old_mask = _block_sigint()
            try:
                super().start()
            finally:
                _restore_mask(old_mask)
                if main is None:
                    sys.modules.pop("__main__", None)
                else:
                    sys.modules["__main__"] = main


def _block_sigint() -> Any:
    """Block SIGINT in this thread; returns the previous mask (None where masks are not supported)."""
    if not hasattr(signal, "pthread_sigmask"):
        return None
    return signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})


def _restore_mask(mask: Any) -> None:
    if mask is not None:
        signal.pthread_sigmask(signal.SIG_SETMASK, mask)


class _WorkerContext(mp_context.SpawnContext):
    Process = _WorkerProcess


_main_lock = threading.Lock()


def worker_context() -> Any:
    """The multiprocessing context of arflow's worker pools: spawn, without the caller's ``__main__``."""
    return _WorkerContext()


# -- test hooks ---------------------------------------------------------------

def fault_point(name: str) -> None:
    """Test-only hook at a named point of a run (source open, after writing a table, before commit).

    ``ARFLOW_TEST_FAIL_AFTER=name`` raises; ``ARFLOW_TEST_PAUSE_AFTER=name``
    prints a marker line on stderr and waits (at most 60 s) until the file
    named by ``ARFLOW_TEST_RESUME_FILE`` exists.
    """
    if os.environ.get("ARFLOW_TEST_FAIL_AFTER") == name:
        raise RuntimeError(f"test fault injected after {name}")
    if os.environ.get("ARFLOW_TEST_PAUSE_AFTER") == name:
        import time
        from pathlib import Path

        sys.stderr.write(f"arflow-test: paused after {name}\n")
        sys.stderr.flush()
        resume = os.environ.get("ARFLOW_TEST_RESUME_FILE")
        deadline = time.monotonic() + 60.0
        while time.monotonic() < deadline and not (resume and Path(resume).exists()):
            time.sleep(0.02)
