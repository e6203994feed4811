"""report.html from the Jinja2 template: parsed with the standard library's html.parser and
xml.etree, its figures are checked against pyarrow/numpy recomputations from the manifest, and
``leanset report RUN`` rebuilds any run's page from its files, old or new run.json alike."""

import copy
import json
import xml.etree.ElementTree as ET
from html.parser import HTMLParser

import numpy as np
import pandas as pd
import pyarrow.parquet as pq
import pytest

from leanset.report.charts import OKABE_ITO
from leanset.report.format import seconds, share
from leanset.report.html import SECTIONS, render_html
from store_helpers import cli, config, part, published, run_ok


class _Page(HTMLParser):
    """Sections, figures (with the table their caption points at), tables by id, SVGs, external references, text."""

    def __init__(self):
        super().__init__()
        self.sections, self.section = [], None
        self.figures: list[dict] = []
        self.tables: dict[str, str] = {}
        self.headers: list[dict] = []
        self.external: list[str] = []
        self.tags: list[str] = []
        self.meta: list[dict] = []
        self.text: list[str] = []
        self._in_figure = None

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        if tag == "section":
            self.section = a.get("id")
            self.sections.append(self.section)
        if tag == "figure":
            self._in_figure = {"section": self.section, "chart": None, "table": None}
            self.figures.append(self._in_figure)
        if self._in_figure is not None and tag in ("svg", "img") and self._in_figure["chart"] is None:
            self._in_figure["chart"] = tag
        if self._in_figure is not None and tag == "a" and a.get("href", "").startswith("#"):
            self._in_figure["table"] = a["href"][1:]
        if tag == "table" and a.get("id"):
            self.tables[a["id"]] = self.section
        if tag == "th":
            self.headers.append(a)
        if tag == "meta":
            self.meta.append(a)
        for key in ("src", "href", "xlink:href"):
            value = a.get(key)
            if value and not value.startswith(("data:", "#")):
                self.external.append(value)
        if tag in ("script", "link", "iframe", "object", "embed"):
            self.external.append(tag)

    def handle_endtag(self, tag):
        if tag == "figure":
            self._in_figure = None

    def handle_data(self, data):
        self.text.append(data)

    @property
    def words(self) -> str:
        return " ".join(" ".join(self.text).split())


def _parse(html: str) -> _Page:
    page = _Page()
    page.feed(html)
    page.close()
    return page


def _svgs(html: str) -> list[str]:
    out, at = [], 0
    while (start := html.find("<svg", at)) >= 0:
        end = html.index("</svg>", start) + len("</svg>")
        out.append(html[start:end])
        at = end
    return out


@pytest.fixture(scope="module")
def run_dir(prefect_api, tmp_path_factory):
    """A run on an invented table with a segment column, suspected label errors and conflicting duplicates."""
    tmp = tmp_path_factory.mktemp("report_html")
    folder = tmp / "t"
    path = part(folder, "a.parquet", 0, 900, seed=21)
    df = pd.read_parquet(path)
    clash = df.iloc[:12].copy()  # same features, another label: conflicting duplicates
    clash["label"] = np.where(clash["label"] == "a", "b", "a")
    clash["rid"] = [f"x{i:03d}" for i in range(len(clash))]
    pd.concat([df, clash], ignore_index=True).to_parquet(path)
    cfg = config(tmp, folder, input__id="rid", input__segments=["color"], selection__drop_suspect_labels=True)
    run_ok(cfg)
    return published(tmp / "store")[-1]


def test_formats_follow_the_issue():
    # the issue's own examples: a share prints as "13.1 %", not 0.1305; times as seconds with sensible precision
    assert share(0.1305) == "13.1 %"
    assert seconds(2.0) == "2.0 s" and seconds(0.0123) == "0.012 s" and seconds(75.4) == "75 s"


