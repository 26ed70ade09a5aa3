"""The build report page: `report.html` beside report.json, one self-contained file.

It shows the gate's decision and the key numbers as tables, and four figures embedded as base64
PNG: the member and non-member score distributions with the region boundaries, the regions'
false-positive budgets and filter sizes, the artifact against a plain Bloom filter and the lower
bound, and (when a version is in service) the drift figures. Its inputs are the report dict and
plain score arrays; matplotlib is used through its object API with the Agg canvas, so no global
backend is chosen and no display is needed, and it is imported only when a figure is drawn (about
a second), so `tamis show` reads the page's name without it. The page is XHTML-compatible HTML5 (every tag
closed, only the five XML entities), so an XML parser reads it too.
"""

from __future__ import annotations

import base64
import html
import io
import json
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

from typing import TYPE_CHECKING

import numpy as np

from tamis.artifact import write_atomically
from tamis.sizing import BLOOM_OVERHEAD

if TYPE_CHECKING:
    from matplotlib.figure import Figure

REPORT_PAGE_NAME = "report.html"

# Every figure is 8 x 3.6 inches at 100 dots per inch: 800 x 360 pixels, wide enough for a laptop
# screen at full resolution and small enough to keep the page under a megabyte.
FIGURE_INCHES = (8.0, 3.6)
FIGURE_DPI = 100

# Bins of the score histograms: enough to show the shape of each distribution, few enough that
# the sparser one (members in the low-score bins) is not all noise.
SCORE_BINS = 80

# The page's palette, ours and in one place: warm ember for members, deep lake blue for non-members,
# stone grey for boundaries and the container's rest, on paper-white with near-black ink. Every text
# colour keeps a contrast ratio of at least 4.5 against the page (tests/test_report_page.py).
PALETTE = {
    "ink": "#1e2527",          # body text
    "rule": "#c8c1b4",         # table borders
    "shade": "#f3efe6",        # table heads
    "page": "#ffffff",         # background
    "passed": "#2d6a3f",       # the gate passed
    "refused": "#a4262c",      # the gate refused
    "member": "#a0481a",       # members, model bytes, the target line
    "nonmember": "#2a5b8c",    # non-members, filter bytes
    "boundary": "#6d6962",     # region boundaries, the lower bound, header and layout
}
MEMBER_COLOUR, NONMEMBER_COLOUR, BOUNDARY_COLOUR = PALETTE["member"], PALETTE["nonmember"], PALETTE["boundary"]


@dataclass(frozen=True)
class ScoreSample:
    """The scores the report page plots: every member's, and the validation non-members' with
    their lookup counts as weights (the sample the region plan used)."""

    member_scores: np.ndarray
    validation_scores: np.ndarray
    validation_weights: np.ndarray


# ---------------------------------------------------------------------------------------------------
# Figures: each a function from plain data to a matplotlib Figure.
# ---------------------------------------------------------------------------------------------------


def _figure(columns: int = 1) -> tuple[Figure, list]:
    from matplotlib.figure import Figure

    figure = Figure(figsize=FIGURE_INCHES, dpi=FIGURE_DPI, layout="constrained")
    axes = figure.subplots(1, columns, squeeze=False)[0]
    return figure, list(axes)


def boundaries_of(regions: Sequence[dict]) -> list[int]:
    """The region boundaries from the report's region rows (each region's `score_from` but the first's)."""
    return [int(region["score_from"]) for region in regions[1:]]


