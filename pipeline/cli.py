"""The `tamis` command line.

Exit codes: 0 done (published), 1 refused by the gate, 2 bad input (one line on stderr says what,
where and how to fix it), 3 the build failed inside a stage (a line names the stage and the error,
the traceback follows; nothing was published).
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import sys
import time
import traceback
from importlib import resources
from pathlib import Path

from tamis import publish
from tamis.keylines import DEFAULT_MAX_KEY_BYTES
from tamis.version import tool_version
from tamis.errors import BadInput

EXIT_PUBLISHED, EXIT_REFUSED, EXIT_BAD_INPUT, EXIT_FAILED = 0, 1, 2, 3

# The modules of the `build` extra (pyproject.toml): `tamis build`, `demo` and `schedule` need them,
# a plain install (the loader: lookup, show, versions, rollback) does not.
BUILD_STACK = ("polars", "lightgbm", "scipy", "prefect", "matplotlib", "rich")
BUILD_INSTALL = "pip install 'tamis[build]'"

# Prefect settings for a quiet, offline, embedded run; a user's own environment wins.
PREFECT_DEFAULTS = {
    "PREFECT_SERVER_EPHEMERAL_STARTUP_TIMEOUT_SECONDS": "120",
    "PREFECT_SERVER_ANALYTICS_ENABLED": "false",
    "PREFECT_LOGGING_LEVEL": "WARNING",
    "PREFECT_LOGGING_TO_API_ENABLED": "false",
}

# A manual build reports its own progress and failures; Prefect's console logs (a task's failure
# with its traceback, printed twice) would only repeat them, so they stay off the terminal.
PREFECT_BUILD_DEFAULTS = {**PREFECT_DEFAULTS, "PREFECT_LOGGING_LEVEL": "CRITICAL"}


def _prepare_prefect(defaults: dict[str, str] = PREFECT_DEFAULTS) -> None:
    for name, value in defaults.items():
        os.environ.setdefault(name, value)


def _installed(module: str) -> bool:
    try:
        return importlib.util.find_spec(module) is not None
    except ImportError:  # an import hook that refuses the module
        return False


def require_build_stack(command: str) -> None:
    """Raise BadInput saying how to install the build stack when any of its modules is missing."""
    missing = [module for module in BUILD_STACK if not _installed(module)]
    if missing:
        raise BadInput(
            f"`tamis {command}` needs the build stack, which this installation lacks ({', '.join(missing)} "
            f"missing); install it with: {BUILD_INSTALL}"
        )


def _demo_config_path() -> Path:
    return Path(str(resources.files("tamis.configs") / "demo.toml"))


def _run_build(config, replace_newer: bool = False) -> int:
    _prepare_prefect(PREFECT_BUILD_DEFAULTS)
    from tamis.flows.build import BuildFailed, check_inputs, flow_for
    from tamis.flows.server_guard import start_temporary_server
    from tamis.progress import progress_display

    started = time.perf_counter()
    check_inputs(config)  # bad paths fail in a second, before Prefect starts its server
    build = flow_for(config)
    start_temporary_server()  # under a guard: it ends with this process, even one killed with SIGKILL
    try:
        with progress_display(sys.stderr) as progress:
            outcome = build(config, progress=progress, replace_newer=replace_newer)
    except BuildFailed as failure:
        print(failure_text(failure, config.store.path), file=sys.stderr, end="")
        return EXIT_FAILED
    if outcome.unchanged:
        print(f"unchanged: version {outcome.version} in service was built from the same inputs (corpus, additions, "
              f"config, tool version); nothing was built or published: {outcome.folder}")
        return EXIT_PUBLISHED
    print(summary_text(outcome.report, outcome.folder), end="")
    print(f"report page: {outcome.page}")
    print(f"total {time.perf_counter() - started:.1f} s", file=sys.stderr)
    return EXIT_PUBLISHED if outcome.published else EXIT_REFUSED


def failure_text(failure, store: Path) -> str:
    """What a failed build prints: the stage and the error first, what is in service, the traceback."""
    try:
        current = publish.current_version(store)
    except publish.StoreError:
        current = None
    kept = f"version {current} stays current" if current is not None else "the store has no current version"
    details = "".join(traceback.format_exception(failure.error))
    return f"tamis: the build failed: {failure}; nothing was published ({kept})\n{details}"


def drift_text(drift: dict) -> str:
    """One line on the version that was in service when the build ran, against its corpus (the
    report keeps this state of the build's time; `service_now_text` tells the store's state now)."""
    if drift["status"] == "none":
        return "  in service when built: none (this build found no version in service)"
    if drift["status"] == "unreadable":
        return f"  in service when built: {drift['error']}"
    return (
        f"  in service when built: version {drift['current_version']}, which misses {drift['members_missed']:,} of today's members "
        f"({drift['members_missed_share']:.2%}); its held-out FPR {drift['heldout_fpr']:.4%} "
        f"(upper bound {drift['heldout_fpr_upper']:.4%})"
    )


def plain_filter_text(plain: dict) -> str:
    """One line on the learned artifact against the plain filter it would replace (both written
    by the build, certified the same way); a plain warning when the model does not pay."""
    learned, bytes_ = plain["learned_bytes"], plain["plain_bytes"]
    if plain["model_pays"]:
        return f"  a plain filter (no model) certified the same way: {bytes_:,} bytes; the model saves {1 - learned / bytes_:.1%}"
    from tamis.report_page import plain_filter_outcome

    return (
        f"  WARNING the model does not pay: the learned artifact takes {learned:,} bytes against {bytes_:,} for a plain "
        f"filter (no model) certified the same way; {plain_filter_outcome(plain)}"
    )


def strata_lines(strata: dict | None) -> list[str]:
    """The two strata in a line, and a warning when the aim fell below half the target."""
    if not strata:
        return []
    lines = [
        f"  heavy keys (at least {strata['tau']:,} lookups) {strata['heavy_keys']:,}, {strata['heavy_share']:.1%} of lookups, "
        f"false positives {strata['heavy_false_positive_share']:.4%} of lookups; tail rate {strata['tail_fpr']:.4%} "
        f"(upper bound {strata['tail_fpr_upper']:.4%}) on {strata['tail_heldout_keys']:,} held-out keys"
    ]
    if strata["aim_below_half_target"]:
        lines.append(
            f"  note: the plan aimed at {strata['aim_fpr']:.4%}, below half the target: the held-out tail is too small "
            f"to show a rate nearer the target, so the artifact is larger than it needs to be; a longer lookup log "
            f"(or a lower corpus.heavy_count) lets it aim closer"
        )
    return lines


def static_text(baseline: dict) -> list[str]:
    """The best plain static filter's line, when the report has one (reports before it do not)."""
    if not baseline.get("static_kind"):
        return []
    return [f"  best plain static filter ({baseline['static_kind']}) {baseline['static_bytes']:,} bytes: ratio {baseline['static_ratio']:.3f}"]


