"""`holdfast predict results/<experiment> NEW.csv -o predictions.csv`: use the refit winner on new rows.

The model is loaded only through the trusted loader, with the sha256 and the exact types the ledger's refit
line recorded. The new file must hold every feature the model was trained on (model/provenance.json names
them) with the kind of values the development set had (numbers, text or true/false, read from dev.parquet's
schema without loading rows); other columns are ignored with a note. The output holds the id column (or a
row key made from each row's content), the prediction and, for classifiers, one proba_<class> column per
class. Whether an honest estimate of how the predictions will do exists is said plainly: only an opening of
the sealed test set for this very model gives one. Until the experiment's first opening, rows of its sealed test
set are refused (see :func:`sealed_among`): their predictions beside outcomes the user holds would be a look at
the test set outside the ledger.
"""

from __future__ import annotations

import argparse
import csv
import hashlib
import json
from pathlib import Path
from typing import Any

from .. import display, ledger
from .._io import sha256_file, write_atomic
from ..errors import ConfigError, DataError, HoldfastError, ModelFileError, SealedAccessError
from ..layout import DEV, LEDGER, MANIFEST, MODEL, PROVENANCE, VERDICT, sealed_experiment_of
from ._common import experiment_folder, short, when

NUMBERS, TEXT, TRUTH = "numbers", "text", "true/false values"
NEVER_OPENED = ("the test set of this experiment was never opened: no honest estimate of how these predictions "
                "will do exists yet")
OUTPUT_SUFFIXES = (".csv", ".parquet")


def _say(line: str) -> None:
    print(f"holdfast: {line}", flush=True)


def trained_kinds(dev_path: Path, features: list[str]) -> dict[str, str]:
    """Each feature's kind of values in the development set (numbers, text, true/false), from the Parquet schema."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    schema = pq.read_schema(dev_path)
    kinds = {}
    for name in features:
        kind = schema.field(name).type
        if pa.types.is_dictionary(kind):
            kind = kind.value_type
        if pa.types.is_boolean(kind):
            kinds[name] = TRUTH
        elif pa.types.is_integer(kind) or pa.types.is_floating(kind) or pa.types.is_decimal(kind):
            kinds[name] = NUMBERS
        elif pa.types.is_string(kind) or pa.types.is_large_string(kind):
            kinds[name] = TEXT
        else:
            kinds[name] = str(kind)
    return kinds


def _csv_header(path: Path) -> list[str]:
    try:
        with open(path, newline="", encoding="utf-8-sig") as handle:
            header = next(csv.reader(handle), [])
    except (OSError, UnicodeDecodeError, csv.Error) as exc:
        raise DataError(f"file '{path}' cannot be read as UTF-8 CSV ({type(exc).__name__}); save it as "
                        "comma-separated UTF-8 text or as Parquet") from exc
    repeated = sorted({name for name in header if header.count(name) > 1})
    if repeated:
        raise DataError(f"file '{path}' repeats column name '{repeated[0]}'; give every column a unique name")
    return header


def read_new(path: Path, kinds: dict[str, str]) -> Any:
    """The new rows; a CSV's columns the model read as text are read as text whatever their values look like."""
    import pandas as pd

    if not path.is_file():
        raise DataError(f"file of new rows '{path}' does not exist; pass a CSV or Parquet file with the model's "
                        "feature columns")
    suffix = path.suffix.lower()
    if suffix not in (".csv", ".txt", ".parquet", ".pq"):
        raise DataError(f"file of new rows '{path}' has suffix '{suffix}'; use a .csv or .parquet file")
    try:
        if suffix in (".parquet", ".pq"):
            frame = pd.read_parquet(path)
        else:
            header = _csv_header(path)
            frame = pd.read_csv(path, encoding="utf-8-sig",
                                dtype={c: str for c in header if kinds.get(c) == TEXT})
    except DataError:
        raise
    except Exception as exc:  # pandas and pyarrow raise many kinds for unreadable files
        first = str(exc).splitlines()[0] if str(exc) else ""
        raise DataError(f"file of new rows '{path}' could not be read ({type(exc).__name__}: {first}); check its "
                        "format") from exc
    if len(frame) == 0:
        raise DataError(f"file of new rows '{path}' has no rows; nothing to predict")
    return frame


