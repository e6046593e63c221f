"""The experiment's report: one self-contained page (report.html) to read on screen, print or hand on.

It is made from the experiment's own files with an audit run for it: the numbers of the ranking, the choice,
the optimism and the verdict come only from files that audit verified against the ledger (the same bytes),
and only when it passed, as the closing lines of a run do. Pictures are embedded PNGs, the style sheet is
inline, and a content security policy forbids every request: the page works offline and sends nothing. The
one script opens collapsed sections before printing. Every number a person reads goes through
:mod:`holdfast.display` (plain metric names, errors positive in the target's unit).
"""

from __future__ import annotations

import base64
import hashlib
import html
import io
import json
import math
import shutil
from collections.abc import Callable, Mapping
from datetime import datetime
from pathlib import Path
from typing import Any

from . import display, ledger
from ._io import read_json, write_atomic
from .layout import (
    CHOICE,
    LEDGER,
    MANIFEST,
    NESTED_SUMMARY,
    PLOT,
    PROVENANCE,
    RANKING,
    REPORT,
    REPORT_FIGURES,
    VERDICT,
    group_family,
)

TOP = 10  # candidates in the ranking's first table (every candidate is in the collapsed full table)
PER_FOLD = 5  # candidates whose per-fold scores are shown
MAX_FOLD_COLUMNS = 20  # more folds than this (leave-one-out...) are summarised per candidate instead
OPEN_LIMIT = 60  # longer tables start collapsed (they open for printing)
SCHEMES = {
    "kfold": "shuffled k-fold: every development row is validated once per repeat",
    "stratified": "k-fold with each class's share kept in every fold",
    "group": "k-fold with whole groups per fold: no group trains and validates in the same fold",
    "stratified_group": "whole groups per fold, with class shares kept as far as the groups allow",
    "loo": "leave-one-out: one fold per development row",
    "leave_one_group_out": "one fold per group",
    "holdout": "a single validation part; the rest trains",
    "stratified_holdout": "a single validation part with class shares kept; the rest trains",
    "forward": "time-ordered forward windows: each fold trains only on rows before its validation window",
    "forward_group": "time-ordered forward windows of whole groups",
}
TEST_SCHEMES = {
    "hashed": "a row is sealed when the hash of its key and the salt falls below the fraction",
    "stratified": "within each class, the rows with the lowest hashes, so class shares match on both sides",
    "grouped": "whole groups are sealed by the hash of the group value and the salt: no group is on both sides",
    "stratified_grouped": "whole groups, chosen within each class, so no group is on both sides",
    "time_tail": "the latest rows by time: the test set is the most recent period",
}
RULES = {
    "best_mean": "best mean: the candidate with the best CV estimate wins",
    "one_standard_error": ("one standard error: the simplest candidate whose CV estimate is within one standard "
                           "error of the best one wins"),
}
# The one script: collapsed sections open before printing, so paper shows everything.
SCRIPT = ("window.addEventListener('beforeprint', function () {\n"
          "  document.querySelectorAll('details').forEach(function (d) { d.open = true; });\n"
          "});")
STYLE = """
:root { --ink: #1b1f24; --soft: #5a6270; --rule: #cfd5dd; --band: #f3f5f8; --mark: #1d4e89;
        --good: #1f6b3a; --bad: #a1261d; --warn: #8a5a00; }
* { box-sizing: border-box; }
body { margin: 0 auto; max-width: 74rem; padding: 1.5rem 1.25rem 3rem; color: var(--ink); background: #fff;
       font: 15px/1.45 system-ui, -apple-system, "Segoe UI", Roboto, "Helvetica Neue", Arial, sans-serif; }
h1 { font-size: 1.55rem; margin: 0 0 .3rem; }
h2 { font-size: 1.2rem; margin: 2.2rem 0 .6rem; padding-bottom: .25rem; border-bottom: 2px solid var(--mark); }
h3 { font-size: 1rem; margin: 1.2rem 0 .4rem; }
p { margin: .45rem 0; }
code, .hash { font-family: ui-monospace, "SFMono-Regular", Menlo, Consolas, monospace; font-size: .88em; }
.lead { color: var(--soft); margin-bottom: 1rem; }
.status { display: flex; flex-wrap: wrap; gap: .5rem; margin: .8rem 0 1rem; padding: 0; list-style: none; }
.status li { border: 1px solid var(--rule); border-radius: 3px; padding: .25rem .6rem; background: var(--band); }
.pass { color: var(--good); font-weight: 600; }
.fail { color: var(--bad); font-weight: 600; }
.progress { color: var(--warn); font-weight: 600; }
nav { font-size: .9rem; margin: .5rem 0 1rem; }
nav a { color: var(--mark); margin-right: .8rem; text-decoration: none; white-space: nowrap; }
table { border-collapse: collapse; margin: .5rem 0 .8rem; font-size: .86rem; display: block; max-width: 100%;
        overflow-x: auto; }
th, td { border-bottom: 1px solid var(--rule); padding: .28rem .55rem; text-align: left; vertical-align: top; }
th { background: var(--band); font-weight: 600; }
td.num, th.num { text-align: right; font-variant-numeric: tabular-nums; }
td.num { white-space: nowrap; }
tr.winner td { font-weight: 600; background: #eef3fa; }
dl.facts { display: grid; grid-template-columns: max-content 1fr; gap: .2rem 1rem; margin: .5rem 0; }
dl.facts dt { color: var(--soft); }
dl.facts dd { margin: 0; }
.withheld { color: var(--bad); border-left: 3px solid var(--bad); padding: .2rem .6rem; }
.note { color: var(--soft); font-size: .88rem; }
.box { border: 1px solid var(--rule); background: var(--band); padding: .6rem 1rem; margin: 1rem 0; }
.caution { border-left: 4px solid var(--warn); }
figure { margin: .8rem 0; }
figure img { max-width: 100%; height: auto; border: 1px solid var(--rule); }
figcaption { color: var(--soft); font-size: .85rem; margin-top: .25rem; }
details { margin: .5rem 0; }
details > summary { cursor: pointer; color: var(--mark); }
ul.problems li { margin: .2rem 0; }
.big { font-size: 1.1rem; font-weight: 600; }
@media print {
  body { max-width: none; padding: 0; font-size: 10pt; }
  nav { display: none; }
  h2 { break-after: avoid; }
  table { display: table; }
  figure, .box { break-inside: avoid; }
  details > summary { color: var(--ink); }
  a { color: inherit; text-decoration: none; }
  @page { margin: 14mm; }
}
"""


class WithheldError(Exception):
    """The numbers of a file are not shown: the reason is what the report says instead."""


def _e(value: Any) -> str:
    return html.escape(str(value), quote=True)


def _short(digest: Any, n: int = 12) -> str:
    return f'<span class="hash">{_e(str(digest)[:n])}</span>' if digest else "—"


def _table(headers: list[str], rows: list[list[str]], numeric: set[int] | None = None,
           row_classes: list[str] | None = None) -> str:
    """An HTML table; cells are HTML already (escape text with _e first); columns in ``numeric`` right-aligned."""
    numeric = numeric or set()
    head = "".join(f'<th{" class=num" if i in numeric else ""}>{h}</th>' for i, h in enumerate(headers))
    body = []
    for r, row in enumerate(rows):
        cls = f' class="{row_classes[r]}"' if row_classes and row_classes[r] else ""
        cells = "".join(f'<td{" class=num" if i in numeric else ""}>{c}</td>' for i, c in enumerate(row))
        body.append(f"<tr{cls}>{cells}</tr>")
    return f"<table><thead><tr>{head}</tr></thead><tbody>{''.join(body)}</tbody></table>"


def _facts(pairs: list[tuple[str, str]]) -> str:
    return '<dl class="facts">' + "".join(f"<dt>{_e(k)}</dt><dd>{v}</dd>" for k, v in pairs) + "</dl>"


def _collapsible(summary: str, body: str, open_: bool = False) -> str:
    return f"<details{' open' if open_ else ''}><summary>{_e(summary)}</summary>{body}</details>"


