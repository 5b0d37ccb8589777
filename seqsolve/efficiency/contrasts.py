"""Contrast expressions over condition names, parsed by a small recursive-descent parser (never eval).

Grammar:  expr := term (('+' | '-') term)* ; term := factor (('*' | '/') factor)* ;
          factor := number | name | '(' expr ')' | ('+' | '-') factor
Every expression must be linear in the condition names.
"""

from __future__ import annotations

import re
from dataclasses import dataclass

import numpy as np

MAX_DEPTH = 50  # nested parentheses or signs; a contrast nests two or three (the parser recurses per level)
MAX_CHARS = 10_000  # longer texts are not contrasts (the spec allows 1,000)
_TOKEN = re.compile(r"\s*(?:(\d+\.\d*|\.\d+|\d+)|([A-Za-z][A-Za-z0-9_]*)|(.))")


class ContrastSyntaxError(ValueError):
    """The expression cannot be read; the message says where."""


@dataclass
class _Linear:
    weights: np.ndarray  # per condition
    constant: float


def _tokens(text: str) -> list[tuple[str, str]]:
    out = []
    pos = 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None or m.end() == pos:
            break
        num, name, sym = m.groups()
        if num is not None:
            out.append(("num", num))
        elif name is not None:
            out.append(("name", name))
        elif sym is not None and sym.strip():
            if sym not in "+-*/()":
                raise ContrastSyntaxError(f"unexpected '{sym}' in '{text}'; use names, numbers, + - * / and ( )")
            out.append(("sym", sym))
        pos = m.end()
    return out


class _Parser:
    def __init__(self, text: str, names: list[str]):
        self.text, self.names = text, names
        if len(text) > MAX_CHARS:
            raise ContrastSyntaxError(f"a contrast of {len(text):,} characters; at most {MAX_CHARS:,} are read")
        self.toks = _tokens(text)
        self.i = 0
        self.depth = 0

    def peek(self):
        return self.toks[self.i] if self.i < len(self.toks) else ("end", "")

    def take(self):
        tok = self.peek()
        self.i += 1
        return tok

    def expr(self) -> _Linear:
        left = self.term()
        while self.peek() in (("sym", "+"), ("sym", "-")):
            op = self.take()[1]
            right = self.term()
            sign = 1.0 if op == "+" else -1.0
            left = _Linear(left.weights + sign * right.weights, left.constant + sign * right.constant)
        return left

    def term(self) -> _Linear:
        left = self.factor()
        while self.peek() in (("sym", "*"), ("sym", "/")):
            op = self.take()[1]
            right = self.factor()
            if op == "*":
                if left.weights.any() and right.weights.any():
                    raise ContrastSyntaxError(f"'{self.text}' multiplies two conditions; a contrast must be linear")
                if left.weights.any():
                    left = _Linear(left.weights * right.constant, left.constant * right.constant)
                else:
                    left = _Linear(right.weights * left.constant, left.constant * right.constant)
            else:
                if right.weights.any():
                    raise ContrastSyntaxError(f"'{self.text}' divides by a condition; divide by numbers only")
                if right.constant == 0:
                    raise ContrastSyntaxError(f"'{self.text}' divides by zero")
                left = _Linear(left.weights / right.constant, left.constant / right.constant)
        return left

    def factor(self) -> _Linear:
        self.depth += 1
        try:
            if self.depth > MAX_DEPTH:
                raise ContrastSyntaxError(f"parentheses or signs nested more than {MAX_DEPTH} deep in a contrast")
            return self._factor()
        finally:
            self.depth -= 1

    def _factor(self) -> _Linear:
        kind, value = self.take()
        zero = np.zeros(len(self.names))
        if kind == "num":
            return _Linear(zero, float(value))
        if kind == "name":
            if value not in self.names:
                raise ContrastSyntaxError(
                    f"'{value}' in '{self.text}' is not a modelled condition; modelled: {', '.join(self.names)}"
                )
            w = zero.copy()
            w[self.names.index(value)] = 1.0
            # allow '2 gain' as '2 * gain'? no: implicit products hide typos
            return _Linear(w, 0.0)
        if (kind, value) == ("sym", "("):
            inner = self.expr()
            if self.take() != ("sym", ")"):
                raise ContrastSyntaxError(f"missing ')' in '{self.text}'")
            return inner
        if (kind, value) in (("sym", "-"), ("sym", "+")):
            inner = self.factor()
            return inner if value == "+" else _Linear(-inner.weights, -inner.constant)
        shown = value or "the end"
        raise ContrastSyntaxError(f"unexpected {shown} in '{self.text}'")


def parse_contrast(text: str, names: list[str]) -> np.ndarray:
    """Weights over `names` of a contrast expression such as '(gain + loss)/2 - neutral'.

    Raises
    ------
    ContrastSyntaxError
        When the text is not a linear expression of known names.
    """
    p = _Parser(text, list(names))
    lin = p.expr()
    if p.peek()[0] != "end":
        raise ContrastSyntaxError(f"unexpected '{p.peek()[1]}' in '{text}' (missing an operator?)")
    if lin.constant != 0:
        raise ContrastSyntaxError(f"'{text}' has a constant term; a contrast weighs conditions only")
    if not lin.weights.any():
        raise ContrastSyntaxError(f"'{text}' gives every condition weight zero")
    return lin.weights


def weight_warning(text: str, weights: np.ndarray, names: list[str]) -> str | None:
    """A warning when a difference's weights do not cancel (e.g. 'a - (b + c)' for 'a - (b + c)/2')."""
    pos, neg = weights[weights > 0].sum(), -weights[weights < 0].sum()
    if pos > 0 and neg > 0 and not np.isclose(pos, neg):
        return (
            f"contrast '{text}': positive weights sum to {pos:g} and negative to {neg:g}; "
            "a comparison usually has weights that cancel (e.g. divide a sum by its number of terms)"
        )
    return None