def score_figure(scores: ScoreSample, boundaries: Sequence[int]) -> Figure:
    """Share of members and of non-member lookups per score bin, on a log scale, with the
    region boundaries as dashed lines."""
    figure, (ax,) = _figure()
    members = np.asarray(scores.member_scores, dtype=np.float64)
    others = np.asarray(scores.validation_scores, dtype=np.float64)
    weights = np.asarray(scores.validation_weights, dtype=np.float64)
    edges = np.histogram_bin_edges(np.concatenate([members, others, np.asarray(boundaries, dtype=np.float64)]), SCORE_BINS)
    ax.hist(members, bins=edges, weights=np.full(len(members), 1 / max(len(members), 1)), histtype="step",
            log=True, color=MEMBER_COLOUR, label=f"members ({len(members):,})")
    ax.hist(others, bins=edges, weights=weights / weights.sum(), histtype="step", log=True, color=NONMEMBER_COLOUR,
            label=f"non-member lookups, validation ({len(others):,} keys)")
    for boundary in boundaries:
        ax.axvline(boundary, color=BOUNDARY_COLOUR, linestyle="--", linewidth=1)
    span = [edges[0], *boundaries, edges[-1]]
    for index, (low, high) in enumerate(zip(span[:-1], span[1:])):
        ax.text((low + high) / 2, 0.98, f"R{index}", transform=ax.get_xaxis_transform(), ha="center", va="top",
                fontsize=8, color=BOUNDARY_COLOUR)
    ax.set_xlabel("score (higher = more member-like); dashed: region boundaries")
    ax.set_ylabel("share per bin (log scale)")
    figure.legend(loc="outside upper center", ncols=2, fontsize=8, frameon=False)
    return figure


def kind_label(region: dict) -> str:
    """A region's filter in a few characters: "bloom k=7", "fuse r=7", "yes", "no"."""
    kind = region.get("kind", region["mode"])
    if kind == "fuse":
        return f"fuse r={region['width']}"
    if kind == "bloom" and region.get("hashes"):
        return f"bloom k={region['hashes']}"
    return f'"{kind}"' if kind in ("yes", "no") else kind


def regions_figure(regions: Sequence[dict]) -> Figure:
    """Each region's false-positive budget (log scale) and the bytes of its backup filter."""
    figure, (budget_ax, bytes_ax) = _figure(columns=2)
    index = np.arange(len(regions))
    labels = [f"R{i}" for i in index]
    fprs = np.array([region["fpr"] for region in regions], dtype=np.float64)
    shown = np.where(fprs > 0, fprs, np.nan)  # budget 0 has no bar on a log axis: it is written instead
    budget_ax.bar(index, shown, color=NONMEMBER_COLOUR)
    budget_ax.set_yscale("log")
    budget_ax.set_ylabel("false-positive budget (log scale)")
    for i in np.flatnonzero(fprs == 0):
        budget_ax.annotate("0: answers no", (i, 0), xycoords=("data", "axes fraction"), ha="center", va="bottom",
                           fontsize=8, rotation=90, color=BOUNDARY_COLOUR)
    bytes_ax.bar(index, [region["filter_bytes"] for region in regions], color=MEMBER_COLOUR)
    bytes_ax.set_ylabel("backup filter bytes")
    for ax in (budget_ax, bytes_ax):
        ax.set_xticks(index, labels)
        ax.set_xlabel("region")
    for i, region in enumerate(regions):
        bytes_ax.annotate(kind_label(region), (i, 0), ha="center", va="bottom", fontsize=8)
    return figure


def size_figure(size: dict, baseline: dict) -> Figure:
    """The artifact (model, filters, the rest of the container) against a plain Bloom filter at the
    same target and the lower bound n log2(1/F) bits of any filter."""
    figure, (ax,) = _figure()
    rows = ["lower bound", "this artifact", "plain Bloom filter"]
    rest = size["total_bytes"] - size["model_bytes"] - size["filter_bytes"]
    ax.barh(0, baseline["lower_bound_bytes"], color=BOUNDARY_COLOUR)
    left = 0.0
    for part, value, colour in (("model", size["model_bytes"], MEMBER_COLOUR),
                                ("filters", size["filter_bytes"], NONMEMBER_COLOUR),
                                ("header and layout", rest, BOUNDARY_COLOUR)):
        ax.barh(1, value, left=left, color=colour, label=part, alpha=1.0 if part != "header and layout" else 0.5)
        left += value
    ax.barh(2, baseline["bloom_bytes"], color=NONMEMBER_COLOUR, alpha=0.5)
    for row, value in enumerate((baseline["lower_bound_bytes"], size["total_bytes"], baseline["bloom_bytes"])):
        ax.annotate(f" {value:,.0f} bytes", (value, row), va="center", fontsize=8)
    ax.set_yticks(range(len(rows)), rows)
    ax.set_xlabel("bytes")
    ax.set_xlim(0, max(baseline["bloom_bytes"], size["total_bytes"]) * 1.25)
    ax.legend(loc="lower right", fontsize=8)
    return figure


