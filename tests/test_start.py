"""How holdfast starts Snakemake and its jobs quickly: Snakemake imported ahead, jobs that wait for the worker.

``holdfast.snakemake_ready`` imports Snakemake while the command checks the config and then runs Snakemake's
own command line; ``holdfast.worker._connect`` lets a job wait for a worker that is still importing instead of
running cold. Both run for real here (real Snakemake, real worker processes).
"""

from __future__ import annotations

import json
import os
import signal
import subprocess
import sys
import time
from pathlib import Path
from typing import Any

import pytest
from conftest import REPO
from holdfast import worker

ENV = {**os.environ, "PYTHONPATH": str(REPO / "scripts")}


def _ready(tmp_path: Path) -> subprocess.Popen[str]:
    return subprocess.Popen([sys.executable, "-m", "holdfast.snakemake_ready"], cwd=tmp_path, env=ENV,
                            stdin=subprocess.PIPE, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)


def test_a_ready_snakemake_told_nothing_runs_nothing(tmp_path: Path) -> None:
    process = _ready(tmp_path)
    _, err = process.communicate("", timeout=120)
    assert process.returncode == 0, err
    assert not (tmp_path / ".snakemake").exists()


def test_a_ready_snakemake_runs_the_command_line_as_python_m_snakemake_would(tmp_path: Path) -> None:
    # The Snakefile sees sys.argv as under `python -m snakemake` (holdfast.plan.snakemake_flags reads it there),
    # the environment it was sent, and its output goes to the named log; Snakemake's exit code comes back.
    (tmp_path / "Snakefile").write_text(
        "import atexit, json, os, sys\n"
        f"sys.path.insert(0, {str(REPO / 'scripts')!r})\n"
        "from holdfast.plan import snakemake_flags\n"
        "if '--target-jobs' not in sys.argv:  # the main process (a job's own Snakemake has that option)\n"
        "    atexit.register(lambda: open('exit_handler_ran', 'w').close())\n"
        "    with open('seen.json', 'w') as handle:\n"
        "        json.dump({'flags': snakemake_flags(), 'argv0': sys.argv[0],\n"
        "                   'mark': os.environ.get('HOLDFAST_TEST_MARK')}, handle, default=sorted)\n"
        "rule all:\n"
        "    output: 'done.txt'\n"
        "    shell: 'touch {output}'\n")
    log = tmp_path / "snakemake.log"
    request = {"argv": ["-s", "Snakefile", "--cores", "1", "--forcerun", "all"], "log": str(log),
               "env": {**ENV, "HOLDFAST_TEST_MARK": "sent"}}
    process = _ready(tmp_path)
    out, err = process.communicate(json.dumps(request) + "\n", timeout=300)
    assert process.returncode == 0, log.read_text() + err
    seen = json.loads((tmp_path / "seen.json").read_text())
    assert seen["flags"]["forcerun"] == ["all"]
    assert Path(seen["argv0"]).name == "__main__.py" and "snakemake" in seen["argv0"]
    assert seen["mark"] == "sent"
    assert "Finished job" in log.read_text() or "steps (100%) done" in log.read_text()
    assert out == ""  # everything went to the log
    # It ends without the interpreter's module teardown after a success, but only after every exit handler ran
    # (Snakemake's and its plugins' clean-ups; here one the Snakefile registered).
    assert (tmp_path / "exit_handler_ran").exists()

    failing = {**request, "argv": ["-s", "Missing.smk", "--cores", "1"]}
    process = _ready(tmp_path)
    process.communicate(json.dumps(failing) + "\n", timeout=300)
    assert process.returncode == 1
    assert "Missing.smk" in log.read_text()


