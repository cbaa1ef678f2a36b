"""A preloaded launcher: fresh measuring workers for the price of a ``fork``, not an interpreter.

A worker per curve must start clean (its own address-space limit, its own thread limits, no state
left by another curve), but a clean interpreter pays for ``numpy``, ``scipy`` and ``pgmpy``
(which pulls scikit-learn) every time: seconds of CPU per curve, most of a small study's budget.
The *zygote* pays them once per study. It is a small server process, started on the first
worker request, that

1. pins the BLAS/OpenMP thread variables (they are read when the libraries load, so they are in
   its environment before anything is imported), then imports numpy, threadpoolctl and the
   measuring code (:data:`PRELOAD`); on the first request for a worker of a built-in family it
   also imports scipy, networkx, the parts of pgmpy the families' reference checks use and every
   built-in family (:data:`PRELOAD_FAMILIES`, then :func:`model_zoo.base.resolve` on each
   registered name; each guarded: one family that fails to import does not stop the others);
2. serves *fork requests* on a Unix ``SOCK_SEQPACKET`` socket pair: the parent sends the three
   descriptors of the new worker (stdin, stdout, stderr) as ``SCM_RIGHTS`` ancillary data
   (:func:`socket.send_fds`), the zygote forks, the child puts them on 0/1/2 and runs
   :func:`profiler.harness.worker_main` — the same loop a spawned worker runs, so the child sets
   its own ``RLIMIT_AS`` (its baseline measured after the fork), its own threadpoolctl limits and
   its parent-death signal; the zygote replies with the child's pid (and a pidfd where the kernel
   offers one, so signals can never reach a recycled pid);
3. reaps its children and reports each exit status (``-11`` for a segfault, as
   :attr:`subprocess.Popen.returncode` would say) on the same socket;
4. dies with its parent: ``PR_SET_PDEATHSIG`` (tied to the parent thread that started it, a
   thread that lives exactly as long as the connection) and end-of-file on the socket. Its
   children have their own parent-death signal, so nothing outlives a ``kill -9`` of the study.

Measurement honesty: a forked child inherits imported modules and nothing else. The zygote never
builds an instance, runs an engine or fills a cache; what the child gets beyond a fresh
interpreter is code already loaded (shared copy-on-write pages) and a frozen garbage-collector
generation holding the import-time objects. The first touch of a shared page costs a page fault
in the child; the warm-up pass of every point, which is never timed, pays those — exactly as a
spawned worker's warm-up pays its lazy imports — so timed repeats see the same steady state
either way. Garbage collection is off during timed repeats in both launchers.

The parent side is :class:`Zygote` (one per study, keyed by interpreter, threads and import path);
:func:`acquire` / :func:`release` hand it to curve drivers, :func:`launcher_scope` holds it for a
whole study and shuts it down at the end. Any failure (not Linux, no ``send_fds``, an import
error, a slow start, a zygote that died) makes :func:`acquire` return None and the harness
spawns an interpreter as before.

Cost notes: starting the zygote costs one interpreter plus the imports (~4 s of CPU with pgmpy);
each worker then costs one ``fork`` (copy of the page tables, a few ms for a ~1 GiB address
space) and its own initialisation (thread limits, environment, calibration kernel: tens of ms).
"""

from __future__ import annotations

import contextlib
import json
import os
import select
import signal
import socket
import subprocess
import sys
import tempfile
import threading
import time
from typing import Any, Iterator

__all__ = ["Zygote", "ZygoteUnavailable", "ForkedProcess", "acquire", "release",
           "launcher_scope", "shutdown_all", "zygote_main", "PRELOAD", "PRELOAD_FAMILIES",
           "launcher_mode", "is_supported", "is_builtin_family", "live_zygotes"]

#: Modules the zygote imports before serving (each guarded): what every worker needs.
PRELOAD = ("numpy", "threadpoolctl", "tracemalloc", "ctypes", "faulthandler",
           "profiler.records", "profiler.environment", "profiler.harness", "model_zoo.base")
#: Modules the zygote imports on the first request for a worker of a built-in family (each
#: guarded), followed by every registered family through ``model_zoo.resolve``. A study of
#: only a user's own families (the test suite's, say) never pays for pgmpy.
PRELOAD_FAMILIES = ("scipy", "scipy.special", "scipy.linalg", "networkx",
                    "networkx.algorithms.approximation", "pgmpy.inference", "pgmpy.models",
                    "pgmpy.factors.discrete", "model_zoo.topologies", "model_zoo.treewidth",
                    "model_zoo.networks.pgmpy_bridge")