def test_page_structure_accessibility_and_offline(run_dir):
    html = (run_dir / "report.html").read_text()
    page = _parse(html)
    assert page.sections == list(SECTIONS)
    assert {"name": "viewport", "content": "width=device-width, initial-scale=1"} in page.meta
    assert page.external == []  # nothing to fetch: no script, stylesheet link, font or remote image
    assert len(html.encode()) < 1_000_000  # the issue's target
    # every header cell names its scope (WAI tables tutorial: th scope="col" / "row")
    assert page.headers and all(h.get("scope") in ("col", "row") for h in page.headers)
    # every chart sits in a figure whose caption points at the table of its figures, in the same section
    assert {f["section"] for f in page.figures} >= {"verdict", "metrics", "composition", "scores", "reasons"}
    for fig in page.figures:
        assert fig["chart"] in ("svg", "img")
        assert fig["table"] in page.tables and page.tables[fig["table"]] == fig["section"], fig
    # each inline SVG is well-formed XML (xml.etree), and no element id repeats across the page
    ids = []
    for svg in _svgs(html):
        root = ET.fromstring(svg)
        assert root.tag.endswith("svg") and len(list(root.iter())) > 20
        ids += [e.get("id") for e in root.iter() if e.get("id")]
    assert len(ids) == len(set(ids))
    # the Okabe–Ito colours (Okabe & Ito 2008, "Color Universal Design"; hex values from memory) draw kept and dropped
    assert OKABE_ITO["blue"].lower() in html.lower() and OKABE_ITO["vermillion"].lower() in html.lower()


def test_figures_match_the_manifest(run_dir):
    run = json.loads((run_dir / "run.json").read_text())
    m = pq.read_table(run_dir / "manifest.parquet").to_pandas()
    text = _parse((run_dir / "report.html").read_text()).words
    v = run["verdict"]
    assert v["status"].upper() in text and f"{v['delta']:+.4f}" in text and f"[{v['ci'][0]:+.4f}, {v['ci'][1]:+.4f}]" in text
    cal = v["calibration"]
    for key in ("full", "kept", "random"):
        assert f"{cal[key]:.4f}" in text  # calibration of all / kept / random rows is on the page
    train = m[m.split == "train"]
    kept = train[train.decision == "keep"]
    # class composition recomputed with pandas' value_counts
    before = train.label.value_counts(normalize=True)
    after = kept.label.value_counts(normalize=True)
    for label in before.index:
        assert f"{label} {(train.label == label).sum():,} {100 * before[label]:.1f} % {(kept.label == label).sum():,} {100 * after.get(label, 0):.1f} %" in text
    # reason counts and their meanings
    for reason, n in m.reason.value_counts().items():
        assert f"{reason} {n:,}" in text
    assert "suspected label errors" in text and "conflicting duplicates" in text
    n_suspect = int(train.suspect_label.fillna(False).sum())
    n_conflict = int(train.conflict.fillna(False).sum())
    assert n_conflict > 0 and n_suspect > 0
    assert f"suspected label errors: {n_suspect:,} rows" in text and f"conflicting duplicates (same features, another label): {n_conflict:,} rows" in text
    assert f"leanset report {run['run_id']} --list suspect" in text
    # the review sample shows the rows' features: x0 of the most suspicious row, read back from the input table
    worst = train[train.suspect_label.fillna(False)].sort_values("aum").iloc[0]
    source = pd.read_parquet(run["input"]["path"]).set_index("rid")
    assert f"{worst.row_id} {worst.label}" in text and f"{source.loc[worst.row_id, 'x0']:.3f}" in text


def test_strata_edges_bound_every_stratum(run_dir):
    """Coverage-centric selection (Zheng et al., ICLR 2023) bins difficulty into equal-width strata:
    the edges on the page must enclose each row's recorded stratum."""
    from leanset.report.html import _score_view

    run = json.loads((run_dir / "run.json").read_text())
    manifest = pq.read_table(run_dir / "manifest.parquet")
    view = _score_view(run, manifest)
    m = manifest.to_pandas()
    score = run["config"]["selection"]["score"]
    for c in view["classes"]:
        rows = m[(m.label == c["name"]) & (m.stratum >= 0)]
        lo, hi, width = c["span"]
        bounds = np.linspace(lo, hi, run["selection"]["strata"] + 1)  # strata: auto, as the run resolved it
        assert np.allclose(width, np.diff(bounds)) and np.allclose(c["edges"], bounds[1:-1])
        difficulty = -rows[score] if score == "aum" else rows[score]  # aum: lower is harder (Pleiss et al., 2020)
        hard_lo = np.sort(-bounds if score == "aum" else bounds)
        s = rows.stratum.to_numpy().astype(np.int64)
        assert np.all(difficulty.to_numpy() >= hard_lo[s] - 1e-9) and np.all(difficulty.to_numpy() <= hard_lo[s + 1] + 1e-9)


