"""Benchmark (not a test): time and memory of the data-bound steps as the data grows.

1. The seal (``holdfast.seal.seal``) and the fold assignment step (``holdfast.steps.assign_folds``,
   the rule's adapter: draw, check, leakage summary, write) at 1 M and 10 M rows x 20 columns
   (id, binary target, 16 numeric and 2 text features; a seeded Parquet file), test stratified
   20 %, folds stratified 5-fold. Time, peak RSS of the process, and bytes per row of folds.parquet.
2. The tally (``holdfast.tally.tally``) with BBC-CV at 200 candidates x 100,000 development rows
   (20 families of 10, 5 folds): fits/ and oof/ files synthesized in holdfast's own format
   (``holdfast.fit.oof_frame`` and the fit record's columns, scores from ``holdfast.scoring``), from
   seeded predictions of varied quality. The tally holds every out-of-fold prediction.

Every measurement is a fresh process (so its peak RSS is its own; ``getrusage(RUSAGE_CHILDREN)``
in a wrapper); data are generated beforehand in other processes and not timed. "after imports"
is the process's peak RSS just before the measured call.

At the code this script was written against, seal + fold assignment took 0.3-0.7 ms per row and
their peak RSS grew by about 4 KB per row (measured once at 100,000 rows on a busy 2-core
machine): 10 M rows would take about an hour per rep and need tens of GB. A measurement that
fails or is killed (the out-of-memory killer) is reported in the table, and the rest goes on.

Run:  PYTHONPATH=scripts python bench/data_size.py [--reps 3] [--rows N ...] [--only seal tally]
                                                    [--keys content] [--full-precision]
      PYTHONPATH=scripts python bench/data_size.py --quick       (tiny sizes; checks that it works)
"""

from __future__ import annotations

import json
import shutil
import sys
from pathlib import Path
from typing import Any

import _common as c

CONFIG = {
    "experiment": "size", "data": {"path": "data.parquet", "target": "y", "id": "id"}, "task": "classification",
    "test": {"fraction": 0.2, "scheme": "stratified", "salt": "bench-size"},
    "folds": {"scheme": "stratified", "k": 5, "repeats": 1, "seed": 3},
    "candidates": {"logistic": {"estimator": "sklearn.linear_model.LogisticRegression"}},
}

MAKE_DATA = """\
import json, sys
import numpy as np, pyarrow as pa, pyarrow.parquet as pq
out, path, rows, digits = sys.argv[1], sys.argv[2], int(sys.argv[3]), int(sys.argv[4])
rng = np.random.default_rng(20261)
x = rng.standard_normal((rows, 16), dtype=np.float64)
logit = x[:, :4] @ np.array([1.0, -0.8, 0.6, 0.4])
codes_a, codes_b = rng.integers(0, 6, rows), rng.integers(0, 12, rows)
logit += np.array([-0.5, -0.2, 0.0, 0.1, 0.3, 0.6])[codes_a]
y = (rng.random(rows) < 1 / (1 + np.exp(-logit))).astype(np.int8)
columns = {"id": pa.array(np.arange(rows, dtype=np.int64)), "y": pa.array(y)}
for j in range(16):
    columns[f"x{j:02d}"] = pa.array(np.round(x[:, j], digits) if digits >= 0 else x[:, j])
for name, codes, levels in (("cat_a", codes_a, 6), ("cat_b", codes_b, 12)):
    labels = pa.array([f"{name[-1]}{i}" for i in range(levels)])
    columns[name] = pa.DictionaryArray.from_arrays(pa.array(codes.astype(np.int32)), labels).cast(pa.string())
pq.write_table(pa.table(columns), path)
json.dump({"columns": len(columns)}, open(out, "w"))
"""

