"""`holdfast preflight` without a cluster: reading the profile, and its one-line answers before SLURM is asked.

Its checks against a real SLURM cluster are in tests/test_cluster.py.
"""

from __future__ import annotations

import sys
from pathlib import Path

import pytest
from conftest import REPO, run_cli
from holdfast import preflight
from holdfast.errors import ConfigError

PROFILE = REPO / "workflow" / "profiles" / "slurm"


def test_shipped_profile_names_only_rules_the_workflow_has() -> None:
    profile = preflight.read_profile(str(PROFILE))
    rules = preflight.workflow_rules()
    assert {"seal", "assign_folds", "record_round", "fit_family", "tally", "refit_winner", "open_test",
            "nested_fit_family", "score_outer"} <= rules
    assert "audit" not in rules  # audits run in holdfast's closing step, not as a rule
    assert profile.get("executor") == "slurm"
    assert profile.pairs("groups") == {"seal": "prepare", "assign_folds": "prepare", "record_round": "conclude",
                                       "tally": "conclude", "refit_winner": "conclude",
                                       "learning_curve": "diagnose", "diagnostics": "diagnose",
                                       "learning_summary": "diagnose"}


def test_profile_options_read_from_either_yaml_form(tmp_path: Path) -> None:
    (tmp_path / "config.yaml").write_text(
        "executor: slurm\n"
        "default-resources:\n  - slurm_partition='short'\n  - mem_mb=100\n"
        "set-resources:\n  fit_family:\n    slurm_partition: long\n"
        "groups: {seal: prepare}\n", encoding="utf-8")
    profile = preflight.read_profile(str(tmp_path))
    assert profile.path == tmp_path / "config.yaml"
    assert profile.pairs("default-resources") == {"slurm_partition": "short", "mem_mb": "100"}
    assert profile.rule_resources() == {"fit_family": {"slurm_partition": "long"}}
    assert profile.pairs("groups") == {"seal": "prepare"}


def test_profile_file_chosen_as_snakemake_chooses(tmp_path: Path) -> None:
    for name in ("config.yaml", "config.v8+.yaml", "config.v99+.yaml", "notes.yaml"):
        (tmp_path / name).write_text(f"executor: slurm\njobs: {len(name)}\n", encoding="utf-8")
    # The newest versioned file this Snakemake (9.x) may read; a file for Snakemake 99 is not for it.
    assert preflight.find_profile(str(tmp_path)) == tmp_path / "config.v8+.yaml"
    assert preflight.find_profile(str(tmp_path / "notes.yaml")) == tmp_path / "notes.yaml"  # a file, as given
    assert preflight.find_profile(str(tmp_path / "absent")) is None


def test_a_resource_entry_without_a_value_is_refused(tmp_path: Path) -> None:
    (tmp_path / "config.yaml").write_text("executor: slurm\ndefault-resources:\n  - mem_mb\n", encoding="utf-8")
    with pytest.raises(ConfigError, match=r"'default-resources' entry 'mem_mb' is not NAME=VALUE"):
        preflight.read_profile(str(tmp_path)).pairs("default-resources")


@pytest.mark.parametrize(("resources", "sizes"), [
    ({"runtime": 30, "mem_mb": 1000}, (30, 1000)),
    ({"runtime": "1h", "mem": "2GB"}, (60, 2000)),  # Snakemake's human-friendly sizes, as the plugin gets them
    ({"slurm_partition": "debug"}, (None, None)),  # the rules' own runtime and memory apply
])
def test_default_sizes_read_as_snakemake_reads_them(tmp_path: Path, resources: dict, sizes: tuple) -> None:
    profile = preflight.Profile(tmp_path / "config.yaml", {"executor": "slurm", "default-resources": resources})
    assert preflight.default_sizes(profile) == sizes


def test_unreadable_runtime_is_refused(tmp_path: Path) -> None:
    profile = preflight.Profile(tmp_path / "config.yaml", {"default-resources": {"runtime": "soon"}})
    with pytest.raises(ConfigError, match=r"default-resources runtime or mem is not a size Snakemake reads"):
        preflight.default_sizes(profile)