def cleaning_text(corpus: dict) -> list[str]:
    """Repeated rows and keys on both sides, when the corpus had any."""
    if not (corpus.get("member_duplicates") or corpus.get("non_member_duplicates") or corpus.get("conflicts")):
        return []
    return [f"  repeated rows merged: {corpus['member_duplicates']:,} member, {corpus['non_member_duplicates']:,} non-member; "
            f"keys on both sides kept as members: {corpus['conflicts']:,}"]


def observed_lines(served: list[dict]) -> list[str]:
    """Per version served: certified at build time beside observed in service."""
    def percent(value):
        return "n/a" if value is None else f"{value:.4%}"

    return [
        f"  version {row['version']}: certified {percent(row['fpr'])} (upper {percent(row['fpr_upper'])}), observed in service "
        f"{percent(row['rate'])} ({percent(row['rate_low'])} to {percent(row['rate_high'])}) over {row['lookups']:,} lookups"
        for row in served
    ]


def sample_text(sample: dict | None) -> list[str]:
    """The lookup sample the build read from served filters' files, and what the service observed."""
    if not sample:
        return []
    return [
        f"  lookup sample: {sample['files']:,} files from {sample['replicas']:,} replicas, {sample['period_from']} to "
        f"{sample['period_to']}, rate {', '.join(f'{r:.6g}' for r in sample['sample_rates'])}; "
        f"{sample['member_lookups']:,} lookups of members left out",
        *observed_lines(sample["served"]),
    ]