def _png(data: bytes, alt: str, caption: str) -> str:
    encoded = base64.b64encode(data).decode("ascii")
    return (f'<figure><img src="data:image/png;base64,{encoded}" alt="{_e(alt)}">'
            f"<figcaption>{caption}</figcaption></figure>")


def _when(stamp: Any) -> str:
    """'2026-12-02 20:13:59 UTC' from the ledger's ISO time."""
    try:
        moment = datetime.fromisoformat(str(stamp).replace("Z", "+00:00"))
    except ValueError:
        return _e(stamp)
    return moment.strftime("%Y-%m-%d %H:%M:%S UTC")


def _candidate(family: Any, cid: Any) -> str:
    return f"{_e(family)} <code>{_e(cid)}</code>"


def _params(text: Any) -> str:
    """A candidate's parameters as 'a=1, b=x' (the ranking stores them as JSON)."""
    try:
        values = json.loads(text) if isinstance(text, str) else dict(text or {})
    except ValueError:
        return _e(text)
    return _e(", ".join(f"{k}={v}" for k, v in sorted(values.items()))) if values else "defaults"


class Vouched:
    """The experiment's result files as the audit verified them: the same bytes, and only when it passed."""

    def __init__(self, exp: Path, result: Mapping[str, Any]) -> None:
        self.exp = exp
        self.verified: Mapping[str, str] = result.get("verified") or {}
        self.state = result.get("state")
        self.passed = bool(result.get("passed"))

    def data(self, name: str) -> bytes:
        """The bytes of a result file, or WithheldError with the reason."""
        if self.state == "in progress":
            raise WithheldError("withheld: a run was writing to the experiment when this report was made; make the "
                           "report again when it has finished")
        if not self.passed:
            raise WithheldError("withheld: the audit did not pass (see the audit section); a failing record vouches "
                           "for none of these numbers")
        if name not in self.verified:
            raise WithheldError(f"withheld: '{name}' is not among the files the audit verified against the ledger")
        path = self.exp / name
        try:
            data = path.read_bytes()
        except OSError as exc:
            raise WithheldError(f"withheld: '{name}' cannot be read ({type(exc).__name__})") from None
        if hashlib.sha256(data).hexdigest() != self.verified[name]:
            raise WithheldError(f"withheld: '{name}' changed after the audit verified it; make the report again")
        return data

    def json(self, name: str) -> Any:
        """A verified JSON file's content."""
        return json.loads(self.data(name))

    def table(self, name: str) -> Any:
        """A verified Parquet file as a pandas DataFrame."""
        import pandas as pd

        return pd.read_parquet(io.BytesIO(self.data(name)))


def _section(anchor: str, title: str, body: Callable[[], str]) -> str:
    """One section; what it cannot show is said in its place, so one odd file never costs the whole page."""
    try:
        content = body()
    except WithheldError as reason:
        content = f'<p class="withheld">{_e(reason)}</p>'
    except Exception as exc:  # a file that matches forged records, or one no holdfast step writes, can hold anything
        content = (f'<p class="withheld">This section could not be made ({_e(type(exc).__name__)}: {_e(exc)}): a '
                   "file holds what no holdfast step writes. The audit section says whether the record vouches "
                   "for it.</p>")
    return f'<section id="{anchor}"><h2>{_e(title)}</h2>{content}</section>'


# --- sections --------------------------------------------------------------------------------------------------------

def _job(exp: Path, entries: list[dict[str, Any]]) -> str:
    manifest = read_json(exp / MANIFEST) if (exp / MANIFEST).exists() else None
    if not isinstance(manifest, dict):
        return "<p>Not sealed yet: no <code>sealed/manifest.json</code>.</p>"
    data, spec, counts = manifest.get("data") or {}, manifest.get("spec") or {}, manifest.get("counts") or {}
    keys = manifest.get("keys") or {}
    seal = ledger.events(entries, "seal")
    fraction = spec.get("fraction")
    pairs = [
        ("data file", f"<code>{_e(data.get('path'))}</code>, {_e(data.get('rows'))} rows, "
                      f"{len(data.get('columns') or [])} columns"),
        ("data fingerprint", f"sha256 {_short(data.get('sha256'), 16)}… ({_e(data.get('bytes'))} bytes)"),
        ("task", _e(spec.get("task"))),
        ("target", f"<code>{_e(spec.get('target'))}</code>"),
        ("row key", f"<code>{_e(spec['id'])}</code> column" if spec.get("id") else "a hash of each row's content"),
    ]
    if spec.get("group"):
        pairs.append(("group", f"<code>{_e(spec['group'])}</code> (not a feature)"))
    if spec.get("time"):
        pairs.append(("time", f"<code>{_e(spec['time'])}</code> (not a feature)"))
    if spec.get("drop"):
        pairs.append(("left out", ", ".join(f"<code>{_e(c)}</code>" for c in spec["drop"])))
    if spec.get("text"):
        pairs.append(("text on purpose", ", ".join(f"<code>{_e(c)}</code>" for c in spec["text"])
                      + " (mostly numbers, kept as categories: <code>data.text</code>)"))
    if spec.get("known_before_outcome"):
        known = ", ".join(f"<code>{_e(c)}</code>" for c in spec["known_before_outcome"])
        pairs.append(("features the target fixes", known + ": in every row the target fixes their values (or "
                      "blanks); kept because the config states they are recorded before the outcome "
                      "(<code>data.known_before_outcome</code>). The validated and test figures hold for new rows "
                      "only if that statement is true."))
    pairs += [
        ("test scheme", f"{_e(spec.get('scheme'))}: {_e(TEST_SCHEMES.get(str(spec.get('scheme')), ''))}"),
        ("test fraction", _e(f"{fraction:.0%}") if isinstance(fraction, int | float) else "—"),
        ("salt", f"<code>{_e(spec.get('salt'))}</code>"),
        ("sizes", f"{_e(counts.get('dev'))} development rows, {_e(counts.get('test'))} sealed test rows"
                  + (f", {_e(counts['dev_groups'])} groups in development" if counts.get("dev_groups") else "")
                  + (f", {_e(counts['left_out_in_gap'])} rows left out in the gap before the test period"
                     if counts.get("left_out_in_gap") else "")),
    ]
    classes = counts.get("classes") or {}
    if classes:
        for side, label in (("dev", "classes, development"), ("test", "classes, sealed test")):
            shown = ", ".join(f"{_e(k)}: {_e(v)}" for k, v in sorted((classes.get(side) or {}).items()))
            pairs.append((label, shown or "—"))
    pairs += [
        ("the seal", f"first ledger line {_short(manifest.get('ledger_anchor'))}"
                     + (f", written {_when(seal[0].get('time'))}" if seal else "")),
        ("sealed files", f"test.parquet {_short((manifest.get('files') or {}).get('test.parquet'))}, dev.parquet "
                         f"{_short((manifest.get('files') or {}).get('dev.parquet'))}"),
        ("row keys", f"from the {_e(keys.get('from', 'data'))}; digests: development {_short(keys.get('dev_sha256'))}, "
                     f"sealed {_short(keys.get('test_sha256'))}"),
    ]
    from .overlap import note_lines, noted_at_seal

    unopened = note_lines(noted_at_seal(entries))
    if unopened:
        pairs.append(("other experiments, at the seal", "<br>".join(_e(line) for line in unopened)))
    if manifest.get("public_key"):
        pairs.append(("signing", f"every ledger line signed; public key {_short(manifest['public_key'], 16)}…"))
    intro = ("<p>Choose one model among many by cross-validation on the development rows, then measure it once on "
             "rows sealed away before any choosing. These are the data and the split, from "
             "<code>sealed/manifest.json</code> (its file hashes are checked against the seal's ledger line by "
             "the audit).</p>")
    return intro + _facts(pairs)


def _fold_events(entries: list[dict[str, Any]]) -> dict[str, Any]:
    found = ledger.events(entries, "assign_folds")
    return found[-1]["details"] if found else {}


FOLD_COLUMNS = {"repeat": "repeat", "fold": "fold", "rows": "validation rows", "training_rows": "training rows",
                "duplicates_with_training": "duplicates of training rows", "groups": "groups",
                "groups_on_both_sides": "groups on both sides", "time_first": "earliest",
                "time_last": "latest", "target_mean": "target mean", "target_sd": "target sd"}