def _first_bad(values: Any, ok: Any) -> str:
    """' (e.g. 'abc' in data row 3)' for the first present value that ``ok`` refuses ('' when none is found)."""
    for position, value in enumerate(values):
        if value is not None and value == value and not ok(value):  # value == value: not NaN
            return f" (e.g. {value!r} in data row {position + 1})"
    return ""


def check_columns(frame: Any, kinds: dict[str, str], source: Path) -> Any:
    """The feature frame in the model's column order; DataError naming a missing column or one of the wrong kind."""
    import numpy as np
    import pandas as pd

    missing = [c for c in kinds if c not in frame.columns]
    if missing:
        shown = ", ".join(f"'{c}'" for c in missing[:5]) + (f" and {len(missing) - 5} more" if len(missing) > 5 else "")
        raise DataError(f"file of new rows '{source}' lacks feature column(s) {shown} that the model was trained on; "
                        "add them (blank values are allowed where a value is unknown)")
    out = {}
    for name, kind in kinds.items():
        values = frame[name]
        numeric = pd.api.types.is_numeric_dtype(values) and not pd.api.types.is_bool_dtype(values)
        if kind == NUMBERS:
            if pd.api.types.is_bool_dtype(values):
                raise DataError(f"column '{name}' of '{source}' holds true/false values but the model was trained on "
                                "numbers in it; write numbers")
            if not numeric:
                where = _first_bad(values, lambda v: not isinstance(v, str) or _is_number(v))
                raise DataError(f"column '{name}' of '{source}' holds text{where} but the model was trained on "
                                "numbers in it; fix those values or leave them blank")
            infinite = np.isinf(values.to_numpy(dtype="float64", na_value=np.nan))
            if infinite.any():  # the seal refuses them in the training data; scikit-learn would fail on them here
                raise DataError(f"column '{name}' of '{source}' has {int(infinite.sum())} infinite value(s) (first "
                                f"in data row {int(np.flatnonzero(infinite)[0]) + 1}) but the model was trained on "
                                "finite numbers; fix those values or leave them blank")
        elif kind == TRUTH:
            if not pd.api.types.is_bool_dtype(values):
                present = values.dropna()
                if all(isinstance(v, bool | np.bool_) for v in present) or (numeric and set(present) <= {0, 1}):
                    values = values.astype("float64")  # 1/0 are what true/false become inside the model; blanks NaN
                else:
                    where = _first_bad(values, lambda v: isinstance(v, bool | np.bool_))
                    raise DataError(f"column '{name}' of '{source}' holds other values{where} but the model was "
                                    "trained on true/false values in it; write True or False")
        elif kind == TEXT:
            if numeric or pd.api.types.is_bool_dtype(values):
                raise DataError(f"column '{name}' of '{source}' holds {values.dtype} values but the model was trained "
                                "on text in it; store the column as text")
        else:
            import pyarrow as pa

            actual = pa.Schema.from_pandas(frame[[name]], preserve_index=False).field(name).type
            if str(actual) != kind:
                raise DataError(f"column '{name}' of '{source}' holds {actual} values but the model was trained on "
                                f"{kind} values in it; give the column that type (a Parquet file keeps it)")
        out[name] = values
    return pd.DataFrame(out, index=frame.index)


def model_outputs(model: Any, x: Any, probabilities: bool, source: Path) -> tuple[Any, Any]:
    """The model's predictions (and class probabilities) for ``x``; a value the model cannot take (a blank where
    its pipeline imputes nothing, say) is a DataError naming the file, not a traceback."""
    try:
        return model.predict(x), (model.predict_proba(x) if probabilities else None)
    except ValueError as exc:  # scikit-learn's input checks raise ValueError
        first = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise DataError(f"the model cannot predict the rows of '{source}' (scikit-learn: {first}); make their values "
                        "like the development data's (a blank is allowed only where the model's preprocessing "
                        "imputes one)") from exc