WARM = """\
import importlib, os, time
os.environ.setdefault("MPLBACKEND", "Agg")
t_imports = time.perf_counter()
for module in {modules!r}:  # what the step imports inside its call, so that 'seconds' is the work alone
    try:
        importlib.import_module(module)
    except ImportError:
        pass
t_imports = time.perf_counter() - t_imports
"""
STEP_MODULES = ("pandas", "pyarrow.parquet", "sklearn.metrics", "sklearn.model_selection", "holdfast.seal",
                "holdfast.folds", "holdfast.leakage", "holdfast.ledger", "holdfast._io", "holdfast.tally",
                "holdfast.stats", "matplotlib.pyplot")


def warmed(code: str) -> str:
    """The measured code with the step's imports done (and timed) first."""
    return WARM.format(modules=STEP_MODULES) + code

SEAL = """\
import json, resource, sys, time
from pathlib import Path
from holdfast.config import seal_spec, validate
from holdfast.seal import seal
out, config_json, exp = sys.argv[1], sys.argv[2], sys.argv[3]
config = validate(json.loads(config_json))
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t0 = time.perf_counter()
manifest = seal(config["data"]["path"], {**seal_spec(config), "task": config["task"]}, exp, config["experiment"],
                leakage=config["leakage"])
seconds = time.perf_counter() - t0
Path(out).write_text(json.dumps({"seconds": seconds, "imports": t_imports, "before_kb": before,
                                 "dev": manifest["counts"]["dev"],
                                 "test": manifest["counts"]["test"]}))
"""

FOLDS = """\
import json, resource, sys, time
from pathlib import Path
from types import SimpleNamespace as Job
from holdfast.config import seal_spec, validate
from holdfast.steps import assign_folds
out, config_json, exp = sys.argv[1], sys.argv[2], Path(sys.argv[3])
config = validate(json.loads(config_json))
spec = {**seal_spec(config), "task": config["task"]}
# The fields the assign_folds rule (workflow/rules/folds.smk) hands its job, with the same values.
job = Job(rule="assign_folds", wildcards=Job(), log=[str(exp / "logs" / "assign_folds.log")],
          input=Job(dev=str(exp / "dev.parquet")),
          output=Job(folds=str(exp / "folds.parquet"), summary=str(exp / "folds_summary.parquet"),
                     leakage=str(exp / "leakage.json")),
          params=Job(spec=json.dumps(spec, sort_keys=True), folds=json.dumps(config["folds"], sort_keys=True),
                     test=str(exp / "sealed" / "test.parquet"), manifest=str(exp / "sealed" / "manifest.json"),
                     task=config["task"],
                     leakage=json.dumps(config["leakage"], sort_keys=True), ledger=str(exp / "ledger.jsonl")))
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t0 = time.perf_counter()
assign_folds(job)
seconds = time.perf_counter() - t0
Path(out).write_text(json.dumps({"seconds": seconds, "imports": t_imports, "before_kb": before}))
"""

