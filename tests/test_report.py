"""The index report page (``lshjob report``): one self-contained file, valid HTML and SVG, the
S-curve drawn from 1-(1-s^r)^b, and the manifest's figures shown as they are."""

from __future__ import annotations

import json
import re
import shutil
import subprocess
import sys
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import polars as pl
import pytest

from lshjob.audit.check import audit_index
from lshjob.cli.report_command import write_report
from lshjob.demo.generate import generate_events
from lshjob.index.publish import read_manifest
from lshjob.ingest.spec import EventSpec
from lshjob.jobs.run import RunOptions, run_job
from lshjob.report.page import SECTIONS

SPEC = EventSpec(entity="patron", element="title")
NAMESPACES = {"http://www.w3.org/2000/svg", "http://www.w3.org/1999/xlink"}  # names, never fetched
CHROMIUM = "/usr/bin/chromium"


@pytest.fixture(scope="module")
def index(tmp_path_factory):
    """A real index of the library demo at 300 patrons, and its audit as lshjob audit --json prints it."""
    folder = tmp_path_factory.mktemp("report")
    events, _ = generate_events(300, seed=5)
    events.write_parquet(folder / "loans.parquet")
    run_job(folder / "loans.parquet", SPEC, RunOptions(threshold=0.5, top_k=5), folder / "idx")
    audit = audit_index(folder / "idx", sample=100)
    (folder / "audit.json").write_text(json.dumps(audit, default=str))
    return folder


@pytest.fixture(scope="module")
def page(index):
    summary = write_report(index / "idx", index / "report.html", index / "audit.json")
    return summary, (index / "report.html").read_text()


class _Collect(HTMLParser):
    def __init__(self):
        super().__init__()
        self.ids, self.sources, self.tags = set(), [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append(tag)
        if "id" in attrs:
            self.ids.add(attrs["id"])
        self.sources += [attrs[a] for a in ("src", "href") if a in attrs]


def _svgs(text: str) -> list[str]:
    return re.findall(r"<svg\b.*?</svg>", text, flags=re.S)


def test_page_is_one_file_with_no_network_reference_and_every_section(index, page):
    summary, text = page
    assert summary["out"] == str(index / "report.html") and summary["audit"] is True
    assert summary["sample_histogram"] is True  # the run's events are still there
    # Oracle: the standard library's HTML parser, and every web address in the text listed.
    parser = _Collect()
    parser.feed(text)
    parser.close()
    assert set(SECTIONS) <= parser.ids
    assert not parser.sources and "script" not in parser.tags and "link" not in parser.tags and "img" not in parser.tags
    assert set(re.findall(r"https?://[^\"'\s<>)]*", text)) <= NAMESPACES
    assert sorted(p.name for p in index.iterdir() if p.name.startswith("report")) == ["report.html"]  # no temp left


def test_figures_are_valid_svg(page):
    _, text = page
    svgs = _svgs(text)
    assert len(svgs) == 4  # S-curve, stages, distributions, forecast curves
    for svg in svgs:
        # Oracle: an XML parser (xml.etree); the root is an SVG element with drawn paths.
        root = ET.fromstring(svg)
        assert root.tag == "{http://www.w3.org/2000/svg}svg"
        assert root.findall(".//{http://www.w3.org/2000/svg}path")
    ids = re.findall(r'\bid="([^"]+)"', "".join(svgs))
    assert len(ids) == len(set(ids))  # figures inlined together share no id


def test_s_curve_points_follow_the_banding_formula(index, page):
    _, text = page
    plan = read_manifest(index / "idx").plan
    figure = re.search(r'<figure class="figure" id="figure-s-curve" data-s="([^"]*)" data-p="([^"]*)"', text)
    s = np.array(json.loads(figure.group(1).replace("&quot;", '"')))
    p = np.array(json.loads(figure.group(2).replace("&quot;", '"')))
    # Oracle: Mining of Massive Datasets 3.4, P(s) = 1-(1-s^r)^b, evaluated here in plain Python.
    expected = [1 - (1 - x ** plan["rows"]) ** plan["bands"] for x in s]
    assert s[0] == 0.0 and s[-1] == 1.0 and len(s) > 50
    assert np.allclose(p, expected, rtol=0, atol=1e-12)
    assert f"b={plan['bands']}, r={plan['rows']}" in text and "threshold 0.5" in text


def test_stage_seconds_memory_recall_and_skew_are_the_manifests(index, page):
    _, text = page
    m = read_manifest(index / "idx")
    audit = json.loads((index / "audit.json").read_text())
    table = re.search(r'<table id="stage-table">(.*?)</table>', text, flags=re.S).group(1)
    rows = re.findall(r'<tr><td class="name">([^<]+)</td><td>([^<]+)</td>', table)
    # Oracle: the manifest as written by the run (JSON), stage by stage.
    assert {name: float(sec) for name, sec in rows} == {k: v for k, v in m.seconds.items() if k != "total"}
    recall = re.search(r'<table id="recall-table">(.*?)</table>', text, flags=re.S).group(1)
    assert f"{m.plan['predicted']['expected_recall']:.4f}" in recall and f"{audit['recall']:.4f}" in recall
    skew = re.search(r'<table id="skew-table">(.*?)</table>', text, flags=re.S).group(1)
    assert f"<td>{m.skew['largest_bucket']}</td>" in skew


def test_neighbours_per_entity_match_the_table(index, page):
    _, text = page
    table = pl.read_parquet(index / "idx" / "neighbours.parquet")
    entities = read_manifest(index / "idx").counts["entities"]
    # Oracle: neighbour rows counted per entity in Python, entities without a row counted as 0.
    counts = {}
    for entity in table["entity"].to_list():
        counts[entity] = counts.get(entity, 0) + 1
    per = list(counts.values()) + [0] * (entities - len(counts))
    cell = re.search(r"neighbours per entity: median / mean / max</td><td>([^<]+)</td>", text).group(1)
    assert cell == f"{np.median(per):g} / {sum(per) / len(per):.3f} / {max(per)}"
    assert f"entities with no neighbour</td><td>{entities - len(counts)}</td>" in text


def test_missing_index_folder_is_exit_2_one_line_and_nothing_written(tmp_path):
    done = subprocess.run([sys.executable, "-m", "lshjob.cli.app", "report", str(tmp_path / "nope"),
                           "--out", str(tmp_path / "r.html")], capture_output=True, text=True, timeout=120)
    assert done.returncode == 2
    assert done.stderr.startswith("error: ") and done.stderr.count("\n") == 1 and "nope" in done.stderr
    assert list(tmp_path.iterdir()) == []


def test_audit_file_that_is_not_an_audit_is_refused(index, tmp_path):
    from lshjob.errors import InputError

    bad = tmp_path / "audit.json"
    bad.write_text(json.dumps({"recall": 1.0}))
    with pytest.raises(InputError, match="not an lshjob audit report"):
        write_report(index / "idx", tmp_path / "r.html", bad)
    assert not (tmp_path / "r.html").exists()


# headless Chromium as root in a container: no sandbox, no GPU, nothing fetched, a new empty profile
CHROMIUM_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
                  "--disable-background-networking", "--disable-component-update", "--disable-sync",
                  "--enable-logging=stderr", "--v=0")