def _folds(exp: Path, files: Vouched, entries: list[dict[str, Any]]) -> str:
    details = _fold_events(entries)
    if not details:
        return "<p>No folds assigned yet.</p>"
    scheme = str(details.get("scheme"))
    seeds = details.get("seeds") or []
    parts = [_facts([
        ("scheme", f"{_e(scheme)}: {_e(SCHEMES.get(scheme, ''))}"),
        ("folds", f"{_e(details.get('k'))} per repeat, {_e(details.get('repeats'))} repeat(s), on "
                  f"{_e(details.get('rows'))} development rows"),
        ("seeds", _e(", ".join(map(str, seeds))) if seeds else "none (the scheme is not random)"),
        ("fold table", f"<code>folds.parquet</code> {_short(details.get('folds_sha256'))}"),
    ])]
    try:
        summary = files.table("folds_summary.parquet")
        columns = list(summary.columns)
        headers = [_e(FOLD_COLUMNS.get(c, c.replace("class_", "class ").replace("_", " "))) for c in columns]
        numeric, rows = set(range(len(columns))), []  # times too: kept on one line
        for record in summary.to_dict("records"):
            row = []
            for column in columns:
                value = record[column]
                if value is None or (isinstance(value, float) and math.isnan(value)):
                    row.append("—")
                elif isinstance(value, float):
                    row.append(_e(f"{value:.4g}"))
                elif column.startswith("time_"):
                    row.append(_e(str(value)[:10]))
                else:
                    row.append(_e(value))
            rows.append(row)
        table = _table(headers, rows, numeric)
        parts.append("<h3>Each fold</h3>" + (table if len(rows) <= OPEN_LIMIT else
                                               _collapsible(f"{len(rows)} folds", table)))
    except WithheldError as reason:
        parts.append(f'<p class="withheld">Fold summary {_e(reason)}</p>')
    try:
        parts.append("<h3>Leakage checks</h3><ul>" + "".join(f"<li>{line}</li>" for line in
                                                            _leakage_words(files.json("leakage.json"))) + "</ul>")
    except WithheldError as reason:
        parts.append(f'<p class="withheld">Leakage checks {_e(reason)}</p>')
    return "".join(parts)


def _leakage_words(report: Mapping[str, Any]) -> list[str]:
    """The leakage report in sentences."""
    out = []
    dup = int(report.get("duplicate_feature_rows_dev_test") or 0)
    out.append(f"{dup} sealed test row(s) repeat the features of a development row." if dup else
               "No sealed test row repeats the features of a development row.")
    within = int(report.get("duplicate_feature_rows_within_folds") or 0)
    out.append(f"{within} validation row(s) repeat the features of a training row of the same fold: those "
               "scores are partly on rows the model has seen." if within else
               "No validation row repeats the features of a training row of its fold.")
    overlap = report.get("group_overlap")
    if isinstance(overlap, dict):
        column, groups = overlap.get("column"), overlap.get("groups")
        folds_with = int(overlap.get("folds_with_overlap") or 0)
        if folds_with:
            out.append(f"{folds_with} fold(s) have groups of <code>{_e(column)}</code> on both sides (at most "
                       f"{_e(overlap.get('most_in_a_fold'))} in one fold): those folds score a candidate partly on "
                       "groups it was fitted on, which flatters candidates that learn group quirks.")
        else:
            out.append(f"No group of <code>{_e(column)}</code> ({_e(groups)} groups) is on both sides of any fold.")
    for alarm in report.get("single_feature") or []:
        out.append(f"Feature <code>{_e(alarm.get('feature'))}</code> alone reaches {_e(alarm.get('measure'))} "
                   f"{_e(_fmt(alarm.get('value'), 3))} (threshold {_e(report.get('single_feature_threshold'))}): "
                   "check that it is not the outcome in disguise.")
    if not report.get("single_feature"):
        out.append(f"No single feature alone predicts the target beyond the threshold "
                   f"{_e(report.get('single_feature_threshold'))}.")
    missing = report.get("classes_missing_from_validation") or []
    if missing:
        out.append(f"Some folds validate no row of a class: {_e(missing)}.")
    at_seal = report.get("time_order_at_seal")
    if isinstance(at_seal, dict) and at_seal.get("dev_rows_after_first_test"):
        share = at_seal.get("share")
        out.append(f"{_e(at_seal['dev_rows_after_first_test'])} development rows"
                   + (f" ({_e(f'{share:.1%}')})" if isinstance(share, int | float) else "")
                   + f" are later by <code>{_e(at_seal.get('column'))}</code> than the first sealed test row "
                   f"(test scheme {_e(at_seal.get('scheme'))}): the test figure is for rows like these, not for a "
                   "later period.")
    in_folds = report.get("time_order_in_folds")
    if isinstance(in_folds, dict) and in_folds.get("training_rows_later"):
        out.append(f"Summed over folds, {_e(in_folds['training_rows_later'])} training rows are later than the "
                   f"first row they help validate ({_e(in_folds.get('scheme'))}): the folds do not score "
                   "forecasting forward in time.")
    return out


def _fmt(value: Any, digits: int = 4) -> str:
    try:
        return f"{float(value):.{digits}f}"
    except (TypeError, ValueError):
        return str(value)


def _primary(files: Vouched) -> tuple[dict[str, Any], str]:
    choice = files.json(CHOICE)
    return choice, str(choice["metric"])


def _ranking(exp: Path, files: Vouched, unit: str | None) -> str:
    choice, metric = _primary(files)
    ranking = files.table(RANKING)
    winner = choice["winner"]["candidate"]
    rows = ranking[ranking["metric"] == metric].sort_values("rank")
    n = len(rows)
    top = rows.head(TOP)
    if winner not in set(top["candidate"]):
        top = rows[(rows.index.isin(top.index)) | (rows["candidate"] == winner)]
    headers = ["rank", "candidate", "parameters", "CV estimate", "standard error", "corrected standard error",
               "folds", "behind the winner by", "p (winner vs this)"]
    body, classes = [], []
    for r in top.to_dict("records"):
        is_winner = r["candidate"] == winner
        gap = "—" if is_winner else display.spread(metric, _num(r.get("diff_vs_winner")), unit)
        p = "—" if is_winner or _num(r.get("p")) is None else _fmt(r["p"], 3)
        state = "" if r.get("complete", True) else f" (failed: {_e(r.get('error') or 'a fold failed')})"
        body.append([_e(r["rank"]), _candidate(r["family"], r["candidate"]) + (" ← winner" if is_winner else "")
                     + state, _params(r["params"]), _e(display.number(metric, r["mean"], unit)),
                     _e(display.spread(metric, _num(r["se"]), unit)),
                     _e(display.spread(metric, _num(r["se_corrected"]), unit)), _e(r["folds"]), _e(gap), _e(p)])
        classes.append("winner" if is_winner else "")
    out = [f"<p>{n} candidate(s) ranked by cross-validated <b>{_e(display.label(metric))}</b> "
           f"({_e(display.direction(metric))}), the primary metric; the top {len(top)} here.</p>",
           _table(headers, body, {0, 3, 4, 5, 6, 7, 8}, classes),
           '<p class="note">The corrected standard error (Nadeau &amp; Bengio 2003) allows for folds sharing '
           "training rows; the plain one is too small. p compares the winner with that candidate on the same "
           "folds (corrected resampled t-test); many comparisons are made, so read it loosely.</p>"]
    metrics = list(dict.fromkeys([metric, *ranking["metric"].unique().tolist()]))
    full_headers = ["rank", "candidate", "parameters"] + [
        f"{_e(display.label(m))} (corrected standard error)" for m in metrics]
    by = {(r["candidate"], r["metric"]): r for r in ranking.to_dict("records")}
    full = []
    for r in rows.to_dict("records"):
        cells = [_e(r["rank"]), _candidate(r["family"], r["candidate"]), _params(r["params"])]
        for m in metrics:
            other = by.get((r["candidate"], m))
            cells.append("—" if other is None else _e(f"{display.number(m, other['mean'], unit)} "
                                                       f"({display.spread(m, _num(other['se_corrected']), unit)})"))
        full.append(cells)
    out.append(_collapsible(f"Every candidate on every metric ({n})",
                            _table(full_headers, full, set(range(3, 3 + len(metrics))) | {0},
                                   ["winner" if r["candidate"] == winner else "" for r in rows.to_dict("records")]),
                            open_=False))
    plot = exp / PLOT
    if plot.exists():
        out.append(_png(plot.read_bytes(), "the best candidates' CV estimates with their standard errors",
                        "<code>plots/ranking.png</code>, drawn by the tally from the same ranking: the best "
                        "candidates' CV estimates with plain (thick) and corrected (thin) standard errors. The "
                        "ledger records no hash of the picture itself; the table above is the checked source."))
    return "".join(out)