#: Seconds a zygote may take to import everything before the harness gives up on it.
START_TIMEOUT_S = 120.0
#: Seconds an unused zygote lives on outside a :func:`launcher_scope` (so back-to-back curves,
#: e.g. one-slot studies or a Dask worker's tasks, share it).
LINGER_S = 3.0
#: Restarts of a zygote that died (per key) before the harness spawns interpreters for good.
MAX_STARTS = 3
_ENV_FD = "INFERCOST_ZYGOTE_FD"
_ENV_PARENT = "INFERCOST_ZYGOTE_PARENT"
_MSG = 1 << 16


class ZygoteUnavailable(Exception):
    """The zygote could not start a worker (the harness then spawns an interpreter)."""


def launcher_mode(requested: str = "auto") -> str:
    """``"spawn"`` or ``"auto"``: the ``INFERCOST_LAUNCHER`` variable overrides ``"auto"``.

    ``"spawn"`` forces a fresh interpreter per worker (the fallback path); ``"auto"`` uses the
    zygote where it works.
    """
    mode = str(requested or "auto")
    if mode == "auto":
        mode = os.environ.get("INFERCOST_LAUNCHER", "auto") or "auto"
    return "spawn" if mode == "spawn" else "auto"


def is_supported() -> bool:
    """Whether this platform can run a zygote (Linux, ``socket.send_fds``, ``os.fork``)."""
    return (sys.platform.startswith("linux") and hasattr(socket, "send_fds")
            and hasattr(socket, "recv_fds") and hasattr(os, "fork")
            and hasattr(socket, "SOCK_SEQPACKET"))


# ============================================================================ the parent's side
class ForkedProcess:
    """The parts of :class:`subprocess.Popen` the harness uses, for a child of the zygote.

    ``returncode`` comes from the zygote's exit reports (negative: the signal that killed it).
    Signals go through the child's pidfd when there is one, else to its pid while its exit has
    not been reported (the zygote reaps at once and reports within milliseconds, so the window
    in which the pid could be recycled is that short).
    """

    def __init__(self, zygote: "Zygote", pid: int, pidfd: int | None, stdin: Any,
                 stdout: Any) -> None:
        self.zygote, self.pid, self.pidfd = zygote, int(pid), pidfd
        self.stdin, self.stdout = stdin, stdout
        self.args = ["<fork of the infercost zygote>"]

    @property
    def returncode(self) -> int | None:
        return self.poll()

    def poll(self) -> int | None:
        return self.zygote.exit_code(self.pid)

    def wait(self, timeout: float | None = None) -> int:
        code = self.zygote.wait_exit(self.pid, timeout)
        if code is None:
            raise subprocess.TimeoutExpired(self.args, timeout or 0.0)
        self._close_pidfd()
        return code

    def send_signal(self, sig: int) -> None:
        if self.poll() is not None:
            return
        try:
            if self.pidfd is not None and hasattr(signal, "pidfd_send_signal"):
                signal.pidfd_send_signal(self.pidfd, sig)
            else:
                os.kill(self.pid, sig)
        except (ProcessLookupError, OSError):
            pass

    def terminate(self) -> None:
        self.send_signal(signal.SIGTERM)

    def kill(self) -> None:
        self.send_signal(signal.SIGKILL)

    def _close_pidfd(self) -> None:
        fd, self.pidfd = self.pidfd, None
        if fd is not None:
            with contextlib.suppress(OSError):
                os.close(fd)

    def __del__(self) -> None:  # a handle dropped without wait() must not leak its pidfd
        self._close_pidfd()


