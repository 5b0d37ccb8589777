"""Hostile specs: every value that once crashed generate or wrote NaN figures (issue 10) is refused at
load, by check as by generate, with the field named and exit 2; long values are not echoed whole."""

from __future__ import annotations

import pytest
from typer.testing import CliRunner

from seqsolve.cli import app
from tests.test_bad_input import BASE

runner = CliRunner()
ITI = BASE.replace(
    "soa = 2.0", 'trial_duration = 1.0\niti = { distribution = "choice", values = [1, 2], weights = [1, 1] }'
)


def with_line(section: str, line: str, base: str = BASE) -> str:
    """The base spec with one line added to a section (created at the end when absent)."""
    if f"[{section}]" in base:
        return base.replace(f"[{section}]\n", f"[{section}]\n{line}\n", 1)
    return base + f"\n[{section}]\n{line}\n"


def with_value(key: str, value: str, base: str = BASE) -> str:
    """The base spec with the first occurrence of a key's value replaced."""
    lines = base.splitlines()
    hits = [i for i, ln in enumerate(lines) if ln.startswith(f"{key} = ")]
    assert hits, key
    lines[hits[0]] = f"{key} = {value}"
    return "\n".join(lines) + "\n"


NESTED = "(" * 1000 + "gain" + ")" * 1000 + " - loss"
CASES = [
    pytest.param('include = ["x\\u0000.toml"]\n' + BASE, ["include[1]", "no rule set"], id="include-null-byte"),
    pytest.param('include = ["../../../../tmp/x"]\n' + BASE, ["include[1]", "no rule set"], id="include-escape"),
    pytest.param(
        with_line("analysis", f'contrasts = ["{NESTED}"]'),
        ["analysis.contrasts", "characters"],
        id="contrast-1000-parentheses",
    ),
    pytest.param(
        with_line("analysis", f'contrasts = ["{"(" * 60 + "gain" + ")" * 60} - loss"]'),
        ["analysis.contrasts[1]", "nested more than 50"],
        id="contrast-60-parentheses",
    ),
    pytest.param(with_value("trials", "1e30"), ["conditions[1].trials"], id="trials-1e30"),
    pytest.param(
        with_value("trials", str(2**62)), ["conditions[1].trials", "SEQSOLVE_MAX_TRIALS_PER_RUN"], id="trials-2^62"
    ),
    pytest.param(with_value("trials", "1_000_000_000"), ["conditions[1]", "1,000,000,000"], id="trials-1e9"),
    pytest.param(with_value("trials", "1_000_000"), ["conditions[1]", "20,000"], id="trials-1e6"),
    pytest.param(
        BASE.replace("runs = 2", "runs = 20").replace(
            'trials = 4\nlevels = { valence = "good" }', 'trials = 19000\nlevels = { valence = "good" }'
        ),
        ["trials per participant"],
        id="trials-total",
    ),
    pytest.param(with_value("tr", "inf"), ["timing.tr", "finite"], id="tr-inf"),
    pytest.param(with_value("tr", "nan"), ["timing.tr", "finite"], id="tr-nan"),
    pytest.param(with_value("soa", "inf"), ["timing.soa"], id="soa-inf"),
    pytest.param(with_line("timing", "lead_in = inf"), ["timing.lead_in"], id="lead-in-inf"),
    pytest.param(
        with_line("timing", "lead_out = 1e300"), ["timing", "lead_out", "SEQSOLVE_MAX_SECONDS"], id="lead-out-1e300"
    ),
    pytest.param(with_line("analysis", "fir_window = inf"), ["analysis.fir_window"], id="fir-window-inf"),
    pytest.param(
        with_line("analysis", "resolution = 1e-300"),
        ["analysis", "resolution", "SEQSOLVE_MIN_STEP_MS"],
        id="resolution-1e-300",
    ),
    pytest.param(with_line("analysis", "fir_step = 1e-6"), ["analysis", "fir_step"], id="fir-step-1e-6"),
    pytest.param(
        ITI.replace("weights = [1, 1]", "weights = [inf, 1]"), ["timing.iti", "weights"], id="choice-weights-inf"
    ),
    pytest.param(with_line("objective", "detection = inf"), ["objective.detection"], id="detection-inf"),
    pytest.param(
        with_line("analysis", "hrf = { samples = [0, nan, 1], step = 0.5 }"), ["analysis.hrf", "samples"], id="hrf-nan"
    ),
    pytest.param(
        with_line("analysis", "hrf = { samples = [0, 0, 0], step = 0.5 }"),
        ["analysis.hrf", "every sample"],
        id="hrf-zero",
    ),
    pytest.param(with_value("name", '"' + "t" * 100_000 + '"'), ["study.name", "[100002 characters]"], id="name-100kB"),
    pytest.param(
        BASE.replace('name = "gain"', 'name = "' + "g" * 100_000 + '"'), ["conditions[1].name"], id="condition-100kB"
    ),
    pytest.param(with_line("timing", "x" * 100_000 + " = 1"), ["unknown key", "characters"], id="key-100kB"),
    pytest.param(
        BASE + '\n[[rules]]\nkind = "max-run"\nlength = ' + str(2**62) + "\n",
        ["rules[1].length"],
        id="rule-number-2^62",
    ),
    pytest.param(
        BASE + '\n[[rules]]\nkind = "' + "k" * 100_000 + '"\n', ["rules[1]", "unknown rule kind"], id="rule-kind-100kB"
    ),
    pytest.param("x = " + "[" * 5000 + "]" * 5000 + "\n" + BASE, ["nested too deeply"], id="toml-nesting"),
    pytest.param(
        with_value("seed", str(2**70), BASE.replace("runs = 2", "runs = 2\nseed = 1")), ["study.seed"], id="seed-2^70"
    ),
    pytest.param(
        with_line("timing", "volumes = 1_000_000_000"), ["volumes", "SEQSOLVE_MAX_VOLUMES_PER_RUN"], id="volumes-1e9"
    ),
]


@pytest.mark.parametrize("command", ["check", "generate"])
@pytest.mark.parametrize("text, expected", CASES)
def test_hostile_spec_is_refused_at_load(tmp_path, text, expected, command):
    spec = tmp_path / "study.toml"
    spec.write_text(text)
    args = [command, str(spec)] + (["-o", str(tmp_path / "out")] if command == "generate" else [])
    result = runner.invoke(app, args)
    assert result.exit_code == 2, result.output
    assert result.exception is None or isinstance(result.exception, SystemExit), result.exception
    for piece in expected:
        assert piece in result.output, (piece, result.output[:2000])
    assert len(result.output) < 4000, "long values must be shortened"
    assert not (tmp_path / "out").exists()


def test_spec_over_the_size_limit_is_refused(tmp_path, monkeypatch):
    monkeypatch.setenv("SEQSOLVE_MAX_SPEC_KB", "1")
    spec = tmp_path / "study.toml"
    spec.write_text(BASE + "# " + "padding " * 200 + "\n")
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 2 and "SEQSOLVE_MAX_SPEC_KB" in result.output, result.output


def test_bundled_rule_set_by_name_still_works(tmp_path):
    spec = tmp_path / "study.toml"
    spec.write_text('include = ["standard"]\n' + BASE)
    result = runner.invoke(app, ["check", str(spec)])
    assert result.exit_code == 0, result.output
