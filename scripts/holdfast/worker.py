"""A pre-warmed worker for local runs: each job is forked from a process that has already imported its libraries.

Every Snakemake job is a new Python process, and a job's imports (pandas, pyarrow, scikit-learn) cost about
two seconds before any work, which on a laptop is most of what a small fit job costs. ``holdfast run`` and
``holdfast open`` start this worker before Snakemake (local runs only); the job process (holdfast.job) then
hands its job to the worker over a Unix socket, with its own stdout and stderr, and the worker forks a child that
runs the step with everything already imported. The job process waits for the child's exit code, so Snakemake sees an
ordinary job. If the job process dies (Snakemake was killed), the child is killed too. When no worker answers
(a cluster job, plain ``snakemake``, ``HOLDFAST_NO_WORKER=1``) the job process runs the step itself, as before.
The command that started the worker sends it its own heavy work the same way (:func:`call`: the full check before a
seal, the audits), so that only one process imports the libraries while Snakemake starts.

Only the standard library is imported at module level: the job process imports :func:`submit` cheaply.
"""

from __future__ import annotations

import contextlib
import os
import pickle
import select
import signal
import socket
import struct
import sys
import threading
from typing import Any

ENV = "HOLDFAST_WORKER"
PID_ENV = "HOLDFAST_WORKER_PID"  # the worker's process: a job that finds no socket yet waits while it runs
STARTUP_WAIT = 60.0  # seconds a job waits for a worker that is still importing (about 2 s alone, more when busy)
HEADER = struct.Struct("!Q")
# Seconds the worker waits, once ready, for a first connection before it starts the later imports: the command that
# started it is usually polling for it already (its check or audit), and an import under way would hold that up.
FIRST_WAIT = 0.25
# What the steps import; loaded once in the worker so that no job pays for it again (pyarrow.dataset: pandas's
# read_parquet with columns; narwhals' pandas part: scikit-learn's column handling imports it at a fit; jsonschema: the
# config's validation; py-spy showed each fit job importing the first two itself).
PRELOAD = ("numpy", "pandas", "pyarrow", "pyarrow.parquet", "pyarrow.dataset", "scipy.stats", "sklearn.base",
           "sklearn.pipeline", "jsonschema", "narwhals._pandas_like.namespace",
           "sklearn.compose", "sklearn.impute", "sklearn.preprocessing", "sklearn.metrics", "sklearn.linear_model",
           "sklearn.ensemble", "sklearn.tree", "sklearn.neighbors", "sklearn.model_selection", "threadpoolctl",
           "holdfast.job", "holdfast.steps", "holdfast.fit", "holdfast.folds", "holdfast.seal",
           "holdfast.tally", "holdfast.refit", "holdfast.rounds")
# What only the later steps import (plots, the report, diagnostics, the audit): loaded one by one after the socket is
# up, between connections, so the first jobs and the command's own check do not wait for them; every step that draws
# sets Agg too.
LATE = ("holdfast.audit", "holdfast.closing", "skops.io", "holdfast.opening", "matplotlib", "matplotlib.pyplot",
        "holdfast.learning", "holdfast.diagnostics", "holdfast.nested", "holdfast.report")


def _recv_exact(conn: socket.socket, size: int) -> bytes:
    chunks, left = [], size
    while left:
        chunk = conn.recv(min(left, 1 << 20))
        if not chunk:
            raise ConnectionError("the job process closed the connection")
        chunks.append(chunk)
        left -= len(chunk)
    return b"".join(chunks)