class Zygote:
    """Client of one zygote process: start it, ask it for workers, hear about their exits.

    Parameters
    ----------
    python
        Interpreter to run (the study's).
    threads
        BLAS/OpenMP threads; set in the zygote's environment before its imports.
    sys_path
        Entries prepended to the zygote's ``sys.path`` (the parent's import path, so a user's
        ``package.module:Class`` imports in the workers as it does here).
    env
        The zygote's environment (:func:`profiler.harness.worker_env` of ``threads``).

    Notes
    -----
    One thread per zygote starts it and then reads its messages for as long as it lives; the
    zygote's parent-death signal is tied to that thread. Fork requests are serialised by a lock
    (a request is a few hundred bytes and a fork: milliseconds).
    """

    def __init__(self, *, python: str, threads: int, sys_path: tuple[str, ...],
                 env: dict[str, str]) -> None:
        self.python, self.threads, self.sys_path = python, int(threads), tuple(sys_path)
        self.env = dict(env)
        self.proc: subprocess.Popen | None = None
        self.sock: socket.socket | None = None
        self.info: dict[str, Any] = {}
        #: Import groups the zygote has loaded beyond :data:`PRELOAD`, with their seconds.
        self.groups: dict[str, float] = {}
        self.error: str = ""
        self._ready = threading.Event()
        self._alive = False
        self._request_lock = threading.Lock()
        self._replies: list[tuple[dict, list[int]]] = []
        self._reply_cv = threading.Condition()
        self._exits: dict[int, int] = {}
        self._children: set[int] = set()
        self._exit_cv = threading.Condition()
        self._stderr = tempfile.TemporaryFile()
        self._thread = threading.Thread(target=self._run, name="infercost-zygote", daemon=True)

    # ------------------------------------------------------------------ life
    def start(self, timeout: float = START_TIMEOUT_S) -> "Zygote":
        """Start the zygote and wait until it has imported everything (or raise)."""
        if not is_supported():
            raise ZygoteUnavailable("the preloaded launcher needs Linux and socket.send_fds")
        self._thread.start()
        if not self._ready.wait(timeout):
            self.error = self.error or f"the zygote did not finish its imports in {timeout:g} s"
            self.close()
            raise ZygoteUnavailable(self.error)
        if not self._alive:
            self.close()
            raise ZygoteUnavailable(self.error or "the zygote did not start")
        return self

    @property
    def alive(self) -> bool:
        return self._alive and self.proc is not None and self.proc.poll() is None

    @property
    def pid(self) -> int | None:
        return None if self.proc is None else self.proc.pid

    def _run(self) -> None:
        """Thread body: start the zygote, then read its replies and exit reports until EOF."""
        try:
            ours, theirs = socket.socketpair(socket.AF_UNIX, socket.SOCK_SEQPACKET)
            env = dict(self.env)
            env[_ENV_FD] = str(theirs.fileno())
            env[_ENV_PARENT] = str(os.getpid())
            env["INFERCOST_ZYGOTE_PATH"] = json.dumps(list(self.sys_path))
            self.proc = subprocess.Popen(
                [self.python, "-c", "from profiler.zygote import zygote_main; zygote_main()"],
                stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=self._stderr,
                env=env, close_fds=True, pass_fds=(theirs.fileno(),), start_new_session=True)
            theirs.close()
            self.sock = ours
        except (OSError, ValueError) as exc:
            self.error = f"cannot start the zygote: {exc}"
            self._ready.set()
            return
        try:
            first = self._recv()
            if first is None or first[0].get("op") != "ready":
                self.error = "the zygote exited during its imports: " + self.stderr_tail()
                self._ready.set()
                return
            self.info = first[0]
            self._alive = True
            self._ready.set()
            while True:
                got = self._recv()
                if got is None:
                    break
                msg, fds = got
                if msg.get("op") == "exit":
                    with self._exit_cv:
                        self._exits[int(msg["pid"])] = int(msg["returncode"])
                        self._children.discard(int(msg["pid"]))
                        self._exit_cv.notify_all()
                else:
                    with self._reply_cv:
                        self._replies.append((msg, fds))
                        self._reply_cv.notify_all()
        finally:
            self._alive = False
            self._ready.set()
            with self._exit_cv:
                # The zygote is gone; its children got their parent-death SIGKILL from the kernel.
                for pid in self._children:
                    self._exits.setdefault(pid, -int(signal.SIGKILL))
                self._children.clear()
                self._exit_cv.notify_all()
            with self._reply_cv:
                self._reply_cv.notify_all()
            if self.proc is not None:
                with contextlib.suppress(subprocess.TimeoutExpired, OSError):
                    self.proc.wait(timeout=5.0)

    def _recv(self) -> tuple[dict, list[int]] | None:
        assert self.sock is not None
        try:
            data, fds, _flags, _addr = socket.recv_fds(self.sock, _MSG, 4)
        except OSError:
            return None
        if not data:
            for fd in fds:
                with contextlib.suppress(OSError):
                    os.close(fd)
            return None
        try:
            return json.loads(data), list(fds)
        except ValueError:
            return {"op": "garbled"}, list(fds)

    def stderr_tail(self, limit: int = 600) -> str:
        try:
            self._stderr.seek(0, os.SEEK_END)
            size = self._stderr.tell()
            self._stderr.seek(max(0, size - limit))
            text = self._stderr.read().decode(errors="replace")
        except (OSError, ValueError):
            return ""
        return " | ".join(ln.strip() for ln in text.splitlines() if ln.strip())[-limit:]

    # ------------------------------------------------------------------ workers
    def spawn(self, *, stderr_fd: int, cwd: str | None = None, families: bool = True,
              timeout: float = 30.0) -> ForkedProcess:
        """A new worker whose stdin/stdout are pipes to this process and stderr is ``stderr_fd``.

        ``families``: make sure the zygote has imported :data:`PRELOAD_FAMILIES` and the
        built-in families first (once per zygote; that request then waits for the imports).

        Raises
        ------
        ZygoteUnavailable
            The zygote is gone or did not answer within ``timeout`` seconds.
        """
        if not self.alive or self.sock is None:
            raise ZygoteUnavailable("the zygote is not running")
        in_r, in_w = os.pipe()
        out_r, out_w = os.pipe()
        try:
            with self._request_lock:
                importing = families and "families" not in self.groups
                request = json.dumps({"op": "fork", "cwd": cwd or os.getcwd(),
                                      "groups": ["families"] if families else []}).encode()
                try:
                    socket.send_fds(self.sock, [request], [in_r, out_w, int(stderr_fd)])
                except OSError as exc:
                    raise ZygoteUnavailable(f"fork request failed: {exc}") from None
                reply, fds = self._next_reply(max(timeout, START_TIMEOUT_S) if importing
                                              else timeout)
                for group, secs in (reply.get("imported") or {}).items():
                    self.groups[str(group)] = float(secs)
        except BaseException:
            for fd in (in_w, out_r):
                with contextlib.suppress(OSError):
                    os.close(fd)
            raise
        finally:
            # The child holds its own copies now; ours must go, or its death would never
            # reach us as end-of-file.
            for fd in (in_r, out_w):
                with contextlib.suppress(OSError):
                    os.close(fd)
        if reply.get("op") != "forked":
            for fd in fds + [in_w, out_r]:
                with contextlib.suppress(OSError):
                    os.close(fd)
            raise ZygoteUnavailable(str(reply.get("error", "the zygote could not fork")))
        pid = int(reply["pid"])
        with self._exit_cv:
            if pid not in self._exits:
                self._children.add(pid)
        pidfd = fds[0] if fds else None
        for extra in fds[1:]:
            with contextlib.suppress(OSError):
                os.close(extra)
        return ForkedProcess(self, pid, pidfd, os.fdopen(in_w, "wb"), os.fdopen(out_r, "rb"))

    def preload_families(self, timeout: float = START_TIMEOUT_S) -> None:
        """Have the zygote import :data:`PRELOAD_FAMILIES` and the built-in families now."""
        if "families" in self.groups or not self.alive or self.sock is None:
            return
        with self._request_lock:
            try:
                self.sock.send(json.dumps({"op": "preload", "groups": ["families"]}).encode())
            except OSError as exc:
                raise ZygoteUnavailable(f"preload request failed: {exc}") from None
            reply, fds = self._next_reply(timeout)
        for fd in fds:
            with contextlib.suppress(OSError):
                os.close(fd)
        for group, secs in (reply.get("imported") or {}).items():
            self.groups[str(group)] = float(secs)

    def _next_reply(self, timeout: float) -> tuple[dict, list[int]]:
        end = time.monotonic() + timeout
        with self._reply_cv:
            while not self._replies:
                left = end - time.monotonic()
                if not self._alive:
                    raise ZygoteUnavailable("the zygote died: " + self.stderr_tail())
                if left <= 0:
                    raise ZygoteUnavailable(f"the zygote did not fork within {timeout:g} s")
                self._reply_cv.wait(min(left, 0.5))
            return self._replies.pop(0)

    def exit_code(self, pid: int) -> int | None:
        with self._exit_cv:
            return self._exits.get(int(pid))

    def wait_exit(self, pid: int, timeout: float | None) -> int | None:
        end = None if timeout is None else time.monotonic() + timeout
        with self._exit_cv:
            while int(pid) not in self._exits:
                left = None if end is None else end - time.monotonic()
                if left is not None and left <= 0:
                    return None
                self._exit_cv.wait(left if left is not None else 0.5)
            return self._exits[int(pid)]

    def close(self, timeout: float = 5.0) -> None:
        """Ask the zygote to quit (it kills any child still running), then make sure it did."""
        sock, proc = self.sock, self.proc
        if sock is not None:
            with contextlib.suppress(OSError):
                sock.send(json.dumps({"op": "quit"}).encode())
            with contextlib.suppress(OSError):
                sock.shutdown(socket.SHUT_WR)
        if proc is not None:
            try:
                proc.wait(timeout=timeout)
            except subprocess.TimeoutExpired:
                proc.kill()
                with contextlib.suppress(subprocess.TimeoutExpired):
                    proc.wait(timeout=5.0)
        if self._thread.is_alive() and self._thread is not threading.current_thread():
            self._thread.join(timeout=timeout)
        if sock is not None:
            with contextlib.suppress(OSError):
                sock.close()
        self.sock = None
        self._alive = False
        with contextlib.suppress(OSError, ValueError):
            self._stderr.close()