def _render(page_file, shot, tmp_path, height=1400):
    """Screenshot of ``page_file`` in headless Chromium, and the console lines it logged."""
    if not shutil.which(CHROMIUM):
        print(f"skipped: {CHROMIUM} is not installed (.ci/run installs Debian's chromium when apt-get is there)")
        pytest.skip(f"{CHROMIUM} is not installed: the page is not rendered in a browser")
    profile = tmp_path / f"profile-{shot.stem}"
    profile.mkdir()
    done = subprocess.run([CHROMIUM, *CHROMIUM_FLAGS, f"--user-data-dir={profile}", f"--screenshot={shot}",
                           f"--window-size=1000,{height}", page_file.as_uri()],
                          capture_output=True, text=True, timeout=120, check=True)
    return [line for line in done.stderr.splitlines() if ":CONSOLE" in line]


def _pixels(shot):
    import matplotlib.image

    return matplotlib.image.imread(shot)


def test_page_renders_in_headless_chromium(index, page, tmp_path):
    shot = tmp_path / "shot.png"
    console = _render(index / "report.html", shot, tmp_path)
    # Oracle: the screenshot's pixels (read by matplotlib): a blank page is one colour; and the
    # browser's own console log: the page has no script, so any console line is a problem.
    pixels = _pixels(shot)
    assert pixels.ndim == 3 and pixels[..., :3].std() > 0.02
    assert len(np.unique(pixels[..., :3].reshape(-1, 3), axis=0)) > 50
    assert console == []


def test_the_browser_check_catches_console_errors_and_blank_pages(tmp_path):
    # The checks above can fail: a page logging an error, and a blank page, are caught.
    noisy = tmp_path / "noisy.html"
    noisy.write_text('<!DOCTYPE html><html><body><p>x</p><script>console.error("broken")</script></body></html>')
    assert any("broken" in line for line in _render(noisy, tmp_path / "noisy.png", tmp_path))
    blank = tmp_path / "blank.html"
    blank.write_text("<!DOCTYPE html><html><body></body></html>")
    _render(blank, tmp_path / "blank.png", tmp_path)
    assert _pixels(tmp_path / "blank.png")[..., :3].std() < 0.02


def test_index_without_bands_still_has_every_section(tmp_path, small_events):
    # threshold 1: identical sets only, grouped exactly; no S-curve, no buckets.
    run_job(small_events, SPEC, RunOptions(threshold=1.0, top_k=5), tmp_path / "idx")
    summary = write_report(tmp_path / "idx", tmp_path / "r.html", sample=False)
    text = (tmp_path / "r.html").read_text()
    parser = _Collect()
    parser.feed(text)
    # Oracle: the HTML parser; the manifest says there are no bands and no skew profile.
    assert set(SECTIONS) <= parser.ids and read_manifest(tmp_path / "idx").skew is None
    assert "there is no S-curve" in text and "no buckets" in text
    assert summary["sample_histogram"] is False and len(_svgs(text)) == 2