def _alive(pid: int) -> bool:
    """True while process ``pid`` runs (a zombie, dead but not yet reaped by its parent, counts as ended)."""
    if os.path.isdir("/proc/self"):
        try:
            with open(f"/proc/{pid}/stat", "rb") as handle:
                return handle.read().rsplit(b")", 1)[-1].split()[0] != b"Z"
        except OSError:
            return False
    try:  # no /proc (macOS): ask the kernel, which cannot tell a zombie
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def _connect(address: str, pid: str | None = None) -> socket.socket | None:
    """A connection to the worker at ``address``; while it is still importing (its process ``pid``, else the one
    named in :data:`PID_ENV`, runs, for up to :data:`STARTUP_WAIT` seconds) wait for it rather than run cold."""
    import time

    pid = os.environ.get(PID_ENV, "") if pid is None else pid
    deadline = time.monotonic() + STARTUP_WAIT
    while True:
        conn = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
        try:
            conn.connect(address)
            return conn
        except OSError:
            conn.close()
        if not pid.isdigit() or not _alive(int(pid)) or time.monotonic() > deadline:
            return None
        time.sleep(0.02)


def _sent(address: str, request: dict[str, Any], pid: str | None = None) -> socket.socket | None:
    """Connect to the worker and send ``request`` with this process's stdout, stderr, folder and environment; the
    open connection for the answer, or None when no worker answers."""
    payload = pickle.dumps({**request, "cwd": os.getcwd(), "env": dict(os.environ)}, protocol=4)
    conn = _connect(address, pid)
    if conn is None:
        return None
    socket.send_fds(conn, [HEADER.pack(len(payload))], [1, 2])
    conn.sendall(payload)
    return conn


def submit(address: str, job: Any) -> int | None:
    """Run ``job`` (a plain description, :func:`holdfast.job.describe`) in the worker; its exit code, or None when
    no worker answers."""
    conn = _sent(address, {"job": job})
    if conn is None:
        return None
    with conn:
        answer = conn.recv(1)
    if not answer:
        return 1  # the child died without an answer (killed, or it crashed hard): a failed job
    return answer[0]


class NoAnswerError(Exception):
    """The worker could not take the call, or its child ended without an answer: the caller runs it itself."""


def call(address: str, target: str, *args: Any, pid: str | None = None) -> Any:
    """Run ``module:function(*args)`` in a child of the worker, with this process's stdout, stderr, directory and
    environment; return its value, or raise the exception it raised.

    Used by the holdfast command for its own heavy work (the full check before a seal, the audits), so that the
    command imports neither pandas nor scikit-learn while the worker imports them anyway. Raises
    :class:`NoAnswerError` when no worker answers or the child died without a word.
    """
    sys.stdout.flush()
    sys.stderr.flush()
    conn = _sent(address, {"call": target, "args": args}, pid)
    if conn is None:
        raise NoAnswerError(f"no worker at {address}")
    with conn:
        try:
            (size,) = HEADER.unpack(_recv_exact(conn, HEADER.size))
            kind, value = pickle.loads(_recv_exact(conn, size))
        except Exception as exc:  # no answer, a cut one, or one that cannot be rebuilt here: do it in the caller
            raise NoAnswerError(f"the worker's child ended without an answer ({exc})") from None
    if kind == "raise":
        raise value
    return value


def _run_child(conn: socket.socket) -> None:
    """In the forked child: take the job, its stdout/stderr and environment, run the step, answer the code."""
    message, fds, _, _ = socket.recv_fds(conn, HEADER.size, 2)
    (size,) = HEADER.unpack(message)
    request = pickle.loads(_recv_exact(conn, size))
    os.dup2(fds[0], 1)
    os.dup2(fds[1], 2)
    for fd in fds:
        os.close(fd)
    os.chdir(request["cwd"])
    os.environ.clear()
    os.environ.update(request["env"])
    os.environ.pop(ENV, None)
    os.environ.pop(PID_ENV, None)

    def watch() -> None:  # the job process died (its Snakemake was killed): this job must not outlive it
        try:
            if not conn.recv(1):
                os.kill(os.getpid(), signal.SIGKILL)
        except OSError:
            os.kill(os.getpid(), signal.SIGKILL)

    threading.Thread(target=watch, daemon=True).start()
    if "call" in request:
        _answer_call(conn, request)
    code = 1
    try:
        from holdfast.job import Job
        from holdfast.steps import StepError, run

        try:
            run(Job(request["job"]))
            code = 0
        except StepError:
            code = 1  # the one-line message is already in the log and on stderr
    except BaseException:  # an unexpected failure: its traceback goes where a cold job's would
        import traceback

        traceback.print_exc()
    finally:
        sys.stdout.flush()
        sys.stderr.flush()
        try:
            conn.sendall(bytes([code]))
        finally:
            os._exit(code)


