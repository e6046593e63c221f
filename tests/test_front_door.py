"""`holdfast run` is the safe front door: an untrusted config never reaches Snakemake's loader.

Snakemake evaluates template expressions in any config file it loads (a top-level `__use_yte__: true` makes a
`?...` value Python code) before the Snakefile or any holdfast code runs. These tests show the attack, through
the real CLI and the real Snakemake, and what each door does with it.
"""

from __future__ import annotations

from pathlib import Path

import pytest
from conftest import breast_cancer_frame, run_cli, run_workflow, small_classification_config, tree_digest, write_config

TEMPLATE = """__use_yte__: true
experiment: ?__import__("os").system("touch {payload}") and "bc" or "bc"
data: {{path: data.csv, target: target, id: patient}}
candidates:
  tree: {{estimator: sklearn.tree.DecisionTreeClassifier, grid: {{max_depth: [2, 3]}}}}
"""


@pytest.fixture
def work(tmp_path: Path) -> Path:
    """A project folder with the breast cancer data (scikit-learn's bundled copy) and nothing run."""
    breast_cancer_frame().to_csv(tmp_path / "data.csv", index=False)
    return tmp_path


def evil(work: Path) -> tuple[Path, Path]:
    """A config whose experiment name is a template expression that would create ``payload``."""
    payload = work / "PAYLOAD"
    path = work / "evil.yaml"
    path.write_text(TEMPLATE.format(payload=payload), encoding="utf-8")
    return path, payload


@pytest.mark.slow
def test_holdfast_run_never_lets_a_template_run(work: Path) -> None:
    path, payload = evil(work)
    result = run_cli(work, "run", path.name, "--cores", "1")
    assert result.returncode == 2
    assert result.stderr.strip() == (f"holdfast: config error: config file '{path.name}' carries the template marker "
                                     "'__use_yte__', which makes Snakemake run the expressions in it as code; "
                                     "remove it and write plain values")
    assert not payload.exists(), "holdfast run let the template run"
    assert not (work / "results").exists() or tree_digest(work / "results") == {}


@pytest.mark.slow
def test_plain_snakemake_runs_the_template_first_then_the_workflow_refuses(work: Path) -> None:
    """What the README's caution says: plain `snakemake --configfile` cannot protect against this file."""
    path, payload = evil(work)
    result = run_workflow(work, "-n", configfile=path.name)
    assert payload.exists(), "Snakemake's loader evaluates templates before holdfast code runs (documented)"
    assert result.returncode == 2, result.stderr[-2000:]
    assert "carries the template marker '__use_yte__'" in result.stderr
    assert not (work / "results").exists()


@pytest.mark.parametrize(("text", "message"), [
    ("experiment: bc\nexperiment: other\n", "key 'experiment' is written twice (lines 1 and 2)"),
    ("candidates:\n  tree: {estimator: sklearn.tree.DecisionTreeClassifier}\n"
     "  tree: {estimator: sklearn.tree.ExtraTreeClassifier}\n", "key 'tree' is written twice (lines 2 and 3)"),
    ("experiment: !!str bc\n", "tag 'tag:yaml.org,2002:str' on line 1; tags are not allowed"),
    ("experiment: !!python/object/apply:os.system ['touch x']\n", "tags are not allowed"),
    ("__use_yte__: true\nexperiment: bc\n", "carries the template marker '__use_yte__'"),
    ("a: &a [1]\n" + "".join(f"b{i}: *a\n" for i in range(101)), "more than 100 aliases"),
])
def test_the_strict_reader_refuses_what_is_not_plain_data(tmp_path: Path, text: str, message: str) -> None:
    path = tmp_path / "c.yaml"
    path.write_text(text, encoding="utf-8")
    result = run_cli(tmp_path, "check", path.name)
    assert result.returncode == 2, result.stdout + result.stderr
    assert result.stderr.startswith(f"holdfast: config error: config file '{path.name}'")
    assert message in result.stderr


@pytest.mark.slow
def test_a_family_written_twice_stops_plain_snakemake_too(work: Path) -> None:
    """Snakemake's own reader silently keeps the last of two equal keys; the workflow reads the file again."""
    write_config(work, small_classification_config())
    text = (work / "config.yaml").read_text()
    (work / "twice.yaml").write_text(text + "candidates:\n  tree: {estimator: sklearn.tree.DecisionTreeClassifier}\n")
    result = run_workflow(work, "-n", configfile="twice.yaml")
    assert result.returncode == 2 and "key 'candidates' is written twice" in result.stderr