def test_a_job_waits_for_a_worker_that_is_still_importing(tmp_path: Path,
                                                          monkeypatch: pytest.MonkeyPatch) -> None:
    address = str(tmp_path / "w.sock")
    started = subprocess.Popen([sys.executable, "-m", "holdfast.worker", address], env=ENV,
                               stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    try:
        assert not os.path.exists(address)  # its imports take seconds: no socket yet
        monkeypatch.setenv(worker.PID_ENV, str(started.pid))
        conn = worker._connect(address)
        assert conn is not None, "the job gave up on a worker that was still starting (it would run cold)"
        conn.close()
    finally:
        started.terminate()
        started.wait(timeout=30)


def test_a_job_does_not_wait_for_a_worker_that_ended(tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    ended = subprocess.Popen([sys.executable, "-c", "pass"])
    deadline = time.monotonic() + 30
    while worker._alive(ended.pid) and time.monotonic() < deadline:  # not reaped yet: a zombie counts as ended
        time.sleep(0.05)
    assert not worker._alive(ended.pid)
    monkeypatch.setenv(worker.PID_ENV, str(ended.pid))
    t0 = time.monotonic()
    assert worker._connect(str(tmp_path / "none.sock")) is None
    assert time.monotonic() - t0 < 5
    ended.wait()
    monkeypatch.delenv(worker.PID_ENV)  # no worker named: no wait at all (plain snakemake, a cluster job)
    t0 = time.monotonic()
    assert worker._connect(str(tmp_path / "none.sock")) is None
    assert time.monotonic() - t0 < 1



def test_ctrl_c_before_the_request_leaves_the_ready_snakemake_quiet(tmp_path: Path) -> None:
    # Ctrl-C reaches the whole process group while holdfast still checks the config; the process importing
    # Snakemake has nothing to stop then (holdfast ends it), so it must not print a traceback on the terminal.
    process = _ready(tmp_path)
    time.sleep(0.5)  # inside its imports (about 1.7 s)
    process.send_signal(signal.SIGINT)
    _, err = process.communicate("", timeout=120)
    assert "Traceback" not in err and "KeyboardInterrupt" not in err, err
    assert process.returncode == 0


@pytest.fixture(scope="module")
def started_worker(tmp_path_factory: pytest.TempPathFactory) -> Any:
    """A real worker process, as `holdfast run` starts one; yields (address, pid)."""
    address = str(tmp_path_factory.mktemp("worker") / "w.sock")
    process = subprocess.Popen([sys.executable, "-m", "holdfast.worker", address], env=ENV,
                               stdin=subprocess.DEVNULL, stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
    yield address, str(process.pid)
    process.terminate()
    process.wait(timeout=30)


def test_a_call_in_the_worker_runs_in_the_callers_folder_and_environment(
        started_worker: tuple[str, str], tmp_path: Path, monkeypatch: pytest.MonkeyPatch,
        capfd: pytest.CaptureFixture[str]) -> None:
    address, pid = started_worker
    monkeypatch.chdir(tmp_path)
    monkeypatch.setenv("HOLDFAST_TEST_MARK", "sent")
    assert worker.call(address, "os:getcwd", pid=pid) == str(tmp_path)  # waits for the worker's imports first
    assert worker.call(address, "os:getenv", "HOLDFAST_TEST_MARK", pid=pid) == "sent"
    assert worker.call(address, "os:getpid", pid=pid) not in (os.getpid(), int(pid))  # a forked child
    worker.call(address, "builtins:print", "printed by the child", pid=pid)
    assert "printed by the child" in capfd.readouterr().out  # its stdout is the caller's


def test_a_call_in_the_worker_raises_what_the_function_raised(started_worker: tuple[str, str], tmp_path: Path,
                                                              capfd: pytest.CaptureFixture[str]) -> None:
    from holdfast.config import read_yaml
    from holdfast.errors import ConfigError

    address, pid = started_worker
    missing = str(tmp_path / "missing.yaml")
    with pytest.raises(ConfigError) as here:
        read_yaml(missing)
    with pytest.raises(ConfigError) as there:
        worker.call(address, "holdfast.config:read_yaml", missing, pid=pid)
    assert there.value.format_message() == here.value.format_message()
    assert there.value.exit_code == here.value.exit_code
    assert "Traceback" not in capfd.readouterr().err  # a deliberate error is one line, as in the caller
    # An error holdfast did not raise on purpose: its traceback on the caller's stderr, a RuntimeError naming it.
    with pytest.raises(RuntimeError, match="ZeroDivisionError in holdfast's worker"):
        worker.call(address, "operator:truediv", 1, 0, pid=pid)
    assert "ZeroDivisionError" in capfd.readouterr().err


def test_a_call_without_a_worker_says_so_at_once(tmp_path: Path) -> None:
    ended = subprocess.Popen([sys.executable, "-c", "pass"])
    ended.wait()
    t0 = time.monotonic()
    with pytest.raises(worker.NoAnswerError):
        worker.call(str(tmp_path / "none.sock"), "os:getcwd", pid=str(ended.pid))
    assert time.monotonic() - t0 < 5


def test_a_call_whose_child_dies_unanswered_is_done_by_the_command_itself(
        started_worker: tuple[str, str], tmp_path: Path, monkeypatch: pytest.MonkeyPatch) -> None:
    from holdfast import cli

    address, pid = started_worker
    with pytest.raises(worker.NoAnswerError):
        worker.call(address, "os:_exit", 3, pid=pid)  # the child ends without a word (as if killed)
    # holdfast.cli._in_worker then does the work in the command: with no worker answering, the value is its own.
    monkeypatch.setitem(cli._WORKER, "address", str(tmp_path / "gone.sock"))
    monkeypatch.setitem(cli._WORKER, "pid", "")
    assert cli._in_worker("os:getpid") == os.getpid()
    monkeypatch.setitem(cli._WORKER, "address", address)
    monkeypatch.setitem(cli._WORKER, "pid", pid)
    assert cli._in_worker("os:getpid") != os.getpid()  # and with the worker answering, a child of it did it
