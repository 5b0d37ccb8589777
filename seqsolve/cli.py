"""The command line: thin typer commands, each one call of the Python API.

Precedence of settings: command line > spec file > built-in default.
Exit codes: 0 success; 1 rules violated, impossible, or not decided in time; 2 unusable input or output
that cannot be written; 3 internal error (a bug in seqsolve); 130 interrupted by Ctrl-C (SIGINT), 143 by
SIGTERM (generate still writes the best designs found before the stop).
"""

from __future__ import annotations

import hashlib
import json
import signal
import sys
import time
from contextlib import contextmanager
from pathlib import Path
from typing import Annotated

import typer

from seqsolve.errors import InternalError, SeqsolveError

EXIT_CODES = (
    "Exit codes: 0 success; 1 rules violated, impossible or not decided in time; 2 unusable input, or output "
    "that cannot be written; 3 a bug in seqsolve; 130 interrupted by Ctrl-C, 143 by SIGTERM (generate still "
    "writes the best designs found so far)."
)

#: what typer raises to end a command (Exit, Abort) or to report a usage error (the ClickException family:
#: click's own while typer depended on click, typer's own copy since it stopped); passed through untouched.
#: Named through typer's public classes, so the command line works with or without click installed.
_USAGE_ERROR = next(c for c in typer.BadParameter.__mro__ if c.__name__ == "ClickException")
_TYPER_ENDINGS = (typer.Exit, typer.Abort, _USAGE_ERROR)

app = typer.Typer(
    name="seqsolve",
    help="Trial orderings that obey your rules by construction, and audits of orderings you already have.\n\n"
    + EXIT_CODES,
    no_args_is_help=True,
    add_completion=False,
    pretty_exceptions_enable=False,
    # plain help: rich markup would take "[analysis]" and "[objective]" (spec sections) for style tags and drop them
    rich_markup_mode=None,
)

SpecArg = Annotated[Path, typer.Argument(help="The study's spec file (TOML).", show_default=False)]
TimeLimit = Annotated[float, typer.Option("--time-limit", help="Seconds of solving allowed per participant.")]


def _fail(exc: SeqsolveError) -> None:
    typer.echo(f"error: {exc}", err=True)
    raise typer.Exit(exc.exit_code)


# ----------------------------------------------------------------------------------------------
# signals and the exit-code contract

_signal = {"received": None}  # the signal that stopped this command, if one did


def _on_signal(signum, frame) -> None:
    """SIGINT and SIGTERM alike: a KeyboardInterrupt in the main process, so the Ctrl-C paths (keep
    the best designs so far, stop the workers) serve both; the exit code then says which it was."""
    _signal["received"] = signum
    raise KeyboardInterrupt


def _interrupted_code() -> int:
    """The shell's convention: 128 + the signal's number (130 for SIGINT, 143 for SIGTERM)."""
    return 128 + (_signal["received"] or signal.SIGINT)


@app.callback()
def _setup(ctx: typer.Context) -> None:
    """Install the signal handlers for the command; the previous ones come back when it ends."""
    _signal["received"] = None
    try:
        before = {s: signal.signal(s, _on_signal) for s in (signal.SIGINT, signal.SIGTERM)}
    except ValueError:  # not the main thread (an embedding program): leave its handlers alone
        return
    ctx.call_on_close(lambda: [signal.signal(s, h) for s, h in before.items()])


def _spec_hash(spec: Path | None) -> str | None:
    """The spec file's hash for a bug report (of its bytes: the study may not have loaded)."""
    try:
        return "sha256:" + hashlib.sha256(spec.read_bytes()).hexdigest() if spec is not None else None
    except (OSError, ValueError):
        return None


