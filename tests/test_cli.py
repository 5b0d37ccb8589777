"""The commands as a user runs them: outputs, refusal to overwrite, determinism, exit codes."""

from __future__ import annotations

import csv
import json
import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from typer.testing import CliRunner

from seqsolve.cli import app

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "examples" / "reward_cue.toml"
runner = CliRunner()


def run(*args):
    return runner.invoke(app, [str(a) for a in args])


#: a short search keeps these tests quick; test_examples runs the README's command as written
SHORT = ("--iterations", "8")


@pytest.fixture(scope="module")
def generated(tmp_path_factory):
    out = tmp_path_factory.mktemp("gen") / "designs"
    result = run("generate", EXAMPLE, "-o", out, *SHORT)
    assert result.exit_code == 0, result.output
    return out


def test_generate_writes_bids_events_orderings_and_manifest(generated):
    files = sorted(p.relative_to(generated).as_posix() for p in generated.rglob("*") if p.is_file())
    assert "orderings.csv" in files and "manifest.json" in files
    assert "sub-01/sub-01_task-rewardcue_run-3_events.tsv" in files
    assert len([f for f in files if f.endswith("_events.tsv")]) == 6 * 3
    with (generated / "sub-01" / "sub-01_task-rewardcue_run-1_events.tsv").open() as fh:
        rows = list(csv.DictReader(fh, delimiter="\t"))
    assert list(rows[0]) == ["onset", "duration", "trial_type"]
    assert {r["trial_type"] for r in rows} == {"win", "avoid", "neutral"}  # the baseline is omitted
    manifest = json.loads((generated / "manifest.json").read_text())
    assert manifest["spec"]["hash"].startswith("sha256:")
    assert len({p["seed"] for p in manifest["participants"]}) == 6
    assert {"ortools", "numpy", "seqsolve"} <= set(manifest["versions"])


def test_generated_orderings_pass_audit_through_both_file_kinds(generated):
    result = run("audit", EXAMPLE, generated / "orderings.csv")
    assert result.exit_code == 0, result.output
    assert "valid" in result.output
    events = sorted(str(p) for p in generated.rglob("*_events.tsv"))
    result = run("audit", EXAMPLE, *events)
    assert result.exit_code == 0, result.output


def test_refuses_to_overwrite_without_force(generated, tmp_path):
    out = tmp_path / "copy"
    shutil.copytree(generated, out)
    before = (out / "orderings.csv").read_text()
    result = run("generate", EXAMPLE, "-o", out, *SHORT)
    assert result.exit_code == 2 and "--force" in result.output
    assert (out / "orderings.csv").read_text() == before
    assert run("generate", EXAMPLE, "-o", out, "--force", "--seed", "99", *SHORT).exit_code == 0
    assert (out / "orderings.csv").read_text() != before


def test_same_spec_and_seed_give_byte_identical_outputs(generated, tmp_path):
    again = tmp_path / "again"
    assert run("generate", EXAMPLE, "-o", again, *SHORT).exit_code == 0
    for p in generated.rglob("*"):
        if p.is_file():
            assert (again / p.relative_to(generated)).read_bytes() == p.read_bytes(), p.name


def test_audit_lists_violations_and_exits_1(generated, tmp_path):
    rows = (generated / "orderings.csv").read_text().splitlines()
    # make participant 01's run 1 start with three 'win' trials
    head, body = rows[0], rows[1:]
    changed = []
    for line in body:
        f = line.split(",")
        if f[0] == "01" and f[1] == "1" and f[2] in ("1", "2", "3"):
            f[3] = "win"
        changed.append(",".join(f))
    bad = tmp_path / "bad.csv"
    bad.write_text("\n".join([head] + changed) + "\n")
    result = run("audit", EXAMPLE, bad)
    assert result.exit_code == 1, result.output
    assert "participant 01; run 1; positions 1, 2, 3" in result.output
    assert "no more than 2 trials" in result.output
    assert "the first trial is always 'fixation'" in result.output  # position 1 was fixation


def test_check_explains_the_conflicting_example():
    result = run("check", ROOT / "examples" / "conflicting_rules.toml")
    assert result.exit_code == 1
    assert "cannot all hold" in result.output
    assert "at least 2 trials between two trials of 'target'" in result.output
    assert "max-run" not in result.output and "standard" not in result.output.split("hold together")[1]


