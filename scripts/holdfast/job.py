"""How a rule's job reaches holdfast.steps: a plain description, handed to a small Python process.

Every rule ends in ``run: run_step(input, output, params, wildcards, threads, resources, log, rule)``
(``workflow/rules/common.smk``). :func:`describe` turns Snakemake's job fields into plain lists and dicts,
:func:`hand_over` starts ``python holdfast/job.py`` with that description on its stdin and waits for it, and
:func:`main` (that process) passes it to the local pre-warmed worker, or runs the step itself when no worker
answers (a cluster job, plain Snakemake, ``HOLDFAST_NO_WORKER``).

Why not Snakemake's ``script:``: a script job first unpickles Snakemake's own job object, which imports
Snakemake (0.3 s of a core per job here) before the job can even ask the worker. This process imports only the
standard library. The job is still a process of its own, so Snakemake's stop on Ctrl-C or SIGTERM ends it (and
the worker's child with it) as before. ``holdfast run`` passes ``--force-use-threads`` so that the ``run:`` block
runs in a thread of the main Snakemake process; without it Snakemake starts a whole new Snakemake per job.

Only the standard library is imported here: the job process must start in a few hundredths of a second.
"""

from __future__ import annotations

import os
import pickle
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from typing import Any

# Thread limits of a job's numeric libraries: what Snakemake sets for a shell or script job of `threads` threads.
THREAD_VARS = ("OMP_NUM_THREADS", "GOTO_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
               "VECLIB_MAXIMUM_THREADS", "NUMEXPR_NUM_THREADS")


class Fields:
    """A job's named files or values, read as attributes (``job.input.dev``), by position or by iteration."""

    def __init__(self, items: list[Any], names: dict[str, Any]) -> None:
        self._items = list(items)
        self._names = dict(names)

    def __getattr__(self, name: str) -> Any:
        try:
            return self.__dict__["_names"][name]
        except KeyError:
            raise AttributeError(name) from None

    def __getitem__(self, index: int) -> Any:
        return self._items[index]

    def __iter__(self) -> Iterator[Any]:
        return iter(self._items)

    def __len__(self) -> int:
        return len(self._items)

    def keys(self) -> list[str]:
        """The names, in the rule's order."""
        return list(self._names)

    def __repr__(self) -> str:
        return f"Fields({self._names!r})"


class Job:
    """What a step reads of its job: the fields of Snakemake's script object, as plain data."""

    def __init__(self, description: dict[str, Any]) -> None:
        self.rule: str = description["rule"]
        self.threads: int = int(description["threads"])
        self.config: dict[str, Any] = description["config"]
        for field in ("input", "output", "params", "wildcards", "resources", "log"):
            items, names = description[field]
            setattr(self, field, Fields(items, names))


def _plain(value: Any) -> Any:
    """A Snakemake value as plain data: its file objects (str subclasses) as str, its lists as lists."""
    if isinstance(value, str):
        return str(value)
    if isinstance(value, (int, float, bool)) or value is None:
        return value
    if isinstance(value, dict):
        return {str(k): _plain(v) for k, v in value.items()}
    if hasattr(value, "__iter__"):  # lists, tuples and Snakemake's named lists
        return [_plain(v) for v in value]
    return value


def _fields(named: Any) -> tuple[list[Any], dict[str, Any]]:
    """A Snakemake named list as (its items, {name: value})."""
    return [_plain(v) for v in named], {str(name): _plain(value) for name, value in named.items()}


def describe(rule: str, input: Any, output: Any, params: Any, wildcards: Any, threads: int, resources: Any,
             log: Any, config: dict[str, Any]) -> dict[str, Any]:
    """The job as plain data (in the main Snakemake process): nothing in it needs Snakemake to be read."""
    return {"rule": str(rule), "threads": int(threads), "config": _plain(config), "input": _fields(input),
            "output": _fields(output), "params": _fields(params), "wildcards": _fields(wildcards),
            "resources": _fields(resources), "log": _fields(log)}


def hand_over(description: dict[str, Any]) -> int:
    """Run the job in a process of its own (see :func:`main`); its exit code."""
    env = dict(os.environ)
    env.update({name: str(description["threads"]) for name in THREAD_VARS})
    tmpdir = description["resources"][1].get("tmpdir")
    if tmpdir:  # Snakemake's tmpdir resource, as it sets it for a shell or script job
        env.update({name: str(tmpdir) for name in ("TMPDIR", "TMP", "TEMPDIR", "TEMP")})
    scripts = str(Path(__file__).resolve().parents[1])
    env["PYTHONPATH"] = os.pathsep.join(p for p in (scripts, env.get("PYTHONPATH", "")) if p)
    payload = pickle.dumps(description, protocol=4)
    return subprocess.run([sys.executable, "-P", str(Path(__file__).resolve())], input=payload, env=env,
                          check=False).returncode


def main() -> int:
    """The job process: the description from stdin to the warm worker, or the step run here (cold)."""
    description = pickle.loads(sys.stdin.buffer.read())
    address = os.environ.get("HOLDFAST_WORKER")
    if address and not os.environ.get("SLURM_JOB_ID"):
        from holdfast.worker import submit  # standard library only

        code = submit(address, description)
        if code is not None:
            return code
    from holdfast.steps import StepError, run

    try:
        run(Job(description))
    except StepError:
        return 1  # the one-line message is already in the log and on stderr
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
