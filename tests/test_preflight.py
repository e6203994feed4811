"""Preflight runs once per run: the command checks and hands the flow a token; a flow started
without the token (a deployment, a script) checks for itself and still refuses bad input before
any fit."""

from __future__ import annotations

import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).parent))
from store_helpers import config, part, published, run_ok  # noqa: E402

import leanset.preflight  # noqa: E402
from leanset.config import load_config  # noqa: E402
from leanset.errors import ConfigError  # noqa: E402
from leanset.flows import prune_flow  # noqa: E402
from leanset.preflight import ensure_checked, preflight  # noqa: E402


@pytest.fixture
def calls(monkeypatch):
    """Counts the table checks of preflight (``check_input``) made from here on."""
    made = []
    check_input = leanset.preflight.check_input

    def counted(*args, **kwargs):
        made.append(1)
        return check_input(*args, **kwargs)

    monkeypatch.setattr(leanset.preflight, "check_input", counted)
    return made


def test_the_command_checks_once(prefect_api, tmp_path, calls):
    cfg = config(tmp_path, part(tmp_path / "in", "t.parquet", 0, 400, seed=2))
    run_ok(cfg)
    assert len(published(tmp_path / "store")) == 1
    assert len(calls) == 1


def test_a_flow_without_the_token_still_refuses_before_any_fit(prefect_api, tmp_path, calls, monkeypatch):
    # num_leaves must be > 1 (LightGBM's own parameter check refuses -5)
    cfg = config(tmp_path, part(tmp_path / "in", "t.parquet", 0, 400, seed=2), target__params={"num_leaves": -5})
    import leanset.flows

    def no_fit(*args, **kwargs):
        raise AssertionError("a stage ran before the check")

    monkeypatch.setattr(leanset.flows, "run_stages", no_fit)
    with pytest.raises(ConfigError, match="num_leaves"):
        prune_flow(str(cfg))
    assert len(calls) == 1 and not (tmp_path / "store" / "runs").exists()


def test_a_token_counts_only_for_the_config_it_was_given_for(tmp_path, calls):
    table = part(tmp_path / "in", "t.parquet", 0, 400, seed=2)
    good = load_config(config(tmp_path, table))
    token = preflight(good)
    ensure_checked(good, token)  # the same config: not checked again
    assert len(calls) == 1
    bad = load_config(config(tmp_path, table, name="bad.yaml", target__params={"num_leaves": -5}))
    with pytest.raises(ConfigError, match="num_leaves"):
        ensure_checked(bad, token)  # another config's token: checked, and refused
    assert len(calls) == 2
    ensure_checked(good, None)
    assert len(calls) == 3