def _num(value: Any) -> float | None:
    try:
        number = float(value)
    except (TypeError, ValueError):
        return None
    return None if math.isnan(number) else number


def _per_fold(exp: Path, files: Vouched, unit: str | None) -> str:
    import pandas as pd

    choice, metric = _primary(files)
    ranking = files.table(RANKING)
    winner = choice["winner"]["candidate"]
    rows = ranking[ranking["metric"] == metric].sort_values("rank")
    best = rows.head(PER_FOLD)
    if winner not in set(best["candidate"]):
        best = pd.concat([best.head(PER_FOLD - 1), rows[rows["candidate"] == winner]])
    wanted = best["candidate"].tolist()
    families = sorted(set(best["family"]))
    frames = []
    for name in sorted(files.verified):
        parts = name.split("/")
        if len(parts) == 3 and parts[0] == "fits" and group_family(parts[1]) in families and parts[2].startswith("r"):
            frame = files.table(name)
            frames.append(frame[frame["candidate"].isin(wanted)])
    column = f"val_{metric}"
    if not frames:
        return "<p>No fit records of these candidates among the verified files.</p>"
    fits = pd.concat(frames, ignore_index=True)
    folds = sorted({(int(r), int(f)) for r, f in zip(fits["repeat"], fits["fold"], strict=True)})
    repeats = len({r for r, _ in folds})
    name_of = {fold: (f"fold {fold[1]}" if repeats == 1 else f"repeat {fold[0]} fold {fold[1]}") for fold in folds}
    scores = {(r["candidate"], int(r["repeat"]), int(r["fold"])): r.get(column) for r in fits.to_dict("records")}
    sizes = {(int(r["repeat"]), int(r["fold"])): r.get("n_val") for r in fits.to_dict("records")}
    label = {r["candidate"]: _candidate(r["family"], r["candidate"]) + (" ← winner" if r["candidate"] == winner
                                                                       else "") for r in best.to_dict("records")}
    intro = (f"<p>Validation {_e(display.label(metric))} of the best {len(wanted)} candidate(s) on each fold, "
             "from their fit records (<code>fits/</code>). A candidate that wins on most folds is steadier than "
             "one that wins on average.</p>")
    if len(folds) <= MAX_FOLD_COLUMNS:
        headers = ["candidate"] + [_e(name_of[f]) for f in folds]
        body = [[label[c]] + [_e(display.number(metric, _num(scores.get((c, *f))), unit)) for f in folds]
                for c in wanted]
        body.append(["validation rows"] + [_e(sizes.get(f, "—")) for f in folds])
        return intro + _table(headers, body, set(range(1, len(folds) + 1)),
                              ["winner" if c == winner else "" for c in wanted] + [""])
    headers = ["candidate", "folds", "lowest", "median", "highest"]
    body = []
    for c in wanted:
        shown = sorted(v for v in (display.value(metric, _num(scores.get((c, *f)))) for f in folds) if v is not None)
        if not shown:
            body.append([label[c], "0", "—", "—", "—"])
            continue
        middle = shown[len(shown) // 2] if len(shown) % 2 else (shown[len(shown) // 2 - 1] + shown[len(shown) // 2]) / 2
        u = display.unit(metric, unit)
        body.append([label[c], _e(len(shown))] + [_e(f"{v:.4f}" + (f" {u}" if u else "")) for v in
                                                  (shown[0], middle, shown[-1])])
    return intro + f"<p>{len(folds)} folds: too many for one column each, so per candidate:</p>" + _table(
        headers, body, {1, 2, 3, 4}, ["winner" if c == winner else "" for c in wanted])


def _choice(exp: Path, files: Vouched, unit: str | None) -> str:
    choice, metric = _primary(files)
    winner, rule = choice["winner"], str(choice["rule"])
    spec = winner.get("spec") or {}
    pairs = [
        ("rule", _e(RULES.get(rule, rule.replace("_", " ")))),
        ("winner", _candidate(winner["family"], winner["candidate"]) + f" — <code>{_e(spec.get('estimator'))}</code>"),
        ("parameters", _params(spec.get("params"))),
        ("preprocessing", _params(spec.get("preprocess"))),
        ("CV estimate", f'<span class="big">{_e(display.named(metric, winner["mean"], unit))}</span> over '
                        f"{_e(winner['folds'])} folds (standard error "
                        f"{_e(display.spread(metric, _num(winner['se']), unit))}, corrected "
                        f"{_e(display.spread(metric, _num(winner.get('se_corrected')), unit))})"),
    ]
    best = choice.get("best_mean") or {}
    if best.get("candidate") and best["candidate"] != winner["candidate"]:
        pairs.append(("best CV estimate", _candidate(best["family"], best["candidate"]) + " "
                      + _e(display.named(metric, best["mean"], unit)) + " (not chosen: a simpler candidate is "
                      "within one standard error of it)"))
    settings = choice.get("rule_settings") or {}
    if rule == "one_standard_error":
        simplicity = settings.get("simplicity") or {}
        told = "; ".join(f"{_e(f)}: lower {_e(s.get('param'))} is simpler" if s.get("simpler") == "lower" else
                         f"{_e(f)}: higher {_e(s.get('param'))} is simpler" for f, s in sorted(simplicity.items()))
        order = settings.get("family_order") or []
        pairs.append(("simpler means", (told or "—") + (f"; families from simplest: {_e(', '.join(order))}"
                                                        if order else "")))
    runner = choice.get("runner_up")
    reason = [f"{_candidate(winner['family'], winner['candidate'])} has "
              + ("the best" if winner["candidate"] == best.get("candidate", winner["candidate"]) else "a")
              + f" CV estimate of {_e(display.label(metric))}, {_e(display.number(metric, winner['mean'], unit))}, "
              f"among {_e(choice.get('candidates'))} candidates"]
    if runner:
        margin = _num(choice.get("margin"))
        clear = margin is not None and abs(margin) > float(winner["se"])
        reason.append(f"the next one, {_candidate(runner['family'], runner['candidate'])} at "
                      f"{_e(display.number(metric, runner['mean'], unit))}, is "
                      + ("behind by " if (margin or 0) >= 0 else "ahead by ")
                      + _e(display.spread(metric, abs(margin) if margin is not None else None, unit))
                      + (", more" if clear else ", less") + " than one standard error"
                      + ("" if clear else ": on other data the order could well be the other way round"))
    pairs.append(("why", "; ".join(reason) + "."))
    failed = choice.get("failed_candidates") or []
    if failed:
        pairs.append(("failed", _e(", ".join(str(f.get("candidate", f)) if isinstance(f, dict) else str(f)
                                             for f in failed)) + " (not ranked)"))
    out = [_facts(pairs)]
    out.append(_collapsible("The tally's own words (choice.json 'why': scorer values, so an error is negative)",
                            f"<p><code>{_e(choice.get('why'))}</code></p>"))
    try:
        provenance = files.json(PROVENANCE)
        trained = provenance.get("trained_on") or {}
        model = provenance.get("model_file") or {}
        versions = provenance.get("versions") or {}
        out.append("<h3>The refit winner</h3>" + _facts([
            ("trained on", f"all {_e(trained.get('rows', '?'))} development rows"),
            ("model file", f"<code>model/model.skops</code> ({_e(model.get('format'))}) sha256 "
                           f"{_short(model.get('sha256'), 16)}…"),
            ("made with", _e(", ".join(f"{k} {v}" for k, v in sorted(versions.items()))) or "—"),
        ]))
    except WithheldError as reason:
        out.append(f'<p class="withheld">The refit winner: {_e(reason)}</p>')
    return "".join(out)


def _optimism(exp: Path, files: Vouched, unit: str | None) -> str:
    choice, metric = _primary(files)
    block = choice.get("optimism") or {}
    label = display.label(metric)
    raw = block.get("raw", choice["winner"]["mean"])
    rows = [["raw CV estimate of the winner", _e(display.number(metric, raw, unit)), "—",
             "the mean over folds of the candidate that came out best"]]
    bbc, tt = block.get("bbc"), block.get("tibshirani")
    if bbc:
        rows.append(["bootstrap bias-corrected cross-validation", _e(display.number(metric, bbc.get("corrected"),
                                                                                    unit)),
                     _e(display.spread(metric, _num(bbc.get("optimism")), unit)),
                     f"{_e(bbc.get('draws'))} bootstrap draws of the stored out-of-fold predictions (seed "
                     f"{_e(bbc.get('seed'))}); the best-mean choice made again on each"])
    else:
        rows.append(["bootstrap bias-corrected cross-validation", "not computed", "—",
                     _e(block.get("bbc_note") or "not available")])
    if tt:
        rows.append(["Tibshirani–Tibshirani correction", _e(display.number(metric, tt.get("corrected"), unit)),
                     _e(display.spread(metric, _num(tt.get("optimism")), unit)),
                     f"from the per-fold scores: how far the winner falls short of each fold's own best, "
                     f"averaged over {_e(tt.get('folds_per_repeat'))} folds"])
    out = [f"<p>The winner was picked as the best of {_e(block.get('candidates_counted', choice.get('candidates')))} "
           f"candidates (every round counted), so its CV estimate flatters it: part of its lead is luck on these "
           "folds. Two estimates of by how much, and the winner's estimate with it removed:</p>",
           _table([f"estimate of {_e(label)}", "value", "optimism removed", "how"], rows, {1, 2})]
    words = ("The optimism is how much the raw CV estimate flatters the winner; a positive optimism means the "
             "winner is expected to do that much worse on new data than its CV estimate says")
    out.append(f"<p>{words}{'' if not display.is_error(metric) else ' (here: a larger error)'}. Both corrections "
               "remove only the flattery of choosing: each CV fit trained on fewer rows than the refit winner, so "
               "for learners that improve with more data the CV estimate also leans the other way. Read them as "
               "estimates with their own bias, not as the truth.</p>")
    if tt and tt.get("caution"):
        out.append(f'<p class="note">Tibshirani–Tibshirani correction: {_e(tt["caution"])}</p>')
    out.append('<p class="note">Sources: bootstrap bias-corrected cross-validation: Tsamardinos, Greasidou &amp; '
               "Borboudakis, Machine Learning 107 (2018); Tibshirani–Tibshirani correction: Tibshirani &amp; "
               "Tibshirani, Annals of Applied Statistics 3(2) (2009).</p>")
    if (exp / NESTED_SUMMARY).exists():
        try:
            summary = files.json(NESTED_SUMMARY)
            numbers = summary["metrics"][metric]
            winners = ", ".join(f"{c} ×{k}" for c, k in summary.get("winner_counts", {}).items())
            out.append(f"<h3>Nested cross-validation</h3><p>The whole selection, re-run inside each of "
                       f"{_e(summary.get('outer_folds'))} outer folds and scored on that fold's held-out rows: "
                       f"<b>{_e(display.named(metric, numbers['mean'], unit))}</b> (standard error "
                       f"{_e(display.spread(metric, _num(numbers.get('se')), unit))}, corrected "
                       f"{_e(display.spread(metric, _num(numbers.get('se_corrected')), unit))}). It estimates how "
                       f"well the selection procedure does, not this one winner. Outer-fold winners: "
                       f"{_e(winners)}.</p>")
        except (WithheldError, KeyError) as reason:
            out.append(f'<p class="withheld">Nested cross-validation: {_e(reason)}</p>')
    return "".join(out)


def _rounds(exp: Path, files: Vouched, entries: list[dict[str, Any]]) -> str:
    from .rounds import summary as change_summary

    events = ledger.events(entries, "round")
    if not events:
        return "<p>No selection round recorded yet.</p>"
    body = []
    for event in events:
        d = event["details"]
        number = d.get("round")
        try:
            record = files.json(f"rounds/{number}.json")
            setup = record.get("setup") or {}
            families = setup.get("candidates") or {}
            folds = setup.get("folds") or {}
            metrics = ", ".join(display.label(m) for m in setup.get("metrics") or [])
            what = (f"{sum(len(c) for c in families.values())} candidates in {len(families)} families; folds "
                    f"{folds.get('scheme')}; {metrics}; rule {(setup.get('selection') or {}).get('rule')!s}")
            what = _e(what.replace("_", " "))
        except WithheldError as reason:
            what = f'<span class="withheld">{_e(reason)}</span>'
        change = d.get("changes")
        changed = _e(change_summary(change) or "nothing the round compares") if change else "first round"
        if d.get("replaces_unseen_setup"):
            changed += " (replaced a set-up no tally had seen)"
        body.append([_e(number), _when(event.get("time")), changed, what, _short(d.get("ranking_seen_sha256"))])
    out = [_table(["round", "recorded", "what changed", "set-up", "ranking seen before the change"], body, {0})]
    try:
        choice = files.json(CHOICE)
        rounds = choice.get("rounds") or {}
        out.append(f"<p><b>{_e(rounds.get('text', ''))}</b>. Every candidate tallied in any round counts towards "
                   "the optimism estimates above: each look at a ranking followed by a change makes the final "
                   "winner's CV estimate more flattering.</p>")
    except WithheldError as reason:
        out.append(f'<p class="withheld">Candidates tried in all: {_e(reason)}</p>')
    return "".join(out)


def _metric_order(verdict: Mapping[str, Any], primary: str | None) -> list[str]:
    names = list(verdict.get("metrics") or {})
    return ([primary] if primary in names else []) + sorted(n for n in names if n != primary)


def interval_figure(verdict: Mapping[str, Any], primary: str | None, unit: str | None) -> bytes | None:
    """A PNG: per metric, the test score with its interval beside the raw and corrected CV estimates."""
    metrics = [m for m in _metric_order(verdict, primary) if (verdict["metrics"][m] or {}).get("test") is not None]
    if not metrics:
        return None
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, axes = plt.subplots(len(metrics), 1, figsize=(7.6, 0.4 + 1.55 * len(metrics)), squeeze=False)
    for ax, metric in zip(axes[:, 0], metrics, strict=True):
        block = verdict["metrics"][metric]
        rows = [("CV estimate (raw)", block.get("cv_mean"), "o", "#5a6270")]
        rows += [(name, block.get(key), marker, "#1d4e89") for key, name, marker in (
            ("cv_corrected_bbc", "bootstrap bias-corrected", "s"),
            ("cv_corrected_tibshirani", "Tibshirani–Tibshirani", "^")) if block.get(key) is not None]
        low, high = (display.value(metric, v) for v in block["interval"])
        test = display.value(metric, block["test"])
        y = len(rows)
        ax.plot([min(low, high), max(low, high)], [y, y], color="#1b1f24", linewidth=3, solid_capstyle="butt")
        ax.plot([test], [y], "D", color="#1b1f24", markersize=7)
        ax.axvspan(min(low, high), max(low, high), color="#1b1f24", alpha=0.07, linewidth=0)
        labels = [f"test set ({block.get('level', 0.95):.0%} interval)"]
        for i, (name, score, marker, colour) in enumerate(rows):
            ax.plot([display.value(metric, score)], [y - 1 - i], marker, color=colour, markersize=7)
            labels.append(name)
        ax.set_yticks([y - i for i in range(len(labels))], labels, fontsize=8)
        ax.set_ylim(-0.7, y + 0.7)
        u = display.unit(metric, unit)
        ax.set_xlabel(f"{display.label(metric)}{f' ({u})' if u else ''}, {display.direction(metric)}", fontsize=8.5)
        ax.tick_params(axis="x", labelsize=8)
        ax.grid(axis="x", alpha=0.3)
        for side in ("top", "right"):
            ax.spines[side].set_visible(False)
    fig.tight_layout()
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=110, metadata={"Software": None})
    plt.close(fig)
    return buffer.getvalue()