# ============================================================================ sharing per study
_LOCK = threading.RLock()
_ZYGOTES: dict[tuple, Zygote] = {}
_USERS: dict[tuple, int] = {}
_STARTS: dict[tuple, int] = {}
_NOTES: dict[tuple, str] = {}
_TIMERS: dict[tuple, threading.Timer] = {}
_SCOPES = 0


def _key(python: str, threads: int, sys_path: tuple[str, ...]) -> tuple:
    return (python, int(threads), tuple(sys_path))


def acquire(*, python: str, threads: int, sys_path: tuple[str, ...],
            env: dict[str, str]) -> tuple[Zygote | None, str]:
    """The running zygote for these settings (started on first use), or (None, why not).

    Every successful call must be matched by :func:`release`. A zygote that failed to start is
    retried at most :data:`MAX_STARTS` times per key; after that the harness spawns.
    """
    key = _key(python, threads, sys_path)
    with _LOCK:
        timer = _TIMERS.pop(key, None)
        if timer is not None:
            timer.cancel()
        z = _ZYGOTES.get(key)
        if z is not None and not z.alive:
            _NOTES[key] = "the zygote died: " + (z.stderr_tail() or "no message")
            z.close()
            _ZYGOTES.pop(key, None)
            z = None
        if z is None:
            if _STARTS.get(key, 0) >= MAX_STARTS:
                return None, _NOTES.get(key, "the zygote failed to start")
            _STARTS[key] = _STARTS.get(key, 0) + 1
            # Started under the lock: curves starting together wait for one zygote rather than
            # each paying the imports.
            try:
                z = Zygote(python=python, threads=threads, sys_path=sys_path, env=env).start()
            except ZygoteUnavailable as exc:
                _NOTES[key] = str(exc)
                return None, str(exc)
            _ZYGOTES[key] = z
        _USERS[key] = _USERS.get(key, 0) + 1
        return z, ""


