"""Mutations of specs and ordering files for fuzzing (tests/test_fuzz_inputs.py, benchmarks/fuzz_inputs.py).

Each mutation draws from a random.Random, so a seed repeats a whole run.
"""

from __future__ import annotations

import json
import math
import random

INF = math.inf
HOSTILE = [
    0, -1, 1, 2, 3, 7, 1000, 10**6, 10**9, 2**31, 2**62, 2**63 - 1, -(2**63),
    1e30, 1e300, -1e300, 1e-300, 1e-6, 0.5, INF, -INF, math.nan, True, False,
    "", " ", "x", "a-b", "x\x00y", "\u00e9", "x" * 100_000, "(" * 1000 + "a" + ")" * 1000,
    "../../../../tmp/x", "/etc/passwd", "standard", "x\x00.toml", "max-run", "choice",
    [], [0], [INF, 1], [[[]]], [1e300], {}, {"kind": "max-run"}, {"kind": "max-run", "length": 2**62},
    {"distribution": "choice", "values": [1e300], "weights": [INF]}, {"samples": [0, math.nan], "step": 0.5},
]  # fmt: skip
MILD = [1, 2, 3, 4, 5, 8, 12, 20, 0.5, 1.0, 1.5, 2.0, 2.5, 3.0, 30.0, 0.1, 0.25, "A", "D", "first", "last"]
FIELD_VALUES = [
    "inf", "-inf", "nan", "NaN", "-1", "0", "3e9", "1e308", "", " ", "x" * 200_000, "y" * 1000,
    "\x00", "\u00e9", "01", "99999999999999999999", "1.5", "1e-300", "0x10", "1_000", '"', "'",
]  # fmt: skip


# ----------------------------------------------------------------------------------------------
# TOML out (a small writer: the standard library reads TOML but does not write it)


def _key(k: str) -> str:
    return json.dumps(k, ensure_ascii=False)


def _value(v) -> str:
    if isinstance(v, bool):
        return "true" if v else "false"
    if isinstance(v, int):
        return str(v)
    if isinstance(v, float):
        return "nan" if v != v else ("inf" if v == INF else "-inf" if v == -INF else repr(v))
    if isinstance(v, str):
        return json.dumps(v, ensure_ascii=False)
    if isinstance(v, list):
        return "[" + ", ".join(_value(x) for x in v) + "]"
    if isinstance(v, dict):
        return "{ " + ", ".join(f"{_key(k)} = {_value(x)}" for k, x in v.items()) + " }"
    raise TypeError(type(v))


def to_toml(data: dict) -> str:
    """TOML text of a dict: scalars first, then [tables] and [[arrays of tables]]."""
    lines, tables = [], []
    for k, v in data.items():
        if isinstance(v, dict):
            tables.append((k, v, False))
        elif isinstance(v, list) and v and all(isinstance(x, dict) for x in v):
            tables.append((k, v, True))
        else:
            lines.append(f"{_key(k)} = {_value(v)}")
    for k, v, many in tables:
        for item in v if many else [v]:
            lines.append(f"\n[[{_key(k)}]]" if many else f"\n[{_key(k)}]")
            lines += [f"{_key(a)} = {_value(b)}" for a, b in item.items()]
    return "\n".join(lines) + "\n"


# ----------------------------------------------------------------------------------------------
# specs


def _paths(node, prefix=()):
    """Every (path, value) inside a parsed spec, containers included."""
    yield prefix, node
    if isinstance(node, dict):
        for k, v in node.items():
            yield from _paths(v, prefix + (k,))
    elif isinstance(node, list):
        for i, v in enumerate(node):
            yield from _paths(v, prefix + (i,))


def _parent(data, path):
    for part in path[:-1]:
        data = data[part]
    return data


def mutate_spec(data: dict, rng: random.Random, names: list[str]) -> dict:
    """One to three random edits of a parsed spec: a hostile value, a deleted or an added key."""
    data = json.loads(json.dumps(data))  # a deep copy (parsed TOML holds no inf or nan)
    for _ in range(rng.choice([1, 1, 1, 2, 3])):
        spots = [p for p, _ in _paths(data) if p]
        if not spots:
            break
        path = rng.choice(spots)
        parent = _parent(data, path)
        roll = rng.random()
        if roll < 0.35:
            parent[path[-1]] = rng.choice(HOSTILE + names)
        elif roll < 0.7:
            parent[path[-1]] = rng.choice(MILD + names)
        elif roll < 0.85 and isinstance(parent, dict):
            del parent[path[-1]]
        elif isinstance(parent, dict):
            parent[rng.choice(["extra", "trials", "kind", "include", "x" * 300])] = rng.choice(HOSTILE)
        elif isinstance(parent, list):
            parent.append(rng.choice(parent))
    return data


def mutate_text(text: str, rng: random.Random) -> str:
    """A byte-level slip in TOML or table text: a cut, a repeat, a stray character."""
    if not text:
        return text
    i = rng.randrange(len(text))
    roll = rng.random()
    if roll < 0.3:
        return text[:i]
    if roll < 0.6:
        j = min(len(text), i + rng.randint(1, 200))
        return text[:j] + text[i:j] * rng.randint(1, 5) + text[j:]
    return text[:i] + rng.choice(["[", "]", "=", '"', "\n", ",", "\t", "\x00", "\u00e9", "{"]) + text[i:]


def spec_variant(data: dict, rng: random.Random, names: list[str]) -> str:
    """A mutated spec as TOML text (now and then slipped at the text level too)."""
    text = to_toml(mutate_spec(data, rng, names))
    return mutate_text(text, rng) if rng.random() < 0.15 else text


# ----------------------------------------------------------------------------------------------
# ordering files


def mutate_table(text: str, rng: random.Random, names: list[str], delimiter: str) -> bytes:
    """A mutated orderings.csv or events.tsv, as bytes (some not UTF-8)."""
    lines = text.splitlines()
    for _ in range(rng.randint(1, 3)):
        roll = rng.random()
        i = rng.randrange(len(lines)) if lines else 0
        if roll < 0.55 and lines:
            cells = lines[i].split(delimiter)
            j = rng.randrange(len(cells))
            cells[j] = rng.choice(FIELD_VALUES + names)
            lines[i] = delimiter.join(cells)
        elif roll < 0.65 and lines:
            del lines[i]
        elif roll < 0.75 and lines:
            lines.insert(i, lines[rng.randrange(len(lines))])
        elif roll < 0.8:
            lines = lines[:1]
        elif roll < 0.9:
            lines = [mutate_text("\n".join(lines), rng)]
        elif lines:
            k = rng.randrange(len(lines))
            lines[i], lines[k] = lines[k], lines[i]
    out = "\n".join(lines) + ("\n" if rng.random() < 0.9 else "")
    encoding = rng.choices(["utf-8", "latin-1", "utf-16", "utf-8-sig"], weights=[85, 5, 5, 5])[0]
    data = out.encode(encoding, errors="replace")
    if rng.random() < 0.05:
        k = rng.randrange(len(data) + 1)
        data = data[:k] + bytes(rng.randrange(256) for _ in range(rng.randint(1, 8))) + data[k:]
    return data
