"""report.html: every run writes one self-contained page; parsed with the standard library's
html.parser, every section and every image is found and each image is a PNG inlined as data."""

import base64
import binascii
from html.parser import HTMLParser

import pytest

from leanset.report.html import CAUTIONS, SECTIONS
from store_helpers import config, part, published, run_ok

PNG = b"\x89PNG\r\n\x1a\n"  # the PNG signature (PNG specification, section 5.2)


class _Page(HTMLParser):
    """Sections by id, the images inside each, every external reference, and the text."""

    def __init__(self):
        super().__init__()
        self.sections: dict[str, list[str]] = {}
        self.current = None
        self.external: list[str] = []
        self.text: list[str] = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "section":
            self.current = a.get("id")
            self.sections[self.current] = []
        if tag == "img":
            self.sections.setdefault(self.current, []).append(a.get("src", ""))
        for key in ("src", "href"):
            if a.get(key) and not a[key].startswith("data:"):
                self.external.append(a[key])
        if tag in ("script", "link", "iframe"):
            self.external.append(tag)

    def handle_endtag(self, tag):
        if tag == "section":
            self.current = None

    def handle_data(self, data):
        self.text.append(data)


def _parse(path):
    page = _Page()
    page.feed(path.read_text())
    page.close()
    return page


def _png(src):
    assert src.startswith("data:image/png;base64,")
    try:
        raw = base64.b64decode(src.split(",", 1)[1], validate=True)
    except binascii.Error as exc:  # pragma: no cover - the assertion below names the failure
        raise AssertionError(f"not base64: {exc}")
    assert raw[:8] == PNG and len(raw) > 1000
    return raw


@pytest.fixture(scope="module")
def runs(prefect_api, tmp_path_factory):
    """A first run and a child run after new rows arrive, with a segment column."""
    tmp = tmp_path_factory.mktemp("report")
    folder = tmp / "t"
    part(folder, "a.parquet", 0, 800, seed=11)
    cfg = config(tmp, folder, input__id="rid", input__segments=["color"])
    first = run_ok(cfg)
    part(folder, "b.parquet", 800, 120, seed=12)
    run_ok(cfg)
    return published(tmp / "store"), first


def test_every_section_and_image_is_there(runs):
    dirs, _ = runs
    for d in dirs:
        page = _parse(d / "report.html")
        assert list(page.sections) == list(SECTIONS)
        for name in ("metrics", "composition", "scores"):
            assert page.sections[name], f"no image in section {name}"
            for src in page.sections[name]:
                _png(src)
        assert page.external == []  # opens offline: nothing to fetch
        text = " ".join(" ".join(page.text).split())
        for caution in CAUTIONS:
            assert " ".join(caution.split()) in text
        assert "segment color" in text  # class and segment composition


def test_verdict_and_churn_sections_carry_the_run_figures(runs):
    import json

    first, child = runs[0]
    for d in (first, child):
        run = json.loads((d / "run.json").read_text())
        text = " ".join(_parse(d / "report.html").text)
        v = run["verdict"]
        assert v["status"].upper() in text and f"{v['delta']:+.4f}" in text
        assert f"[{v['ci'][0]:+.4f}, {v['ci'][1]:+.4f}]" in text
        for value in (v["full"], v["kept"], v["random"]):
            assert f"{value:.4f}" in text
    first_text = " ".join(_parse(first / "report.html").text)
    assert "no parent run" in first_text
    run = json.loads((child / "run.json").read_text())
    child_text = " ".join(_parse(child / "report.html").text)
    assert run["churn"]["parent_run"] in child_text and f"{run['churn']['new_rows']:,}" in child_text


def test_run_summary_points_at_the_report(runs):
    dirs, result = runs
    assert str(dirs[0] / "report.html") in result.output


def test_summary_reports_calibration_beside_the_metric(runs):
    from rich.console import Console

    from leanset.report.summary import read_run, summary

    dirs, _ = runs
    run = read_run(dirs[0])
    cal = run["verdict"]["calibration"]
    console = Console(width=300, record=True)
    console.print(summary(run, dirs[0]))
    text = console.export_text()
    name = "Brier score" if len(run["verdict"]["per_class_recall"]) == 2 else "log loss"
    assert f"{name} (lower is better): full {cal['full']:.4f} · kept {cal['kept']:.4f} · random {cal['random']:.4f}" in text
