"""Audit commands (runs, why, history, diff, restore), each checked against a direct pandas reading
of the manifests (pandas filters, merges and group-bys) and, for percentiles, against
``scipy.stats.percentileofscore``."""

import json

import pandas as pd
import pyarrow.parquet as pq
import pytest
from scipy import stats

from leanset.config import SCORE_NAMES
from store_helpers import cli, config, manifest, part, published, run_json, run_ok


@pytest.fixture(scope="module")
def store(prefect_api, tmp_path_factory):
    """Two runs on a folder that grows between them: 900 rows, then 300 more (ids derived from content)."""
    tmp = tmp_path_factory.mktemp("audit")
    folder = tmp / "table"
    part(folder, "day1.parquet", 0, 900, seed=1, ids=False)
    cfg = config(tmp, folder)
    run_ok(cfg)
    part(folder, "day2.parquet", 900, 300, seed=2, ids=False)
    run_ok(cfg)
    return tmp / "store"


def _json(*args):
    result = cli(*args)
    assert result.exit_code == 0, result.output
    return json.loads(result.output)


def _refused(*args, needle):
    result = cli(*args)
    assert result.exit_code == 2, result.output
    assert len(result.output.strip().splitlines()) == 1 and needle in result.output, result.output


def test_runs_lists_every_run_with_its_figures(store):
    rows = _json("runs", "--store", store, "--json")
    dirs = published(store)
    assert [r["run_id"] for r in rows] == [d.name for d in dirs]
    for r, d in zip(rows, dirs):
        meta, m = run_json(d), manifest(d)
        assert r["rows"] == len(m) == meta["input"]["rows"]
        assert r["kept"] == (m["decision"] == "keep").sum()
        assert r["verdict"] == meta["verdict"]["status"]
    assert rows[0]["parent_run"] is None and rows[1]["parent_run"] == rows[0]["run_id"]
    assert rows[1]["new_rows"] == 300 and rows[1]["churn_rows"] is not None
    human = cli("runs", "--store", store)
    assert human.exit_code == 0 and dirs[1].name in human.output


def test_why_matches_the_manifest_and_scipy_percentiles(store):
    last = published(store)[-1]
    m = manifest(last)
    train = m[m["split"] == "train"]
    for row in (train[train["decision"] == "keep"].iloc[3], train[train["decision"] == "drop"].iloc[7]):
        w = _json("why", row["row_id"], "--store", store, "--json")
        assert w["run_id"] == last.name
        assert (w["decision"], w["reason"], w["label"], w["stratum"]) == (row["decision"], row["reason"], row["label"], row["stratum"])
        same_class = train[train["label"] == row["label"]]
        for name in SCORE_NAMES:
            assert w["scores"][name] == pytest.approx(row[name])
            # scipy's "mean" kind: ties count half, as leanset documents
            assert w["percentiles"][name] == pytest.approx(stats.percentileofscore(same_class[name], row[name], kind="mean"))
        t = w["thresholds"]
        score = run_json(last)["config"]["selection"]["score"]
        expect = same_class.groupby("reason")[score].agg(["count", "min", "max"])
        assert set(t["score_range_by_reason"]) == set(expect.index)
        for reason, r in t["score_range_by_reason"].items():
            assert (r["rows"], r["low"], r["high"]) == pytest.approx(tuple(expect.loc[reason]))
        assert t["class_quota"] == (same_class["decision"] == "keep").sum()
    human = cli("why", row["row_id"], "--store", store)
    assert human.exit_code == 0 and row["reason"] in human.output and "percentile" in human.output


def test_why_in_a_named_run_and_on_a_holdout_row(store):
    first = published(store)[0]
    m = manifest(first)
    hold = m[m["split"] == "holdout"].iloc[0]
    w = _json("why", hold["row_id"], "--run", first.name[:20], "--store", store, "--json")
    assert w["run_id"] == first.name and w["decision"] == "holdout" and w["percentiles"] == {}


def test_history_gives_the_decision_in_every_run(store):
    dirs = published(store)
    old, new = manifest(dirs[0]), manifest(dirs[1])
    new_only = sorted(set(new["row_id"]) - set(old["row_id"]))[0]
    both = old["row_id"].iloc[11]
    for row_id in (both, new_only):
        h = _json("history", row_id, "--store", store, "--json")
        assert [e["run_id"] for e in h] == [d.name for d in dirs]
        for e, d in zip(h, dirs):
            hit = manifest(d).set_index("row_id")
            expect = hit.loc[row_id, ["decision", "reason"]].tolist() if row_id in hit.index else ["absent", None]
            assert [e["decision"], e["reason"]] == expect
    assert _json("history", new_only, "--store", store, "--json")[0]["decision"] == "absent"


