"""compare's families are what they claim, and say why when they cannot be built."""

from __future__ import annotations

import galois
import numpy as np
import pytest
from scipy.signal import max_len_seq
from typer.testing import CliRunner

from seqsolve.cli import app
from seqsolve.families import (
    block_designs,
    m_sequence,
    m_sequence_designs,
    permuted_block_designs,
    prime_power,
    random_valid_designs,
)
from seqsolve.solve import check_runs
from tests.conftest import make_study


def stretches(seq):
    """Lengths of the stretches of equal labels."""
    cuts = np.flatnonzero(np.diff(seq)) + 1
    return np.diff(np.concatenate([[0], cuts, [len(seq)]]))


def test_block_designs_are_blocked_and_obey_the_rules():
    study = make_study([12, 12, 12, 12], [{"kind": "max-run", "length": 6}], baseline=3, runs=2)
    fam = block_designs(study)
    assert fam.possible
    for runs, label in zip(fam.designs, fam.labels):
        b = int(label.split()[-1])
        assert b <= 6  # larger blocks break the max-run rule and are left out
        for r in runs:
            lengths = stretches(r)
            # blocks of b, except where a condition runs out (12 is not always a multiple of b)
            assert lengths.max() <= b and np.median(lengths) == b
    assert "blocks of 12" not in fam.labels


def test_block_family_says_which_rule_refuses_it():
    rules = [{"kind": "max-run", "length": 1}, {"kind": "forbidden-transition", "first": "a", "then": "c"}]
    study = make_study([10, 10, 10], rules, baseline=2)
    fam = block_designs(study)
    assert not fam.possible and "no block size passes" in fam.note


def test_permuted_blocks_stay_near_the_block_design():
    study = make_study([12, 12, 12, 12], [], baseline=3)
    base = block_designs(study).designs[-1]
    fam = permuted_block_designs(study, base, seed=1, n=10, share=0.1)
    assert len(fam.designs) == 10
    for runs in fam.designs:
        changed = np.count_nonzero(runs[0] != base[0])
        assert 0 < changed <= 0.1 * len(base[0]) + 1
        assert np.array_equal(np.bincount(runs[0]), np.bincount(base[0]))


@pytest.mark.parametrize("q, n", [(2, 5), (3, 3), (4, 3)])
def test_m_sequence_has_the_shift_and_add_property(q, n):
    # Golomb's shift-and-add property of m-sequences, checked in galois' GF(q) arithmetic
    gf = galois.GF(q)
    s = m_sequence(q, n)
    assert len(s) == q**n - 1
    rotations = {tuple(np.roll(s, m)) for m in range(len(s))}
    for k in (1, 3):
        assert tuple(np.asarray(gf(s) + gf(np.roll(s, k))).astype(int)) in rotations


def test_binary_m_sequence_matches_scipys_up_to_shift_and_taps():
    # scipy.signal.max_len_seq builds binary m-sequences independently of galois; both are
    # sequences of period 2^n - 1 with two-valued periodic autocorrelation (-1 off the peak)
    for seq in (m_sequence(2, 6), max_len_seq(6)[0].astype(int)):
        pm = 1 - 2 * seq
        auto = [int(pm @ np.roll(pm, k)) for k in range(1, len(pm))]
        assert set(auto) == {-1}


def test_m_sequence_family_maps_zero_to_the_baseline():
    # GF(4), degree 3: 63 trials, 16 of each condition and 15 of the baseline
    study = make_study([15, 16, 16, 16], [], baseline=0)
    fam = m_sequence_designs(study, seed=0, n_designs=4)
    assert fam.possible
    s = m_sequence(4, 3)
    rotations = {tuple(np.roll(s, m)) for m in range(len(s))}
    for runs in fam.designs:
        assert tuple(runs[0]) in rotations  # baseline is code 0, the rest in order: the mapping is the identity


@pytest.mark.parametrize(
    "counts, why",
    [
        ([10, 10, 10, 10, 10, 10], "not a prime power"),
        ([16, 16, 16, 16], "q^n - 1 trials"),
        ([15, 17, 16, 15], "counts differ"),
    ],
)
def test_m_sequence_family_says_why_not(counts, why):
    study = make_study(counts, [], baseline=0)
    fam = m_sequence_designs(study, seed=0)
    assert not fam.possible and why in fam.note


def test_prime_powers():
    assert [q for q in range(1, 17) if prime_power(q)] == [2, 3, 4, 5, 7, 8, 9, 11, 13, 16]


def test_random_valid_sample_passes_every_rule():
    rules = [{"kind": "max-run", "length": 2}, {"kind": "balanced-transitions", "tolerance": 1}]
    study = make_study([8, 8, 8, 8], rules, baseline=3, runs=2)
    fam = random_valid_designs(study, seed=0, n=30)
    assert len(fam.designs) >= 25
    for runs in fam.designs:
        assert check_runs(study, study.rules, runs) == []
    assert len({tuple(np.concatenate(d)) for d in fam.designs}) == len(fam.designs)  # distinct


def test_compare_prints_families_and_writes_a_plot(tmp_path):
    spec = tmp_path / "s.toml"
    spec.write_text(
        """
[study]
name = "compare demo"
task = "demo"
participants = 1
[[conditions]]
name = "rest"
trials = 15
baseline = true
[[conditions]]
name = "tone"
trials = 16
[[conditions]]
name = "chirp"
trials = 16
[[conditions]]
name = "sweep"
trials = 16
[timing]
tr = 2.0
soa = 2.0
[analysis]
fir_window = 10.0
"""
    )
    plot = tmp_path / "plane.svg"
    runner = CliRunner()
    args = ["compare", str(spec), "--plot", str(plot), "--samples", "20", "--front", "2", "--iterations", "5"]
    result = runner.invoke(app, args)
    assert result.exit_code == 0, result.output
    for name in ("block", "permuted block", "m-sequence", "random valid", "seqsolve front"):
        assert name in result.output
    assert plot.read_text().lstrip().startswith("<?xml")
    again = runner.invoke(app, args)
    assert again.exit_code == 2 and "--force" in again.output
    bad = runner.invoke(app, ["compare", str(spec), "--plot", str(tmp_path / "plane.jpg")])
    assert bad.exit_code == 2 and ".png or .svg" in bad.output


def test_compare_names_missing_families_and_why_and_shows_progress(tmp_path):
    """No repeats and balanced transitions refuse every block design (blocks of 1 repeat the same three
    pairs, larger blocks repeat a condition); 18 trials are no
    3^n - 1, so no m-sequence exists: each gets its reason, in the table's notes and in the JSON."""
    spec = tmp_path / "s.toml"
    spec.write_text(
        """
[study]
name = "missing families"
task = "demo"
participants = 1
[[conditions]]
name = "tone"
trials = 6
[[conditions]]
name = "chirp"
trials = 6
[[conditions]]
name = "sweep"
trials = 6
[timing]
tr = 2.0
soa = 2.0
[[rules]]
kind = "balanced-transitions"
tolerance = 1
[[rules]]
kind = "max-run"
length = 1
"""
    )
    result = CliRunner().invoke(app, ["compare", str(spec), "--samples", "5", "--front", "0"])
    assert result.exit_code == 0, result.output
    assert "block: none valid under the rules: no block size passes the rules" in result.output
    assert "m-sequence: not possible for these counts and run lengths" in result.output
    assert "random valid designs: sample 5 of 5" in result.output  # the progress line (stderr, mixed in here)
