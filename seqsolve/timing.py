"""From ordering to schedule: onsets and durations in seconds, jittered gaps, run length in volumes."""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np

from seqsolve.errors import Problem, SpecError
from seqsolve.spec import ChoiceGap, ExponentialGap, FixedGap, Study, Timing, UniformGap


@dataclass(frozen=True)
class RunSchedule:
    """One run: condition codes, onsets and durations (seconds), its length and volume count
    (n_volumes and tr are None for a spec without timing.tr: an EEG/behavioural run has no volumes)."""

    codes: np.ndarray
    onsets: np.ndarray
    durations: np.ndarray
    length: float
    n_volumes: int | None
    tr: float | None


def trial_durations(study: Study) -> np.ndarray:
    """Duration in seconds of each condition's trials, shape (n_conditions,)."""
    t = study.spec.timing
    default = t.trial_duration if t.trial_duration is not None else t.soa
    return np.array([c.duration if c.duration is not None else default for c in study.spec.conditions], dtype=float)


def make_schedules(
    study: Study, runs: list[np.ndarray], seed: int, gaps: list[np.ndarray] | None = None
) -> list[RunSchedule]:
    """Schedules of one participant's runs; deterministic given seed.

    gaps: per run, the gaps between trials (seconds) to use instead of drawing them from the seed,
    e.g. gaps rearranged by the search (see draw_gaps); ignored under a fixed soa.

    Raises
    ------
    SpecError
        When the trials cannot fit the declared run length, naming the timing fields.
    """
    durs = trial_durations(study)
    given = gaps if gaps is not None and study.spec.timing.soa is None else [None] * len(runs)
    return [
        _schedule(study, np.asarray(seq), durs, np.random.default_rng([seed, r, 1]), g)
        for r, (seq, g) in enumerate(zip(runs, given))
    ]


def draw_gaps(study: Study, runs: list[np.ndarray], seed: int) -> list[np.ndarray] | None:
    """The gaps make_schedules would draw for these runs (None under a fixed soa).

    They depend on the runs' trial counts and durations only, not on the order of the trials, so a
    search may permute them within a run and keep both the declared distribution and the run length.
    """
    if study.spec.timing.soa is not None:
        return None
    return [np.diff(s.onsets) - s.durations[:-1] for s in make_schedules(study, runs, seed)]


def jitter_free(study: Study) -> bool:
    """True when every gap is the same, so there is no jitter to rearrange."""
    t = study.spec.timing
    return t.soa is not None or isinstance(t.iti, FixedGap) or t.iti is None


def _schedule(
    study: Study, codes: np.ndarray, durs: np.ndarray, rng: np.random.Generator, gaps: np.ndarray | None = None
) -> RunSchedule:
    t: Timing = study.spec.timing
    n = len(codes)
    d = durs[codes]
    fixed_length = None if t.volumes is None else t.volumes * t.tr
    if t.soa is not None:
        if (d > t.soa + 1e-9).any():
            worst = study.names[int(codes[np.argmax(d)])]
            raise SpecError(
                study.source, [Problem("timing.soa", f"trials of '{worst}' last longer than the soa ({t.soa:g} s)")]
            )
        onsets = t.lead_in + t.soa * np.arange(n)
    else:
        if gaps is None:
            gaps = jitter_gaps(t, n - 1, rng)
            if fixed_length is not None:
                target = fixed_length - t.lead_in - d.sum() - t.lead_out
                gaps = _fit_total(gaps, target, t, rng, study.source)
        onsets = t.lead_in + np.concatenate([[0.0], np.cumsum(d[:-1] + np.asarray(gaps))])
    end = float(onsets[-1] + d[-1] + t.lead_out) if n else t.lead_in + t.lead_out
    if fixed_length is not None:
        if end > fixed_length + 1e-6:
            need = math.ceil(end / t.tr - 1e-9)
            raise SpecError(
                study.source,
                [
                    Problem(
                        "timing.volumes",
                        f"the trials need {end:g} s ({need} volumes) but the run has {t.volumes} volumes",
                    )
                ],
            )
        end = fixed_length
    return RunSchedule(codes, np.round(onsets, 6), d, end, _volumes(t, end), t.tr)