def test_each_partition_of_a_list_is_checked(tmp_path: Path) -> None:
    profile = preflight.Profile(tmp_path / "config.yaml", {
        "default-resources": {"slurm_partition": "short,long"},
        "set-resources": {"fit_family": {"slurm_partition": "long"}}})
    assert preflight.resource_values(profile, "slurm_partition") == {
        "short": ["default-resources"], "long": ["default-resources", "set-resources: fit_family"]}


@pytest.mark.parametrize(("usage", "path_python"), [
    (None, False),  # Snakemake's default: the software is on a shared file system
    (["persistence", "software-deployment"], False),
    ("input-output software-deployment", False),
    (["persistence", "input-output"], True),
    ("none", True),
])
def test_which_python_jobs_run(tmp_path: Path, usage: object, path_python: bool) -> None:
    profile = preflight.Profile(tmp_path / "config.yaml", {"executor": "slurm", "shared-fs-usage": usage})
    assert preflight.jobs_use_path_python(profile) is path_python


def test_missing_profile_is_one_line(tmp_path: Path) -> None:
    result = run_cli(tmp_path, "preflight", "--profile", "nowhere")
    assert result.returncode == 2
    assert result.stderr.strip() == ("holdfast: config error: profile 'nowhere' has no config.yaml (nor "
                                     "profile.yaml); pass the folder that holds the profile's config.yaml, e.g. "
                                     "workflow/profiles/slurm")


def test_profile_that_is_no_mapping_is_one_line(tmp_path: Path) -> None:
    (tmp_path / "p").mkdir()
    (tmp_path / "p" / "config.yaml").write_text("- executor: slurm\n", encoding="utf-8")
    result = run_cli(tmp_path, "preflight", "--profile", "p")
    assert result.returncode == 2
    assert result.stderr.strip().endswith("is not a mapping of Snakemake options; write 'option: value' lines")


def test_a_profile_for_another_executor_stops_at_once(tmp_path: Path) -> None:
    (tmp_path / "p").mkdir()
    (tmp_path / "p" / "config.yaml").write_text("cores: 2\n", encoding="utf-8")
    result = run_cli(tmp_path, "preflight", "--profile", "p")
    assert result.returncode == 1, result.stdout + result.stderr
    assert result.stdout.splitlines()[1:] == [
        "  problem: profile 'p/config.yaml' does not set 'executor', so 'holdfast run --profile' would not submit to "
        "SLURM; add the line 'executor: slurm'",
        "holdfast: preflight: 1 problem in 1 checks; fix it and run 'holdfast preflight --profile p' again"]


def test_without_slurm_commands_it_says_where_to_run(tmp_path: Path) -> None:
    (tmp_path / "p").mkdir()
    (tmp_path / "p" / "config.yaml").write_text("executor: slurm\ngroups: [audit=conclude]\n", encoding="utf-8")
    # Only the interpreter's folder on PATH: no sbatch, squeue, sinfo or scontrol there.
    result = run_cli(tmp_path, "preflight", "--profile", "p", env={"PATH": str(Path(sys.executable).parent)})
    assert result.returncode == 1, result.stdout + result.stderr
    problems = [line.strip() for line in result.stdout.splitlines() if line.strip().startswith("problem: ")]
    assert len(problems) == 2, result.stdout
    assert problems[0].startswith("problem: profile 'p/config.yaml' names rules the workflow does not have "
                                  "(groups 'audit'); remove those lines (the rules are: assign_folds, ")
    assert problems[1] == ("problem: SLURM commands not on PATH: sbatch, squeue, sinfo, scontrol; run preflight on "
                           "the cluster's login node, or make SLURM's commands available first (e.g. 'module load "
                           "slurm')")
    assert not (tmp_path / "results").exists()  # nothing was probed, nothing written