@contextmanager
def _guarded(spec: Path | None, display: _StepDisplay | None = None, note: str = "nothing was written"):
    """Every failure within the exit-code contract: our errors 1/2 (3 for InternalError), Ctrl-C 130 and
    SIGTERM 143, and anything else, which is a bug, one line and exit 3 (no traceback)."""
    try:
        yield
    except _TYPER_ENDINGS:
        raise
    except SeqsolveError as exc:
        if display is not None:
            display.end_line()
        if isinstance(exc, InternalError) and exc.spec_hash is None:
            exc.spec_hash = _spec_hash(spec)
        _fail(exc)
    except KeyboardInterrupt:
        if display is not None:
            display.end_line()
        typer.echo(f"interrupted; {note}", err=True)
        raise typer.Exit(_interrupted_code()) from None
    except Exception as exc:  # the contract's last line: anything else is a bug
        if display is not None:
            display.end_line()
        if _signal["received"] is not None:  # e.g. workers killed by the same signal: a consequence, not a bug
            typer.echo(f"interrupted; {note} ({type(exc).__name__} after the signal)", err=True)
            raise typer.Exit(_interrupted_code()) from None
        detail = f"{type(exc).__name__}: {exc}".splitlines()[0] if str(exc) else type(exc).__name__
        _fail(InternalError(detail, _spec_hash(spec)))


def _progress(started: float):
    def show(done: int, total: int, label: str) -> None:
        if done < total:
            typer.echo(
                f"  participant {label} ({done + 1}/{total}) ... {time.perf_counter() - started:.1f} s", err=True
            )

    return show


class _Countdown:
    """'<what> k of N, elapsed, about T s left' on stderr: rewritten in place on a terminal, else a line
    every few seconds (and the first and last), so long runs are never silent and logs stay short."""

    def __init__(self, what: str, every: float = 5.0):
        self.what, self.every, self.tty = what, every, sys.stderr.isatty()
        self.started = time.perf_counter()
        self.last = -1e9

    def __call__(self, done: int, total: int) -> None:
        now = time.perf_counter()
        if done not in (1, total) and now - self.last < (0.2 if self.tty else self.every):
            return
        self.last = now
        spent = now - self.started
        left = spent / done * (total - done) if done else 0.0
        line = f"  {self.what} {done} of {total}, {spent:.1f} s" + (
            f", about {left:.0f} s left" if done < total else ""
        )
        if self.tty:
            typer.echo("\r" + line.ljust(80), err=True, nl=done >= total)
        else:
            typer.echo(line, err=True)


class _StepDisplay:
    """One status line on stderr during the search: rewritten in place on a terminal, else a line
    every few seconds (so logs stay short)."""

    def __init__(self, participants: tuple[str, ...] = ()):
        self.tty = sys.stderr.isatty()
        self.last = 0.0
        self.timed = True  # False for a spec without timing.tr: counterbalance is then the only figure
        self.order = {label: i for i, label in enumerate(participants)}  # "participant k of P" for these
        self.first: float | None = None  # when the participants' searches began
        self.shown = 0  # participants reported done

    def _whose(self, label: str) -> str:
        """'participant 2 of 6 (02), about 40 s left' for a study's participant; the label alone otherwise."""
        if label not in self.order:
            return label
        total = len(self.order)
        text = f"participant {self.order[label] + 1} of {total} ({label})"
        if self.shown and self.first is not None:
            spent = time.perf_counter() - self.first
            text += f", about {_duration(max(0.0, spent / self.shown * (total - self.shown)))} left in all"
        return text

    def __call__(self, p) -> None:
        now = time.perf_counter()
        if not self.tty and now - self.last < 5.0:
            return
        self.last = now
        f = p.best
        parts = (
            ""
            if f is None
            else f"best {f.score:.4f} (counterbalance {f.counterbalance:.3f})"
            if not self.timed
            else (
                f"best {f.score:.4f} (detection {100 * f.detection_vs_block:.0f}% of block, "
                f"estimation {f.estimation_vs_random:.2f}x random)"
            )
        )
        of = "" if p.iterations >= 10**12 else f"/{p.iterations}"  # a search to a budget has no round count
        line = f"  {self._whose(p.participant)}: round {p.iteration}{of}  {p.elapsed:5.1f} s  {parts}"
        if self.tty:
            typer.echo("\r" + line.ljust(140)[:140], err=True, nl=False)
        else:
            typer.echo(line, err=True)

    def end_line(self) -> None:
        if self.tty:
            typer.echo("", err=True)

    def participants(self, done: int, total: int, label: str) -> None:
        """Participants searched so far, with the time left at the pace so far (a line each)."""
        now = time.perf_counter()
        if done == 0 or self.first is None:
            self.first = now
        # the end comes twice with workers or a cluster: after the searches, and after the pass in order
        if done == 0 or done == self.shown:
            return
        self.shown = done
        took = now - self.first
        left = f", about {_duration(took / done * (total - done))} left" if done < total else ""
        line = f"  participant {done} of {total} searched, {_duration(took)} in{left}"
        typer.echo(("\r" + line.ljust(100)) if self.tty else line, err=True)