def additions_text(folded: dict) -> str:
    """One line on the added members the build folded in, and those the export lacks."""
    line = (f"  added members folded in: {folded['keys']:,} from {folded['batches']:,} batches (through batch "
            f"{folded['folded_through']})")
    if folded["not_in_export"]:
        line += (f"; WARNING {folded['not_in_export']:,} of them are not in today's export: they stay members "
                 f"(check the export, or the additions)")
    return line


def unlike_text(unlike: dict | None) -> list[str]:
    """Keys unlike the sample: each probe family's share of maybe beside the certified bound, and
    what a cap would cost (reports before the probes have none)."""
    if not unlike:
        return []
    families = ", ".join(f"{name} {row['maybe_rate']:.2%}" for name, row in unlike["families"].items())
    cap = unlike["cap"]
    return [
        f"  keys unlike the sample answered maybe: {families} (certified upper bound {unlike['certified_upper']:.4%})",
        f"  a cap of {cap['max_region_fpr']:.2%} on every region (regions.max_region_fpr) would bound them, for "
        f"{cap['ratio'] - 1:+.1%} planned bytes ({cap['planned_bytes_without']:,} -> {cap['planned_bytes_with']:,})",
    ]


def unverified_text(agreement: dict) -> list[str]:
    """A line per query path the verify stage could not check, and what follows for a service."""
    return [f"  NOT VERIFIED: the {name} path ({why}); services answer this artifact on the "
            f"{', '.join(agreement['verified_paths'])} path only" for name, why in agreement.get("not_verified", {}).items()]


def summary_text(report: dict, folder: Path) -> str:
    from tamis.report_page import size_parts_text

    size, base, held = report["size"], report["baseline"], report["heldout"]
    status = f"published version {report['version']}" if report["gate"]["passed"] else "REFUSED by the gate"
    lines = [
        f"{status}: {folder}",
        f"  members {report['corpus']['members']:,}, non-members {report['corpus']['non_members']:,}, "
        f"lookups {report['corpus']['lookups']:,}",
        *cleaning_text(report["corpus"]),
        *sample_text(report["corpus"].get("sample")),
        f"  size {size['total_bytes']:,} bytes ({size['bits_per_member']:.2f} bits/member; model / filters / header and "
        f"layout {size_parts_text(size)})",
        f"  plain Bloom filter's bits at the target (no header, no margin for the measurement) "
        f"{base['bloom_bytes']:,} bytes: ratio {base['ratio']:.3f}",
        *static_text(base),
        f"  FPR {held['fpr']:.4%} (upper bound {held['fpr_upper']:.4%} at {held['confidence']:.0%}), "
        f"target {report['target_fpr']:.4%}, aim {report['aim_fpr']:.4%}",
        *strata_lines(report.get("strata")),
        f"  false negatives {report['false_negatives']}, regions {len(report['regions'])}, "
        f"KL {report['separation']['kl_bits']:.3f} bits, AUC {report['separation']['auc']:.4f}",
        *unverified_text(report.get("answer_paths", {})),
    ]
    lines += unlike_text(report.get("unlike_keys"))
    if "plain_filter" in report:
        lines.append(plain_filter_text(report["plain_filter"]))
    if "drift" in report:
        lines.append(drift_text(report["drift"]))
    if report.get("additions", {}).get("keys"):
        lines.append(additions_text(report["additions"]))
    lines += [f"  refused: {reason}" for reason in report["gate"]["reasons"]]
    return "\n".join(lines) + "\n"


def cmd_demo(args) -> int:
    require_build_stack("demo")
    from tamis.config import load_config, with_overrides
    from tamis.demo import write_demo_corpus

    directory = Path(args.dir).resolve()
    directory.mkdir(parents=True, exist_ok=True)
    print(f"writing the Emberfall demo corpus into {directory}", file=sys.stderr)
    members, lookups = write_demo_corpus(directory, members=args.members, non_members=args.non_members, seed=args.seed)
    config = load_config(_demo_config_path())
    config = with_overrides(
        config,
        corpus={"members": members, "non_members": lookups},
        target={"fpr": args.target_fpr},
        store={"path": directory / "store"},
    )
    return _run_build(config)


