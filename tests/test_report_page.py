"""The report page of a real small build: a well-formed document, its figures decodable PNGs of the
size asked for, and the build's key numbers in its text."""

import base64
import copy
import io
import json
import shutil
import struct
import xml.etree.ElementTree as ET

import numpy as np
import pytest
from PIL import Image

from tamis import cli
from tamis.report_page import FIGURE_DPI, FIGURE_INCHES, REPORT_PAGE_NAME, ScoreSample, drift_figure, render_report_page
from small_build import small_config, write_corpus
from tamis_testing import plain_build_flow

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"
DATA_URI = "data:image/png;base64,"
PIXELS = tuple(round(side * FIGURE_DPI) for side in FIGURE_INCHES)


@pytest.fixture(scope="module")
def builds(tmp_path_factory):
    """Two builds of one corpus into one store: the second has a version in service (drift). The
    first holds one member more, so that the second has inputs of its own (a build of the inputs of
    the version in service publishes nothing) and version 1 misses none of its members."""
    root = tmp_path_factory.mktemp("page")
    members, lookups = write_corpus(root)
    first_members = root / "first-members.txt"
    first_members.write_text(members.read_text(encoding="utf-8") + "version_one_only_member\n", encoding="utf-8")
    with plain_build_flow() as build_flow:  # the flow's own body, without Prefect's start-up
        first = build_flow(small_config(first_members, lookups, root / "store"))
        second = build_flow(small_config(members, lookups, root / "store"))
    return first, second


def parse(page: str) -> ET.Element:
    """The page through an XML parser: it fails on any unclosed tag, bad nesting or stray entity."""
    assert page.startswith("<!DOCTYPE html>\n")
    return ET.fromstring(page.removeprefix("<!DOCTYPE html>\n"))


def png_images(root: ET.Element) -> list[bytes]:
    sources = [img.get("src") for img in root.iter("img")]
    assert all(src.startswith(DATA_URI) for src in sources)
    return [base64.b64decode(src.removeprefix(DATA_URI), validate=True) for src in sources]


def ihdr_size(png: bytes) -> tuple[int, int]:
    """Width and height from the IHDR chunk, the first after the signature (PNG spec, W3C 2003 / ISO 15948)."""
    length, kind = struct.unpack(">I4s", png[8:16])
    assert kind == b"IHDR" and length == 13
    return struct.unpack(">II", png[16:24])


def text_of(root: ET.Element) -> str:
    return " ".join("".join(root.itertext()).split())


def test_the_page_is_a_well_formed_document_with_four_decodable_figures(builds):
    _, second = builds
    root = parse(second.page.read_text(encoding="utf-8"))
    assert root.tag == "html" and root.find("head/title") is not None
    images = png_images(root)
    assert len(images) == 4  # scores, regions, size, drift
    for png in images:
        assert png.startswith(PNG_SIGNATURE)
        assert ihdr_size(png) == PIXELS
        decoded = Image.open(io.BytesIO(png))  # Pillow decodes the whole image, checksums included
        decoded.load()
        assert decoded.size == PIXELS


def test_the_page_shows_the_key_numbers(builds):
    _, second = builds
    report = second.report
    text = text_of(parse(second.page.read_text(encoding="utf-8")))
    assert f"published as version {second.version}" in text
    assert f"{report['size']['total_bytes']:,}" in text
    assert f"{report['heldout']['fpr']:.4%}" in text and f"{report['heldout']['fpr_upper']:.4%}" in text
    assert f"{report['baseline']['bloom_bytes']:,}" in text
    assert f"{report['drift']['heldout_fpr']:.4%}" in text
    for check in report["gate"]["checks"]:
        assert check["rule"] in text
    for region in report["regions"]:
        assert f"{region['members']:,}" in text


def test_the_first_version_has_no_drift_figure(builds):
    first, _ = builds
    root = parse(first.page.read_text(encoding="utf-8"))
    assert len(png_images(root)) == 3
    assert "none: this is the store's first version" in text_of(root)