def _verdict(exp: Path, files: Vouched, unit: str | None, figures: dict[str, bytes]) -> str:
    if not (exp / VERDICT).exists():
        return (f'<p class="big">Test set sealed, not opened.</p><p>The numbers above are all from the development '
                "rows. Open the test set once, when the choice is final, with "
                f"<code>holdfast open {_e(exp)}</code>; until then nothing has seen a sealed row.</p>")
    verdict = files.json(VERDICT)
    try:
        primary = files.json(CHOICE)["metric"]
    except WithheldError:
        primary = None
    out = []
    if verdict.get("compromised"):
        out.append(f'<p class="withheld"><b>{_e(verdict.get("test_set_opened"))}: the test estimate is '
                   "compromised</b> (the test set was opened more than once, each time with a written reason).</p>")
    if verdict.get("test_rows_seen_before"):
        out.append('<p class="withheld">Some sealed rows were seen before by another experiment that opened its '
                   "test set: this test figure is not fresh.</p>")
    winner = verdict.get("winner") or {}
    out.append(f"<p>Opening {_e(verdict.get('opening'))}: the refit winner "
               f"{_candidate(winner.get('family'), winner.get('candidate'))} scored on "
               f"{_e(verdict.get('test_rows'))} sealed test rows; {_e(verdict.get('test_set_opened'))}. "
               f"{_e((verdict.get('selection') or {}).get('text', '').capitalize())}.</p>")
    headers = ["metric", "test set", "interval", "raw CV estimate", "corrected for selection", "agreement"]
    body = []
    for metric in _metric_order(verdict, primary):
        block = verdict["metrics"][metric]
        if block.get("test") is None:
            test, span = _e(f"undefined: {block.get('undefined', 'no score')}"), "—"
        else:
            test = _e(display.number(metric, block["test"], unit))
            level = f"{block.get('level', 0.95):.0%}"
            span = (_e(display.interval(metric, *block["interval"], unit)) + f"<br><span class=note>{_e(level)}, "
                    f"{_e(block.get('interval_method'))}</span>")
        corrected = "; ".join(f"{name} {display.number(metric, block[key], unit)}" for key, name in (
            ("cv_corrected_bbc", "bootstrap bias-corrected"), ("cv_corrected_tibshirani", "Tibshirani–Tibshirani"))
            if block.get(key) is not None) or "— (not the metric the winner was chosen on)"
        body.append([f"<b>{_e(display.label(metric))}</b><br><span class=note>{_e(display.direction(metric))}"
                     "</span>", test, span, _e(display.number(metric, block.get("cv_mean"), unit)), _e(corrected),
                     _e(block.get("agreement", "not judged")) + f"<br><span class=note>"
                     f"{_e(_agreement_words(block))}</span>"])
    out.append(_table(headers, body, {1, 3}))
    picture = interval_figure(verdict, primary, unit)
    if picture:
        figures["test_interval.png"] = picture
        out.append(_png(picture, "test scores with their intervals beside the CV estimates",
                        "Each metric: the test score (diamond) with its interval (bar), and the winner's CV "
                        "estimates before and after the correction for selection. A CV estimate inside the bar "
                        "agrees with the test set within chance."))
    return "".join(out)