def drift_figure(drift: dict, heldout: dict, false_negatives: int, target: float) -> Figure:
    """The version in service against this build: held-out false-positive rate in percent (bar:
    measured, mark: upper bound) beside the target, and, when either misses any, today's members
    each one misses."""
    from matplotlib.ticker import PercentFormatter

    missed = [drift["members_missed"], false_negatives]
    figure, axes = _figure(columns=2 if any(missed) else 1)  # nothing missed: the page says "none" instead
    fpr_ax = axes[0]
    names = [f"version {drift['current_version']}\nin service", "this build"]
    rates = [drift["heldout_fpr"], heldout["fpr"]]
    uppers = [drift["heldout_fpr_upper"], heldout["fpr_upper"]]
    fpr_ax.bar([0, 1], rates, color=[BOUNDARY_COLOUR, NONMEMBER_COLOUR])
    fpr_ax.plot([0, 1], uppers, linestyle="none", marker="_", markersize=30, color=PALETTE["ink"], label="upper bound")
    fpr_ax.axhline(target, color=MEMBER_COLOUR, linestyle="--", label="target")
    fpr_ax.set_xticks([0, 1], names)
    fpr_ax.set_ylabel("held-out false-positive rate")
    fpr_ax.yaxis.set_major_formatter(PercentFormatter(xmax=1.0))  # percent, as in the tables
    fpr_ax.set_ylim(0, max(target, *uppers) * 1.15)
    figure.legend(loc="outside upper center", ncols=2, fontsize=8, frameon=False)  # above the axes, never over a bar
    if not any(missed):
        return figure
    missed_ax = axes[1]
    missed_ax.bar([0, 1], missed, color=[BOUNDARY_COLOUR, NONMEMBER_COLOUR])
    for x, value in enumerate(missed):
        missed_ax.annotate(f"{value:,}", (x, value), ha="center", va="bottom", fontsize=8)
    missed_ax.set_xticks([0, 1], names)
    missed_ax.set_ylim(0, max(missed) * 1.2)
    missed_ax.set_ylabel("today's members answered no")
    return figure