def test_a_refused_build_says_so_and_lists_its_reasons(builds):
    _, second = builds
    report = copy.deepcopy(second.report)
    report["version"] = None
    report["gate"]["passed"] = False
    report["gate"]["reasons"] = ["max_artifact_bytes: the artifact has 4000 bytes, over the limit of 100 <sic> & co"]
    scores = ScoreSample(np.array([5, 9, 12]), np.array([-3, 0, 7, 8]), np.array([1, 4, 1, 2]))
    root = parse(render_report_page(report, scores))
    text = text_of(root)
    assert "refused by the gate" in text and "over the limit of 100 <sic> & co" in text  # escaped, then parsed back


def test_show_prints_the_page_path(builds, capsys):
    _, second = builds
    store = second.folder.parent
    assert cli.main(["show", str(store)]) == 0
    out = capsys.readouterr().out
    assert f"report page: {store / str(second.version) / REPORT_PAGE_NAME}" in out
    # the report's drift line is the state when the build ran; the store's state now follows it
    assert "in service when built: version 1, which misses 0 of today's members" in out
    assert f"in service now: version {second.version} of store {store} (this version)" in out
    # the demo corpus has lookup counts: the rate is by lookups, and says so
    measured = second.report["heldout"]
    assert f"measured on {measured['lookups']:,} lookups of {measured['keys']:,} held-out keys (the rate is by lookups)" in out


def test_show_on_an_older_version_names_the_version_in_service_now(builds, capsys):
    first, second = builds
    store = second.folder.parent
    assert cli.main(["show", str(first.folder / "artifact.tamis")]) == 0
    out = capsys.readouterr().out
    assert "in service when built: none (this build found no version in service)" in out
    assert f"in service now: version {second.version} of store {store} (this artifact is version {first.version})" in out