def release(z: Zygote | None) -> None:
    """One user fewer; an unused zygote outside a :func:`launcher_scope` goes after
    :data:`LINGER_S` seconds."""
    if z is None:
        return
    with _LOCK:
        key = _key(z.python, z.threads, z.sys_path)
        if _ZYGOTES.get(key) is not z:
            return
        _USERS[key] = max(0, _USERS.get(key, 0) - 1)
        if _USERS[key] == 0 and _SCOPES == 0:
            timer = threading.Timer(LINGER_S, _close_if_idle, args=(key, z))
            timer.daemon = True
            _TIMERS[key] = timer
            timer.start()


def _close_if_idle(key: tuple, z: Zygote) -> None:
    with _LOCK:
        if _ZYGOTES.get(key) is not z or _USERS.get(key, 0) > 0 or _SCOPES > 0:
            return
        _ZYGOTES.pop(key, None)
        _TIMERS.pop(key, None)
    z.close()


def shutdown_all() -> None:
    """Close every zygote of this process (their running children are killed)."""
    with _LOCK:
        zygotes = list(_ZYGOTES.values())
        _ZYGOTES.clear()
        _USERS.clear()
        for t in _TIMERS.values():
            t.cancel()
        _TIMERS.clear()
        _STARTS.clear()
    for z in zygotes:
        z.close()