def _volumes(t: Timing, end: float) -> int | None:
    """Volumes of a run ending at end seconds: the declared count, enough to cover it, or None without a TR."""
    if t.volumes is not None:
        return int(t.volumes)
    return None if t.tr is None else int(math.ceil(end / t.tr - 1e-9))


def jitter_gaps(t: Timing, n: int, rng: np.random.Generator) -> np.ndarray:
    """n gaps whose empirical distribution matches the declared one, on the grid, in random order.

    Quantiles at (i + 1/2)/n are used instead of random draws, so the declared distribution is met
    as closely as n values allow; the seed only decides their order.
    """
    gap = t.iti
    if n <= 0:
        return np.zeros(0)
    u = (np.arange(n) + 0.5) / n
    if isinstance(gap, FixedGap):
        vals = np.full(n, gap.value)
    elif isinstance(gap, UniformGap):
        vals = gap.min + u * (gap.max - gap.min)
    elif isinstance(gap, ExponentialGap):
        span = 1.0 - math.exp(-(gap.max - gap.min) / gap.mean)
        vals = gap.min - gap.mean * np.log1p(-u * span)
    elif isinstance(gap, ChoiceGap):
        vals = np.repeat(gap.values, _apportion(gap.weights or [1.0] * len(gap.values), n))
    else:  # pragma: no cover - the spec union has no other members
        raise TypeError(gap)
    if not isinstance(gap, ChoiceGap):
        vals = np.round(vals / t.grid) * t.grid
    return rng.permutation(vals)


def _apportion(weights: list[float], n: int) -> np.ndarray:
    """Integer counts proportional to weights summing to n (largest remainder)."""
    w = np.asarray(weights, dtype=float)
    raw = w / w.sum() * n
    out = np.floor(raw).astype(int)
    order = np.argsort(-(raw - out), kind="stable")
    out[order[: n - out.sum()]] += 1
    return out


def _gap_range(t: Timing) -> tuple[float, float]:
    g = t.iti
    if isinstance(g, FixedGap):
        return g.value, g.value
    if isinstance(g, ChoiceGap):
        return min(g.values), max(g.values)
    return g.min, g.max


def _fit_total(gaps: np.ndarray, target: float, t: Timing, rng: np.random.Generator, source: str) -> np.ndarray:
    """Nudge gaps by grid steps, within the declared range, until they sum to target exactly."""
    lo, hi = _gap_range(t)
    n = len(gaps)
    if not n * lo - 1e-6 <= target <= n * hi + 1e-6:
        raise SpecError(
            source,
            [
                Problem(
                    "timing.volumes",
                    f"the gaps must add up to {target:g} s to fill the run, but {n} gaps of "
                    f"{lo:g} to {hi:g} s add up to {n * lo:g} to {n * hi:g} s; change volumes, the trial counts or the iti",
                )
            ],
        )
    steps = round((target - gaps.sum()) / t.grid)
    gaps = gaps.copy()
    while steps != 0:
        sign = 1 if steps > 0 else -1
        room = (gaps + sign * t.grid <= hi + 1e-9) & (gaps + sign * t.grid >= lo - 1e-9)
        idx = np.flatnonzero(room)
        if idx.size == 0:
            break
        pick = rng.choice(idx, size=min(abs(steps), idx.size), replace=False)
        gaps[pick] += sign * t.grid
        steps -= sign * pick.size
    residue = target - gaps.sum()
    if abs(residue) > 1e-6:
        # the target is off the grid: the last gap takes the remainder, within range if it can
        gaps[np.argmax(gaps) if residue < 0 else np.argmin(gaps)] += residue
    return gaps


def schedule_from_onsets(study: Study, codes: np.ndarray, onsets: np.ndarray) -> RunSchedule:
    """A schedule with given onsets (seconds), e.g. read from a file; durations from the spec."""
    t = study.spec.timing
    d = trial_durations(study)[codes]
    end = float(onsets[-1] + d[-1] + t.lead_out) if len(codes) else t.lead_in + t.lead_out
    length = t.volumes * t.tr if t.volumes is not None else end
    return RunSchedule(np.asarray(codes), np.asarray(onsets, dtype=float), d, max(length, end), _volumes(t, end), t.tr)
