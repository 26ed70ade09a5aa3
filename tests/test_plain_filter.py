"""A build compares its learned artifact with the plain filter it would replace (no model, one
region, the same aim): it says so when the model does not pay, and with
gate.when_model_does_not_pay = "publish_plain" it publishes the plain filter, which the same
loader answers."""

from __future__ import annotations

import lightgbm as lgb
import numpy as np
import pytest

import tamis.flows.build as build
from tamis import additions, cli, publish
from tamis.loader import open_filter
from tamis.booster import compile_booster
from tamis.model import ModelChoice
from tamis.report_page import REPORT_PAGE_NAME
from small_build import small_config
from tamis_testing import plain_build_flow, write_small_corpus

TARGET = 0.05
FORCED_TREES = 40


def forced_model(X_members, X_train, w_train, X_val, w_val, filter_bytes, settings) -> ModelChoice:
    """A model grown to FORCED_TREES trees whatever it costs: on 400 members its bytes cannot pay
    for themselves (the model stage itself would choose no tree here)."""
    X = np.vstack([X_members, X_train])
    labels = np.r_[np.ones(len(X_members)), np.zeros(len(X_train))]
    params = {"objective": "binary", "num_leaves": 7, "learning_rate": 0.3, "min_data_in_leaf": 5,
              "verbose": -1, "num_threads": 1, "seed": 1, "deterministic": True}
    booster = lgb.train(params, lgb.Dataset(X, labels), num_boost_round=FORCED_TREES)
    forest = compile_booster(booster)
    return ModelChoice(forest=forest, trees=forest.trees, params={}, auc=0.5, model_bytes=forest.nbytes,
                       filter_bytes=0.0, total_bytes=float(forest.nbytes), candidates=[], train_seconds=0.0)


@pytest.fixture(scope="module")
def corpus(tmp_path_factory):
    return write_small_corpus(tmp_path_factory.mktemp("corpus"))


def build_with(corpus, store, policy: str, monkeypatch):
    members, non_members = corpus
    monkeypatch.setattr(build, "fit_model", forced_model)
    with plain_build_flow() as flow:
        return flow(small_config(members, non_members, store, target=TARGET, when_model_does_not_pay=policy))


def test_a_model_that_does_not_pay_is_said_in_the_summary_report_and_page(corpus, tmp_path, monkeypatch):
    outcome = build_with(corpus, tmp_path / "store", "publish", monkeypatch)
    plain = outcome.report["plain_filter"]
    assert outcome.published and plain["published"] == "learned" and plain["model_pays"] is False
    assert plain["learned_bytes"] > plain["plain_bytes"]
    artifact = open_filter(outcome.folder / publish.ARTIFACT_NAME)
    assert artifact.forest.trees == FORCED_TREES
    summary = cli.summary_text(outcome.report, outcome.folder)
    assert (f"WARNING the model does not pay: the learned artifact takes {plain['learned_bytes']:,} bytes against "
            f"{plain['plain_bytes']:,} for a plain filter (no model) certified the same way; the learned artifact is "
            f'published anyway (gate.when_model_does_not_pay = "publish")') in summary
    page = (outcome.folder / REPORT_PAGE_NAME).read_text(encoding="utf-8")
    assert "The model does not pay" in page and f"{plain['plain_bytes']:,}" in page


def test_publish_plain_ships_the_plain_filter_and_the_loader_answers_it(corpus, tmp_path, monkeypatch):
    members = corpus[0].read_text(encoding="utf-8").splitlines()
    outcome = build_with(corpus, tmp_path / "store", "publish_plain", monkeypatch)
    report = outcome.report
    assert outcome.published and report["gate"]["passed"]
    assert report["plain_filter"]["published"] == "plain"
    path = outcome.folder / publish.ARTIFACT_NAME
    artifact = open_filter(path)
    # no model, one region holding every member: the filter the plan and filter stages chose for it
    assert artifact.forest.trees == 0 and artifact.info["boundaries"] == []
    assert [region["members"] for region in artifact.info["regions"]] == [len(members)]
    assert artifact.contains_many(members).all()
    assert report["false_negatives"] == 0 and report["heldout"]["fpr_upper"] <= TARGET
    assert report["model"]["trees"] == 0 and len(report["regions"]) == 1
    assert report["size"]["total_bytes"] == path.stat().st_size
    assert sorted(p.name for p in outcome.folder.iterdir()) == sorted([publish.ARTIFACT_NAME, additions.MEMBERS_NAME, publish.REPORT_NAME, REPORT_PAGE_NAME])
    assert "the plain filter is published instead" in cli.summary_text(report, outcome.folder)