def png_data_uri(figure: Figure) -> str:
    """The figure as a `data:image/png;base64,...` URI."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg

    buffer = io.BytesIO()
    FigureCanvasAgg(figure).print_png(buffer)  # renders at the figure's own dpi
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


# ---------------------------------------------------------------------------------------------------
# Tables and the page.
# ---------------------------------------------------------------------------------------------------


def _table(headers: Sequence[str], rows: Sequence[Sequence[object]]) -> str:
    head = "".join(f"<th>{html.escape(str(h))}</th>" for h in headers)
    body = "".join("<tr>" + "".join(f"<td>{html.escape(str(cell))}</td>" for cell in row) + "</tr>" for row in rows)
    return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"


def _pairs(rows: Sequence[tuple[str, object]]) -> str:
    body = "".join(f"<tr><th>{html.escape(name)}</th><td>{html.escape(str(value))}</td></tr>" for name, value in rows)
    return f"<table><tbody>{body}</tbody></table>"


def _percent(value: float | None) -> str:
    return "n/a" if value is None else f"{value:.4%}"


def _signed_percent(value: float | None) -> str:
    return "n/a" if value is None else f"{value:+.1%}"


def _share(value: float | None) -> str:
    return "n/a" if value is None else f"{value:.1%}"


def _count(value: float | None) -> str:
    return "n/a" if value is None else f"{value:,}"


_GATE_VALUE_FORMATS: dict[str, Callable[[float | None], str]] = {
    "fpr_upper": _percent,
    "max_size_growth": _signed_percent,
    "max_member_drop": _share,
}


def decision_text(report: dict) -> str:
    if report["gate"]["passed"]:
        return f"published as version {report['version']}"
    return "refused by the gate"


def key_numbers(report: dict) -> list[tuple[str, object]]:
    corpus, held, size, base = report["corpus"], report["heldout"], report["size"], report["baseline"]
    split = corpus["split"]
    return [
        ("decision", decision_text(report)),
        ("version", "none (refused)" if report["version"] is None else report["version"]),
        ("build", report["build_id"]),
        ("built at", report["built_at"]),
        ("target false-positive rate", _percent(report["target_fpr"])),
        ("planned for (aim)", _percent(report["aim_fpr"])),
        ("members", _count(corpus["members"])),
        *corpus_cleaning_rows(corpus),
        *additions_rows(report.get("additions")),
        ("non-members (train / validation / held-out)",
         f"{corpus['non_members']:,} ({split['train']:,} / {split['validation']:,} / {split['heldout']:,})"),
        ("lookups", _count(corpus["lookups"]) + ("" if corpus["has_counts"] else " (no counts: one a key)")),
        ("held-out false-positive rate", _percent(held["fpr"])),
        (f"held-out upper bound ({held['confidence']:.0%})", _percent(held["fpr_upper"])),
        ("held-out false positives (keys / lookups)", f"{held['false_positives']:,} / {held['false_positive_lookups']:,}"),
        ("held-out effective sample", f"{held['effective_sample']:,.1f}"),
        ("expected rate on validation lookups", _percent(report["expected_fpr"])),
        ("false negatives", report["false_negatives"]),
        ("answer paths verified (every member)", verified_paths_text(report.get("answer_paths", {}))),
        ("artifact bytes", _count(size["total_bytes"])),
        ("model / filters / header and layout bytes", size_parts_text(size)),
        ("bits per member", f"{size['bits_per_member']:.2f}"),
        ("plain Bloom filter bytes at the target, bits alone (ratio)", f"{base['bloom_bytes']:,} ({base['ratio']:.3f})"),
        *([("best plain static filter bytes (kind, ratio)",
            f"{base['static_bytes']:,} ({base['static_kind']}, {base['static_ratio']:.3f})")] if base.get("static_kind") else []),
        ("lower bound bytes (any filter without a model)", f"{base['lower_bound_bytes']:,.0f}"),
        ("KL divergence / AUC", f"{report['separation']['kl_bits']:.3f} bits / {report['separation']['auc']:.4f}"),
        ("model", f"{report['model']['trees']} trees"),
    ]


def verified_paths_text(agreement: dict) -> str:
    """The query paths the verify stage checked every member through, and each it could not, with why."""
    verified = ", ".join(agreement.get("verified_paths", []))
    skipped = "; ".join(f"NOT {name}: {why}" for name, why in agreement.get("not_verified", {}).items())
    return f"{verified}; {skipped}" if skipped else verified


def size_parts_text(size: dict) -> str:
    """The artifact's three parts, which add up to its size (reports before `layout_bytes` derive it)."""
    layout = size.get("layout_bytes", size["total_bytes"] - size["model_bytes"] - size["filter_bytes"])
    return f"{size['model_bytes']:,} / {size['filter_bytes']:,} / {layout:,}"


