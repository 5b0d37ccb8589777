"""The analysis model of a study, resolved to arrays: kernels, contrasts, nuisance settings."""

from __future__ import annotations

import math
import warnings
from dataclasses import dataclass, field

import numpy as np

from seqsolve.efficiency.contrasts import parse_contrast, weight_warning
from seqsolve.efficiency.hrf import sampled_hrf
from seqsolve.errors import Problem, SpecError
from seqsolve.spec import CustomHRF, Study


@dataclass(frozen=True)
class AnalysisSetup:
    """Everything the evaluators need besides the schedule. Times in seconds.

    kernels: shape (n_basis, n_samples) on the fine grid; modelled: condition codes with regressors
    (every condition but the baseline); contrast: shape (n_contrasts, n_modelled). ar1: the AR(1)
    coefficient of the noise; efficiencies are per unit innovation variance (see README, Scoring).
    criterion: "A" (1/trace, not divided by n_contrasts) or "D" (det^(-1/n_contrasts)).
    """

    tr: float
    resolution: float
    kernels: np.ndarray
    sample_offset: float
    high_pass_cutoff: float | None
    drift_degree: int
    ar1: float
    modelled: tuple[int, ...]
    names: tuple[str, ...]
    contrast: np.ndarray
    contrast_labels: tuple[str, ...]
    fir_lags: int
    fir_step: float
    criterion: str = "A"
    notes: tuple[str, ...] = field(default=())

    @property
    def n_basis(self) -> int:
        return self.kernels.shape[0]

    def detection_contrast(self) -> np.ndarray:
        """Contrast over the detection columns (condition x basis); derivative columns weigh 0."""
        c = np.zeros((self.contrast.shape[0], self.contrast.shape[1] * self.n_basis))
        c[:, :: self.n_basis] = self.contrast
        return c

    def estimation_contrast(self) -> np.ndarray:
        """The contrasts applied to every FIR lag: C kron I_lags."""
        return np.kron(self.contrast, np.eye(self.fir_lags))


def named_contrasts(kind: str, names: list[str]) -> tuple[np.ndarray, list[str]]:
    k = len(names)
    if kind == "each-vs-baseline":
        return np.eye(k), [f"{n}" for n in names]
    rows, labels = [], []
    for i in range(k):
        for j in range(i + 1, k):
            w = np.zeros(k)
            w[i], w[j] = 1.0, -1.0
            rows.append(w)
            labels.append(f"{names[i]} - {names[j]}")
    return np.array(rows).reshape(-1, k), labels


#: why detection/estimation scores cannot be computed for a spec without a TR, and what to do
NO_TR_MESSAGE = (
    "detection and estimation are fMRI figures computed on scanner volumes, and the spec gives no TR; "
    "give timing.tr to score an fMRI design (audit and check work without one)"
)


def make_setup(study: Study) -> AnalysisSetup:
    """Resolve the spec's [analysis] section (defaults where it is silent).

    Warns (UserWarning) about contrasts whose weights do not cancel.

    Raises
    ------
    SpecError
        When the spec gives no timing.tr (an EEG/behavioural design has no fMRI analysis to score).
    """
    a = study.spec.analysis
    tr = study.spec.timing.tr
    if tr is None:
        raise SpecError(study.source, [Problem("timing.tr", NO_TR_MESSAGE)])
    base = study.facts.baseline
    modelled = tuple(c for c in range(study.facts.n_conditions) if c != base)
    names = [study.names[c] for c in modelled]
    if isinstance(a.contrasts, str):
        contrast, labels = named_contrasts(a.contrasts, names)
        notes = []
    else:
        contrast = np.array([parse_contrast(t, names) for t in a.contrasts])
        labels = list(a.contrasts)
        notes = [w for t, row in zip(a.contrasts, contrast) if (w := weight_warning(t, row, names))]
        for n in notes:
            warnings.warn(n, UserWarning, stacklevel=2)
    if isinstance(a.hrf, CustomHRF):
        kernels = sampled_hrf(a.resolution, custom=(np.asarray(a.hrf.samples, dtype=float), a.hrf.step))
    else:
        kernels = sampled_hrf(a.resolution, derivative=a.hrf == "double-gamma-derivative")
    step = a.fir_step or tr
    return AnalysisSetup(
        tr=tr,
        resolution=a.resolution,
        kernels=kernels,
        sample_offset=a.sample_offset,
        high_pass_cutoff=a.high_pass_cutoff or None,
        drift_degree=a.drift_degree,
        ar1=a.ar1,
        modelled=modelled,
        names=tuple(names),
        contrast=contrast,
        contrast_labels=tuple(labels),
        fir_lags=max(1, int(math.floor(a.fir_window / step + 1e-9))),
        fir_step=step,
        criterion=a.criterion,
        notes=tuple(notes),
    )