def cmd_build(args) -> int:
    require_build_stack("build")
    from tamis.config import BuildConfig, load_config, with_overrides

    config = load_config(Path(args.config)) if args.config else BuildConfig()
    config = with_overrides(
        config,
        corpus={
            "members": Path(args.members).resolve() if args.members else None,
            "non_members": Path(args.non_members).resolve() if args.non_members else None,
            "key_encoding": args.key_encoding,
            "key_column": args.key_column,
            "count_column": args.count_column,
        },
        target={"fpr": args.target_fpr},
        store={"path": Path(args.store).resolve() if args.store else None},
        gate={"max_size_growth": 0.0, "max_member_drop": 0.0} if args.no_change_limits else {},
        compute={"cluster": args.cluster},
    )
    return _run_build(config, replace_newer=args.replace_newer)


def _open(given: str):
    """An artifact file, or a store's version in service with the keys added after it, opened as a
    service opens it (`open_filter`: a store is read through its pointer once, and again if a
    publish pruned that version meanwhile)."""
    from tamis.loader import FilterLoadError, open_filter

    try:
        return open_filter(Path(given))
    except FilterLoadError as exc:
        raise BadInput(str(exc)) from None


def lookup_keys(arguments: list[str], encoding: str, file: str | None = None) -> list[bytes]:
    """The keys `tamis lookup` answers (and `tamis add` records), as bytes and whatever the locale:
    each argument's bytes as the shell passed them, then the lines of `file`; or else the lines of
    standard input's bytes (`tamis.keylines`). In "utf-8" mode a key that is not valid UTF-8 is
    refused, as the build refuses it."""
    from tamis.keylines import KeyLinesError, split_key_lines

    def lines_of(raw: bytes, where: str) -> list[bytes]:
        try:
            return split_key_lines(raw, encoding, bytes_option="--key-encoding bytes")
        except KeyLinesError as exc:
            raise BadInput(f"{where}: {exc}") from None

    if file is not None:
        try:
            raw = Path(file).read_bytes()
        except OSError as exc:
            raise BadInput(f"--file {file}: cannot be read ({exc.strerror}); check the path") from None
        return lookup_keys(arguments, encoding) + lines_of(raw, file) if arguments else lines_of(raw, file)
    if not arguments:
        return lines_of(sys.stdin.buffer.read(), "standard input")
    keys = [os.fsencode(argument) for argument in arguments]  # the exact bytes of argv
    if encoding == "utf-8":
        for number, key in enumerate(keys, start=1):
            try:
                key.decode("utf-8")
            except UnicodeDecodeError:
                raise BadInput(
                    f"key argument {number} ({key!r}) is not valid UTF-8; look it up as raw bytes with --key-encoding bytes"
                ) from None
    return keys


def cmd_lookup(args) -> int:
    loaded = _open(args.artifact)
    keys = lookup_keys(args.keys, args.key_encoding)
    answers = loaded.contains_many(keys)
    out = sys.stdout.buffer
    # no build takes an empty key as a member (the corpus and `tamis add` refuse it): it surely is not one
    out.writelines(key + (b"\tmaybe\n" if key and answer else b"\tno\n") for key, answer in zip(keys, answers))
    out.flush()
    return 0


def cmd_add(args) -> int:
    from tamis.additions import add_keys

    keys = lookup_keys(args.keys, args.key_encoding, args.file)
    batch = add_keys(Path(args.store), keys, args.max_key_bytes)
    print(f"added {batch.keys:,} keys as batch {batch.number} of {args.store}: every service of the store answers "
          f"maybe for them from its next refresh; the next build folds them in")
    return 0


def report_text(report_path: Path) -> str:
    """The summary of the report beside an artifact for `tamis show`; nothing when there is none,
    and a line saying why when it cannot be read (the artifact itself is still shown)."""
    if not report_path.is_file():
        return ""
    try:
        return summary_text(json.loads(report_path.read_text()), report_path.parent) + f"report: {report_path}\n"
    except (OSError, ValueError, LookupError, TypeError) as exc:
        return f"report: {report_path} is unreadable or incomplete ({type(exc).__name__}: {exc}); the artifact above is complete\n"


def measured_sample_text(measured: dict) -> str:
    """What a held-out rate was measured on: lookups when the corpus had counts (the rate is then
    by lookups), distinct keys otherwise (one lookup each, so both counts agree)."""
    if measured.get("lookups", measured["keys"]) == measured["keys"]:
        return f"{measured['keys']:,} held-out keys"
    return f"{measured['lookups']:,} lookups of {measured['keys']:,} held-out keys (the rate is by lookups)"