def _duration(seconds: float) -> str:
    """12.3 s, 4.5 min or 1.2 h."""
    if seconds < 90:
        return f"{seconds:.1f} s"
    return f"{seconds / 60:.1f} min" if seconds < 5400 else f"{seconds / 3600:.1f} h"


@app.command()
def generate(
    spec: SpecArg,
    out: Annotated[Path, typer.Option("-o", "--out", help="Output folder (must be new or empty).")],
    seed: Annotated[int | None, typer.Option(help="Master seed; overrides study.seed.")] = None,
    force: Annotated[bool, typer.Option(help="Replace an existing output folder.")] = False,
    iterations: Annotated[
        int | None,
        typer.Option(
            min=0, max=1_000_000, help="Search rounds per participant (overrides objective.iterations; 0: none)."
        ),
    ] = None,
    budget: Annotated[
        float | None,
        typer.Option(
            min=0,
            help="Seconds of search per participant. Alone: search until it runs out (or the search stalls); "
            "with --iterations: whichever ends first. Results then depend on machine speed.",
        ),
    ] = None,
    front: Annotated[
        int, typer.Option(min=0, max=1000, help="Also write front.tsv: the trade-off at this many weightings.")
    ] = 0,
    workers: Annotated[
        int,
        typer.Option(
            min=1, max=1024, help="Processes searching participants side by side; the designs do not depend on it."
        ),
    ] = 1,
    cluster: Annotated[
        str | None,
        typer.Option(
            help="Search participants on a Dask cluster instead: 'local' (one started on this machine) or a "
            "running scheduler's address (tcp://host:8786). Needs the cluster extra; the designs do not depend on it.",
        ),
    ] = None,
    cluster_workers: Annotated[
        int | None,
        typer.Option(
            min=1,
            max=100_000,
            help="With --cluster local: its worker processes (default: the cores here); with an address: "
            "the workers to wait for before starting.",
        ),
    ] = None,
    time_limit: TimeLimit = 120.0,
    method: Annotated[str, typer.Option(help="Model: auto, counts or positions.")] = "auto",
    onset_files: Annotated[
        bool,
        typer.Option(
            "--onset-files",
            help="Also write onsets/: per run, onset/duration/weight text files per condition and a "
            "multiple-conditions .mat, for analysis packages that do not read BIDS events.",
        ),
    ] = False,
) -> None:
    """Search valid, efficient orderings and schedules for every participant.

    Every ordering obeys every rule (CP-SAT builds them); the search steers toward the spec's [objective]
    (weights of detection, estimation and counterbalancing).

    Ctrl-C or SIGTERM stops the search and writes the best designs found so far, then exits 130 (Ctrl-C)
    or 143 (SIGTERM), so a script can tell a cut-short search from a finished one.

    Example: seqsolve generate examples/reward_cue.toml -o designs/
    """
    from seqsolve.generate import generate as run_generate
    from seqsolve.search import SearchOptions
    from seqsolve.solve import SolveOptions
    from seqsolve.spec import load_study

    if method not in ("auto", "counts", "positions"):
        typer.echo("error: --method must be auto, counts or positions", err=True)
        raise typer.Exit(2)
    if front == 1:
        typer.echo("error: --front needs at least 2 points (or 0 for none)", err=True)
        raise typer.Exit(2)
    _check_seconds("--time-limit", time_limit)
    _check_seconds("--budget", budget)
    if cluster is None and cluster_workers is not None:
        typer.echo("error: --cluster-workers needs --cluster (local, or a scheduler's address)", err=True)
        raise typer.Exit(2)
    if cluster is not None and workers > 1:
        typer.echo("error: give --workers or --cluster, not both (--cluster-workers sizes the cluster)", err=True)
        raise typer.Exit(2)
    started = time.perf_counter()
    display = _StepDisplay()
    with _guarded(spec, display):
        where = _cluster_options(cluster, cluster_workers)
        study = load_study(spec, seed=seed)
        display = _StepDisplay(study.participants)
        display.timed = study.spec.timing.tr is not None
        steps = study.spec.objective.iterations if iterations is None else iterations
        if budget is not None and iterations is None:
            plan = f"search of {budget:g} s per participant"
        elif steps:
            plan = f"search of {steps} rounds per participant" + (f" (at most {budget:g} s)" if budget else "")
        else:
            plan = "no search"
        if where is not None:  # the cluster runs searches only: without one it is not started
            plan += f", on {where.describe()}" if (steps or budget is not None) else " (--cluster not used)"
        typer.echo(
            f"{study.spec.study.name}: {len(study.participants)} participant(s), {study.facts.n_runs} run(s), "
            f"{len(study.rules)} rule(s); {plan}",
            err=True,
        )
        solve = SolveOptions(time_limit=time_limit, method=method)
        designs = run_generate(
            study,
            out,
            force=force,
            options=solve,
            progress=display.participants if (steps or budget is not None) else _progress(started),
            search=SearchOptions(iterations=iterations, budget=budget, solve=solve, workers=workers),
            on_step=display,
            front=front,
            onset_files=onset_files,
            on_note=lambda text: (display.end_line(), typer.echo(f"  {text} ...", err=True)),
            cluster=where,
        )
        display.end_line()
        _report_designs(designs, study, out, started)
    if designs.interrupted or _signal["received"] is not None:
        # the best designs so far were written; a script can still tell a cut-short search from a finished one
        raise typer.Exit(_interrupted_code())