def test_check_on_valid_spec_lists_rules():
    result = run("check", EXAMPLE)
    assert result.exit_code == 0 and "can all hold" in result.output


def test_schema_is_json_with_rule_kinds():
    result = run("schema")
    schema = json.loads(result.output)
    assert "max-run" in json.dumps(schema) and schema["title"] == "seqsolve spec"


def test_help_of_each_command_has_an_example():
    for cmd in ("generate", "audit", "check"):
        result = run(cmd, "--help")
        assert result.exit_code == 0 and "Example:" in result.output


def test_score_prints_a_table_and_json(generated):
    result = run("score", EXAMPLE, generated / "orderings.csv", "--no-references")
    assert result.exit_code == 0, result.output
    assert "detection" in result.output and "estimation" in result.output
    assert result.output.count(" all ") >= 6  # every participant's all-runs row
    as_json = run(
        "score",
        EXAMPLE,
        generated / "sub-01" / "sub-01_task-rewardcue_run-1_events.tsv",
        generated / "sub-01" / "sub-01_task-rewardcue_run-2_events.tsv",
        generated / "sub-01" / "sub-01_task-rewardcue_run-3_events.tsv",
        "--json",
    )
    assert as_json.exit_code == 0, as_json.output
    rows = json.loads(as_json.output)
    assert {r["run"] for r in rows} == {"1", "2", "3", "all"}
    assert set(rows[0]["per_contrast"]) == {"win - neutral", "avoid - neutral", "(win + avoid)/2 - neutral"}
    assert 0 < rows[0]["detection_vs_block"] and 0 < rows[0]["estimation_vs_random"]
    # the manifest's figures are the same computation as score's
    manifest = json.loads((generated / "manifest.json").read_text())
    first = manifest["participants"][0]["metrics"]["1"]
    assert first["detection"] == pytest.approx(rows[0]["detection"], rel=1e-8)


def test_every_help_keeps_the_bracketed_section_names():
    # rich markup reads "[analysis]" as a style tag and drops it ("the spec's : detection"): every
    # "[name]" written in a command's help or its options' help must reach the rendered --help
    import re

    import typer

    group = typer.main.get_command(app)
    seen = set()
    for name, cmd in [("", group)] + sorted(group.commands.items()):
        texts = [cmd.help or ""] + [getattr(p, "help", None) or "" for p in cmd.params]
        wanted = set(re.findall(r"\[[a-z_]+\]", " ".join(texts)))
        result = runner.invoke(app, ([name] if name else []) + ["--help"], terminal_width=200)
        assert result.exit_code == 0, result.output
        for section in wanted:
            assert section in result.output, f"{name or 'seqsolve'} --help lost {section}"
        assert "spec's :" not in result.output and "spec's ." not in result.output
        seen |= wanted
    assert {"[analysis]", "[objective]"} <= seen


#: runs the command line in a fresh interpreter in which `import click` fails, as on a machine where
#: `pip install -e .` brought a typer that no longer depends on click (typer's own click copy)
_WITHOUT_CLICK = """
import sys
sys.modules["click"] = None
try:
    import typer  # noqa: F401
except ImportError:
    sys.exit(77)  # this typer itself needs click: nothing to test
from seqsolve.cli import main
sys.argv = ["seqsolve", *sys.argv[1:]]
main()
"""


@pytest.mark.parametrize(
    "args, code, says",
    [
        (["check", str(EXAMPLE)], 0, "rules"),
        (["check", str(EXAMPLE), "--no-such-option"], 2, "No such option"),
        (["check", str(ROOT / "examples" / "no_such_spec.toml")], 2, "no_such_spec.toml"),
    ],
    ids=["valid", "usage-error", "missing-spec"],
)
def test_the_command_line_needs_no_click(args, code, says):
    # a fresh `pip install -e .` once failed here with ModuleNotFoundError: click (typer 0.29 dropped it)
    done = subprocess.run([sys.executable, "-c", _WITHOUT_CLICK, *args], capture_output=True, text=True, cwd=ROOT)
    if done.returncode == 77:
        pytest.skip("the installed typer depends on click")
    out = done.stdout + done.stderr
    assert done.returncode == code, out
    assert says in out and "Traceback" not in out