@contextlib.contextmanager
def launcher_scope() -> Iterator[None]:
    """Hold zygotes for a whole study: none lingers or is restarted between its curves, and
    every zygote idle at the end of the outermost scope is closed (``run_study`` wraps a study
    in one)."""
    global _SCOPES
    with _LOCK:
        _SCOPES += 1
    try:
        yield
    finally:
        with _LOCK:
            _SCOPES -= 1
            idle = [] if _SCOPES else [k for k in _ZYGOTES if _USERS.get(k, 0) == 0]
            closing = [_ZYGOTES.pop(k) for k in idle]
            for k in idle:
                t = _TIMERS.pop(k, None)
                if t is not None:
                    t.cancel()
                _STARTS.pop(k, None)
        for z in closing:
            z.close()


def live_zygotes() -> list[Zygote]:
    """The zygotes this process is running (for tests and diagnostics)."""
    with _LOCK:
        return list(_ZYGOTES.values())


import atexit  # noqa: E402  (registered once the functions it calls exist)

atexit.register(shutdown_all)


# ============================================================================ the zygote process
def _parent_death_signal() -> None:
    from profiler.harness import _set_parent_death_signal  # the same prctl as a spawned worker

    _set_parent_death_signal()


def is_builtin_family(family: str) -> bool:
    """Whether a curve's family is one of the registered built-ins (by name or module path)."""
    try:
        from model_zoo.base import _BUILTIN, names
    except ImportError:
        return False
    return family in names() or family in _BUILTIN.values()


def _preload(modules: tuple[str, ...], *, families: bool) -> tuple[list[str], dict[str, str]]:
    import importlib
    import warnings

    loaded, failed = [], {}
    with warnings.catch_warnings():
        # pgmpy warns about its own deprecations on import; a worker never sees them either way.
        warnings.simplefilter("ignore")
        for name in modules:
            try:
                importlib.import_module(name)
                loaded.append(name)
            except Exception as exc:  # a missing optional piece: the worker imports it if needed
                failed[name] = f"{type(exc).__name__}: {exc}"
        if families:
            try:
                from model_zoo.base import names, resolve

                for fam in names():
                    try:
                        resolve(fam)
                        loaded.append(f"family:{fam}")
                    except Exception as exc:
                        failed[f"family:{fam}"] = f"{type(exc).__name__}: {exc}"
            except Exception as exc:
                failed["model_zoo"] = f"{type(exc).__name__}: {exc}"
    _freeze()
    return loaded, failed


def _freeze() -> None:
    import gc

    gc.collect()
    # The import-time objects never die; freezing them keeps the children's collections from
    # walking (and copy-on-write touching) them.
    gc.freeze()


def zygote_main() -> None:
    """Entry point of the zygote process (``python -c "...zygote_main()"``, started by
    :class:`Zygote`): preload, then serve fork requests until the parent goes."""
    _parent_death_signal()
    expected = os.environ.get(_ENV_PARENT)
    if expected and os.getppid() != int(expected):
        os._exit(0)  # the parent died before the death signal was armed
    sock = socket.socket(fileno=int(os.environ.pop(_ENV_FD)))
    for p in reversed(json.loads(os.environ.pop("INFERCOST_ZYGOTE_PATH", "[]"))):
        if p and p not in sys.path:
            sys.path.insert(0, p)
    cwd = os.getcwd()
    if cwd not in sys.path:
        sys.path.insert(0, cwd)
    t0 = time.perf_counter()
    loaded, failed = _preload(PRELOAD, families=False)
    seconds = time.perf_counter() - t0
    _send(sock, {"op": "ready", "pid": os.getpid(), "import_seconds": seconds,
                 "preloaded": loaded, "failed": failed})
    _serve(sock)


def _send(sock: socket.socket, msg: dict, fds: list[int] = ()) -> None:
    data = json.dumps(msg).encode()
    try:
        if fds:
            socket.send_fds(sock, [data], list(fds))
        else:
            sock.send(data)
    except OSError:
        _die(set())


def _die(children: set[int]) -> None:
    for pid in children:
        with contextlib.suppress(OSError):
            os.kill(pid, signal.SIGKILL)
    os._exit(0)