DIAGNOSTICS = "diagnostics/diagnostics.json"


def _figure(files: Vouched, figures: dict[str, bytes], name: str, alt: str, caption: str,
            path: str | None = None) -> str:
    """A verified diagnostics picture (``path``, else diagnostics/plots/<name>.png), also handed to Snakemake's
    report as diagnostics_<name>.png."""
    try:
        data = files.data(path or f"diagnostics/plots/{name}.png")
    except WithheldError as reason:
        return f'<p class="withheld">The picture is {_e(reason)}</p>'
    figures[f"diagnostics_{name}.png"] = data
    return _png(data, alt, caption)


def _mean_sd(metric: str, mean: Any, sd: Any, unit: str | None) -> str:
    shown = display.number(metric, mean, unit)
    return shown if _num(sd) is None else f"{shown} ± {display.spread(metric, sd, unit)}"


LEARNING = "diagnostics/learning.json"


def _learning_summary(files: Vouched, winner: str) -> tuple[dict[str, Any], str | None]:
    """The learning curve's summary (diagnostics/learning.json) and its picture's path, or why it is not shown."""
    try:
        learning = files.json(LEARNING)
    except WithheldError as reason:
        return {"unavailable": f"diagnostics/learning.json is {reason}"}, None
    if learning.get("candidate") != winner:
        return {"unavailable": f"the learning curve is of {learning.get('candidate')}, not of the winner {winner}: "
                               "run again to remake it"}, None
    return learning, "diagnostics/learning.png"