def service_now_text(artifact: Path) -> str:
    """For an artifact published in a store (STORE/<version>/artifact): the version in service
    now; nothing for an artifact elsewhere."""
    folder = artifact.resolve().parent
    store = folder.parent
    if not publish.is_version_name(folder.name) or int(folder.name) not in publish.published_versions(store):
        return ""
    try:
        current = publish.current_version(store)
    except publish.StoreError as exc:
        return f"in service now: unknown ({exc})\n"
    if current is None:
        return f"in service now: none (store {store})\n"
    this = "this version" if current == int(folder.name) else f"this artifact is version {folder.name}"
    return f"in service now: version {current} of store {store} ({this})\n"


# `tamis show` sums the sample files of the last day for the rate observed in service now.
OBSERVED_NOW_SECONDS = 86_400


def observed_now_text(report_path: Path) -> str:
    """When the build read a folder of lookup samples written by served filters: the rate each
    version was observed at in the files of the last day, beside what its build certified."""
    from tamis import traffic

    try:
        folder = Path(json.loads(report_path.read_text(encoding="utf-8"))["paths"]["non_members"])
        if not traffic.is_sample_folder(folder):
            return ""
        sample = traffic.read_sample_folder(folder, OBSERVED_NOW_SECONDS, time.time())
    except (OSError, ValueError, KeyError, TypeError, BadInput) as error:
        return f"observed in service: unknown ({error})\n" if report_path.is_file() else ""
    if not sample.served:
        return f"observed in service: no sample file of the last day in {folder}\n"
    return "\n".join([f"observed in service (sample files of the last day in {folder}):",
                      *observed_lines(sample.served)]) + "\n"


def show_text(path: Path, info: dict, in_service: str) -> str:
    """What `tamis show` prints: the header in words, the regions as a table, the report's summary,
    the `in_service` line(s)."""
    provenance = info.get("provenance", {})
    forest = info.get("forest", {})
    lines = [
        f"artifact {path} ({path.stat().st_size:,} bytes), format {info.get('format', '?')}",
        f"  built {provenance.get('built_at')} by tamis {provenance.get('tool_version')} (build {provenance.get('build_id')})",
        f"  corpus digest {provenance.get('corpus_digest')}, config digest {provenance.get('config_digest')}",
        f"  model: {forest.get('trees')} trees over {forest.get('features')} features",
        "  region  scores from .. to          members  kind   bits        probes  width  budget",
    ]
    bounds = [None, *info.get("boundaries", []), None]
    for i, region in enumerate(info.get("regions", [])):
        span = f"{'-inf' if bounds[i] is None else bounds[i]} .. {'+inf' if bounds[i + 1] is None else bounds[i + 1]}"
        lines.append(
            f"  {i:<6}  {span:<24} {region['members']:>7}  {region['mode']:<5}  {region['bits']:>10}  {region['hashes']:>6}  "
            f"{region.get('width', '-'):>5}  {region['fpr_budget']:.3%}"
        )
    measured = info.get("measured")
    if measured:
        lines.append(
            f"  measured on {measured_sample_text(measured)}: FPR {measured['fpr']:.4%} "
            f"(upper bound {measured['fpr_upper']:.4%} at {measured['confidence']:.0%})"
        )
    report_path = path.with_name(publish.REPORT_NAME)
    text = "\n".join(lines) + "\n" + report_text(report_path) + in_service + observed_now_text(report_path)
    from tamis.report_page import REPORT_PAGE_NAME

    page = path.with_name(REPORT_PAGE_NAME)
    if page.is_file():
        text += f"report page: {page}\n"
    return text


def cmd_show(args) -> int:
    loaded = _open(args.artifact)
    if Path(args.artifact).is_dir():  # the store's version in service, as its pointer said when opened
        in_service = f"in service now: version {loaded.version} of store {loaded.store} (this version)\n"
    else:
        in_service = service_now_text(loaded.path)
    print(show_text(loaded.path, loaded.info, in_service), end="")
    return 0