def additions_rows(folded: dict | None) -> list[tuple[str, object]]:
    """Members added between builds (`tamis add`) that this build folded in."""
    if not folded:
        return []
    return [
        ("members added between builds, folded in", f"{folded['keys']:,} from {folded['batches']:,} batches "
                                                     f"(through batch {folded['folded_through']})"),
        ("of them not in today's export (kept as members)", _count(folded["not_in_export"])),
    ]


def corpus_cleaning_rows(corpus: dict) -> list[tuple[str, object]]:
    """What the corpus stage removed or relabelled: repeated rows and keys on both sides."""
    if "member_duplicates" not in corpus:
        return []
    return [
        ("repeated rows merged (members / non-members)",
         f"{corpus['member_duplicates']:,} / {corpus['non_member_duplicates']:,}"),
        ("keys listed on both sides (kept as members)", _count(corpus["conflicts"])),
    ]


def sample_rows(sample: dict) -> list[tuple[str, object]]:
    """What the lookup sample written by served filters held (tamis.traffic)."""
    return [
        ("files / replicas", f"{sample['files']:,} / {sample['replicas']:,}"
                             + (f" ({sample['skipped_old_files']:,} older files left out)" if sample["skipped_old_files"] else "")),
        ("periods", f"{sample['period_from']} to {sample['period_to']}"),
        ("sample rate (each lookup kept with)", ", ".join(f"{rate:.6g}" for rate in sample["sample_rates"])),
        ("distinct keys / sampled lookups", f"{sample['keys']:,} / {sample['lookups']:,}"),
        ("lookups of members left out (keys / lookups)", f"{sample['member_keys']:,} / {sample['member_lookups']:,}"),
        ("keys no build can hold, left out (keys / lookups)", f"{sample['unusable_keys']:,} / {sample['unusable_lookups']:,}"),
    ]


def observed_rows(served: list[dict]) -> list[list[object]]:
    """Per version served while the sample was written: the rate its build certified beside the
    rate the service observed from its confirmations of "maybe"."""
    return [
        [row["version"] if row["version"] is not None else "?", _percent(row["fpr"]), _percent(row["fpr_upper"]),
         f"{row['lookups']:,}", _percent(row["rate"]), f"{_percent(row['rate_low'])} to {_percent(row['rate_high'])}",
         f"{row['unconfirmed']:,}"]
        for row in served
    ]


def unlike_html(unlike: dict | None) -> list[str]:
    """Keys unlike the sample (tamis.probes): each family's share of maybe, and the cost of a cap."""
    if not unlike:
        return []
    cap = unlike["cap"]
    rows = [[name, f"{row['probes']:,}", _percent(row["maybe_rate"])] for name, row in unlike["families"].items()]
    return [
        "<h2>Keys unlike the sample</h2>",
        f"<p>The certified rate (upper bound {html.escape(_percent(unlike['certified_upper']))}) holds for lookups drawn "
        "like the sample. Families of keys of other shapes, none of them members, were asked of the artifact:</p>",
        _table(["family", "keys asked", "answered maybe"], rows),
        f"<p>A cap of {html.escape(_percent(cap['max_region_fpr']))} on every region (regions.max_region_fpr) would bound "
        f"any family's rate, for {cap['ratio'] - 1:+.1%} planned bytes ({cap['planned_bytes_without']:,} to "
        f"{cap['planned_bytes_with']:,}); gate.max_unlike_rate refuses an artifact whose worst family is above it.</p>",
    ]


def sample_html(sample: dict | None) -> list[str]:
    if not sample:
        return []
    return [
        "<h2>Lookup sample from the service</h2>",
        _pairs(sample_rows(sample)),
        _table(["version", "certified rate", "certified upper bound", "lookups answered", "observed rate",
                "observed 95% interval", "maybes not confirmed"], observed_rows(sample["served"])),
    ]