def _is_number(text: str) -> bool:
    try:
        float(text)
    except ValueError:
        return False
    return True


def _read_recorded(path: Path, sha: Any, what: str) -> bytes:
    """A file's bytes, only when they are what the ledger's refit line recorded."""
    if not path.exists():
        raise ModelFileError(f"'{path}' is missing; the {what} the ledger recorded at the refit is needed: run "
                             "'holdfast audit' on the experiment")
    data = path.read_bytes()
    if hashlib.sha256(data).hexdigest() != sha:
        raise ModelFileError(f"'{path}' is not the {what} the ledger's refit line recorded (sha256 differs); run "
                             "'holdfast audit' on the experiment")
    return data


def _data_file(exp: Path, recorded: dict[str, Any]) -> tuple[Path | None, str]:
    """The experiment's data file as sealed (its recorded path, from here or from the project folder above
    results/), or None and why it cannot be used."""
    from ..plan import data_file_as_sealed

    given = Path(str(recorded.get("path", "")))
    candidates = [given] if given.is_absolute() else [given, exp.resolve().parent.parent / given]
    path = next((c for c in candidates if c.is_file()), None)
    if path is None:
        return None, f"its data file '{given}' is not there"
    if data_file_as_sealed(path, recorded) is not None:
        return None, f"its data file '{path}' has changed since the seal"
    return path, ""


def sealed_among(exp: Path, spec: dict[str, Any], frame: Any, x: Any) -> tuple[int, str]:
    """How many new rows are rows of the experiment's sealed test set: by equal values in every feature the model
    uses, or by the id column when the experiment has one and the new file holds it (either is enough: an edited id
    does not make a sealed row new). Returns (count, how they were matched), or (-1, why no check was possible).

    The sealed rows are found the way the seal found them: from the experiment's own data file (verified against
    the manifest), never by reading the sealed file, whose rows only the opening reads. Without that file (moved,
    edited), new rows holding every column of it are matched by the row hashes the seal wrote.
    """
    import numpy as np

    from .._io import read_json, read_table
    from ..dataset import row_keys
    from ..leakage import row_identity
    from ..seal import split_masks

    try:
        manifest = read_json(exp / MANIFEST)
        path, why = _data_file(exp, manifest["data"])
        if path is None:
            return _by_row_hashes(exp, manifest, frame, why)
        data = read_table(path)
        keys = row_keys(data, spec.get("id"))
        test = split_masks(data, keys, spec, spec["task"])[0]
    except (HoldfastError, KeyError, OSError, ValueError) as exc:
        return -1, f"its sealed rows could not be found again ({type(exc).__name__}: {str(exc)[:120]})"
    columns = list(x.columns)
    missing = [c for c in columns if c not in data.columns]
    if missing:
        return -1, f"feature column '{missing[0]}' is not in its data file"
    sealed, n = data.loc[test, columns], int(test.sum())
    identity = row_identity([_stacked(sealed[c], x[c]) for c in columns])
    matched = np.zeros(len(x), dtype=bool)  # new rows whose feature values equal a sealed row's
    if identity.rows.size:
        new = identity.rows >= n
        matched[identity.rows[new] - n] = np.isin(identity.ids[new], identity.ids[~new])
    how = [f"{int(matched.sum())} by equal values in every feature"]
    id_column = spec.get("id")
    if id_column and id_column in frame.columns:
        by_id = frame[id_column].astype(str).isin(set(keys[test])).to_numpy()
        how.append(f"{int(by_id.sum())} by id column '{id_column}'")
        matched |= by_id
    return int(matched.sum()), ", ".join(how)


def _by_row_hashes(exp: Path, manifest: dict[str, Any], frame: Any, why: str) -> tuple[int, str]:
    """Without the data file: new rows whose values in every column the seal kept equal a sealed row's (the seal's
    row hashes, :func:`overlap.sealed_values_in`; over the features and target when the file lacks another of them);
    (-1, why) when no comparison can be made."""
    from ..overlap import sealed_values_in

    try:
        shared = sealed_values_in(frame, exp, manifest)
    except HoldfastError as exc:
        return -1, f"{why}, and {exc.message}"
    if shared is None or shared.rows is None:
        return -1, why
    count = int(shared.rows.sum())
    return count, (f"{count} by equal values in {shared.over} of the data file, found with the seal's row hashes "
                   f"since {why}")


