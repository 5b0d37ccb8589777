"""The HTML report: self-contained, every picture loads in a real headless browser, the rules read as
`check` prints them, and its pictures show what the folder holds (design matrix against nilearn's)."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from typer.testing import CliRunner

from seqsolve.cli import app
from seqsolve.generate import generate
from seqsolve.report import REPORT_NAME, design_matrix, read_output_folder, report_html, transition_counts
from seqsolve.search import SearchOptions
from seqsolve.spec import load_study

ROOT = Path(__file__).resolve().parents[1]
EXAMPLE = ROOT / "examples" / "reward_cue.toml"
CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
# the flags keep a headless run off the network and away from the user's profile
CHROMIUM_FLAGS = [
    "--headless",
    "--no-sandbox",
    "--disable-gpu",
    "--disable-quic",
    "--no-first-run",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--virtual-time-budget=10000",
]
#: injected by the test only: after the load event, one digit per <img>: 1 loaded (naturalWidth > 0), 0 broken
PROBE = (
    "<script>addEventListener('load',()=>{document.body.dataset.images="
    "[...document.images].map(i=>i.complete&&i.naturalWidth>0?1:0).join('')})</script>"
)


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """An output folder of the README example with one search round and a front of two weightings."""
    out = tmp_path_factory.mktemp("report") / "designs"
    generate(load_study(EXAMPLE), out, search=SearchOptions(iterations=1), front=2)
    return out


def images_loaded(page: str, tmp: Path) -> str:
    """Render the page in headless chromium; one character per <img>: '1' loaded, '0' broken."""
    if CHROMIUM is None:
        pytest.skip("chromium is not installed (apt-get install -y chromium; .ci/run installs it)")
    probe = tmp / "probe.html"
    probe.write_text(page.replace("</body>", PROBE + "</body>"), encoding="utf-8")
    args = [CHROMIUM, *CHROMIUM_FLAGS, f"--user-data-dir={tmp / 'profile'}", "--dump-dom", probe.as_uri()]
    done = subprocess.run(args, capture_output=True, text=True, timeout=180)
    found = re.search(r'data-images="([01]*)"', done.stdout)
    assert found, f"chromium did not finish loading the page: {done.stderr[-500:]}"
    return found.group(1)


def test_every_picture_loads_in_a_headless_browser(folder, tmp_path):
    page = (folder / REPORT_NAME).read_text(encoding="utf-8")
    n_img = page.count("<img ")
    assert n_img == 2  # the plane and the design matrix (transition counts are shaded tables)
    assert images_loaded(page, tmp_path) == "1" * n_img


def test_the_browser_check_catches_a_broken_picture(folder, tmp_path):
    """The check above can fail: one picture's bytes corrupted is reported as not loaded."""
    page = (folder / REPORT_NAME).read_text(encoding="utf-8")
    start = page.index("base64,") + len("base64,")
    broken = page[:start] + "AAAAAAAAAAAAAAAA" + page[start + 16 :]  # a PNG with its signature overwritten
    seen = images_loaded(broken, tmp_path)
    assert seen[0] == "0" and set(seen[1:]) == {"1"}


def test_the_page_needs_no_network_and_no_other_file(folder):
    page = (folder / REPORT_NAME).read_text(encoding="utf-8")
    sources = re.findall(r'src="([^"]*)"', page)
    assert sources and all(s.startswith("data:image/png;base64,") for s in sources)
    assert "http://" not in page and "https://" not in page and "<link" not in page and "<script" not in page


def test_rules_read_as_check_prints_them(folder):
    page = (folder / REPORT_NAME).read_text(encoding="utf-8")
    result = CliRunner().invoke(app, ["check", str(EXAMPLE)])
    lines = [line.strip()[2:] for line in result.output.splitlines() if line.strip().startswith("- ")]
    assert len(lines) == 5
    for line in lines:
        assert line.replace("'", "&#x27;") in page


def test_rebuilding_from_the_folder_gives_the_same_bytes(folder, tmp_path):
    shutil.copytree(folder, tmp_path / "copy")
    result = CliRunner().invoke(app, ["report", str(tmp_path / "copy")])
    assert result.exit_code == 2 and "--force" in result.output  # never overwritten silently
    result = CliRunner().invoke(app, ["report", str(tmp_path / "copy"), "--force"])
    assert result.exit_code == 0, result.output
    assert (tmp_path / "copy" / REPORT_NAME).read_bytes() == (folder / REPORT_NAME).read_bytes()


def test_a_folder_without_manifest_is_refused_with_what_to_do(tmp_path):
    result = CliRunner().invoke(app, ["report", str(tmp_path)])
    assert result.exit_code == 2
    assert "manifest.json: not found" in result.output and "Traceback" not in result.output


def test_participants_figures_in_the_tables_units(folder):
    page = (folder / REPORT_NAME).read_text(encoding="utf-8")
    manifest = json.loads((folder / "manifest.json").read_text())
    for p in manifest["participants"]:
        s = p["score"]
        assert f"{100 * s['detection_vs_block']:.1f}%" in page and f"{s['estimation_vs_random']:.3f}x" in page
    assert "spread across participants" in page and "lowest" in page
    run1 = manifest["participants"][0]["metrics"]["1"]
    assert f"<td>{run1['detection']:.4g}</td><td>{run1['estimation']:.4g}</td>" in page  # folded per-run table