def _diagnostics(exp: Path, files: Vouched, unit: str | None, figures: dict[str, bytes]) -> str:
    if not (exp / DIAGNOSTICS).exists():
        return ("<p>No diagnostics: <code>diagnostics/diagnostics.json</code> does not exist (the experiment was "
                "closed before holdfast made them, or no run has reached them yet).</p>")
    result = files.json(DIAGNOSTICS)
    choice, metric = _primary(files)
    if result["winner"]["candidate"] != choice["winner"]["candidate"]:
        return (f'<p class="withheld">The diagnostics are of {_e(result["winner"]["candidate"])}, not of the winner '
                f'{_e(choice["winner"]["candidate"])}: run again to remake them.</p>')
    label, direction = _e(display.label(metric)), _e(display.direction(metric))
    out = [f"<p>What the stored fits and out-of-fold predictions say about the choice, on development rows only, "
           f"in {label} ({direction}). A wide gap between training and validation scores means the candidate "
           "fits its training rows much better than new ones (over-fitting); low scores on both mean it is too "
           "simple for the data; a validation score still rising at the full training size means more data "
           "would likely help. From <code>diagnostics/diagnostics.json</code>.</p>"]
    curves = result.get("validation_curves") or []
    out.append("<h3>Validation curves</h3>")
    if curves:
        out.append(_figure(files, figures, "validation", "validation curves per family and parameter",
                           "Training (dashed) and validation (solid) score against each numeric grid parameter, mean "
                           "over folds ± 1 sd; the dotted line is the winner's value, or in another family its best "
                           "candidate's. The other parameters are held at that candidate's values."))
        rows = []
        for curve in curves:
            fixed = ", ".join(f"{k}={v}" for k, v in sorted(curve["fixed"].items())) or "none"
            for p in curve["points"]:
                chosen = p["candidate"] == curve["chosen_candidate"]
                mark = (" ← winner" if curve["chosen_is_winner"] else " ← best in family") if chosen else ""
                rows.append([f"{_e(curve['family'])}: <code>{_e(curve['param'])}</code>"
                             f"<br><span class=note>others: {_e(fixed)}</span>", _e(p["value"]) + mark,
                             _e(_mean_sd(metric, p["train_mean"], p["train_sd"], unit)),
                             _e(_mean_sd(metric, p["val_mean"], p["val_sd"], unit)), _e(p["folds"])])
        out.append(_collapsible(f"The numbers ({len(rows)} points)", _table(
            ["family: parameter", "value", "training", "validation", "folds"], rows, {1, 2, 3, 4})))
    else:
        out.append("<p>No family has a grid parameter with at least two numeric values.</p>")
    out.append("<h3>Learning curve of the winner</h3>")
    learning = result.get("learning_curve") or {}
    picture = None  # diagnostics/plots/learning.png: where diagnostics made it before it had a step of its own
    if "summary" in learning:
        learning, picture = _learning_summary(files, choice["winner"]["candidate"])
    if learning.get("points"):
        out.append(_figure(files, figures, "learning", "the winner's learning curve",
                           "The winner fitted on nested subsets of each training fold (each inside the next) and "
                           "scored on the fold's validation rows: mean over folds ± 1 sd. The full fold's point is "
                           "the winner's own fit record.", picture))
        rows = [[_e(f"{p['fraction']:.0%}"), _e(f"{p['n_train']:.0f}"),
                 _e(_mean_sd(metric, p["metrics"][metric]["train_mean"], p["metrics"][metric]["train_sd"], unit)),
                 _e(_mean_sd(metric, p["metrics"][metric]["val_mean"], p["metrics"][metric]["val_sd"], unit)),
                 _e(p["folds"]) + (f" ({_e(p['failed'])} failed)" if p.get("failed") else "")]
                for p in learning["points"]]
        out.append(_table(["share of the training fold", "training rows", "training", "validation", "folds"],
                          rows, {0, 1, 2, 3, 4}))
    else:
        out.append(f"<p>Not made: {_e(learning.get('unavailable', 'no learning-curve tables'))}.</p>")
    if "confusion" in result:
        block = result["confusion"]
        labels = [str(v) for v in block["labels"]]
        out.append("<h3>Confusion matrix of the winner, out of fold</h3>")
        out.append(_figure(files, figures, "confusion", "the winner's out-of-fold confusion matrix",
                           f"{_e(block['rows'])} out-of-fold predictions of the winner (every repeat): rows are the "
                           "true class, columns the predicted one."))
        out.append(_table(["true \\ predicted"] + [_e(v) for v in labels],
                          [[_e(labels[i])] + [_e(c) for c in row] for i, row in enumerate(block["matrix"])],
                          set(range(1, len(labels) + 1))))
    if "calibration" in result:
        block = result["calibration"]
        out.append("<h3>Reliability of the winner's probabilities</h3>")
        if block.get("curves"):
            out.append(_figure(files, figures, "calibration", "reliability curve of the winner's probabilities",
                               f"Out-of-fold predicted probability against the observed share, in {_e(block['bins'])} "
                               "equal-width bins (empty bins left out). On the dotted diagonal, a predicted 30% "
                               "happens 30% of the time."))
            rows = [[_e(c["class"]), _e(f"{p:.3f}"), _e(f"{o:.3f}"), _e(n)] for c in block["curves"]
                    for p, o, n in zip(c["predicted"], c["observed"], c["count"], strict=True)]
            out.append(_collapsible(f"The numbers ({len(rows)} bins)", _table(
                ["class", "mean predicted probability", "observed share", "rows"], rows, {1, 2, 3})))
        else:
            out.append(f"<p>Not made: {_e(block.get('unavailable'))}.</p>")
    if "residuals" in result:
        block = result["residuals"]
        u = f" {unit}" if unit else ""
        out.append("<h3>Residuals of the winner, out of fold</h3>")
        out.append(_figure(files, figures, "residuals", "the winner's out-of-fold residuals against its predictions",
                           "True minus predicted value of every out-of-fold prediction (a sample when there are "
                           "many), and the mean residual per tenth of the predictions. A trend or a funnel says "
                           "where the model is biased or less sure."))
        out.append(_facts([("predictions", _e(block["rows"])), ("mean residual", _e(f"{block['mean']:.4f}{u}")),
                           ("mean absolute residual", _e(f"{block['mean_absolute']:.4f}{u}")),
                           ("middle 90%", _e(f"{block['quantiles']['0.05']:.4f} to "
                                             f"{block['quantiles']['0.95']:.4f}{u}"))]))
        rows = [[_e(f"{b['prediction_low']:.3f} to {b['prediction_high']:.3f}{u}"), _e(b["rows"]),
                 _e(f"{b['residual_mean']:.4f}{u}"), _e("—" if b["residual_sd"] is None else
                                                     f"{b['residual_sd']:.4f}{u}")] for b in block["bins"]]
        out.append(_table(["predictions from", "rows", "mean residual", "sd of residuals"], rows, {1, 2, 3}))
    return "".join(out)


def _agreement_words(block: Mapping[str, Any]) -> str:
    """The verdict's agreement note without its technical key names."""
    note = str(block.get("agreement_note") or "")
    for key, words in (("cv_corrected_bbc and cv_corrected_tibshirani", "the corrected CV estimates"),
                       ("cv_corrected_bbc", "the bootstrap bias-corrected CV estimate"),
                       ("cv_corrected_tibshirani", "the Tibshirani–Tibshirani estimate"),
                       ("cv_mean", "the raw CV estimate")):
        note = note.replace(key, words)
    return note


def _audit(exp: Path, result: Mapping[str, Any]) -> str:
    state = str(result.get("state"))
    css = {"pass": "pass", "fail": "fail"}.get(state, "progress")
    out = [f'<p class="big {css}">Audit {_e(state.upper())}</p>']
    if state == "in progress":
        out.append("<p>A run was writing to the experiment, so nothing was checked. Make the report again when it "
                   "has finished.</p>")
        return "".join(out)
    out.append(_facts([
        ("made", "when this report was made, from the files and the ledger as they were then"),
        ("ledger", f"{_e(result.get('ledger_entries'))} entries, head {_e(result.get('ledger_head_seq'))}:"
                   f"{_short(result.get('ledger_head'), 16)}…"),
        ("test set opened", f"{_e(result.get('test_set_opened', 0))} time(s)"),
        ("files verified", f"{len(result.get('verified') or {})} files match their latest ledger record"),
        ("signatures", f"checked against public key {_short(result.get('signed_with'), 16)}…"
                       if result.get("signed_with") else "the ledger is not signed"),
    ]))
    problems = result.get("problems") or []
    if problems:
        out.append("<h3>Problems</h3><ul class=problems>" + "".join(
            f"<li><code>{_e(p.get('code'))}</code> {_e(p.get('message'))}</li>" for p in problems) + "</ul>")
    else:
        out.append("<p>No problem found.</p>")
    seen = result.get("seen_before")
    if seen:
        names = ", ".join(str(o.get("experiment")) for o in seen.get("overlaps", []))
        out.append(f'<p class="note">Test rows seen before (opened by {_e(names)}); reason given: '
                   f"{_e(seen.get('reason'))}</p>")
    out.append("<h3>What was checked</h3><ul>" + "".join(f"<li>{_e(c)}</li>" for c in result.get("checks") or [])
               + "</ul>")
    out.append(f'<p class="note">Check it again later, anywhere: <code>holdfast audit {_e(exp)} --expect-head '
               f"{_e(result.get('ledger_head_seq'))}:{_e(result.get('ledger_head'))}</code></p>")
    return "".join(out)


def _event_words(entry: Mapping[str, Any]) -> str:
    d = entry.get("details") or {}
    event = entry.get("event")
    if event == "seal":
        counts = d.get("counts") or {}
        return f"sealed {counts.get('test')} test rows; {counts.get('dev')} development rows"
    if event == "round":
        return f"selection round {d.get('round')}: {d.get('summary', '')}"
    if event == "assign_folds":
        return f"folds: {d.get('scheme')}, {d.get('k')} x {d.get('repeats')} repeat(s), {d.get('rows')} rows"
    if event == "fit":
        failed = f", {d.get('failed')} failed" if d.get("failed") else ""
        return (f"fit {d.get('family')} repeat {d.get('repeat')} fold {d.get('fold')}: {d.get('candidates')} "
                f"candidates{failed}")
    if event == "tally":
        metric = str(d.get("metric", ""))
        return (f"tally: winner {d.get('winner')} by {str(d.get('rule', '')).replace('_', ' ')} on "
                f"{display.label(metric) if metric else '?'} among {d.get('candidates')} candidates")
    if event == "refit":
        return f"refit {d.get('winner', d.get('family', ''))} on {d.get('rows')} development rows"
    if event == "opening_started":
        return f"opening {d.get('opening')} recorded before any sealed row was read"
    if event == "open_test":
        return f"opening {d.get('opening')}: verdict written"
    if event == "score_outer":
        return f"nested: outer fold {d.get('outer')} scored"
    if event == "nested_summary":
        return f"nested summary over {d.get('outer_folds')} outer folds"
    if event == "learning_curve":
        return (f"learning curve of {d.get('winner')}, repeat {d.get('repeat')} fold {d.get('fold')}"
                + (": kept from an earlier run" if d.get("reused") else f": {d.get('points')} sizes"))
    if event == "diagnostics":
        return f"diagnostics of {d.get('winner')}: {d.get('curves')} validation curve(s)"
    if event == "learning_summary":
        return f"learning curve of {d.get('winner')} summarised over {d.get('files')} folds"
    return str(event)