def cmd_versions(args) -> int:
    store = Path(args.store)
    publish.require_store(store)
    current = publish.current_version(store)
    versions = publish.published_versions(store)
    if not versions:
        print(f"{store}: no published versions")
    for version in versions:
        report_path = store / str(version) / publish.REPORT_NAME
        line = f"{'*' if version == current else ' '} {version}"
        if report_path.is_file():
            report = json.loads(report_path.read_text())
            line += f"  {report['built_at']}  {report['size']['total_bytes']:,} bytes  held-out FPR {report['heldout']['fpr']:.4%}"
        print(line)
    return 0


def cmd_schedule(args) -> int:
    require_build_stack("schedule")
    _prepare_prefect()
    from tamis.flows.nightly import main_schedule

    return main_schedule(Path(args.config))


def cmd_rollback(args) -> int:
    outcome = publish.rollback(Path(args.store), to=args.to, newer_members=args.newer_members)
    print(f"version {outcome.version} is in service")
    if outcome.covered:
        print(f"{outcome.covered:,} members of later versions that it lacks were added as batch {outcome.batch}: "
              f"served as maybe, folded in by the next build")
    if outcome.dropped:
        print(f"{outcome.dropped:,} members of later versions that it lacks now answer no (--newer-members drop)")
    return 0


EXAMPLES = {
    "demo": "examples:\n  tamis demo\n  tamis demo --dir /tmp/emberfall --members 20000 --non-members 200000",
    "build": (
        "examples:\n  tamis build configs/nightly.example.toml\n"
        "  tamis build --members banned.txt --non-members lookups.parquet --target-fpr 0.01 --store /srv/filters\n"
        "  tamis build configs/nightly.example.toml --cluster tcp://10.0.0.5:8786"
    ),
    "lookup": (
        "examples:\n  tamis lookup store/3/artifact.tamis someone_42\n  tamis lookup store < handles.txt\n"
        "  tamis lookup --key-encoding bytes store < raw_keys.bin"
    ),
    "show": "examples:\n  tamis show store\n  tamis show store/3/artifact.tamis",
    "versions": "example:\n  tamis versions /srv/filters",
    "rollback": "examples:\n  tamis rollback /srv/filters\n  tamis rollback /srv/filters --to 7\n"
                "  tamis rollback /srv/filters --newer-members cover",
    "add": (
        "examples:\n  tamis add /srv/filters bot_4412 frost_wyrm_1984\n  tamis add /srv/filters < banned_today.txt\n"
        "  tamis add /srv/filters --file banned_today.txt"
    ),
    "schedule": "example:\n  tamis schedule configs/nightly.example.toml",
}


TARGET_HELP = (
    "the false-positive rate to meet, as a fraction: 0.01 is 1%% (default: the config's target.fpr, "
    "else 0.01, i.e. 1%%)"
)