def _serve(sock: socket.socket) -> None:
    wake_r, wake_w = os.pipe()
    os.set_blocking(wake_w, False)
    os.set_blocking(wake_r, False)
    signal.set_wakeup_fd(wake_w)
    signal.signal(signal.SIGCHLD, lambda *_: None)  # the wake-up byte is what matters
    children: set[int] = set()
    groups: set[str] = set()

    def reap() -> None:
        while children:
            try:
                pid, status = os.waitpid(-1, os.WNOHANG)
            except ChildProcessError:
                children.clear()
                return
            if pid == 0:
                return
            children.discard(pid)
            _send(sock, {"op": "exit", "pid": pid,
                         "returncode": os.waitstatus_to_exitcode(status)})

    while True:
        try:
            ready, _, _ = select.select([sock, wake_r], [], [], 5.0)
        except InterruptedError:
            ready = [wake_r]
        if wake_r in ready:
            with contextlib.suppress(BlockingIOError, OSError):
                os.read(wake_r, 4096)
        reap()
        if sock not in ready:
            continue
        try:
            data, fds, _flags, _addr = socket.recv_fds(sock, _MSG, 3)
        except OSError:
            _die(children)
        if not data:
            _die(children)  # the parent is gone, or closed us
        try:
            msg = json.loads(data)
        except ValueError:
            msg = {"op": "garbled"}
        if msg.get("op") == "quit":
            _die(children)
        imported = {}
        for group in msg.get("groups") or ():
            if group == "families" and group not in groups:
                t0 = time.perf_counter()
                _preload(PRELOAD_FAMILIES, families=True)
                groups.add(group)
                imported[group] = time.perf_counter() - t0
        if msg.get("op") == "preload":
            for fd in fds:
                with contextlib.suppress(OSError):
                    os.close(fd)
            _send(sock, {"op": "preloaded", "imported": imported})
            continue
        if msg.get("op") != "fork" or len(fds) != 3:
            for fd in fds:
                with contextlib.suppress(OSError):
                    os.close(fd)
            _send(sock, {"op": "refused", "error": f"bad request {msg.get('op')!r}"})
            continue
        reap()  # children that ended during the imports
        zygote_pid = os.getpid()
        try:
            pid = os.fork()
        except OSError as exc:
            for fd in fds:
                os.close(fd)
            _send(sock, {"op": "refused", "error": f"fork failed: {exc}"})
            continue
        if pid == 0:
            _child(fds, msg.get("cwd"), zygote_pid, (sock.fileno(), wake_r, wake_w))
        for fd in fds:
            os.close(fd)
        children.add(pid)
        pidfd = None
        if hasattr(os, "pidfd_open"):
            with contextlib.suppress(OSError):
                pidfd = os.pidfd_open(pid)  # valid even if the child already exited: not reaped
        _send(sock, {"op": "forked", "pid": pid, "imported": imported},
              [pidfd] if pidfd is not None else [])
        if pidfd is not None:
            os.close(pidfd)


def _child(fds: list[int], cwd: str | None, zygote_pid: int, close: tuple[int, ...]) -> None:
    """In the forked child: become a measuring worker on the given descriptors; never return."""
    code = 1
    try:
        signal.set_wakeup_fd(-1)
        signal.signal(signal.SIGCHLD, signal.SIG_DFL)
        for fd in close:
            with contextlib.suppress(OSError):
                os.close(fd)
        for target, fd in enumerate(fds):
            os.dup2(fd, target)
        for fd in fds:
            if fd > 2:
                with contextlib.suppress(OSError):
                    os.close(fd)
        with contextlib.suppress(OSError):
            os.setsid()
        _parent_death_signal()
        if os.getppid() != zygote_pid:
            os._exit(0)  # the zygote died between the fork and the death signal
        import faulthandler
        import importlib

        sys.stdin = open(0, "r", closefd=False)
        sys.stdout = open(1, "w", closefd=False)
        sys.stderr = open(2, "w", buffering=1, closefd=False, errors="backslashreplace")
        faulthandler.enable(file=sys.stderr, all_threads=True)
        if cwd:
            with contextlib.suppress(OSError):
                os.chdir(cwd)
            if cwd not in sys.path:
                sys.path.insert(0, cwd)
            importlib.invalidate_caches()
        from profiler.harness import worker_main

        worker_main()
        code = 0
    except SystemExit as exc:
        code = exc.code if isinstance(exc.code, int) else 1
    except BaseException:
        with contextlib.suppress(Exception):
            import traceback

            traceback.print_exc()
    finally:
        with contextlib.suppress(Exception):
            sys.stderr.flush()
        os._exit(code)
