"""Snakemake, imported while the holdfast command does its own checks, then told what to run.

Importing Snakemake and collecting its plugins costs about 1.7 s of one core before it reads the Snakefile.
``holdfast run`` and ``holdfast open`` start this process as they start, so that cost overlaps their checks;
when the checks pass they write one JSON line to its stdin, ``{"argv": [...], "env": {...}, "log": PATH|null}``,
and it runs Snakemake's own command line on ``argv`` exactly as ``python -m snakemake`` would (``sys.argv[0]``
is Snakemake's ``__main__.py``). If stdin closes without a line (a check failed), it exits 0 having run nothing.

At the end it cancels the scheduler's re-evaluation timers (``threading.Timer`` threads of up to a second that
the interpreter would otherwise wait for at exit) and leaves; the exit code is Snakemake's. After a success it
skips the interpreter's teardown of its modules (:func:`_end_without_teardown`), which took about half a second
after Snakemake's last line, on the path of every ``holdfast run`` and ``holdfast open``.
"""

from __future__ import annotations

import json
import os
import signal
import sys
import threading


def _code(value: object) -> int:
    """An exit code from ``SystemExit.code``: None is success, a message is a failure (printed)."""
    if value is None:
        return 0
    if isinstance(value, int):
        return value
    sys.stderr.write(f"{value}\n")
    return 1


def main() -> int:
    """Import Snakemake, wait for the request on stdin, run it; the exit code is Snakemake's."""
    # Ctrl-C reaches the whole process group: before its request this process has nothing to stop (holdfast ends it
    # if unused), so it stays quiet instead of printing a traceback; from the request on, Snakemake handles it.
    signal.signal(signal.SIGINT, signal.SIG_IGN)
    import snakemake
    import snakemake.cli

    snakemake.cli.get_argument_parser()  # collects the executor, storage and report plugins now, not later
    line = sys.stdin.readline()
    if not line.strip():
        return 0
    request = json.loads(line)
    signal.signal(signal.SIGINT, signal.default_int_handler)  # before Snakemake starts any job: they inherit it
    null = os.open(os.devnull, os.O_RDONLY)  # Snakemake's stdin, as before: nothing
    os.dup2(null, 0)
    os.close(null)
    if request.get("log"):
        log = os.open(request["log"], os.O_WRONLY | os.O_APPEND | os.O_CREAT, 0o644)
        os.dup2(log, 1)
        os.dup2(log, 2)
        os.close(log)
    os.environ.clear()
    os.environ.update(request["env"])
    argv = [str(a) for a in request["argv"]]
    sys.argv = [os.path.join(os.path.dirname(snakemake.__file__), "__main__.py"), *argv]
    code = 1
    try:
        snakemake.cli.main()  # reads sys.argv[1:], as `python -m snakemake` does
        code = 0
    except SystemExit as exc:
        code = _code(exc.code)
    except KeyboardInterrupt:
        code = 130
    finally:
        for thread in threading.enumerate():
            if isinstance(thread, threading.Timer):
                thread.cancel()  # a pending re-evaluation: nothing is left to schedule
        sys.stdout.flush()
        sys.stderr.flush()
    return code


_CODE: list[int] = []  # the exit code main() returned


def _end_without_teardown() -> None:
    """The last exit handler (registered first): after a success, end the process here, once the interpreter has
    waited for its threads and run every other exit handler, without tearing down the modules one by one."""
    if _CODE == [0]:
        if "logging" in sys.modules:
            # Only a safeguard: logging's own exit handler already flushed Snakemake's handlers (logging is imported
            # after this handler was registered, so its handler runs first); this matters only when something such
            # as a sitecustomize imported logging before us. shutdown() is idempotent.
            sys.modules["logging"].shutdown()
        sys.stdout.flush()
        sys.stderr.flush()
        os._exit(0)


if __name__ == "__main__":
    import atexit

    atexit.register(_end_without_teardown)  # before Snakemake registers any: exit handlers run last-in first-out
    _CODE.append(main())
    sys.exit(_CODE[0])