MAKE_TALLY = """\
import json, sys
from pathlib import Path
import numpy as np, pandas as pd
from holdfast._io import write_parquet
from holdfast.candidates import candidate_id
from holdfast.fit import oof_frame
from holdfast.layout import fit_file
from holdfast.scoring import replay, score_outputs
out, exp, rows, families, per_family, k = sys.argv[1], Path(sys.argv[2]), *map(int, sys.argv[3:7])
metrics = ["roc_auc", "accuracy"]
rng = np.random.default_rng(20262)
keys = np.array([f"K{i:07d}" for i in range(rows)], dtype=object)
y = rng.integers(0, 2, rows)
signal = rng.standard_normal(rows) + 1.2 * (2 * y - 1)  # what every candidate partly sees
write_parquet(exp / "dev.parquet", pd.DataFrame({"row_key": keys, "y": y, "x0": signal}))
fold = rng.permutation(np.arange(rows) % k)
write_parquet(exp / "folds.parquet", pd.DataFrame({"row_key": keys, "repeat": np.zeros(rows, "uint8"),
              "fold": pd.array(fold, dtype="UInt8"), "train_from": np.zeros(rows, "uint8")}))
candidates, classes = {}, np.array([0, 1])
for f in range(families):
    family = f"fam{f:02d}"
    specs = []
    for j in range(per_family):
        params = {"C": float(10.0 ** (j - per_family // 2)), "tag": f}
        cid = candidate_id("sklearn.linear_model.LogisticRegression", {}, params)
        spec = {"id": cid, "family": family, "estimator": "sklearn.linear_model.LogisticRegression",
                "preprocess": {}, "params": params}
        candidates[cid] = spec
        specs.append((spec, 0.5 + rng.random()))  # how much of the signal this candidate sees
    noise = {spec["id"]: rng.standard_normal(rows) for spec, _ in specs}
    for fo in range(k):
        val = fold == fo
        records, oofs = [], []
        for spec, weight in specs:
            decision = weight * signal[val] + noise[spec["id"]][val]
            p1 = 1 / (1 + np.exp(-decision))
            outputs = {"predict": (p1 > 0.5).astype(int), "predict_proba": np.column_stack([1 - p1, p1]),
                       "decision_function": decision}
            scores = score_outputs(metrics, replay(outputs, "classification", classes), y[val])
            records.append({"candidate": spec["id"], "family": family, "params": json.dumps(spec["params"],
                            sort_keys=True), "n_train": int((~val).sum()), "n_val": int(val.sum()),
                            "fit_seconds": 0.01, **{f"val_{m}": v for m, v in scores.items()},
                            **{f"train_{m}": v for m, v in scores.items()}, "status": "ok", "error": "",
                            "warnings": "", "repeat": 0, "fold": fo})
            oofs.append(oof_frame(keys[val], spec["id"], outputs, classes).assign(repeat=0, fold=fo))
        write_parquet(exp / fit_file("fits", family, 0, fo), pd.DataFrame(records))
        write_parquet(exp / fit_file("oof", family, 0, fo), pd.concat(oofs, ignore_index=True))
(exp / "candidates.json").write_text(json.dumps(candidates))
Path(out).write_text(json.dumps({"candidates": len(candidates), "rows": rows}))
"""

TALLY = """\
import json, resource, sys, time
from pathlib import Path
from holdfast.tally import tally
out, exp, k = sys.argv[1], Path(sys.argv[2]), int(sys.argv[3])
candidates = json.loads((exp / "candidates.json").read_text())
fits, oofs = sorted(map(str, (exp / "fits").rglob("*.parquet"))), sorted(map(str, (exp / "oof").rglob("*.parquet")))
selection = {"rule": "best_mean", "family_order": [], "bootstrap": 1000, "seed": 0}  # the schema's defaults
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
t0 = time.perf_counter()
choice = tally(fits, oofs, str(exp / "dev.parquet"), candidates, ["roc_auc", "accuracy"], selection, {}, "y",
               "classification", k, str(exp / "ranking.parquet"), str(exp / "choice.json"),
               str(exp / "plots" / "ranking.png"), str(exp / "ledger.jsonl"), str(exp / "folds.parquet"))
seconds = time.perf_counter() - t0
bbc = (choice.get("optimism") or {}).get("bbc") or {}
Path(out).write_text(json.dumps({"seconds": seconds, "imports": t_imports, "before_kb": before,
                                 "bbc": bbc.get("corrected"),
                                 "winner": choice["winner"]["candidate"]}))
"""


def mib(kb: float | None) -> float | None:
    """KiB to MiB."""
    return None if kb is None else kb / 1024.0


Result = tuple[c.Measured | None, dict[str, Any] | None, str | None]


def summary_row(label: str, step: str, done: list[Result], per_row: float | None = None) -> list[Any]:
    """One table row from a step's measurements: medians of those that worked, else why none did."""
    good = [(m, r) for m, r, _ in done if r is not None and m is not None]
    failed = [why for _, _, why in done if why]
    note = f"{len(failed)} of {len(done)} failed: {failed[-1]}" if failed else ""
    return [label, step, c.median([r["seconds"] for _, r in good]), c.median([r["imports"] for _, r in good]),
            c.median([m.peak_mib for m, _ in good]), c.median([mib(r["before_kb"]) for _, r in good]), per_row, note]


