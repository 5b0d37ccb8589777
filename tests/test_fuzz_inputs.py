"""Hypothesis fuzzing of specs and ordering files: whatever the input, only our errors come out.

Bounded: a fixed number of derandomised examples each (a few seconds), no deadline (machines are shared).
benchmarks/fuzz_inputs.py runs the same mutations by the ten thousand through the whole command line.
"""

from __future__ import annotations

import random
import tomllib

from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from seqsolve.errors import SeqsolveError
from seqsolve.io.tables import read_designs
from seqsolve.spec import load_study, study_from_mapping
from tests.fuzzing import mutate_spec, mutate_table, spec_variant, to_toml
from tests.test_bad_input import BASE, CSV_HEAD, good_rows

FUZZ = settings(max_examples=120, deadline=None, derandomize=True, suppress_health_check=list(HealthCheck))
SPEC = tomllib.loads(BASE)
NAMES = ["gain", "loss", "rest"]


def test_the_toml_writer_round_trips_the_base_spec():
    assert tomllib.loads(to_toml(SPEC)) == SPEC


@FUZZ
@given(st.integers(0, 2**32 - 1))
def test_a_mutated_spec_loads_or_raises_our_error(seed):
    data = mutate_spec(SPEC, random.Random(seed), NAMES)
    try:
        study = study_from_mapping(data, source="fuzzed.toml")
    except SeqsolveError:
        return
    # what loads is usable: finite positive timing (or no TR: an EEG/behavioural spec), counts within the limits
    tr = study.spec.timing.tr
    assert (tr is None or tr > 0) and study.facts.counts.sum() > 0


@FUZZ
@given(st.integers(0, 2**32 - 1))
def test_a_mutated_spec_file_loads_or_raises_our_error(tmp_path_factory, seed):
    path = tmp_path_factory.mktemp("spec") / "fuzzed.toml"
    path.write_bytes(spec_variant(SPEC, random.Random(seed), NAMES).encode("utf-8", errors="replace"))
    try:
        load_study(path)
    except SeqsolveError:
        pass


@FUZZ
@given(st.integers(0, 2**32 - 1), st.booleans())
def test_a_mutated_ordering_file_reads_or_raises_our_error(tmp_path_factory, seed, events):
    study = study_from_mapping(SPEC)
    folder = tmp_path_factory.mktemp("files")
    rng = random.Random(seed)
    if events:
        path = folder / f"sub-01_task-cue_run-{rng.choice([1, 2, 0, 9])}_events.tsv"
        path.write_bytes(mutate_table("onset\tduration\ttrial_type\n0\t2\tgain\n2\t2\tloss\n", rng, NAMES, "\t"))
    else:
        path = folder / "orderings.csv"
        path.write_bytes(mutate_table(CSV_HEAD + good_rows(), rng, NAMES, ","))
    try:
        designs = read_designs(study, [path])
    except SeqsolveError:
        return
    for runs in designs.values():
        for codes, onsets in runs:
            assert codes.min() >= 0 and codes.max() < study.facts.n_conditions
            assert onsets is None or (len(onsets) == len(codes) and (onsets >= 0).all())


@FUZZ
@given(st.text(max_size=300), st.sampled_from(["o.csv", "sub-01_task-cue_run-1_events.tsv"]))
def test_any_text_as_an_ordering_file_reads_or_raises_our_error(tmp_path_factory, text, name):
    study = study_from_mapping(SPEC)
    path = tmp_path_factory.mktemp("text") / name
    path.write_bytes(text.encode("utf-8", errors="surrogatepass"))
    try:
        read_designs(study, [path])
    except SeqsolveError:
        pass


ITEMS_SPEC = """
[study]
name = "items"
task = "items"
participants = 2
runs = 2
[[conditions]]
name = "gain"
trials = 2
[[conditions]]
name = "loss"
trials = 2
[[conditions]]
name = "rest"
trials = 2
baseline = true
[timing]
tr = 2.0
soa = 2.0
[objective]
iterations = 0
[items]
file = "{file}"
rotate = ["gain", "loss"]
[[items.rules]]
kind = "attribute-run"
attribute = "kind"
length = 1
"""
ITEMS = "item,condition,kind\n" + "".join(f"i{n},{('gain', 'loss', '')[n % 3]},{'ab'[n % 2]}\n" for n in range(8))


@FUZZ
@given(st.integers(0, 2**32 - 1), st.booleans())
def test_a_mutated_items_file_loads_or_raises_our_error(tmp_path_factory, seed, tabs):
    from seqsolve.item_assign import assign_items, check_items
    from seqsolve.solve import generate_orderings

    folder = tmp_path_factory.mktemp("items")
    name = "items.tsv" if tabs else "items.csv"
    table = ITEMS.replace(",", "\t") if tabs else ITEMS
    (folder / name).write_bytes(
        mutate_table(table, random.Random(seed), ["gain", "loss", "rest", "i1"], "\t" if tabs else ",")
    )
    (folder / "s.toml").write_text(ITEMS_SPEC.format(file=name))
    try:
        study = load_study(folder / "s.toml")
        for k, p in enumerate(generate_orderings(study)):
            items = assign_items(study.items, k, p.label, p.runs, p.seed)
            assert check_items(study.items, k, p.runs, items) == []
    except SeqsolveError:
        pass
