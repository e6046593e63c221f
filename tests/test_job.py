"""How a rule's job reaches the steps: Snakemake's job fields as plain data (holdfast.job), real Snakemake throughout.

Every rule's body hands its job to a small process that imports only the standard library; these tests check that
the description reads like Snakemake's own job object, that reading it needs no Snakemake, and that the job runs
without the warm worker and without ``--force-use-threads`` (plain Snakemake as a user might start it).
"""

from __future__ import annotations

import json
import os
import pickle
import subprocess
import sys
from pathlib import Path

from conftest import REPO
from holdfast.job import Job, describe
from snakemake.iocontainers import InputFiles, Log, OutputFiles, Params, Wildcards


def _named(cls: type, values: list, names: dict[str, tuple[int, int | None]]) -> object:
    named = cls(values)
    for name, (start, end) in names.items():
        named._set_name(name, start, end)
    return named


def _snakemake_fields() -> dict:
    return {
        "input": _named(InputFiles, ["r/dev.parquet", "r/fits/a.parquet", "r/fits/b.parquet"],
                        {"dev": (0, None), "fits": (1, 3)}),
        "output": _named(OutputFiles, ["r/ranking.parquet"], {"ranking": (0, None)}),
        "params": _named(Params, ['{"a": 1}', 5], {"spec": (0, None), "folds": (1, None)}),
        "wildcards": _named(Wildcards, ["forest", "0", "3"], {"family": (0, None), "repeat": (1, None),
                                                              "fold": (2, None)}),
        "log": _named(Log, ["r/logs/tally.log"], {}),
    }


def test_a_described_job_reads_like_snakemakes_job_object() -> None:
    fields = _snakemake_fields()
    config = {"experiment": "bc", "data": {"path": "data.csv"}, "candidates": {"forest": {"threads": 2}}}
    description = describe("tally", fields["input"], fields["output"], fields["params"], fields["wildcards"], 2,
                           _named(Params, [1000], {"mem_mb": (0, None)}), fields["log"], config)
    job = Job(pickle.loads(pickle.dumps(description)))
    assert job.rule == "tally" and job.threads == 2 and job.config == config
    assert job.input.dev == "r/dev.parquet" and list(job.input.fits) == ["r/fits/a.parquet", "r/fits/b.parquet"]
    assert list(job.input) == list(fields["input"]) and job.input[0] == "r/dev.parquet"
    assert getattr(job.input, "round", None) is None and getattr(job.wildcards, "outer", None) is None
    assert job.output.ranking == "r/ranking.parquet" and job.log[0] == "r/logs/tally.log"
    assert json.loads(job.params.spec) == {"a": 1} and job.params.folds == 5
    assert (job.wildcards.family, job.wildcards.repeat, job.wildcards.fold) == ("forest", "0", "3")
    assert job.resources.mem_mb == 1000
    # Every field the steps read, compared with Snakemake's own containers.
    for field in ("input", "output", "params", "wildcards", "log"):
        ours, theirs = getattr(job, field), fields[field]
        assert [str(v) for v in ours] == [str(v) for v in theirs]
        assert ours.keys() == list(theirs.keys())


def test_reading_a_described_job_imports_no_snakemake(tmp_path: Path) -> None:
    # The job process must start in a few hundredths of a second: the description holds only plain data, so
    # unpickling it in a bare interpreter (no site-packages) must work and must not import Snakemake.
    fields = _snakemake_fields()
    description = describe("tally", fields["input"], fields["output"], fields["params"], fields["wildcards"], 1,
                           _named(Params, [1000], {"mem_mb": (0, None)}), fields["log"], {"experiment": "bc"})
    path = tmp_path / "job.pickle"
    path.write_bytes(pickle.dumps(description, protocol=4))
    check = ("import pickle, sys; d = pickle.load(open(sys.argv[1], 'rb')); "
             "assert not any(m.split('.')[0] == 'snakemake' for m in sys.modules), sorted(sys.modules); "
             "print(d['input'][1]['fits'])")
    result = subprocess.run([sys.executable, "-S", "-I", "-c", check, str(path)], capture_output=True, text=True)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == "['r/fits/a.parquet', 'r/fits/b.parquet']"