def seal_and_folds(sizes: list[int], reps: int, root: Path, keys: str = "id", digits: int = 4) -> None:
    """Seal and fold assignment per data size, each in a fresh process; alternating sizes per rep. With ``keys``
    "content" the config names no id column (the id column is dropped from the features): rows are keyed by
    their content, every value written as text and hashed. ``digits`` rounds the 16 numeric columns (-1: full
    precision, every value distinct, so no value's text is shared between rows)."""
    logs = root / "logs"
    config = json.dumps(CONFIG if keys == "id" else {
        **CONFIG, "data": {"path": "data.parquet", "target": "y", "drop": ["id"]}})
    for n in sizes:
        folder = root / f"rows-{n}"
        folder.mkdir()
        c.progress(f"generating {n:,} rows x 20 columns")
        c.python_json(MAKE_DATA, [str(folder / "data.parquet"), str(n), str(digits)], folder, logs, f"make-{n}")
    results: dict[tuple[int, str], list[Result]] = {(n, s): [] for n in sizes for s in ("seal", "folds")}
    folds_bytes: dict[int, tuple[int, int]] = {}

    def seal_step(n: int) -> Any:
        def go(rep: int) -> None:
            folder = root / f"rows-{n}"
            if rep:  # the previous rep's experiment is no longer needed: keep the disk small
                shutil.rmtree(folder / "results" / f"rep{rep - 1}", ignore_errors=True)
            exp = folder / "results" / f"rep{rep}"
            results[(n, "seal")].append(c.try_python_json(warmed(SEAL), [config, str(exp)], folder, logs,
                                                          f"seal-{n}-rep{rep}"))
        return go

    def folds_step(n: int) -> Any:
        def go(rep: int) -> None:
            folder = root / f"rows-{n}"
            exp = folder / "results" / f"rep{rep}"
            sealed = results[(n, "seal")][rep][1]
            if sealed is None:
                results[(n, "folds")].append((None, None, "not run: the seal failed"))
                return
            done = c.try_python_json(warmed(FOLDS), [config, str(exp)], folder, logs, f"folds-{n}-rep{rep}")
            results[(n, "folds")].append(done)
            if done[1] is not None:  # one repeat: one fold-table row per development row
                folds_bytes[n] = ((exp / "folds.parquet").stat().st_size, int(sealed["dev"]))
        return go

    steps = []
    for n in sizes:
        steps += [(f"seal {n:,} rows", seal_step(n)), (f"folds {n:,} rows", folds_step(n))]
    c.alternate(reps, steps)
    rows = []
    for n in sizes:
        per_row = folds_bytes[n][0] / folds_bytes[n][1] if n in folds_bytes else None
        rows.append(summary_row(f"{n:,}", "seal", results[(n, "seal")]))
        rows.append(summary_row(f"{n:,}", "fold assignment", results[(n, "folds")], per_row))
        pairs = [(s[1], f[1]) for s, f in zip(results[(n, "seal")], results[(n, "folds")], strict=True)
                 if s[1] is not None and f[1] is not None]
        peaks = [m.peak_mib for step in ("seal", "folds") for m, r, _ in results[(n, step)]
                 if m is not None and r is not None]
        rows.append([f"{n:,}", "seal + fold assignment", c.median([a["seconds"] + b["seconds"] for a, b in pairs]),
                     None, max(peaks) if peaks else None, None, None, ""])
    c.table(["rows", "step", "seconds", "imports (s)", "peak RSS (MiB)", "after imports (MiB)",
             "folds.parquet bytes/row", "failures"], rows, note_last=True,
            title="1. seal and fold assignment, 20 columns (Parquet; test stratified 20 %, folds stratified 5-fold; "
                  f"rows keyed by {'the id column' if keys == 'id' else 'their content (no data.id)'}; numbers "
                  f"{'at full precision' if digits < 0 else f'rounded to {digits} decimals'}; medians; the sum's peak "
                  "is the larger of the two)")
    first = next((r for m, r, _ in results[(sizes[0], "seal")] if r is not None), None)
    if first is not None:
        print(f"  {sizes[0]:,} rows: {first['dev']:,} development and {first['test']:,} test rows after the seal")
    print("  seconds: the package call alone; imports: what the step imports, loaded and timed before the call")
    print()


