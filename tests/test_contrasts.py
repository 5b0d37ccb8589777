"""Our contrast parser: linear expressions over condition names, never eval."""

import numpy as np
import pytest

from seqsolve.efficiency.contrasts import ContrastSyntaxError, parse_contrast, weight_warning

NAMES = ["gain", "loss", "neutral"]


@pytest.mark.parametrize(
    "text, weights",
    [
        ("gain - loss", [1, -1, 0]),
        ("(gain + loss)/2 - neutral", [0.5, 0.5, -1]),
        ("0.5*gain + 0.5 * loss - neutral", [0.5, 0.5, -1]),
        ("-gain + 2*loss - loss", [-1, 1, 0]),
        ("3 * (gain - neutral) / 3", [1, 0, -1]),
        ("gain", [1, 0, 0]),
    ],
)
def test_parses_linear_expressions(text, weights):
    assert np.allclose(parse_contrast(text, NAMES), weights)


@pytest.mark.parametrize(
    "text, match",
    [
        ("gain * loss", "linear"),
        ("gain / loss", "divide by numbers"),
        ("gain / 0", "zero"),
        ("gain - 1", "constant"),
        ("gain - gain", "weight zero"),
        ("gain loss", "missing an operator"),
        ("__import__('os')", "unexpected"),
        ("gian - loss", "not a modelled condition"),
        ("(gain - loss", "missing"),
    ],
)
def test_rejects_what_is_not_a_contrast(text, match):
    with pytest.raises(ContrastSyntaxError, match=match):
        parse_contrast(text, NAMES)


def test_warns_when_weights_do_not_cancel():
    assert weight_warning("gain - (loss + neutral)", parse_contrast("gain - (loss + neutral)", NAMES), NAMES)
    assert weight_warning("gain - loss", parse_contrast("gain - loss", NAMES), NAMES) is None
    assert weight_warning("gain", parse_contrast("gain", NAMES), NAMES) is None