def _cluster_options(address: str | None, workers: int | None):
    """--cluster and --cluster-workers as ClusterOptions (None: no cluster); a bad address exits 2."""
    if address is None:
        return None
    from seqsolve.cluster import ClusterOptions

    return ClusterOptions(address.strip(), workers)


def _check_seconds(option: str, value: float | None) -> None:
    """A time option must be a finite number of seconds (inf or nan would never stop or never start)."""
    if value is not None and not (value == value and 0 <= value <= 1e7):
        typer.echo(f"error: {option} must be a number of seconds from 0 to 10,000,000; got {value}", err=True)
        raise typer.Exit(2)


def _report_designs(designs, study, out: Path, started: float) -> None:
    if designs and designs[0].figures is not None:
        typer.echo(_designs_table(designs, study.spec.timing.tr is not None))
    for note in designs.notes:
        typer.echo(f"note: {note}")
    typer.echo(
        f"wrote {len(designs)} participant design(s) to {out}/ in {time.perf_counter() - started:.1f} s "
        f"({designs[0].method} model); every ordering passed all {len(study.rules)} rule checks"
    )
    extra = f", {out}/front.tsv" if (out / "front.tsv").exists() else ""
    extra += f", {out}/onsets/" if (out / "onsets").exists() else ""
    typer.echo(
        f"  a BIDS dataset skeleton: {out}/dataset_description.json, {out}/sub-*/...events.tsv; "
        f"for stimulus software {out}/stimulus/; {out}/orderings.csv, {out}/manifest.json{extra}; "
        f"to read and share: {out}/report.html"
    )