def tally_memory(candidates: int, rows: int, reps: int, root: Path) -> None:
    """The tally with BBC-CV over synthesized out-of-fold predictions of ``candidates`` x ``rows``."""
    per_family = 10 if candidates >= 10 else candidates
    families, k = candidates // per_family, 5
    exp = root / "tally"
    exp.mkdir()
    c.progress(f"synthesizing fits/ and oof/ for {candidates} candidates x {rows:,} rows")
    c.python_json(MAKE_TALLY, [str(exp), str(rows), str(families), str(per_family), str(k)], exp, root / "logs",
                  "make-tally")
    oof_bytes = sum(p.stat().st_size for p in (exp / "oof").rglob("*.parquet"))
    done: list[Result] = []

    def go(rep: int) -> None:
        for name in ("ranking.parquet", "choice.json", "ledger.jsonl"):
            (exp / name).unlink(missing_ok=True)
        done.append(c.try_python_json(warmed(TALLY), [str(exp), str(k)], exp, root / "logs", f"tally-rep{rep}"))

    c.alternate(reps, [("tally", go)])
    row = summary_row(f"{candidates} x {rows:,}", "", done, oof_bytes / 2**20)
    del row[1]
    c.table(["candidates x development rows", "seconds", "imports (s)", "peak RSS (MiB)", "after imports (MiB)",
             "oof/ on disk (MiB)", "failures"], [row], note_last=True,
            title=f"2. tally with BBC-CV (1,000 draws), {families} famil{'y' if families == 1 else 'ies'} x "
                  f"{per_family} candidates, {k} folds (medians)")
    result = next((r for _, r, _ in reversed(done) if r is not None), None)
    if result is not None:
        print(f"  winner {result['winner']}, BBC-corrected CV estimate {c.fmt(result['bbc'], 4)}; seconds: the tally "
              "call alone, after its imports")
    print()


def main(argv: list[str] | None = None) -> int:
    """Parse options, run both parts, print the tables."""
    p = c.parser(__doc__)
    p.add_argument("--only", nargs="+", choices=("seal", "tally"), default=["seal", "tally"],
                   help="which parts to run (default: both)")
    p.add_argument("--rows", nargs="+", type=int, help="data sizes of part 1 (default 1,000,000 and 10,000,000)")
    p.add_argument("--keys", choices=("id", "content"), default="id",
                   help="part 1's row keys: the id column (default) or each row's content (a config without data.id)")
    p.add_argument("--full-precision", action="store_true",
                   help="part 1's numeric columns at full precision (default: rounded to 4 decimals)")
    args = p.parse_args(argv)
    reps = c.reps_of(args)
    c.header("holdfast and data size: the seal, the fold assignment and the tally", args, reps)
    with c.workspace("data-size", args.keep) as root:
        if "seal" in args.only:
            sizes = args.rows or ([2_000, 20_000] if args.quick else [1_000_000, 10_000_000])
            seal_and_folds(sizes, reps, root, args.keys, -1 if args.full_precision else 4)
        if "tally" in args.only:
            tally_memory(10, 2_000, reps, root) if args.quick else tally_memory(200, 100_000, reps, root)
    c.footer()
    return 0


if __name__ == "__main__":
    sys.exit(main())