def strata_rows(strata: dict) -> list[tuple[str, object]]:
    """The two strata of the bound: heavy keys answered exactly, the tail sampled."""
    aim_note = " (below half the target: the held-out tail is too small to aim closer)" if strata["aim_below_half_target"] else ""
    return [
        ("tau (heavy from this many lookups)", _count(strata["tau"]) + (f": {strata['tau_rule']}" if "tau_rule" in strata else "")),
        ("heavy keys / their lookups", f"{strata['heavy_keys']:,} / {strata['heavy_lookups']:,}"),
        ("heavy share of lookups", _percent(strata["heavy_share"])),
        ("heavy false positives (keys / share of lookups)",
         f"{strata['heavy_false_positive_keys']:,} / {_percent(strata['heavy_false_positive_share'])}"),
        ("tail share of lookups", _percent(strata["tail_share"])),
        ("tail held-out keys / lookups", f"{strata['tail_heldout_keys']:,} / {strata['tail_heldout_lookups']:,}"),
        ("tail effective sample", f"{strata['tail_effective_sample']:,.1f}"),
        (f"tail rate / its upper bound ({strata['confidence']:.0%})",
         f"{_percent(strata['tail_fpr'])} / {_percent(strata['tail_fpr_upper'])}"),
        ("planned for (aim)", _percent(strata["aim_fpr"]) + aim_note),
        (f"heavy false-positive lookups: first filter variants / best of {strata['hot_keys']['variants']}",
         f"{strata['hot_keys']['heavy_false_positive_lookups_first']:,} / {strata['hot_keys']['heavy_false_positive_lookups_chosen']:,}"),
    ]


def gate_rows(report: dict) -> list[list[str]]:
    rows = []
    for check in report["gate"]["checks"]:
        show = _GATE_VALUE_FORMATS.get(check["rule"], _count)
        result = "passed" if check["passed"] else "REFUSED"
        rows.append([check["rule"], result, show(check["value"]), show(check["limit"]) if check["limit"] is not None else "off",
                     check["detail"]])
    return rows


def region_rows(regions: Sequence[dict]) -> list[list[object]]:
    return [
        [f"R{i}", "-inf" if r["score_from"] is None else r["score_from"], "+inf" if r["score_to"] is None else r["score_to"],
         f"{r['members']:,}", f"{r['nonmember_share']:.4%}", f"{r['fpr']:.4%}", kind_label(r), f"{r['filter_bytes']:,}",
         _optional_percent(r.get("planned_fpr")), _optional_percent(r.get("measured_fpr")),
         "-" if r.get("measured_keys") is None else f"{r['measured_keys']:,}"]
        for i, r in enumerate(regions)
    ]


def _optional_percent(value: float | None) -> str:
    return "-" if value is None else f"{value:.4%}"


def drift_rows(drift: dict, report: dict) -> list[tuple[str, object]]:
    if drift["status"] == "none":
        return [("version in service", "none: this is the store's first version")]
    if drift["status"] == "unreadable":
        return [("version in service", drift["current_version"] or "unknown"), ("could not be evaluated", drift["error"])]
    return [
        ("version in service", drift["current_version"]),
        ("its bytes / this build's", f"{drift['artifact_bytes']:,} / {report['size']['total_bytes']:,}"),
        ("its members / today's", f"{drift['members_built']:,} / {report['corpus']['members']:,}"),
        ("today's members it misses",
         "none" if not drift["members_missed"] else f"{drift['members_missed']:,} ({drift['members_missed_share']:.2%})"),
        ("its held-out false-positive rate", _percent(drift["heldout_fpr"])),
        ("its held-out upper bound", _percent(drift["heldout_fpr_upper"])),
    ]


_STYLE = f"""
body {{ font-family: system-ui, sans-serif; margin: 2em auto; max-width: 62em; color: {PALETTE["ink"]}; background: {PALETTE["page"]}; }}
h1 {{ font-size: 1.4em; }} h2 {{ font-size: 1.15em; margin-top: 1.6em; }}
table {{ border-collapse: collapse; margin: 0.6em 0; font-size: 0.9em; }}
th, td {{ border: 1px solid {PALETTE["rule"]}; padding: 0.25em 0.6em; text-align: left; vertical-align: top; }}
thead th {{ background: {PALETTE["shade"]}; }}
.passed {{ color: {PALETTE["passed"]}; }} .refused {{ color: {PALETTE["refused"]}; }}
img {{ display: block; max-width: 100%; }}
"""


