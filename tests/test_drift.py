"""Drift: each build measures the version in service on today's corpus, reports it (refused builds
too), compares against it in the gate, and survives a version in service that cannot be opened."""

import json
import shutil

import pytest

from tamis import publish
from tamis.drift import measure_drift
from tamis.loader import open_filter
from small_build import first_members, small_config, write_corpus
from tamis_testing import plain_build_flow

ALL_MEMBERS, FIRST = 3300, 3000


@pytest.fixture(scope="module")
def builds(tmp_path_factory):
    """Version 1 from the first 3,000 members; version 2 from all 3,300 (300 added since); then a
    build from 2,000 members that the member-drop limit refuses."""
    root = tmp_path_factory.mktemp("drift")
    members, lookups = write_corpus(root, members=ALL_MEMBERS)
    early = first_members(members, FIRST, root / "early.txt")
    shrunk = first_members(members, 2000, root / "shrunk.txt")
    store = root / "store"
    with plain_build_flow() as build_flow:  # the flow's own body, without Prefect's start-up
        first = build_flow(small_config(early, lookups, store))
        second = build_flow(small_config(members, lookups, store))
        refused = build_flow(small_config(shrunk, lookups, store))
    return {"root": root, "store": store, "members": members, "lookups": lookups,
            "first": first, "second": second, "refused": refused}


def test_the_first_build_has_nothing_in_service(builds):
    drift = builds["first"].report["drift"]
    assert drift["status"] == "none" and drift["current_version"] is None
    assert drift["members_missed"] is None and drift["heldout_fpr"] is None


def test_the_version_in_service_misses_only_members_added_since(builds):
    drift = builds["second"].report["drift"]
    assert drift["status"] == "evaluated" and drift["current_version"] == 1
    assert drift["members_built"] == FIRST
    # an independent count through the loader: version 1 answers every one of its own members
    # maybe (zero false negatives), so every miss is among the 300 added since
    keys = builds["members"].read_text(encoding="utf-8").splitlines()
    answers = open_filter(builds["store"] / "1" / publish.ARTIFACT_NAME).contains_many(keys)
    assert answers[:FIRST].all()
    assert drift["members_missed"] == int((~answers[FIRST:]).sum()) <= ALL_MEMBERS - FIRST
    assert drift["members_missed_share"] == pytest.approx(drift["members_missed"] / ALL_MEMBERS)


def test_its_held_out_rate_is_measured_like_verify_measures_a_new_build(builds):
    # the non-members did not change, so the held-out part is the same keys: version 1 must score
    # exactly what its own verify measured
    drift = builds["second"].report["drift"]
    own = builds["first"].report["heldout"]
    assert drift["heldout_fpr"] == own["fpr"] and drift["heldout_fpr_upper"] == own["fpr_upper"]
    assert drift["heldout"] == own


def test_a_refused_build_still_reports_drift_and_the_gate_names_the_member_drop(builds):
    refused = builds["refused"]
    assert not refused.published and refused.version is None
    assert [r.split(":")[0] for r in refused.report["gate"]["reasons"]] == ["max_member_drop"]
    assert "2,000 members against 3,300 in version 2" in refused.report["gate"]["reasons"][0]
    assert refused.report["drift"]["current_version"] == 2 and refused.report["drift"]["status"] == "evaluated"
    saved = json.loads((refused.folder / publish.REPORT_NAME).read_text())
    assert saved["drift"] == refused.report["drift"]
    assert publish.current_version(builds["store"]) == 2


def test_the_size_growth_check_compares_with_the_version_in_service(builds):
    second = builds["second"].report
    growth = next(c for c in second["gate"]["checks"] if c["rule"] == "max_size_growth")
    in_service = (builds["store"] / "1" / publish.ARTIFACT_NAME).stat().st_size
    assert growth["value"] == pytest.approx(second["size"]["total_bytes"] / in_service - 1)
    assert second["drift"]["artifact_bytes"] == in_service


def test_an_unopenable_version_in_service_is_reported_and_the_build_goes_on(builds, tmp_path):
    store = tmp_path / "store"
    shutil.copytree(builds["store"] / "2", store / "2")
    publish.set_current(store, 2)
    artifact = store / "2" / publish.ARTIFACT_NAME
    artifact.write_bytes(b"not an artifact at all")
    with plain_build_flow() as build_flow:
        outcome = build_flow(small_config(builds["members"], builds["lookups"], store))
    drift = outcome.report["drift"]
    assert drift["status"] == "unreadable" and drift["current_version"] == 2
    assert "cannot be evaluated" in drift["error"] and str(artifact) in drift["error"]
    assert drift["members_missed"] is None
    # nothing to compare with, so the change limits do not apply: the new build replaces the broken one
    assert outcome.published and outcome.version == 3 and publish.current_version(store) == 3


def test_a_current_file_that_names_no_version_is_reported_too(tmp_path):
    (tmp_path / publish.POINTER_NAME).write_text("banana\n")
    drift = measure_drift(tmp_path, None, 0.95)  # never read: the pointer fails first
    assert drift.status == "unreadable" and drift.current_version is None and "banana" in drift.error
    assert drift.baseline() is None and drift.as_report()["heldout_fpr"] is None