def test_autoescape(run_dir):
    run = json.loads((run_dir / "run.json").read_text())
    manifest = pq.read_table(run_dir / "manifest.parquet")
    run["input"]["path"] = "<script>alert(1)</script>&.parquet"
    page = _parse(render_html(run, manifest))
    assert "script" not in page.tags and "<script>alert(1)</script>&.parquet" in page.words


def test_old_and_new_run_json_both_render(run_dir):
    """Runs written before calibration, cost and carried verdicts render; those sections show when present."""
    run = json.loads((run_dir / "run.json").read_text())
    manifest = pq.read_table(run_dir / "manifest.parquet")
    old = copy.deepcopy(run)
    for key in ("calibration", "metrics", "mcnemar"):
        old["verdict"].pop(key, None)
    for key in ("agreement", "cost", "search", "frontier"):
        old.pop(key, None)
    text = _parse(render_html(old, manifest)).words
    assert "no cost ledger" in text and "recorded no calibration" in text
    new = copy.deepcopy(run)
    new["verdict"]["calibration"].update(full_ci=[0.30, 0.36], kept_ci=[0.33, 0.41], random_ci=[0.31, 0.40], excess=0.21,
                                         ci=[0.05, 0.37], tolerance=0.25, failed=False)
    new["verdict"].update(status="carried", carried={"from_run": "R0", "status": "pass", "age_runs": 2})
    new["cost"] = {"stages": {"score": 3.5, "verify": 9.0}, "selection_seconds": 4.0, "verification_seconds": 9.0,
                   "target_fit_seconds": {"full": 12.0, "kept": 3.0, "random": 3.1}, "target_fits_from": "R0",
                   "saving_per_fit": 9.0, "speedup_per_fit": 4.0, "break_even_fits": 1,
                   "break_even_fits_with_verification": 2, "end_to_end_speedup": 1.8, "saves_time": True}
    page = _parse(render_html(new, manifest))
    text = page.words
    assert "CARRIED" in text and "carries the verdict of run R0" in text
    assert "[0.3300, 0.4100]" in text and "relative excess" in text
    assert "9.0 s saved per fit" in text and "pays back after 1 fit" in text
    assert any(f["section"] == "cost" for f in page.figures)


def test_report_command_rebuilds_and_lists(run_dir):
    store = run_dir.parent.parent
    page = run_dir / "report.html"
    page.write_text("stale")
    result = cli("report", run_dir.name[:12], "--store", str(store))
    assert result.exit_code == 0, result.output
    assert _parse(page.read_text()).sections == list(SECTIONS)
    listed = cli("report", run_dir.name, "--list", "conflict", "--json", "--store", str(store))
    m = pq.read_table(run_dir / "manifest.parquet").to_pandas()
    expected = m[(m.split == "train") & m.conflict.fillna(False)].row_id.tolist()
    assert [r["row_id"] for r in json.loads(listed.stdout)] == expected
    bad = cli("report", run_dir.name, "--list", "everything", "--store", str(store))
    assert bad.exit_code == 2 and "--list everything" in bad.output


def test_coded_columns_count_as_numpy_unique():
    """The report counts string columns through codes, not a Python object per row; its values and
    counts must be those of ``np.unique`` over the column's values as ``str`` (NumPy)."""
    import pyarrow as pa

    from leanset.report.coded import Coded

    columns = [pa.chunked_array([["keep", "drop", None], ["holdout", "keep"]]),
               pa.chunked_array([[3, None, 1], [3, 2]]), pa.array([0.5, 1.0, 0.5]), ["b", "a", "b"]]
    for column in columns:
        values = column.to_numpy(zero_copy_only=False) if hasattr(column, "to_numpy") else column
        names = np.asarray(values, dtype=object).astype(str)
        coded = Coded.of(column)
        expect = np.unique(names, return_counts=True)  # NumPy
        for got, want in zip(coded.counts(), expect):
            np.testing.assert_array_equal(got, want)
        np.testing.assert_array_equal(coded.values[coded.codes], names)
        np.testing.assert_array_equal(coded.eq(names[0]), names == names[0])
        rows = np.array([True, False, True] + [False] * (len(names) - 3))
        for got, want in zip(coded.counts(rows), np.unique(names[rows], return_counts=True)):
            np.testing.assert_array_equal(got, want)