def _timeline(entries: list[dict[str, Any]]) -> str:
    if not entries:
        return "<p>No ledger yet.</p>"
    body = []
    for entry in entries:
        d = entry.get("details") if isinstance(entry.get("details"), dict) else {}
        scope = d.get("scope", "main")
        recorded = ", ".join(f"{k.removesuffix('_sha256')} {_short(v, 8)}" for k, v in sorted(d.items())
                             if k.endswith("_sha256") and isinstance(v, str))
        body.append([_e(entry.get("seq")), _when(entry.get("time")), _e(entry.get("event")),
                     _e((entry.get("actor") or {}).get("rule") or "—") + ("" if scope == "main" else
                                                                          f" ({_e(scope)})"),
                     _e(_event_words(entry)), recorded or "—", _short(entry.get("hash"))])
    table = _table(["#", "time", "step", "rule", "what", "files recorded (sha256)", "line hash"], body, {0})
    intro = (f"<p>{len(entries)} ledger lines, each holding the hash of the one before: a changed, removed or "
             "inserted line breaks the chain, and the audit names it.</p>")
    return intro + (table if len(entries) <= OPEN_LIMIT else _collapsible(f"all {len(entries)} lines", table))


ESTIMATES = [
    ("CV estimate", "the mean validation score over folds: how a candidate trained on most of the development rows "
                    "is expected to do on new rows like them. The winner's is flattered by the choice itself."),
    ("standard error, corrected standard error", "how much the CV estimate would move with other folds. The plain "
                                                 "one ignores that folds share training rows and is too small; the "
                                                 "corrected one (Nadeau–Bengio) is the more honest width."),
    ("corrected for selection", "the winner's CV estimate with the flattery of choosing the best removed: bootstrap "
                                "bias-corrected cross-validation and the Tibshirani–Tibshirani correction, two "
                                "estimates of the same thing."),
    ("test set score and interval", "the refit winner measured once on sealed rows nobody chose with: an unbiased "
                                    "estimate of its score on new data from the same source; the interval says "
                                    "how sure that is."),
    ("nested cross-validation", "how well the whole selection procedure does on rows it never saw (when run)."),
]


def _estimates() -> str:
    return ('<div class="box">' + "".join(f"<p><b>{_e(k)}</b>: {_e(v)}</p>" for k, v in ESTIMATES) + "</div>")


def _cautions() -> str:
    return ('<div class="box caution"><p>Every estimate here holds for data like the development data: rows from '
            "the same source, period and population. It is not a guarantee under distribution shift (new sites, "
            "seasons, suppliers, or a changed way of recording the data).</p><p>Decisions about people follow "
            "their domain's own rules and human review; a score on a test set does not replace either.</p></div>")


SECTIONS = (("job", "The job"), ("folds", "Folds"), ("ranking", "Ranking"), ("per-fold", "Per-fold scores"),
            ("choice", "The choice"), ("optimism", "Optimism of the winner"), ("rounds", "Selection rounds"),
            ("diagnostics", "Diagnostics"), ("verdict", "Verdict"), ("audit", "Audit"), ("ledger", "Ledger"),
            ("estimates", "What each number estimates"), ("cautions", "Cautions"))


def render(exp_dir: str | Path, result: Mapping[str, Any], target_unit: str | None = None,
           figures: dict[str, bytes] | None = None) -> str:
    """The report's HTML for an experiment and an audit result of it (``audit.audit``); pure but for reading.

    ``figures`` (if given) receives the pictures shown, by file name, for Snakemake's report.
    """
    exp = Path(exp_dir)
    unit = target_unit or None
    figures = {} if figures is None else figures
    entries = ledger.verify_chain(exp / LEDGER)[0] if (exp / LEDGER).exists() else []
    files = Vouched(exp, result)
    name = result.get("experiment") or exp.name
    builders: dict[str, Callable[[], str]] = {
        "job": lambda: _job(exp, entries),
        "folds": lambda: _folds(exp, files, entries),
        "ranking": lambda: _ranking(exp, files, unit),
        "per-fold": lambda: _per_fold(exp, files, unit),
        "choice": lambda: _choice(exp, files, unit),
        "optimism": lambda: _optimism(exp, files, unit),
        "rounds": lambda: _rounds(exp, files, entries),
        "diagnostics": lambda: _diagnostics(exp, files, unit, figures),
        "verdict": lambda: _verdict(exp, files, unit, figures),
        "audit": lambda: _audit(exp, result),
        "ledger": lambda: _timeline(entries),
        "estimates": _estimates,
        "cautions": _cautions,
    }
    if (exp / PLOT).exists():
        figures["ranking.png"] = (exp / PLOT).read_bytes()
    sections = "".join(_section(anchor, title, builders[anchor]) for anchor, title in SECTIONS)
    state = str(result.get("state"))
    css = {"pass": "pass", "fail": "fail"}.get(state, "progress")
    opened = int(result.get("test_set_opened") or 0)
    status = [f'<li>audit <span class="{css}">{_e(state.upper())}</span></li>',
              f"<li>{'test set opened ' + str(opened) + ' time(s)' if opened else 'test set sealed, not opened'}</li>",
              f"<li>ledger head {_e(result.get('ledger_head_seq'))}:{_short(result.get('ledger_head'), 12)}</li>"]
    headline = _headline(files, unit)
    if headline:
        status.insert(0, f"<li>{headline}</li>")
    nav = "\n".join(f'<a href="#{a}">{_e(t)}</a>' for a, t in SECTIONS)
    script_hash = base64.b64encode(hashlib.sha256(SCRIPT.encode()).digest()).decode()
    policy = f"default-src 'none'; img-src data:; style-src 'unsafe-inline'; script-src 'sha256-{script_hash}'"
    return (
        "<!DOCTYPE html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
        f'<meta http-equiv="Content-Security-Policy" content="{policy}">'
        '<meta name="viewport" content="width=device-width, initial-scale=1">'
        '<link rel="icon" href="data:,">'
        f"<title>holdfast report: {_e(name)}</title><style>{STYLE}</style></head><body>"
        f"<header><h1>holdfast report: {_e(name)}</h1>"
        f'<p class="lead">Model selection with a sealed test set, read from <code>{_e(exp)}</code>.</p>'
        f'<ul class="status">{"".join(status)}</ul><nav>{nav}</nav></header>'
        f"<main>{sections}</main><script>{SCRIPT}</script></body></html>\n"
    )


def _headline(files: Vouched, unit: str | None) -> str:
    try:
        choice, metric = _primary(files)
    except WithheldError:
        return ""
    winner = choice["winner"]
    return (f"winner {_candidate(winner['family'], winner['candidate'])}: CV "
            f"{_e(display.named(metric, winner['mean'], unit))}")


def write_report(exp_dir: str | Path, out_path: str | Path, figures_dir: str | Path | None = None,
                 target_unit: str | None = None, last_step: bool = False) -> dict[str, Any]:
    """Audit the experiment, write its report (and, if named, a folder of its pictures); return the audit result.

    Reads only: nothing is appended to the ledger. ``last_step`` is for the workflow's report rule, which runs
    after every other step of its run (see ``audit.audit``).
    """
    from .audit import audit

    exp = Path(exp_dir)
    result = audit(str(exp), last_step=last_step)
    figures: dict[str, bytes] = {}
    text = render(exp, result, target_unit, figures)
    write_atomic(out_path, lambda tmp: Path(tmp).write_text(text, encoding="utf-8"), mode=0o644)
    if figures_dir is not None:
        folder = Path(figures_dir)
        if folder.exists():
            shutil.rmtree(folder)
        folder.mkdir(parents=True)
        for name, data in sorted(figures.items()):
            (folder / name).write_bytes(data)
    return result


def default_paths(exp_dir: str | Path) -> tuple[Path, Path]:
    """report.html and its figure folder inside an experiment."""
    exp = Path(exp_dir)
    return exp / REPORT, exp / REPORT_FIGURES


__all__ = ["Vouched", "WithheldError", "default_paths", "interval_figure", "render", "write_report"]
