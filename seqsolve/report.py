"""The HTML report of an output folder: one self-contained file (pictures inline as data: URIs, no network).

It is built from the folder's files alone (manifest.json, orderings.csv, and front.tsv or compare.json
where present), so `generate` writes it with the folder and `seqsolve report DIR` rebuilds it later.
Pictures are drawn by seqsolve.plots (matplotlib on Agg, imported on first use).
"""

from __future__ import annotations

import base64
import csv
import html
import io
import json
from collections.abc import Mapping
from pathlib import Path

import numpy as np

from seqsolve.errors import InputError, OutputExistsError, Problem
from seqsolve.plots import Cloud, FrontMark, clouds_of, plane_figure, png_bytes, pyplot
from seqsolve.rules._text import rule_line

REPORT_NAME = "report.html"
#: files the report reads from an output folder (the first is required)
READS = ("manifest.json", "orderings.csv", "front.tsv", "compare.json")
#: transition heat maps shown (one per participant, the first ones); the caption says how many are left out
MAX_HEAT_MAPS = 24

STYLE = """
body{font-family:system-ui,sans-serif;max-width:960px;margin:2em auto;padding:0 1em;color:#222}
table{border-collapse:collapse;font-size:13px;margin:.5em 0}
td,th{border-bottom:1px solid #ddd;padding:3px 8px;text-align:right}
th:first-child,td:first-child{text-align:left}
tr.summary td{font-style:italic;background:#f6f6f6}
img{max-width:100%;height:auto;display:block;margin:.5em 0}
.caption,.note{font-size:13px;color:#555}
code{background:#f3f3f3;padding:0 3px}
.maps{display:flex;flex-wrap:wrap;gap:14px}
table.heat td,table.heat th{border:1px solid #fff;padding:2px 6px;text-align:center;font-size:12px}
table.heat caption{font-size:12px;color:#555}
"""


# ----------------------------------------------------------------------------------------------
# reading the folder


def read_output_folder(folder: str | Path) -> dict[str, str]:
    """{file name: text} of the files the report reads (READS); the optional ones only if present.

    Raises
    ------
    InputError
        When the folder has no manifest.json (not a generate output folder), or a file is unreadable.
    """
    folder = Path(folder)
    if not (folder / READS[0]).is_file():
        raise InputError(
            str(folder), [Problem(READS[0], "not found; give a folder written by `seqsolve generate -o FOLDER`")]
        )
    out = {}
    for name in READS:
        path = folder / name
        if path.is_file():
            try:
                out[name] = path.read_text(encoding="utf-8")
            except (OSError, UnicodeDecodeError) as exc:
                raise InputError(
                    str(path), [Problem("", f"cannot be read ({exc}); is it a seqsolve output?")]
                ) from None
    return out


def _json(files: Mapping[str, str | bytes], name: str) -> dict | None:
    if name not in files:
        return None
    try:
        return json.loads(files[name])
    except json.JSONDecodeError as exc:
        raise InputError(
            name, [Problem(f"line {exc.lineno}", f"not valid JSON ({exc.msg}); regenerate the file")]
        ) from None


def _orderings(text: str) -> dict[str, dict[int, list[tuple[str, float, float]]]]:
    """orderings.csv as {participant: {run: [(condition, onset s, duration s), ...]}} in file order."""
    out: dict[str, dict[int, list]] = {}
    for i, row in enumerate(csv.DictReader(io.StringIO(text)), start=2):
        try:
            trial = (row["condition"], float(row["onset"]), float(row["duration"]))
            out.setdefault(row["participant"], {}).setdefault(int(row["run"]), []).append(trial)
        except (KeyError, TypeError, ValueError):
            raise InputError(
                "orderings.csv", [Problem(f"line {i}", "needs participant, run, condition, onset and duration")]
            ) from None
    return out


# ----------------------------------------------------------------------------------------------
# the pictures