def _stacked(first: Any, second: Any) -> Any:
    """Two columns one after the other, with a fresh index."""
    import pandas as pd

    return pd.concat([first.reset_index(drop=True), second.reset_index(drop=True)], ignore_index=True)


def _keys(frame: Any, id_column: str | None) -> tuple[str, Any, str]:
    """The output's key column: the experiment's id column when the new file has it, else a content row key."""
    from ..dataset import KEY, content_keys

    if id_column and id_column in frame.columns:
        return id_column, frame[id_column], f"id column '{id_column}'"
    why = f"the id column '{id_column}' is not in the file" if id_column else "the experiment names no id column"
    return KEY, content_keys(frame), f"'{KEY}' made from each row's content ({why})"


def estimate_lines(exp: Path, entries: list[dict[str, Any]], model_sha: str, metric: str,
                   unit: str | None) -> list[str]:
    """What is known of how this model does on new rows: the test estimate of its own opening, or why none exists."""
    from .. import openings

    started = openings.records(exp).count
    finished = ledger.events(entries, "open_test")
    if not started:
        return [NEVER_OPENED, "(the CV estimate is not such an estimate: it chose the model, so it is optimistic; "
                              f"'holdfast open {exp}' is the one look at the sealed test set)"]
    mine = [e for e in finished if e["details"].get("model_sha256") == model_sha]
    if not mine:
        if finished:
            other = finished[-1]["details"]
            return [f"the test set of this experiment was opened for another model ({other.get('winner')}, model file "
                    f"sha256 {short(other.get('model_sha256'))}), not this one: no honest estimate of how these "
                    "predictions will do exists yet"]
        return ["an opening of the test set was recorded but never finished: no honest estimate of how these "
                "predictions will do exists yet"]
    last = mine[-1]
    verdict_path = exp / VERDICT
    if not verdict_path.exists() or sha256_file(verdict_path) != last["details"].get("verdict_sha256"):
        return [f"the test set was opened for this model at {when(last['time'])}, but '{verdict_path}' is not the "
                "verdict that opening wrote; run 'holdfast audit' on the experiment"]
    verdict = json.loads(verdict_path.read_text(encoding="utf-8"))
    block = verdict["metrics"][metric]
    if block.get("test") is None:
        shown = f"test {display.label(metric)} {block.get('undefined', 'undefined')}"
    else:
        shown = (f"test {display.named(metric, block['test'], unit)}, {block['level']:.0%} interval "
                 f"{display.interval(metric, *block['interval'], unit)}")
    line = (f"the test set was opened for this model at {when(last['time'])}: {shown} on {verdict.get('test_rows')} "
            "sealed rows, an estimate for rows like the development data")
    if verdict.get("compromised"):
        line += f"; {verdict['test_set_opened']}: the test estimate is compromised"
    return [line]