@pytest.mark.parametrize("damage", ["cut", "not json", "fields missing"])
def test_show_still_shows_the_artifact_when_the_report_is_damaged(builds, tmp_path, capsys, damage):
    _, second = builds
    folder = tmp_path / "copy"
    shutil.copytree(second.folder, folder)
    report = folder / "report.json"
    text = report.read_text()
    report.write_text({"cut": text[: len(text) // 2], "not json": "[]", "fields missing": '{"version": 2}'}[damage])
    assert cli.main(["show", str(folder / "artifact.tamis")]) == 0
    out = capsys.readouterr().out
    assert "region  scores from" in out and "measured on" in out
    assert f"report: {report} is unreadable or incomplete" in out



def test_one_region_and_tied_scores_still_draw(builds):
    # the edge of a model that cannot separate: every key the same score, one region answering yes
    first, _ = builds
    report = copy.deepcopy(first.report)
    report["regions"] = [{"score_from": None, "score_to": None, "members": 10, "nonmember_share": 1.0, "fpr": 1.0,
                          "mode": "yes", "filter_bytes": 0}]
    scores = ScoreSample(np.zeros(10, dtype=np.int64), np.zeros(4, dtype=np.int64), np.array([1, 1, 2, 5]))
    images = png_images(parse(render_report_page(report, scores)))
    assert len(images) == 3 and all(ihdr_size(png) == PIXELS for png in images)


def test_the_page_names_its_provenance_and_explains_its_terms(builds):
    _, second = builds
    report = second.report
    root = parse(second.page.read_text(encoding="utf-8"))
    text = text_of(root)
    # the title names the build; the verdict is said once, below it
    title = root.find("head/title").text
    assert title == f"tamis build {report['build_id']}" and "published" not in title
    artifact = second.folder / "artifact.tamis"
    for shown in (report["paths"]["members"], report["paths"]["non_members"], str(artifact),
                  report["provenance"]["corpus_digest"], report["provenance"]["config_digest"],
                  f"tamis {report['provenance']['tool_version']}", "target.fpr", "gate.when_model_does_not_pay"):
        assert shown in text, shown
    # the files on disk hold the artifact's final path (written again once it was published)
    assert json.loads((second.folder / "report.json").read_text())["paths"]["artifact"] == str(artifact)
    assert "lower bound bytes (any filter without a model)" in text
    assert "the fewest bytes any filter without a model can take" in text
    for term in ("aim", "effective sample"):
        assert root.find(f".//dl/dt[.='{term}']") is not None, term
    assert "The model pays: the learned artifact takes" in text


def test_the_timings_include_report_publish_and_total(builds):
    _, second = builds
    timings = json.loads((second.folder / "report.json").read_text())["timings"]
    assert {"report", "publish", "total"} <= set(timings)
    assert timings["total"] >= sum(seconds for stage, seconds in timings.items() if stage != "total")
    rows = {row.findtext("td[1]") for row in parse(second.page.read_text(encoding="utf-8")).iter("tr")}
    assert {"report", "publish", "total"} <= rows


def test_the_drift_chart_reads_in_percent_and_draws_no_empty_members_chart(builds):
    from matplotlib.ticker import PercentFormatter

    _, second = builds
    report = second.report
    assert report["drift"]["members_missed"] == 0 and report["false_negatives"] == 0
    figure = drift_figure(report["drift"], report["heldout"], report["false_negatives"], report["target_fpr"])
    assert len(figure.axes) == 1  # nothing missed on either side: no chart of two zero bars
    assert isinstance(figure.axes[0].yaxis.get_major_formatter(), PercentFormatter)
    rows = {row.findtext("th"): row.findtext("td") for row in parse(second.page.read_text(encoding="utf-8")).iter("tr")}
    assert rows["today's members it misses"] == "none"
    missed = {**report["drift"], "members_missed": 3, "members_missed_share": 0.001}
    assert len(drift_figure(missed, report["heldout"], 0, report["target_fpr"]).axes) == 2


def test_the_strata_show_on_the_page_and_an_aim_below_half_the_target_is_said(builds):
    report = copy.deepcopy(builds[0].report)
    strata = report["strata"]
    assert strata["tau"] == 44 and strata["heavy_keys"] > 0 and 0 < strata["heavy_share"] < 1
    assert strata["heavy_share"] + strata["tail_share"] == pytest.approx(1.0)
    scores = ScoreSample(np.array([5, 9, 12]), np.array([-3, 0, 7, 8]), np.array([1, 4, 1, 2]))
    text = text_of(parse(render_report_page(report, scores)))
    assert "Lookups by stratum" in text and f"{strata['heavy_keys']:,}" in text
    assert len(cli.strata_lines(strata)) == (2 if strata["aim_below_half_target"] else 1)
    strata["aim_below_half_target"], strata["aim_fpr"] = True, report["target_fpr"] / 10
    said = cli.strata_lines(strata)
    assert len(said) == 2 and "below half the target" in said[1]
    assert "below half the target" in text_of(parse(render_report_page(report, scores)))


def relative_luminance(hex_colour: str) -> float:
    """WCAG 2.1 relative luminance of an sRGB colour (W3C, Web Content Accessibility Guidelines 2.1,
    definition of 'relative luminance')."""
    channels = [int(hex_colour[i:i + 2], 16) / 255 for i in (1, 3, 5)]
    linear = [c / 12.92 if c <= 0.04045 else ((c + 0.055) / 1.055) ** 2.4 for c in channels]
    return 0.2126 * linear[0] + 0.7152 * linear[1] + 0.0722 * linear[2]


def contrast_ratio(a: str, b: str) -> float:
    """(L1 + 0.05) / (L2 + 0.05), lighter over darker (WCAG 2.1, 'contrast ratio')."""
    high, low = sorted((relative_luminance(a), relative_luminance(b)), reverse=True)
    return (high + 0.05) / (low + 0.05)


def test_the_palette_is_in_one_place_and_every_text_colour_is_readable():
    """Every colour the page and its figures use comes from report_page.PALETTE, and each colour
    text is written in meets WCAG 2.1's 4.5:1 minimum for normal text against the page and the
    table heads (level AA, W3C)."""
    import inspect
    import re

    from tamis import report_page

    source = inspect.getsource(report_page)
    literals = set(re.findall(r"#[0-9a-fA-F]{6}\b", source))
    assert literals == set(report_page.PALETTE.values())
    assert all(source.count(colour) == 1 for colour in literals)  # written once, in PALETTE
    assert '"black"' not in source and "'black'" not in source
    # a check of the formula itself: black on white is 21:1, the published maximum
    assert contrast_ratio("#000000", "#ffffff") == pytest.approx(21.0)
    for text in ("ink", "passed", "refused", "member", "nonmember", "boundary"):
        for ground in ("page", "shade"):
            ratio = contrast_ratio(report_page.PALETTE[text], report_page.PALETTE[ground])
            assert ratio >= 4.5, (text, ground, ratio)


def test_a_region_with_budget_zero_is_labelled_on_the_budget_plot():
    from tamis.report_page import regions_figure

    regions = [
        {"mode": "no", "fpr": 0.0, "filter_bytes": 0},
        {"mode": "filter", "kind": "bloom", "hashes": 4, "fpr": 0.02, "filter_bytes": 100},
        {"mode": "yes", "fpr": 1.0, "filter_bytes": 0},
    ]
    figure = regions_figure(regions)
    budget_ax = figure.axes[0]
    assert [t.get_text() for t in budget_ax.texts] == ["0: answers no"]


def test_the_drift_legend_stays_inside_the_figure(builds):
    """The legend's box, once drawn, lies within the figure's pixels and overlaps no axes."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    report = builds[1].report
    figure = drift_figure(report["drift"], report["heldout"], report["false_negatives"], report["target_fpr"])
    canvas = FigureCanvasAgg(figure)
    canvas.draw()
    renderer = canvas.get_renderer()
    width, height = canvas.get_width_height()
    (legend,) = figure.legends
    box = legend.get_window_extent(renderer)
    assert 0 <= box.x0 and box.x1 <= width and 0 <= box.y0 and box.y1 <= height
    for ax in figure.axes:
        assert not box.overlaps(ax.get_window_extent(renderer))


def test_the_size_parts_add_up_and_the_cleaning_is_said(builds):
    """model + filters + header and layout = the artifact's bytes, on the page and in the summary;
    repeated rows and conflicts are named in both."""
    from tamis.cli import summary_text

    first, _ = builds
    report = first.report
    size = report["size"]
    assert size["model_bytes"] + size["filter_bytes"] + size["layout_bytes"] == size["total_bytes"]
    assert size["layout_bytes"] > 0
    rows = {row.findtext("th"): row.findtext("td") for row in parse(first.page.read_text(encoding="utf-8")).iter("tr")}
    assert rows["model / filters / header and layout bytes"] == (
        f"{size['model_bytes']:,} / {size['filter_bytes']:,} / {size['layout_bytes']:,}")
    corpus = report["corpus"]
    assert rows["keys listed on both sides (kept as members)"] == f"{corpus['conflicts']:,}"
    assert "automatic (corpus.heavy_count = 0)" in rows["tau (heavy from this many lookups)"]
    summary = summary_text(report, first.folder)
    assert f"{size['layout_bytes']:,}" in summary
    dirty = {**report, "corpus": {**corpus, "member_duplicates": 5_000, "conflicts": 100}}
    assert "repeated rows merged: 5,000 member" in summary_text(dirty, first.folder)
    assert "keys on both sides kept as members: 100" in summary_text(dirty, first.folder)


def test_keys_unlike_the_sample_are_measured_and_shown_with_the_cost_of_a_cap(builds):
    from tamis.cli import summary_text
    from tamis.probes import FAMILIES

    first, _ = builds
    unlike = first.report["unlike_keys"]
    assert set(unlike["families"]) == set(FAMILIES)
    assert all(0.0 <= row["maybe_rate"] <= 1.0 and row["probes"] > 0 for row in unlike["families"].values())
    assert unlike["cap"]["planned_bytes_with"] >= unlike["cap"]["planned_bytes_without"]
    (rule,) = [c for c in first.report["gate"]["checks"] if c["rule"] == "max_unlike_rate"]
    assert rule["passed"] and rule["value"] == unlike["worst_rate"]
    text = text_of(parse(first.page.read_text(encoding="utf-8")))
    assert "Keys unlike the sample" in text and "host names" in text
    assert "keys unlike the sample answered maybe" in summary_text(first.report, first.folder)


def test_the_page_says_what_additions_the_build_folded_in(builds):
    from tamis.report_page import page_html

    report = {**builds[0].report, "additions": {"folded_through": 7, "batches": 3, "keys": 500, "not_in_export": 12}}
    rows = {row.findtext("th"): row.findtext("td") for row in parse(page_html(report, {})).iter("tr")}
    assert rows["members added between builds, folded in"] == "500 from 3 batches (through batch 7)"
    assert rows["of them not in today's export (kept as members)"] == "12"