def test_diff_matches_a_pandas_merge(store, tmp_path):
    a, b = published(store)
    d = _json("diff", a.name, b.name, "--store", store, "--json", "--limit", "5", "--out", tmp_path / "changed.parquet")
    ma, mb = manifest(a), manifest(b)
    j = ma.merge(mb, on="row_id", how="outer", suffixes=("_a", "_b"), indicator=True)
    inner = j[j["_merge"] == "both"]
    changed = inner[inner["decision_a"] != inner["decision_b"]]
    c = d["counts"]
    assert (c["rows_a"], c["rows_b"], c["both"]) == (len(ma), len(mb), len(inner))
    assert (c["only_a"], c["only_b"]) == ((j["_merge"] == "left_only").sum(), (j["_merge"] == "right_only").sum())
    assert c["changed"] == len(changed) and c["unchanged"] == len(inner) - len(changed)
    assert c["changed"] == run_json(b)["churn"]["rows"]
    expect = changed.groupby(["reason_a", "reason_b"]).size()
    got = {(t["reason_a"], t["reason_b"]): t["rows"] for t in d["transitions"]}
    assert got == expect.to_dict()
    assert [r["row_id"] for r in d["rows"]] == sorted(changed["row_id"])[:5]
    assert set(pq.read_table(tmp_path / "changed.parquet").column("row_id").to_pylist()) == set(changed["row_id"])


def test_restore_is_exactly_kept_and_the_chosen_reasons(store, tmp_path):
    run = published(store)[-1]
    m = manifest(run)
    reasons = sorted(set(m.loc[m["decision"] == "drop", "reason"]))
    assert reasons, "the run dropped no row"
    for chosen in ([reasons[0]], reasons):
        out = tmp_path / f"restore-{len(chosen)}.parquet"
        info = _json("restore", run.name, *sum((["--reason", r] for r in chosen), []), "--out", out, "--store", store, "--json")
        got = pq.read_table(out).to_pandas()
        expect = m[(m["decision"] == "keep") | ((m["decision"] == "drop") & m["reason"].isin(chosen))]
        assert got["row_id"].is_unique and set(got["row_id"]) == set(expect["row_id"])
        assert info["rows"] == len(expect) and info["kept"] == (m["decision"] == "keep").sum()
        # the original columns come back unchanged
        source = pd.concat([pd.read_parquet(p) for p in sorted((store.parent / "table").glob("*.parquet"))])
        cols = ["x0", "x1", "x2", "color", "label"]
        merged = got[["row_id", *cols]].merge(source[cols].drop_duplicates(), on=cols, how="left", indicator=True)
        assert (merged["_merge"] == "both").all()
        # weighted class shares equal the training rows' (class_prior weights)
        train = m[m["split"] == "train"]["label"].value_counts(normalize=True)
        weighted = got.groupby("label")["weight"].sum() / got["weight"].sum()
        pd.testing.assert_series_equal(weighted.sort_index(), train.sort_index(), check_names=False)


def test_restore_ids_only_writes_the_manifest_columns(store, tmp_path):
    run = published(store)[-1]
    out = tmp_path / "ids.csv"
    r = cli("restore", run.name, "--reason", "drop:over_budget", "--ids-only", "--out", out, "--store", store)
    assert r.exit_code == 0, r.output
    got = pd.read_csv(out)
    assert list(got.columns) == ["row_id", "label", "decision", "reason", "weight"]
    assert set(got["reason"]) <= {"drop:over_budget"} | {x for x in got["reason"] if x.startswith("keep:")}


def test_audit_refusals_are_one_line(store, tmp_path):
    _refused("why", "no-such-row", "--store", store, needle="'no-such-row' is in no run")
    _refused("history", "no-such-row", "--store", store, needle="no-such-row")
    _refused("diff", "2", "nope", "--store", store, needle="ambiguous")
    _refused("restore", published(store)[0].name, "--reason", "drop:typo", "--store", store, needle="its drop reasons are")
    _refused("runs", "--store", tmp_path / "empty", needle="no runs/ folder")