def _table(head: list[str], rows: list[list[str]]) -> str:
    lines = [head] + rows
    widths = [max(len(row[i]) for row in lines) for i in range(len(head))]
    out = ["  ".join(cell.rjust(w) for cell, w in zip(row, widths)) for row in lines]
    out.insert(1, "  ".join("-" * w for w in widths))
    return "\n".join(out)


def _designs_table(designs, timed: bool = True) -> str:
    """The searched designs' figures; without a TR (timed False) detection and estimation show '-'."""
    head = ["participant", "score", "detection vs block", "estimation vs random", "counterbalance", "rounds", "stopped"]
    rows = []
    for d in designs:
        f, info = d.figures, d.search or {}
        if f is None:
            rows.append([d.label, "-", "-", "-", "-", "0", "not searched"])
            continue
        stopped = info.get("stopped", "")
        stopped = "not reached (first valid design)" if stopped == "not reached" else stopped
        rows.append(
            [
                d.label,
                f"{f.score:.4f}",
                f"{100 * f.detection_vs_block:.1f}%" if timed else "-",
                f"{f.estimation_vs_random:.3f}x" if timed else "-",
                f"{f.counterbalance:.3f}",
                str(info.get("iterations", 0)),
                stopped + (" (rescued)" if "rescued_from" in info else ""),
            ]
        )
    text = _table(head, rows)
    spread = designs.spread()
    w = designs.weights
    formula = (
        f"{w.detection:.2f} x detection vs block + {w.estimation:.2f} x estimation vs random"
        + (f" + {w.counterbalance:.2f} x counterbalance" if w.counterbalance else "")
        if timed
        else "counterbalance (no timing.tr: detection and estimation are not computed)"
    )
    text += f"\nscore = {formula}" + (f"; spread across participants {100 * spread:.1f}%" if spread is not None else "")
    return text


@app.command()
def audit(
    spec: SpecArg,
    files: Annotated[
        list[Path],
        typer.Argument(
            help="orderings.csv and/or BIDS *_events.tsv files, a participants.tsv (counterbalancing), "
            "or an output folder (its orderings.csv and participants.tsv).",
            show_default=False,
        ),
    ],
    as_json: Annotated[bool, typer.Option("--json", help="Print the report as JSON.")] = False,
    rank: Annotated[
        int,
        typer.Option(
            min=0,
            max=100_000,
            help="Rank each design among this many valid designs sampled under the same rules (seeded by the "
            "spec's seed; about a second for 50 where the counts model applies, up to a minute otherwise; 0: no "
            "ranking, no solver).",
        ),
    ] = 50,
) -> None:
    """Check existing orderings against the spec's rules, and a study's counterbalanced assignment
    against its [[counterbalance]] sections (exit 0 valid, 1 violations, 2 bad input).

    Files may hold some of the runs only (e.g. one run of four): the runs present are checked and the
    absent ones named. Each complete design is also ranked: the percent of valid designs, sampled under
    the same rules, that score at or below it on the spec's [objective].

    Example: seqsolve audit examples/reward_cue.toml designs/orderings.csv
    """
    from seqsolve.audit import audit as run_audit
    from seqsolve.spec import load_study

    with _guarded(spec):
        study = load_study(spec)
        report = run_audit(study, files, rank, _Countdown("ranking: valid design"))
    if as_json:
        typer.echo(json.dumps(_audit_json(report), indent=2))
    else:
        _print_audit(study, report)
    raise typer.Exit(0 if report.valid else 1)


def _say_items(study) -> None:
    """What check can say of the items: they are given after the ordering, under these rules."""
    if study.items is None:
        return
    from seqsolve.item_assign import rule_names
    from seqsolve.items import balance_notes

    cat = study.items
    lists = f", in {len(cat.rotate)} lists rotated across participants" if cat.rotate else ""
    typer.echo(f"{len(cat.names)} stimulus item(s){lists}, given to the trials after the ordering is made:")
    for name in rule_names(cat):
        typer.echo(f"  - {name}")
    for note in balance_notes(cat, study.facts, len(study.participants)):
        typer.echo(f"note: {note}")