def test_plain_snakemake_without_worker_or_threads_still_runs_a_step(bc_workdir: Path) -> None:
    # Without --force-use-threads Snakemake starts each run: job as a Snakemake of its own; without the worker the
    # job process runs the step itself (as on a cluster). Slower, but the same step and the same ledger line.
    env = {k: v for k, v in os.environ.items() if not k.startswith("HOLDFAST_WORKER")}
    env["PYTHONPATH"] = str(REPO / "scripts")
    cmd = [sys.executable, "-m", "snakemake", "-s", str(REPO / "Snakefile"), "-d", str(bc_workdir), "--cores", "2",
           "results/bc/sealed/manifest.json", "--configfile", str(bc_workdir / "config.yaml")]
    result = subprocess.run(cmd, capture_output=True, text=True, timeout=600, env=env, stdin=subprocess.DEVNULL)
    assert result.returncode == 0, result.stderr[-3000:]
    manifest = json.loads((bc_workdir / "results/bc/sealed/manifest.json").read_text())
    assert manifest["counts"]["test"] > 0
    log = (bc_workdir / "results/bc/logs/seal.log").read_text()
    assert "sealed" in log and "test rows" in log
    ledger = [json.loads(line) for line in (bc_workdir / "results/bc/ledger.jsonl").read_text().splitlines()]
    assert [entry["event"] for entry in ledger] == ["seal"]


def _job_reading(paths: list[str], params: list[str] | None = None) -> Job:
    """A described job whose inputs are ``paths`` (and whose params are ``params``), of experiment 'e'."""
    fields = _snakemake_fields()
    fields["input"] = _named(InputFiles, paths, {})
    fields["params"] = _named(Params, params or [], {})
    return Job(describe("tally", threads=1, resources=_named(Params, [], {}), config={"experiment": "e"}, **fields))


def test_a_step_that_failed_on_a_cut_or_overwritten_file_is_told_which_one(tmp_path: Path) -> None:
    """holdfast.steps.unreadable_files: asked after a step failed with an error holdfast did not raise on purpose."""
    import pandas as pd
    from holdfast.steps import _damaged_message, unreadable_files

    good = tmp_path / "good.parquet"
    pd.DataFrame({"row_key": [f"k{i}" for i in range(5000)], "x": range(5000)}).to_parquet(good)
    (tmp_path / "good.json").write_text('{"a": 1}')
    (tmp_path / "notes.txt").write_text("not read: neither Parquet nor JSON")
    readable = [str(good), str(tmp_path / "good.json"), str(tmp_path / "notes.txt")]
    assert unreadable_files(_job_reading(readable)) == [], "a step's own failure keeps its traceback"

    cut = tmp_path / "cut.parquet"
    cut.write_bytes(good.read_bytes()[:300])
    overwritten = tmp_path / "choice.json"
    overwritten.write_text('{"winner": ')
    inner = tmp_path / "inner.parquet"  # footer intact, a data page overwritten: only reading it whole tells
    data = bytearray(good.read_bytes())
    data[8:2008] = b"\xff" * 2000
    inner.write_bytes(bytes(data))
    named = str(tmp_path / "test_keys.parquet")  # a file named by a param (assign_folds reads the test keys so)
    Path(named).write_bytes(b"PAR1 not a table")
    damaged = unreadable_files(_job_reading([*readable, str(cut), str(overwritten), str(inner)],
                                            params=['{"spec": 1}', named, str(tmp_path / "absent.parquet")]))
    assert [path for path, _ in damaged] == [str(cut), str(overwritten), str(inner), named]
    assert damaged[0][1] == "Parquet magic bytes not found in footer" and all(reason for _, reason in damaged)

    job = _job_reading([str(cut)])
    line = _damaged_message(job, damaged)
    assert line.startswith(f"'{cut}' cannot be read (Parquet magic bytes not found in footer) (and 3 more")
    assert "'holdfast audit results/e'" in line and "delete the file and run again" in line
    sealed = _damaged_message(job, [("results/e/dev.parquet", "cut")])
    assert "the seal never runs again" in sealed and "delete" not in sealed