def predict(exp: Path, new_path: Path, out_path: Path) -> list[str]:
    """Write the predictions of the experiment's refit winner for the rows of ``new_path``; return what to say."""
    if out_path.suffix.lower() not in OUTPUT_SUFFIXES:
        raise ConfigError(f"output '{out_path}' has suffix '{out_path.suffix}'; name a .csv or .parquet file with -o")
    if out_path.exists():
        raise ConfigError(f"output '{out_path}' exists; choose another name with -o or remove it (predict never "
                          "overwrites a file)")
    sealed = sealed_experiment_of(new_path)
    if sealed is not None:
        raise SealedAccessError(f"'{new_path}' is in the sealed folder of experiment folder '{sealed}', whose rows "
                                "only that experiment's opening reads; predict rows from your own data files")
    entries = ledger.read(exp / LEDGER)
    refits = ledger.events(entries, "refit")
    if not refits:
        raise ModelFileError(f"experiment '{exp}' has no refit winner (no refit line in its ledger); run 'holdfast run "
                             "CONFIG' first")
    refit = refits[-1]["details"]
    provenance = json.loads(_read_recorded(exp / PROVENANCE, refit.get("provenance_sha256"), "provenance record"))
    features = list(provenance["trained_on"]["features"])
    _read_recorded(exp / DEV, refit.get("dev_sha256"), "development set")  # the schema read next is the right one
    kinds = trained_kinds(exp / DEV, features)
    frame = read_new(new_path, kinds)
    x = check_columns(frame, kinds, new_path)
    seals = ledger.events(entries, "seal")
    spec = (seals[0]["details"].get("spec") or {}) if seals else {}
    key_name, keys, key_text = _keys(frame, spec.get("id"))
    from .. import openings

    unchecked = ""
    if not openings.records(exp).count:
        # Before the one look, the sealed rows' predictions beside their known outcomes would be a look at the test
        # set that no ledger line records.
        count, how = sealed_among(exp, spec, frame, x)
        if count > 0:
            raise SealedAccessError(f"{count} of the {len(frame)} rows of '{new_path}' are sealed test rows of "
                                    f"experiment '{exp}' (matched {how}); predicting them before the opening would "
                                    "be a look at the test set that the ledger does not record: leave them out, or "
                                    f"open the test set first with 'holdfast open {exp}'")
        if count < 0:
            unchecked = (f"note: could not check that these rows hold none of the sealed test rows: {how}; keep "
                         "the sealed rows out of files you predict until the test set is opened")

    from ..closing import target_unit_of
    from ..refit import load_model

    model = load_model(str(exp / MODEL), refit.get("model_sha256"), refit.get("model_types"))
    import pandas as pd

    probabilities = spec.get("task") == "classification" and hasattr(model, "predict_proba")
    prediction, proba = model_outputs(model, x, probabilities, new_path)
    out = pd.DataFrame({key_name: keys.to_numpy(), "prediction": prediction})
    if proba is not None:
        for i, label in enumerate(model.classes_):
            out[f"proba_{label}"] = proba[:, i]

    def write(tmp: str) -> None:
        if out_path.suffix.lower() == ".parquet":
            out.to_parquet(tmp, index=False, engine="pyarrow")
        else:
            out.to_csv(tmp, index=False)

    write_atomic(out_path, write)
    candidate = provenance["candidate"]
    lines = [f"wrote {len(out)} prediction(s) of model {candidate['family']} {candidate['id']} (refit on "
             f"{provenance['trained_on']['rows']} development rows) to {out_path}: {key_text}, prediction"
             + (", " + ", ".join(c for c in out.columns if c.startswith("proba_")) if probabilities else "")]
    extra = [c for c in frame.columns if c not in kinds and c != key_name]
    if extra:
        shown = ", ".join(f"'{c}'" for c in extra[:8]) + (f" and {len(extra) - 8} more" if len(extra) > 8 else "")
        lines.append(f"note: ignored column(s) the model does not use: {shown}")
    if unchecked:
        lines.append(unchecked)
    if spec.get("task") == "classification" and not probabilities:
        lines.append(f"note: {candidate['estimator']} gives no class probabilities; only the predicted class is "
                     "written")
    return lines + estimate_lines(exp, entries, str(refit.get("model_sha256")), provenance["selected_by"]["metric"],
                                  target_unit_of(exp))


def main(args: argparse.Namespace) -> int:
    """Predict and say what the predictions rest on."""
    for line in predict(experiment_folder(args.experiment_dir), Path(args.new), Path(args.output)):
        _say(line)
    return 0


def add_parser(sub: Any) -> None:
    """Register `holdfast predict`."""
    p = sub.add_parser("predict", help="predict new rows with the refit winner (loaded through the trusted loader)",
                       description=__doc__.split("\n\n")[1])
    p.add_argument("experiment_dir", help="results/<experiment>")
    p.add_argument("new", metavar="NEW", help="CSV or Parquet file of new rows with the model's feature columns")
    p.add_argument("-o", "--output", required=True, help="where to write the predictions (.csv or .parquet); an "
                   "existing file is never overwritten")
    p.set_defaults(func=main, takes_extra=False)