def _audit_json(report) -> dict:
    return {
        "valid": report.valid,
        "participants": report.participants,
        "absent_runs": report.absent,
        "violations": [v.__dict__ for v in report.violations],
        "ranks": [r.__dict__ for r in report.ranks],
        "notes": report.notes,
    }


def _print_audit(study, report) -> None:
    typer.echo(_audit_scope(study, report))
    for label, runs in report.absent.items():
        typer.echo(f"  participant {label}: run(s) {', '.join(map(str, runs))} not in the files; the others checked")
    for v in report.violations:
        typer.echo(f"  {v.describe()}")
    for note in report.notes:
        typer.echo(f"note: {note}")
    if report.ranks:
        n = report.ranks[0].samples
        typer.echo(f"rank among {n} valid designs sampled under the same rules (score as generate steers by it):")
        for r in report.ranks:
            typer.echo(
                f"  participant {r.participant}: score {r.score:.4f}, above or equal to {r.percentile:.0f}% of them"
            )
    typer.echo("valid: every rule holds" if report.valid else f"{len(report.violations)} violation(s)")


def _audit_scope(study, report) -> str:
    """What audit checked: orderings (rules, counts, timing, items) and/or a counterbalanced assignment."""
    from seqsolve.audit import TIMING_RULE

    n = len(report.participants)
    factors = sum(r.startswith("counterbalance[") for r in report.rules)
    names = [c.name for c in study.spec.counterbalance]
    cb = f"its {len(names)} counterbalanced factor(s) ({', '.join(names)})"
    if TIMING_RULE not in report.rules:
        return f"checked the assignment of {n} participant(s) against {cb}"
    checked = (
        "its trial counts, its timing and its items" if study.items is not None else "its trial counts and its timing"
    )
    head = f"checked {n} participant(s) against the spec's {len(study.rules)} rule(s), {checked}"
    if not factors and study.spec.counterbalance:
        return head + f"; not {cb}: give the output folder or its participants.tsv for that"
    return head + (f", and their assignment against {cb}" if factors else "")


@app.command()
def check(spec: SpecArg, time_limit: TimeLimit = 60.0) -> None:
    """Say whether the rules can all hold; if not, name a smallest set that conflicts.

    It solves for one participant, which settles every participant unless a rule ties participants
    together (participants-differ): the answer then says that part is left to generate.

    Example: seqsolve check examples/reward_cue.toml
    """
    from seqsolve.rules._text import rule_line
    from seqsolve.solve import SolveOptions, check_study
    from seqsolve.spec import load_study

    _check_seconds("--time-limit", time_limit)
    with _guarded(spec):
        study = load_study(spec)
        result = check_study(study, SolveOptions(time_limit=time_limit, explain_time_limit=time_limit))
    if result.feasible:
        typer.echo(
            f"the {len(study.rules)} rule(s) can all hold {_check_scope(study)} "
            f"({result.method} model, {result.seconds:.2f} s):"
        )
        for r, src in zip(study.rules, study.rule_sources):
            typer.echo(f"  - {rule_line(src, r.label, r.sentence(study.facts))}")
        _say_items(study)
        _echo_counterbalance(study)
        raise typer.Exit(0)
    typer.echo(result.explanation.describe())
    raise typer.Exit(1)