def _image(uri: str, alt: str) -> str:
    width, height = (round(side * FIGURE_DPI) for side in FIGURE_INCHES)
    return f'<img src="{uri}" width="{width}" height="{height}" alt="{html.escape(alt)}"/>'


# What the page's less common words mean, said once below the key numbers.
TERMS = (
    ("aim", "the false-positive rate the regions were planned for, below the target: the held-out measurement "
            "has sampling error, so a build planned right at the target would fail the gate's upper bound about "
            "half the time; planning at the aim leaves room for that error (gate.aim_sigmas, gate.confidence)."),
    ("effective sample", "how many independent draws the held-out keys are worth. Without lookup counts it is "
                         "their number; with counts the rate is by lookups, and a few heavy keys weigh like few "
                         "draws: Kish's (sum of counts)^2 / sum of squared counts. The upper bound is computed on it."),
    ("lower bound", "n log2(1/F) bits for n members at rate F: the fewest bytes any filter without a model can "
                    f"take (a plain Bloom filter needs about {BLOOM_OVERHEAD:.2f} times that). A learned filter may go below it, "
                    "because its model already tells most non-members from members; when the artifact is above "
                    "it, the model did not earn that much."),
)


def provenance_rows(report: dict) -> list[tuple[str, object]]:
    provenance, paths = report["provenance"], report.get("paths", {})
    return [
        ("tool version", f"tamis {provenance['tool_version']}"),
        ("built at", report["built_at"]),
        ("build", report["build_id"]),
        ("members", paths.get("members", "n/a")),
        ("non-members", paths.get("non_members", "n/a")),
        ("corpus digest (xxh3-128 of every key and count)", provenance["corpus_digest"]),
        ("config digest (xxh3-128 of the settings that shape the artifact)", provenance["config_digest"]),
        ("store", paths.get("store", "n/a")),
        ("artifact", paths.get("artifact") or "being published (this page is rewritten once it is)"),
    ]


def config_rows(config: dict) -> list[list[str]]:
    """The build's settings, one row a key (section.key = value)."""
    return [[f"{section}.{key}", json.dumps(value)] for section, table in config.items() for key, value in table.items()]


def plain_filter_text(plain: dict) -> str:
    """The learned artifact against the plain filter it would replace, in a sentence."""
    learned, bytes_ = plain["learned_bytes"], plain["plain_bytes"]
    if plain["model_pays"]:
        return (f"The model pays: the learned artifact takes {learned:,} bytes, {1 - learned / bytes_:.1%} less than "
                f"the {bytes_:,} of a plain filter (no model) certified the same way.")
    return (f"The model does not pay: the learned artifact takes {learned:,} bytes against {bytes_:,} for a plain "
            f"filter (no model) certified the same way; {plain_filter_outcome(plain)}.")


def plain_filter_outcome(plain: dict) -> str:
    """What the build did with a learned artifact that does not pay, and the setting that chose it."""
    if plain["published"] == "plain":
        outcome = "the plain filter is published instead"
    elif plain["when_model_does_not_pay"] == "refuse":
        outcome = "the gate refuses the build"
    else:
        outcome = "the learned artifact is published anyway"
    return f"{outcome} (gate.when_model_does_not_pay = \"{plain['when_model_does_not_pay']}\")"