def test_design_matrix_matches_nilearn(folder):
    """Each task column equals nilearn's regressor of the same events under its 'spm' HRF (the same
    double gamma; nilearn rounds the undershoot ratio to 0.167), read at the same volumes."""
    pd = pytest.importorskip("pandas")
    from nilearn.glm.first_level import make_first_level_design_matrix

    manifest = json.loads((folder / "manifest.json").read_text())
    rows = pd.read_csv(folder / "orderings.csv", dtype={"participant": str})
    run = rows[(rows.participant == "01") & (rows.run == 1)]
    trials = list(zip(run.condition, run.onset, run.duration))
    n_vol = manifest["participants"][0]["runs"][0]["volumes"]
    modelled = ["win", "avoid", "neutral"]
    ours = design_matrix({1: trials}, [n_vol], 2.0, manifest["analysis"], modelled)
    events = run.rename(columns={"condition": "trial_type"})[["onset", "duration", "trial_type"]]
    events = events[events.trial_type != "fixation"]
    theirs = make_first_level_design_matrix(np.arange(n_vol) * 2.0, events, hrf_model="spm", drift_model=None)
    for i, name in enumerate(modelled):
        col = theirs[name].to_numpy()
        assert np.max(np.abs(ours[:, i] - col)) < 0.02 * np.max(np.abs(col)), name


def test_transition_tables_hold_every_participants_counts(folder):
    page = (folder / REPORT_NAME).read_text(encoding="utf-8")
    assert page.count("<table class=heat>") == 6
    assert "participant 06</caption>" in page


def test_a_folder_without_search_says_how_to_get_figures(tmp_path):
    out = tmp_path / "designs"
    generate(load_study(EXAMPLE), out, search=SearchOptions(iterations=0))
    page = (out / REPORT_NAME).read_text(encoding="utf-8")
    assert "No figures to show" in page and page.count("<img ") == 1  # the design matrix only


def test_transition_counts_equal_a_count_by_hand():
    names = ["a", "b", "c"]
    runs = {1: [(c, 0.0, 1.0) for c in "abbca"], 2: [(c, 0.0, 1.0) for c in "cab"]}
    expected = np.zeros((3, 3), int)
    for seq in ("abbca", "cab"):
        for x, y in zip(seq, seq[1:]):
            expected[names.index(x), names.index(y)] += 1
    assert (transition_counts(runs, names) == expected).all()
    assert expected.sum() == 4 + 2  # pairs within runs only, none across the break


def test_hrf_robustness_shown_only_when_the_manifest_has_it(folder):
    files = read_output_folder(folder)
    assert "HRF robustness" not in report_html(files)
    manifest = json.loads(files["manifest.json"])
    manifest["participants"][0]["score"]["hrf_robustness"] = {"worst": 0.61234, "mean": 0.7, "worst_member": "peak 7 s"}
    page = report_html(dict(files, **{"manifest.json": json.dumps(manifest)}))
    assert "HRF robustness" in page and "0.6123" in page and "peak 7 s" in page


def test_compare_families_and_labels_are_escaped(folder):
    """compare.json's families go on the plane; user text (a rule label) is escaped, never markup."""
    files = read_output_folder(folder)
    manifest = json.loads(files["manifest.json"])
    manifest["rules"][0]["label"] = "<b>odd</b>"
    comparison = {
        "families": [
            {"family": "block", "designs": 0, "absent": "none valid under the rules"},
            {"family": "random valid", "designs": 2, "absent": ""},
        ],
        "points": [
            {"family": "random valid", "label": "random", "detection": 0.3, "estimation": 1.0, "weights": None},
            {"family": "random valid", "label": "random", "detection": 0.4, "estimation": 0.9, "weights": None},
        ],
    }
    page = report_html(dict(files, **{"manifest.json": json.dumps(manifest), "compare.json": json.dumps(comparison)}))
    assert "&lt;b&gt;odd&lt;/b&gt;" in page and "<b>odd</b>" not in page
    assert "compare&#x27;s families" in page


def test_counterbalancing_and_items_shown_and_a_spec_without_tr_renders(tmp_path):
    # the tone example has no timing.tr and two counterbalanced factors; the melody one has items
    tone, melody = tmp_path / "tone", tmp_path / "melody"
    generate(load_study(ROOT / "examples" / "tone_oddball.toml"), tone, search=SearchOptions(iterations=1))
    generate(load_study(ROOT / "examples" / "melody_endings.toml"), melody, search=SearchOptions(iterations=1))
    page = (tone / REPORT_NAME).read_text(encoding="utf-8")
    manifest = json.loads((tone / "manifest.json").read_text())
    assert "The study around the orderings" in page and "no timing.tr" in page
    for section in manifest["counterbalance"]:
        order = section["participants"]["01"]
        shown = " - ".join(order) if isinstance(order, list) else order
        assert f"<td>01</td><td>{shown}</td>" in page, section["name"]
    page = (melody / REPORT_NAME).read_text(encoding="utf-8")
    items = json.loads((melody / "manifest.json").read_text())["items"]
    assert f"{items['items']} item(s) from melody_items.tsv" in page
    assert all(rule.replace("'", "&#x27;") in page for rule in items["rules"])
    assert images_loaded(page, tmp_path) == "1" * page.count("<img ")