def _img(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


def hrf_kernels(analysis: dict) -> tuple[np.ndarray, float]:
    """The analysis' response kernels (n_basis, n_samples) and their grid step in seconds, from the
    manifest's [analysis] (seqsolve.efficiency.hrf, as the scores use them)."""
    from seqsolve.efficiency.hrf import sampled_hrf

    res = float(analysis.get("resolution", 0.1))
    hrf = analysis.get("hrf", "double-gamma")
    if isinstance(hrf, dict):
        return sampled_hrf(res, custom=(np.asarray(hrf["samples"], float), float(hrf["step"]))), res
    return sampled_hrf(res, derivative=hrf == "double-gamma-derivative"), res


def design_matrix(
    runs: dict[int, list], volumes: list[int], tr: float, analysis: dict, modelled: list[str]
) -> np.ndarray:
    """One participant's task regressors, runs stacked: shape (sum of volumes, conditions x basis).

    Each condition's trials as boxcars on the analysis grid (onset and duration rounded to it), convolved
    with each kernel and read at every volume (sample_offset seconds into the TR). A picture, not the
    scores' model: no drifts, high-pass or prewhitening."""
    kernels, res = hrf_kernels(analysis)
    offset = float(analysis.get("sample_offset", 0.0))
    blocks = []
    for r, n_vol in zip(sorted(runs), volumes):
        n_grid = int(np.ceil(n_vol * tr / res)) + 1
        reads = np.minimum(np.round((np.arange(n_vol) * tr + offset) / res).astype(int), n_grid - 1)
        cols = []
        for name in modelled:
            box = np.zeros(n_grid)
            for cond, onset, dur in runs[r]:
                if cond == name:
                    a = int(round(onset / res))
                    box[a : a + max(1, int(round(dur / res)))] = 1.0
            # kernels have unit area (sum x res = 1), so a sustained block reaches a plateau of 1
            cols += [res * np.convolve(box, k)[:n_grid][reads] for k in kernels]
        blocks.append(np.column_stack(cols))
    return np.vstack(blocks)


def _design_matrix_png(x: np.ndarray, labels: list[str], run_volumes: list[int]) -> bytes:
    plt = pyplot()
    peak = np.abs(x).max(axis=0)
    shown = x / np.where(peak > 0, peak, 1.0)  # each column to its largest value: common practice in these pictures
    fig, ax = plt.subplots(figsize=(1.2 + 0.55 * x.shape[1], 5.0))
    ax.imshow(shown, aspect="auto", cmap="gray", interpolation="nearest", vmin=min(0.0, shown.min()), vmax=1.0)
    ax.set_xticks(range(len(labels)), labels, rotation=45, ha="right", fontsize=8)
    for edge in np.cumsum(run_volumes)[:-1]:
        ax.axhline(edge - 0.5, color="tab:red", lw=0.8)
    ax.set_ylabel("volume (runs stacked; red lines: run breaks)", fontsize=8)
    fig.tight_layout()
    return png_bytes(fig)


def transition_counts(runs: dict[int, list], names: list[str]) -> np.ndarray:
    """How often condition b directly follows condition a within a run, summed over runs: (K, K)."""
    code = {n: i for i, n in enumerate(names)}
    out = np.zeros((len(names), len(names)), dtype=int)
    for trials in runs.values():
        seq = [code[c] for c, _, _ in trials]
        np.add.at(out, (seq[:-1], seq[1:]), 1)
    return out


def _heat_colour(share: float) -> str:
    """A cell's background: white (0) to dark blue (the largest count), as a CSS rgb()."""
    low, high = np.array([255, 255, 255]), np.array([31, 78, 140])
    r, g, b = (low + (high - low) * share).round().astype(int)
    return f"rgb({r},{g},{b})"


def _heat_map_table(label: str, counts: np.ndarray, names: list[str], top: int) -> str:
    """One participant's transition counts as an HTML table whose cells are shaded by count (no picture
    to load: exact numbers, and fast to build)."""
    head = "".join(f"<th>{html.escape(n)}</th>" for n in names)
    rows = []
    for name, row in zip(names, counts):
        cells = "".join(
            f'<td style="background:{_heat_colour(v / top)};color:{"#fff" if v > 0.55 * top else "#222"}">{v}</td>'
            for v in row
        )
        rows.append(f"<tr><th>{html.escape(name)}</th>{cells}</tr>")
    caption = f"<caption>participant {html.escape(label)}</caption>"
    return f"<table class=heat>{caption}<tr><th>then &rarr;</th>{head}</tr>{''.join(rows)}</table>"


# ----------------------------------------------------------------------------------------------
# the sections


def _rules_section(m: dict) -> str:
    items = "".join(
        f"<li>{html.escape(rule_line(r['source'], r.get('label'), r['rule']))}</li>" for r in m.get("rules", [])
    )
    return f"<h2>Rules</h2><p>Every ordering passed all {len(m.get('rules', []))} rule checks:</p><ul>{items}</ul>"


FIGURE_COLUMNS = (  # manifest score key, heading, format (units as the generate table shows them)
    ("score", "score", "{:.4f}"),
    ("detection_vs_block", "detection vs block", "pct"),
    ("estimation_vs_random", "estimation vs random", "{:.3f}x"),
    ("counterbalance", "counterbalance", "{:.3f}"),
)


def _fmt(v: float | None, how: str) -> str:
    if v is None:
        return "-"
    return f"{100 * v:.1f}%" if how == "pct" else how.format(v)


def _participants_section(m: dict) -> str:
    head = ["participant"] + [h for _, h, _ in FIGURE_COLUMNS] + ["rounds", "stopped"]
    rows = []
    for p in m["participants"]:
        s, info = p.get("score") or {}, p.get("search") or {}
        cells = [_fmt(s.get(k), how) for k, _, how in FIGURE_COLUMNS]
        rows.append([p["label"], *cells, str(info.get("iterations", 0)), info.get("stopped", "not searched")])
    summary = []
    for name, fn in (("lowest", np.min), ("mean", np.mean), ("highest", np.max)):
        cells = []
        for k, _, how in FIGURE_COLUMNS:
            vals = [p["score"][k] for p in m["participants"] if (p.get("score") or {}).get(k) is not None]
            cells.append(_fmt(float(fn(vals)) if vals else None, how))
        summary.append([name, *cells, "", ""])
    body = _html_table(head, rows, summary)
    obj = m.get("objective", {})
    w = obj.get("weights")
    text = ""
    if w:
        text += f"score = {w['detection']:.2f} x detection vs block + {w['estimation']:.2f} x estimation vs random" + (
            f" + {w['counterbalance']:.2f} x counterbalance" if w.get("counterbalance") else ""
        )
    if obj.get("spread") is not None:
        text += f"; spread across participants {100 * obj['spread']:.1f}% (1 - lowest score / highest)"
    notes = "".join(f"<p class=note>note: {html.escape(n)}</p>" for n in obj.get("notes", []))
    return f"<h2>Participants</h2>{body}<p class=caption>{html.escape(text)}</p>{notes}{_per_run(m)}"


def _per_run(m: dict) -> str:
    """The manifest's figures per run, as `seqsolve score` prints them, folded away."""
    head = ["participant", "run", "detection", "estimation", "cb max", "H bits"]
    rows = [
        [
            p["label"],
            run,
            _fmt(f.get("detection"), "{:.4g}"),
            _fmt(f.get("estimation"), "{:.4g}"),
            f"{f['counterbalance_max']:.2f}",
            f"{f['entropy_bits']:.2f}",
        ]
        for p in m["participants"]
        for run, f in (p.get("metrics") or {}).items()
    ]
    if not rows:
        return ""
    note = (
        "Per run and for all runs together: detection and estimation efficiencies of the [analysis] model (noise in "
        "units of the AR(1) innovation variance), the largest deviation from ideal pair counts, next-trial entropy."
    )
    return f"<details><summary>figures per run</summary>{_html_table(head, rows)}<p class=caption>{note}</p></details>"


def _html_table(head: list[str], rows: list[list[str]], summary: list[list[str]] = ()) -> str:
    def row(cells, cls=""):
        return f"<tr{cls}>" + "".join(f"<td>{html.escape(str(c))}</td>" for c in cells) + "</tr>"

    out = "<table><tr>" + "".join(f"<th>{html.escape(h)}</th>" for h in head) + "</tr>"
    out += "".join(row(r) for r in rows) + "".join(row(r, " class=summary") for r in summary)
    return out + "</table>"


def _front_tsv(text: str) -> list[FrontMark]:
    rows = csv.DictReader(io.StringIO(text), delimiter="\t")
    keys = ("weight_detection", "weight_estimation", "detection_vs_block", "estimation_vs_random")
    return [FrontMark(*(float(r[k]) for k in keys)) for r in rows]


def _plane_section(m: dict, files: Mapping[str, str | bytes]) -> str:
    if not _timed(m):
        return (
            "<h2>Detection and estimation</h2><p class=note>None: the spec has no timing.tr, so no fMRI analysis "
            "is scored (the search steered by counterbalance).</p>"
        )
    scored = [p for p in m["participants"] if (p.get("score") or {}).get("detection_vs_block") is not None]
    clouds: list[Cloud] = []
    front: list[FrontMark] = []
    comparison = _json(files, "compare.json")
    where = "the participants"
    if comparison:
        clouds = clouds_of(comparison["families"], comparison["points"])
        front = [
            FrontMark(*p["weights"], p["detection"], p["estimation"])
            for p in comparison["points"]
            if p.get("weights") is not None
        ]
        where = "compare's families (compare.json), the participants"
    if "front.tsv" in files:
        front = _front_tsv(files["front.tsv"])  # this study's own front (generate --front) wins
        where += " and the front of front.tsv"
    if not scored and not clouds and not front:
        return (
            "<h2>Detection and estimation</h2><p class=note>No figures to show: the designs were not searched "
            "(iterations 0). <code>seqsolve score SPEC orderings.csv</code> scores them; <code>seqsolve compare SPEC "
            "--json &gt; FOLDER/compare.json</code> then <code>seqsolve report FOLDER --force</code> adds the families."
            "</p>"
        )
    clouds.append(
        Cloud(
            "participants",
            [p["score"]["detection_vs_block"] for p in scored],
            [p["score"]["estimation_vs_random"] for p in scored],
            "no figures",
        )
    )
    fig = plane_figure(clouds, front, m.get("spec", {}).get("study", ""), size=(7.0, 5.0))
    caption = (
        f"Detection (% of the best block design's) against estimation (times the mean random ordering's) of {where}; "
        "the front shows only its non-dominated weightings, each named by its weights (d: detection, e: estimation)."
    )
    return f"<h2>Detection and estimation</h2>{_img(png_bytes(fig), 'detection-estimation plane')}" + (
        f"<p class=caption>{html.escape(caption)}</p>"
    )


def _timed(m: dict) -> bool:
    """Does the manifest's study have a TR (fMRI figures, volumes, a design matrix)?"""
    return (m.get("timing") or {}).get("tr") is not None


def _design_matrix_section(m: dict, orderings: dict) -> str:
    first = m["participants"][0]
    label = first["label"]
    runs = orderings.get(label)
    if not _timed(m) or not runs or len(runs) != len(first["runs"]):  # no volumes, or orderings.csv edited by
        return ""  # hand: nothing sure to draw
    volumes = [r["volumes"] for r in first["runs"]]
    tr = float(m.get("timing", {}).get("tr") or first["runs"][0]["seconds"] / volumes[0])
    modelled = [c for c in m["conditions"] if c != m.get("baseline")]
    analysis = m.get("analysis", {})
    x = design_matrix(runs, volumes, tr, analysis, modelled)
    basis = x.shape[1] // len(modelled)
    labels = [n if basis == 1 else f"{n} [{b}]" for n in modelled for b in range(basis)]
    png = _design_matrix_png(x, labels, volumes)
    caption = (
        f"Participant {label}'s task regressors, runs stacked: each condition's trials convolved with the analysis "
        "HRF and read at each volume; columns scaled to their largest value. Drifts, high-pass and prewhitening "
        "are left out of the picture."
    )
    return f"<h2>Design matrix</h2>{_img(png, 'design matrix')}<p class=caption>{html.escape(caption)}</p>"


def _transitions_section(m: dict, orderings: dict) -> str:
    names = list(m["conditions"])
    listed = [p["label"] for p in m["participants"] if p["label"] in orderings]
    if not listed or any(
        c not in names for runs in orderings.values() for trials in runs.values() for c, _, _ in trials
    ):
        return ""
    shown = [(label, transition_counts(orderings[label], names)) for label in listed[:MAX_HEAT_MAPS]]
    top = max(int(c.max()) for _, c in shown) or 1
    maps = "".join(_heat_map_table(label, c, names, top) for label, c in shown)
    more = len(listed) - len(shown)
    caption = (
        "How often the column's condition directly follows the row's, within runs, summed over a participant's "
        f"runs; shading from 0 (white) to {top} (dark), the same in every table."
    )
    if more > 0:
        caption += f" The first {len(shown)} participants are shown; {more} more are in orderings.csv."
    return f"<h2>Transitions</h2><div class=maps>{maps}</div><p class=caption>{html.escape(caption)}</p>"


def _robust_entries(obj, path: str = "") -> list[tuple[str, str]]:
    """(key path, value) of every entry under a key naming HRF robustness, scalars as text."""
    out = []
    if isinstance(obj, dict):
        for k, v in obj.items():
            here = f"{path}.{k}" if path else str(k)
            if "robust" in str(k).lower():
                out += _flatten(v, here)
            else:
                out += _robust_entries(v, here)
    return out


def _flatten(v, path: str) -> list[tuple[str, str]]:
    if isinstance(v, dict):
        return [e for k, x in v.items() for e in _flatten(x, f"{path}.{k}")]
    if isinstance(v, float):
        return [(path, f"{v:.4g}")]
    return [(path, v if isinstance(v, str) else json.dumps(v))]


def _robustness_section(m: dict) -> str:
    """HRF-robustness figures if the manifest has any (keys naming 'robust'); nothing otherwise."""
    entries = _robust_entries({k: v for k, v in m.items() if k != "participants"})
    for p in m["participants"]:
        entries += [(f"participant {p['label']}: {k}", v) for k, v in _robust_entries(p)]
    if not entries:
        return ""
    return "<h2>HRF robustness</h2>" + _html_table(["figure", "value"], [list(e) for e in entries])


# ----------------------------------------------------------------------------------------------
# the page


def _study_section(m: dict) -> str:
    """Counterbalancing across participants and stimulus items, from the manifest (nothing if neither)."""
    out = []
    sections = m.get("counterbalance") or []
    if sections:
        out.append("<h3>Counterbalancing</h3><ul>")
        out += [f"<li>{html.escape(c.get('sentence', c.get('name', '')))}</li>" for c in sections]
        out.append("</ul>")
        for c in sections:
            head = ["participant", c["name"]]
            rows = [
                [label, " - ".join(v) if isinstance(v, list) else str(v)]
                for label, v in (c.get("participants") or {}).items()
            ]
            if rows:
                out.append(f"<details><summary>{html.escape(c['name'])} by participant</summary>")
                out.append(_html_table(head, rows) + "</details>")
        crossing = m.get("counterbalance_crossing")
        if crossing:
            out.append(f"<p class=caption>{html.escape(str(crossing))}</p>")
    items = m.get("items")
    if items:
        lists = ", ".join(items.get("rotate") or []) or "none"
        out.append(
            f"<h3>Stimulus items</h3><p>{items.get('items')} item(s) from {html.escape(str(items.get('file') or 'the spec'))}"
            f"; lists rotated across participants for: {html.escape(lists)}; repeats "
            f"{'allowed' if items.get('repeat') else 'not allowed'}.</p><ul>"
        )
        out += [f"<li>{html.escape(r)}</li>" for r in items.get("rules", [])]
        out.append("</ul>")
        out += [f"<p class=note>note: {html.escape(n)}</p>" for n in items.get("notes", [])]
    return "<h2>The study around the orderings</h2>" + "".join(out) if out else ""


def report_html(files: Mapping[str, str | bytes]) -> str:
    """The report of an output folder given as {file name: text} (READS; manifest.json required).

    Raises
    ------
    InputError
        When manifest.json or orderings.csv cannot be read.
    """
    m = _json(files, "manifest.json")
    if m is None:
        raise InputError("manifest.json", [Problem("", "missing; give a folder written by seqsolve generate")])
    orderings = _orderings(files["orderings.csv"]) if "orderings.csv" in files else {}
    spec = m.get("spec", {})
    name = spec.get("study") or spec.get("file", "study")
    counts = ", ".join(f"{k} {v}" for k, v in m.get("conditions", {}).items())
    head = (
        f"<h1>{html.escape(name)}</h1><p class=caption>{len(m['participants'])} participant(s); trials per run: "
        f"{html.escape(counts)}; spec {html.escape(spec.get('file', ''))} ({html.escape(spec.get('hash', ''))}), "
        f"seed {m.get('seed')}; seqsolve {html.escape(m.get('versions', {}).get('seqsolve', '?'))}</p>"
    )
    parts = [
        head,
        _rules_section(m),
        _study_section(m),
        _participants_section(m),
        _plane_section(m, files),
        _design_matrix_section(m, orderings),
        _transitions_section(m, orderings),
        _robustness_section(m),
    ]
    return (
        "<!DOCTYPE html>\n<html lang=en><head><meta charset=utf-8>"
        f"<title>{html.escape(name)}: seqsolve report</title><style>{STYLE}</style></head>\n<body>\n"
        + "\n".join(p for p in parts if p)
        + "\n</body></html>\n"
    )


def write_report(folder: str | Path, force: bool = False, out: str | Path | None = None) -> Path:
    """(Re)build the report of an output folder and write it atomically (default FOLDER/report.html).

    Raises
    ------
    InputError
        When the folder is not a generate output folder.
    OutputExistsError
        When the report exists and force is not set.
    OutputWriteError
        When it cannot be written (the previous file is then unchanged).
    """
    from seqsolve.io.atomic import write_text_atomic

    target = Path(out) if out is not None else Path(folder) / REPORT_NAME
    if target.exists() and not force:
        raise OutputExistsError(f"{target}: exists; add --force to rebuild it")
    write_text_atomic(target, report_html(read_output_folder(folder)))
    return target