def draw_figures(report: dict, scores: ScoreSample) -> dict[str, str]:
    """The page's figures as PNG data URIs, by name (the slow part of the page: about a second)."""
    figures = {
        "score distributions": score_figure(scores, boundaries_of(report["regions"])),
        "region budgets and filter sizes": regions_figure(report["regions"]),
        "size against a plain Bloom filter and the lower bound": size_figure(report["size"], report["baseline"]),
    }
    drift = report["drift"]
    if drift["status"] == "evaluated":
        figures["drift of the version in service"] = drift_figure(drift, report["heldout"], report["false_negatives"],
                                                                   report["target_fpr"])
    return {name: png_data_uri(figure) for name, figure in figures.items()}


def _figure_html(figures: dict[str, str], name: str) -> list[str]:
    return [_image(figures[name], name)] if name in figures else []


def page_html(report: dict, figures: dict[str, str]) -> str:
    """The whole page as text, with figures drawn by `draw_figures` (any missing one is left out)."""
    passed = report["gate"]["passed"]
    title = f"tamis build {report['build_id']}"  # the verdict is said once, just below
    drift = report["drift"]
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8"/>',
        f"<title>{html.escape(title)}</title><style>{_STYLE}</style></head><body>",
        f"<h1>{html.escape(title)}</h1>",
        f'<p class="{"passed" if passed else "refused"}"><strong>{html.escape(decision_text(report))}</strong></p>',
    ]
    parts += [f"<p class=\"refused\">{html.escape(reason)}</p>" for reason in report["gate"]["reasons"]]
    if "plain_filter" in report:
        plain = report["plain_filter"]
        parts.append(f'<p class="{"passed" if plain["model_pays"] else "refused"}">{html.escape(plain_filter_text(plain))}</p>')
    parts += [
        "<h2>Gate</h2>",
        _table(["rule", "result", "value", "limit", "detail"], gate_rows(report)),
        "<h2>Key numbers</h2>",
        _pairs(key_numbers(report)),
        "<dl>" + "".join(f"<dt>{html.escape(term)}</dt><dd>{html.escape(text)}</dd>" for term, text in TERMS) + "</dl>",
        "<h2>Lookups by stratum</h2>",
        _pairs(strata_rows(report["strata"])),
        "<h2>Score distributions</h2>",
        *_figure_html(figures, "score distributions"),
        "<h2>Regions</h2>",
        *_figure_html(figures, "region budgets and filter sizes"),
        _table(["region", "scores from", "to", "members", "non-member share", "budget", "filter", "filter bytes",
                "rate as built", "rate measured", "held-out keys"],
               region_rows(report["regions"])),
        "<h2>Size</h2>",
        *_figure_html(figures, "size against a plain Bloom filter and the lower bound"),
        "<p>The lower bound is the fewest bytes any filter without a model can take for these members at the "
        f"target, n log2(1/F) bits; a plain Bloom filter needs about {BLOOM_OVERHEAD:.2f} times that. The learned artifact beats "
        "it only as far as its model tells non-members from members.</p>",
        *unlike_html(report.get("unlike_keys")),
        *sample_html(report["corpus"].get("sample")),
        "<h2>Drift of the version in service</h2>",
        _pairs(drift_rows(drift, report)),
        *_figure_html(figures, "drift of the version in service"),
        "<h2>Timings</h2>",
        _table(["stage", "seconds"], [[stage, f"{seconds:.1f}"] for stage, seconds in report["timings"].items()]),
        "<h2>Provenance</h2>",
        _pairs(provenance_rows(report)),
        "<h3>Configuration</h3>",
        _table(["setting", "value"], config_rows(report.get("config", {}))),
        "</body></html>",
    ]
    return "\n".join(parts) + "\n"


def render_report_page(report: dict, scores: ScoreSample) -> str:
    """The whole page as text, its figures drawn from `scores`."""
    return page_html(report, draw_figures(report, scores))


def write_report_page(folder: Path, report: dict, figures: dict[str, str]) -> Path:
    """Write `report.html` into `folder` (atomically) with figures already drawn; return its path."""
    path = folder / REPORT_PAGE_NAME
    write_atomically(path, [page_html(report, figures).encode("utf-8")])
    return path