@app.command()
def score(
    spec: SpecArg,
    files: Annotated[
        list[Path], typer.Argument(help="orderings.csv and/or BIDS *_events.tsv files.", show_default=False)
    ],
    as_json: Annotated[bool, typer.Option("--json", help="Print every figure as JSON.")] = False,
    references: Annotated[bool, typer.Option(help="Also score block and random designs for comparison.")] = True,
) -> None:
    """Efficiency of orderings for the spec's [analysis]: detection, estimation and sequence figures.

    Example: seqsolve score examples/reward_cue.toml designs/orderings.csv
    """
    import warnings

    from seqsolve.score import score_files
    from seqsolve.spec import load_study

    with _guarded(spec):
        study = load_study(spec)
        with warnings.catch_warnings(record=True) as caught:
            warnings.simplefilter("always")
            rows = score_files(study, files, with_references=references)
    for w in caught:
        typer.echo(f"warning: {w.message}", err=True)
    if as_json:
        typer.echo(json.dumps([r.as_dict() for r in rows], indent=2))
        raise typer.Exit(0)
    typer.echo(_score_table(rows))
    typer.echo(
        "\ndetection: 1/trace(C M^-1 C') of the HRF model's contrasts (criterion A: summed over contrasts, not\n"
        "averaged; D: det^(-1/q)); estimation: the same for the FIR model; noise in units of the AR(1) innovation\n"
        "variance. --json adds the reference values (block design's detection and block size, random estimation).\n"
        "vs block: share of the best block design's detection; vs random: of the mean shuffled ordering's estimation\n"
        "(same counts and timing); vs bound: of the FIR bound where it holds (each-vs-baseline, SOA = TR, no ar1).\n"
        "cb max: largest |observed - ideal| pair count; H: next-trial entropy in bits.\n"
        "HRF min, mean: detection over 12 plausible HRFs (peak 4-7 s, three undershoots); worst HRF: the member\n"
        "giving the minimum, as peak/undershoot latency and undershoot ratio."
    )


def _echo_counterbalance(study) -> None:
    """The [[counterbalance]] sections as sentences, with the study's counts (assignment from its seed)."""
    from seqsolve.counterbalance import assign_study, crossing, sentence

    found = assign_study(study)
    if found:
        typer.echo(f"across the {len(study.participants)} participant(s), from seed {study.spec.study.seed}:")
    for a in found:
        typer.echo(f"  - counterbalance[{a.index + 1}]: {sentence(a)}")
    if crossing(found):
        typer.echo(f"  - {crossing(found)}")


def _check_scope(study) -> str:
    """What check decided, exactly: it solves one participant, which settles every participant unless a
    rule ties participants together (participants-differ), which it leaves to generate."""
    across = [src for r, src in zip(study.rules, study.rule_sources) if r.across_participants]
    n = len(study.participants)
    if not across or n == 1:
        return f"for each of the {n} participant(s) (each has the same rules and counts)"
    return (
        f"for one participant; whether all {n} participants can also meet {', '.join(across)} "
        "(which ties participants together) is not decided by check: generate searches for it"
    )


def _hrf_cells(family: dict | None) -> list[str]:
    """Detection over the HRF family: minimum, mean, and the worst member (peak and undershoot in s)."""
    if family is None:
        return ["-", "-", "-"]
    return [f"{family['min']:.4g}", f"{family['mean']:.4g}", family["worst"].replace(" s, undershoot ", "/")]


def _score_table(rows) -> str:
    head = [
        "participant",
        "run",
        "detection",
        "vs block",
        "estimation",
        "vs random",
        "vs bound",
        "cb max",
        "H bits",
        "max r",
        "HRF min",
        "HRF mean",
        "worst HRF",
    ]

    def pct(v):
        return "-" if v is None else f"{100 * v:.0f}%"

    lines = [head]
    for r in rows:
        lines.append(
            [
                r.participant,
                r.run,
                f"{r.detection:.4g}",
                pct(r.detection_vs_block),
                f"{r.estimation:.4g}",
                pct(r.estimation_vs_random),
                pct(r.estimation_vs_bound),
                f"{r.counterbalance_max:.2f}",
                f"{r.entropy_bits:.2f}",
                f"{r.max_correlation:.2f}",
                *_hrf_cells(r.hrf_family),
            ]
        )
    out = [_table(lines[0], lines[1:])]
    for r in rows:
        for w in r.warnings:
            out.append(f"warning: participant {r.participant} run {r.run}: {w}")
    return "\n".join(out)