def make_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(prog="tamis", description="Build and query compact learned membership filters.")
    parser.add_argument("--version", action="version", version=f"tamis {tool_version()}")
    sub = parser.add_subparsers(dest="command", required=True, metavar="COMMAND")

    def command(name: str, help_text: str):
        return sub.add_parser(name, help=help_text, description=help_text, epilog=EXAMPLES.get(name),
                              formatter_class=argparse.RawDescriptionHelpFormatter)

    demo = command("demo", "write the fictional demo corpus, build, verify, publish, print a summary")
    demo.add_argument("--dir", default="tamis-demo", help="folder for the corpus and the store (default: ./tamis-demo)")
    demo.add_argument("--members", type=int, default=200_000, help="banned handles to generate (default 200,000)")
    demo.add_argument("--non-members", type=int, default=2_000_000, help="distinct looked-up handles (default 2,000,000)")
    demo.add_argument("--seed", type=int, default=7, help="generator seed (default 7)")
    demo.add_argument("--target-fpr", type=float, help=TARGET_HELP)
    demo.set_defaults(run=cmd_demo)

    build = command("build", "one rebuild from a TOML config and/or plain options (options override the config)")
    build.add_argument("config", nargs="?", help="TOML build configuration")
    build.add_argument("--members", help="members: one key a line, or a table (CSV, Parquet, NDJSON) with a key column")
    build.add_argument("--non-members", help="non-members: one key a line, or a table with key and optional count columns")
    build.add_argument("--target-fpr", type=float, help=TARGET_HELP)
    build.add_argument("--store", help="store folder to publish into")
    build.add_argument("--key-encoding", choices=("utf-8", "bytes"), help="read keys as UTF-8 text (default) or raw bytes")
    build.add_argument("--key-column", metavar="NAME", help="the column of keys in a table source (default: key)")
    build.add_argument("--count-column", metavar="NAME",
                       help="the column of lookup counts in the non-members table (default: count, when there is one); "
                            "'' reads no counts, every key looked up once")
    build.add_argument("--no-change-limits", action="store_true",
                       help="for this build, turn off the gate's limits on change against the version in service "
                            "(max_size_growth, max_member_drop): for a deliberate large change")
    build.add_argument("--cluster", metavar="ADDRESS",
                       help="run the per-chunk stages and training on the Dask cluster of this scheduler, "
                            "e.g. tcp://10.0.0.5:8786 (needs the cluster extra; default: this machine)")
    build.add_argument("--replace-newer", action="store_true",
                       help="publish even when the version in service was built from a members export modified "
                            "later than this build's (refused otherwise: it would put older members back in service)")
    build.set_defaults(run=cmd_build)

    lookup = command("lookup", "answer keys: KEY<TAB>maybe or KEY<TAB>no, in input order")
    lookup.add_argument("artifact", help="an artifact file, or a store folder (its version in service)")
    lookup.add_argument("keys", nargs="*", help="keys to look up (default: one a line from stdin)")
    lookup.add_argument("--key-encoding", choices=("utf-8", "bytes"), default="utf-8",
                        help="keys are UTF-8 text (default; a CR before a line's LF ends the line) or raw bytes "
                             "(every byte but LF is the key's; a line ending in CR is refused); input and output "
                             "are bytes, whatever the locale")
    lookup.set_defaults(run=cmd_lookup)

    add = command("add", "record keys as members of a store now: served as maybe at once, folded in by the next build")
    add.add_argument("store", help="the store folder a build publishes into")
    add.add_argument("keys", nargs="*", help="keys to add (default: one a line from stdin, unless --file is given)")
    add.add_argument("--file", metavar="F", help="add the keys of this file, one a line (same rules as stdin)")
    add.add_argument("--key-encoding", choices=("utf-8", "bytes"), default="utf-8",
                     help="keys are UTF-8 text (default) or raw bytes, read as `tamis lookup` reads them")
    add.add_argument("--max-key-bytes", type=int, default=DEFAULT_MAX_KEY_BYTES, metavar="N",
                     help=f"the longest key accepted: the store's corpus.max_key_bytes (default {DEFAULT_MAX_KEY_BYTES})")
    add.set_defaults(run=cmd_add)

    show = command("show", "header, sizes, regions, measured FPR and provenance of an artifact")
    show.add_argument("artifact", help="an artifact file, or a store folder (its version in service)")
    show.set_defaults(run=cmd_show)

    versions = command("versions", "list the published versions of a store (* marks the version in service)")
    versions.add_argument("store")
    versions.set_defaults(run=cmd_versions)

    rollback = command("rollback", "put a published version back in service: the one before the version in "
                                   "service, or the one --to names (older or newer)")
    rollback.add_argument("store")
    rollback.add_argument("--to", type=int, metavar="VERSION",
                          help="the published version to put in service (see `tamis versions`), e.g. to undo a rollback")
    rollback.add_argument("--newer-members", choices=("cover", "drop"),
                          help="members that later versions hold and the chosen one lacks (the rollback refuses "
                               "while there are any): 'cover' adds them as a batch (served as maybe), 'drop' lets them "
                               "answer no")
    rollback.set_defaults(run=cmd_rollback)

    schedule = command("schedule", "serve the nightly build on the config's cron through Prefect (until Ctrl-C)")
    schedule.add_argument("config", help="TOML build configuration with a [schedule] table")
    schedule.set_defaults(run=cmd_schedule)
    return parser


def main(argv: list[str] | None = None) -> int:
    args = make_parser().parse_args(argv)
    try:
        return args.run(args)
    except BadInput as exc:
        print(f"tamis: {exc}", file=sys.stderr)
        return EXIT_BAD_INPUT
    except BrokenPipeError:
        # the reader of our output went away (`tamis lookup ... | head`): stop quietly, common practice
        sys.stderr.close()
        return 0


if __name__ == "__main__":
    sys.exit(main())