def test_an_extra_estimator_module_needs_the_operators_consent(tmp_path: Path) -> None:
    """A module's top-level code runs when it is imported: naming it in a config alone imports nothing."""
    breast_cancer_frame().to_csv(tmp_path / "data.csv", index=False)
    marker = tmp_path / "IMPORTED"
    (tmp_path / "sidecar_models.py").write_text(f"open({str(marker)!r}, 'w').close()\n", encoding="utf-8")
    config = small_classification_config(allowed_modules=["sklearn", "sidecar_models"])
    config["candidates"]["odd"] = {"estimator": "sidecar_models.Model"}
    write_config(tmp_path, config)
    env = {"PYTHONPATH": f"{Path(__file__).resolve().parents[1] / 'scripts'}:{tmp_path}"}
    refused = run_cli(tmp_path, "check", "config.yaml", env=env)
    assert refused.returncode == 2, refused.stdout + refused.stderr
    assert ("config key 'allowed_modules[1]': module 'sidecar_models' is not trusted by whoever runs holdfast"
            in refused.stderr)
    assert "--trust-module sidecar_models" in refused.stderr
    assert not marker.exists(), "the module was imported on the config's word alone"
    consented = run_cli(tmp_path, "check", "config.yaml", env={**env, "HOLDFAST_TRUSTED_MODULES": "sidecar_models"})
    assert marker.exists(), "with the operator's consent the module is imported"
    assert consented.returncode == 2 and "has no class 'Model'" in consented.stderr


@pytest.mark.parametrize("name", ["os;rm", "sidecar models", "sidecar_models\n", ".hidden"])
def test_module_names_are_checked_before_any_import(tmp_path: Path, name: str) -> None:
    breast_cancer_frame().to_csv(tmp_path / "data.csv", index=False)
    write_config(tmp_path, small_classification_config(allowed_modules=["sklearn", name]))
    result = run_cli(tmp_path, "check", "config.yaml", env={"HOLDFAST_TRUSTED_MODULES": name})
    assert result.returncode == 2 and "allowed_modules" in result.stderr, result.stderr


@pytest.mark.parametrize("option", ["--configfile=x.yaml", "--config", "-s", "--directory=elsewhere"])
def test_holdfast_run_keeps_the_options_it_sets_itself(work: Path, option: str) -> None:
    write_config(work, small_classification_config())
    result = run_cli(work, "run", "config.yaml", option)
    assert result.returncode == 2 and "is set by holdfast run itself" in result.stderr
    assert not (work / "results").exists()


@pytest.mark.parametrize("option", [["--allowed-rules", "tally", "open_test", "report"], ["--until=tally"],
                                    ["-U", "x"]])
def test_holdfast_open_keeps_what_its_snakemake_may_run(work: Path, option: list[str]) -> None:
    # Snakemake takes the last --allowed-rules it is given: one passed on would widen what the opening's call runs.
    result = run_cli(work, "open", "results/bc", "--yes", *option)
    assert result.returncode == 2 and "is set by holdfast open itself" in result.stderr, result.stderr
    assert not (work / "results").exists()


def test_help_lists_every_command_and_version_works(tmp_path: Path) -> None:
    help_text = run_cli(tmp_path, "--help").stdout
    for command in ("run", "open", "audit", "check"):
        assert f"    {command} " in help_text or f"    {command}\n" in help_text, help_text
    version = run_cli(tmp_path, "--version")
    assert version.returncode == 0 and version.stdout.startswith("holdfast ")


def test_holdfast_run_asks_for_the_greedy_scheduler_unless_told_otherwise(work: Path) -> None:
    # Snakemake's default scheduler solves an integer programme at every pass (slow at thousands of ready fit jobs);
    # holdfast passes --scheduler greedy, and an explicit --scheduler of the user's is passed on instead.
    write_config(work, small_classification_config())

    def command_line(*options: str) -> str:
        result = run_cli(work, "run", "config.yaml", "-n", *options)  # a dry run shows Snakemake's own output
        assert result.returncode == 0, result.stdout + result.stderr
        return next(line for line in (result.stdout + result.stderr).splitlines() if "Command:" in line)

    default = command_line()
    assert " --scheduler greedy" in default, default
    chosen = command_line("--scheduler", "ilp")
    assert " --scheduler ilp" in chosen and "greedy" not in chosen, chosen
    # The user's cores in the short form with the number attached replace holdfast's "--cores all".
    assert " --cores all" in default and " --cores all" not in command_line("-c1"), default


@pytest.mark.parametrize("extra", [[], ["--cores", "2"], ["--cores=2"], ["-c2"], ["-j", "4", "-n"], ["--jobs=3", "-p"],
                                   ["--scheduler", "ilp", "--rerun-incomplete"], ["-k", "--dry-run"]])
def test_plain_options_force_nothing_by_snakemakes_own_parser(extra: list[str]) -> None:
    # holdfast run skips importing Snakemake's parser for such command lines; Snakemake's parser must agree.
    from holdfast.cli import forces_nothing
    from holdfast.plan import snakemake_flags

    assert forces_nothing(extra)
    assert not any(snakemake_flags(["snakemake", *extra]).values())


@pytest.mark.parametrize("extra", [["--forcer", "seal"], ["--forcerun=seal"], ["--cores"], ["--cores", "--forceall"],
                                   ["-nF"], ["all"], ["--profile", "p"], ["-c", "2", "--until", "tally"], ["--cores="]])
def test_anything_else_goes_through_snakemakes_parser(extra: list[str]) -> None:
    from holdfast.cli import forces_nothing

    assert not forces_nothing(extra)