@app.command()
def compare(
    spec: SpecArg,
    plot: Annotated[Path | None, typer.Option(help="Also draw the plane to this .png or .svg file.")] = None,
    samples: Annotated[int, typer.Option(min=1, max=100_000, help="Random valid designs sampled from CP-SAT.")] = 200,
    front: Annotated[
        int, typer.Option(min=0, max=1000, help="seqsolve's points, from detection to estimation (0: none).")
    ] = 5,
    iterations: Annotated[
        int | None,
        typer.Option(min=0, max=1_000_000, help="Search steps per front point (default: objective.iterations)."),
    ] = None,
    force: Annotated[bool, typer.Option(help="Replace an existing plot file.")] = False,
    as_json: Annotated[bool, typer.Option("--json", help="Print every point as JSON.")] = False,
) -> None:
    """Block, permuted block, m-sequence and random designs beside seqsolve's trade-off front.

    Each family is built under the spec's counts, timing and rules where they allow it; the table
    says which could not be built and why. Scores use the first participant's timing.

    Example: seqsolve compare examples/reward_cue.toml --plot plane.png
    """
    from seqsolve.compare import check_plot_path
    from seqsolve.compare import compare as run_compare
    from seqsolve.compare import plot as draw
    from seqsolve.search import SearchOptions
    from seqsolve.spec import load_study

    if front == 1:
        typer.echo("error: --front needs at least 2 points (or 0 for none)", err=True)
        raise typer.Exit(2)
    display = _StepDisplay()
    with _guarded(spec, display):
        if plot is not None:
            check_plot_path(plot, force)
        study = load_study(spec)
        countdown = _Countdown("random valid designs: sample")
        result = run_compare(study, samples, front, SearchOptions(iterations=iterations), display, countdown)
        display.end_line()
        if plot is not None:
            draw(result, plot, study.spec.study.name)
    if as_json:
        typer.echo(
            json.dumps(
                {
                    "references": result.references.as_dict(),
                    "families": result.summary(),
                    "points": [p.__dict__ for p in result.points],
                },
                indent=2,
            )
        )
        raise typer.Exit(0)

    def fmt(v, kind):
        if v is None:
            return "-"
        return f"{100 * v:.1f}%" if kind == "d" else f"{v:.3f}x"

    rows = [
        [
            r["family"],
            str(r["designs"]),
            fmt(r["best_detection"], "d"),
            fmt(r["mean_detection"], "d"),
            fmt(r["best_estimation"], "e"),
            fmt(r["mean_estimation"], "e"),
        ]
        for r in result.summary()
    ]
    head = ["family", "designs", "best detection", "mean detection", "best estimation", "mean estimation"]
    typer.echo(_table(head, rows))
    for r in result.summary():
        typer.echo(f"  {r['family']}: " + (f"{r['absent']}: " if r["absent"] else "") + r["note"])
    ref = result.references
    typer.echo(
        f"\ndetection as a share of the best block design's (blocks of {ref.block_size}, baseline "
        f"{ref.block_placement}, rules or not); "
        "estimation as a multiple of the mean random ordering's; same counts and timing."
    )
    if plot is not None:
        typer.echo(f"wrote {plot}")


@app.command()
def report(
    folder: Annotated[Path, typer.Argument(help="An output folder written by generate.", show_default=False)],
    force: Annotated[bool, typer.Option(help="Replace an existing report.html.")] = False,
) -> None:
    """(Re)build FOLDER/report.html: one self-contained HTML page (pictures inline, no network) of the rules,
    each participant's figures, a design matrix, transition counts and the detection/estimation plane.

    It reads only the folder: manifest.json, orderings.csv, front.tsv (generate --front) and compare.json
    (`seqsolve compare SPEC --json > FOLDER/compare.json`) where present.

    Example: seqsolve report designs/ --force
    """
    from seqsolve.report import write_report

    with _guarded(None):
        path = write_report(folder, force)
    typer.echo(f"wrote {path}")


@app.command()
def schema() -> None:
    """Print the JSON Schema of the spec file (for editor completion and validation)."""
    from seqsolve.spec import spec_json_schema

    typer.echo(json.dumps(spec_json_schema(), indent=2))


def main() -> None:  # pragma: no cover - entry point
    app()


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