def _answer_call(conn: socket.socket, request: dict[str, Any]) -> None:
    """In the forked child: run the requested function and send back ("return", value) or ("raise", exception).

    An exception that cannot be pickled, or one holdfast did not raise on purpose, is printed here as a traceback
    (on the caller's stderr) and answered as a RuntimeError naming it.
    """
    import importlib

    try:
        module, _, name = request["call"].partition(":")
        answer: tuple[str, Any] = ("return", getattr(importlib.import_module(module), name)(*request["args"]))
    except KeyboardInterrupt:
        os._exit(130)  # Ctrl-C reached the whole process group: the caller is stopping too
    except BaseException as exc:  # every failure goes back to the caller, who raises it
        from holdfast.errors import HoldfastError

        if not isinstance(exc, HoldfastError):
            import traceback

            traceback.print_exc()
            exc = RuntimeError(f"{type(exc).__name__} in holdfast's worker: {exc}")
        answer = ("raise", exc)
    try:
        payload = pickle.dumps(answer, protocol=4)
    except Exception as exc:  # an answer that cannot travel is a failure of its own
        payload = pickle.dumps(("raise", RuntimeError(f"the answer of {request['call']} cannot be sent: {exc}")))
    sys.stdout.flush()
    sys.stderr.flush()
    try:
        conn.sendall(HEADER.pack(len(payload)) + payload)
    finally:
        os._exit(0)


def serve(address: str) -> None:
    """Import everything the steps need, then fork one child per job until the parent process goes away."""
    # The numeric libraries must not have started thread pools before fork; each job sets its own limits.
    for name in PRELOAD:
        _import(name)
    parent = os.getppid()
    listener = socket.socket(socket.AF_UNIX, socket.SOCK_STREAM)
    tmp = f"{address}.{os.getpid()}.tmp"
    listener.bind(tmp)
    listener.listen(64)
    os.replace(tmp, address)  # the socket appears only once the imports every step needs are done
    late = list(LATE)
    select.select([listener], [], [], FIRST_WAIT)
    listener.settimeout(1.0)
    signal.signal(signal.SIGCHLD, lambda *_: _reap())
    try:
        while os.getppid() == parent:
            # The later steps' imports go one by one between connections: a job or call that comes meanwhile is
            # served first (the first ones need none of them), and a child forked early imports what it uses.
            if late and not select.select([listener], [], [], 0)[0]:
                _import(late.pop(0))
                continue
            try:
                conn, _ = listener.accept()
            except TimeoutError:
                continue
            except InterruptedError:
                continue
            conn.settimeout(None)
            pid = os.fork()
            if pid == 0:
                listener.close()
                signal.signal(signal.SIGCHLD, signal.SIG_DFL)
                _run_child(conn)
            conn.close()
    finally:
        listener.close()
        with contextlib.suppress(FileNotFoundError):
            os.unlink(address)


def _import(name: str) -> None:
    """Import module ``name`` into the worker if it is installed (matplotlib with its file-only Agg backend)."""
    import importlib

    try:
        importlib.import_module(name)
        if name == "matplotlib":
            import matplotlib

            matplotlib.use("Agg")
    except ImportError:
        pass


def _reap() -> None:
    while True:
        try:
            pid, _ = os.waitpid(-1, os.WNOHANG)
        except ChildProcessError:
            return
        if pid == 0:
            return


def main(argv: list[str] | None = None) -> int:
    """``python -m holdfast.worker SOCKET``: serve jobs on the Unix socket SOCKET."""
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 1:
        sys.stderr.write("usage: python -m holdfast.worker SOCKET\n")
        return 2
    serve(args[0])
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
