"""The build flow's operations: progress events, retries of the corpus read, failures that publish
nothing, and a held-out part too small for the target stopping the build before training."""

import dataclasses
import errno
import math

import pytest

import tamis.flows.build as build
from tamis import cli, publish
from tamis import corpus as corpus_stage
from tamis import verify
from tamis.artifact import read_artifact
from tamis.config import ComputeSettings
from tamis.errors import BadInput
from small_build import SMALL_MODEL, small_config, write_corpus


@pytest.fixture(scope="module")
def corpus_files(tmp_path_factory):
    return write_corpus(tmp_path_factory.mktemp("flow"))


# Small chunks, so that every per-chunk stage runs several tasks
CHUNK_KEYS = 1_000


@pytest.fixture(scope="module")
def published(corpus_files, tmp_path_factory):
    """One build into a fresh store, in chunks of CHUNK_KEYS keys, with every progress event it sent."""
    store = tmp_path_factory.mktemp("published") / "store"
    events = []
    config = dataclasses.replace(small_config(*corpus_files, store), compute=ComputeSettings(chunk_keys=CHUNK_KEYS))
    outcome = build.build_flow(config, progress=events.append)
    return outcome, events


def test_the_chunk_size_does_not_change_the_artifact(corpus_files, tmp_path, monkeypatch):
    """Chunks are computed on their own and joined in order (filter bits by OR), and [compute] is
    left out of the config digest, so a build in one chunk writes the same bytes as one in many."""
    monkeypatch.setenv("SOURCE_DATE_EPOCH", "1700000000")
    chunked = build.build_flow(dataclasses.replace(small_config(*corpus_files, tmp_path / "a"), compute=ComputeSettings(chunk_keys=CHUNK_KEYS)))
    whole = build.build_flow(small_config(*corpus_files, tmp_path / "b"))
    first, second = (read_artifact(o.folder / publish.ARTIFACT_NAME) for o in (chunked, whole))
    assert first[0] == second[0] and first[1].keys() == second[1].keys()
    assert all(first[1][name].tobytes() == second[1][name].tobytes() for name in first[1])
    assert (chunked.folder / publish.ARTIFACT_NAME).read_bytes() == (whole.folder / publish.ARTIFACT_NAME).read_bytes()


@pytest.fixture
def quick_retries(monkeypatch):
    """The corpus task with its retries kept but without the waits between them."""
    monkeypatch.setattr(build, "read_corpus", build.read_corpus.with_options(retry_delay_seconds=0))


def _store_entries(store):
    return sorted(p.name for p in store.iterdir()) if store.exists() else []


def test_every_stage_starts_and_ends_in_order(published):
    outcome, events = published
    assert outcome.published
    ends = [(e.stage, e.kind) for e in events if e.kind != "step"]
    assert ends == [(stage, kind) for stage in build.STAGES for kind in ("start", "done")]
    assert all(e.seconds >= 0 for e in events)


def test_long_stages_report_their_advance(published):
    outcome, events = published
    steps = {stage: [e for e in events if e.stage == stage and e.kind == "step"] for stage in ("features", "model", "filters")}
    corpus = outcome.report["corpus"]
    features = steps["features"]
    split = corpus["split"]
    assert features[-1].done == features[-1].total == corpus["members"] + split["train"] + split["validation"] + split["check"] + split["heavy"]
    assert [e.done for e in features] == sorted(e.done for e in features)
    assert steps["filters"][-1].done == steps["filters"][-1].total == corpus["members"]
    # one step a chunk: the members, training, validation, check and heavy keys are chunked part by part
    # and the filters stage fills the members once a plan it settles (tamis.planning), each round's steps counting afresh
    rounds = len(outcome.report["plan"]["rounds"])
    assert len(steps["filters"]) == rounds * math.ceil(corpus["members"] / CHUNK_KEYS)
    parts = (corpus["members"], split["train"], split["validation"], split["check"], split["heavy"])
    assert len(features) == sum(math.ceil(keys / CHUNK_KEYS) for keys in parts)
    # one step per priced checkpoint: the model report lists them all
    assert [e.done for e in steps["model"]] == list(range(1, len(outcome.report["model"]["candidates"]) + 1))


def test_the_corpus_read_is_retried_after_an_os_error(corpus_files, tmp_path, monkeypatch, quick_retries):
    real, calls = corpus_stage.load_corpus, []

    def flaky(*args):
        calls.append(args)
        if len(calls) == 1:
            raise OSError(errno.EIO, "Input/output error (a network filesystem hiccup)")
        return real(*args)

    monkeypatch.setattr(corpus_stage, "load_corpus", flaky)
    # a 0.1% target stops the build right after the corpus stage (min_heldout): reaching that check
    # shows the second read delivered the corpus, without paying for the rest of a build
    with pytest.raises(BadInput, match="^min_heldout: "):
        build.build_flow(small_config(*corpus_files, tmp_path / "store", target=0.001))
    assert len(calls) == 2


def test_bad_input_is_never_retried_and_writes_nothing(corpus_files, tmp_path, monkeypatch, quick_retries):
    calls = []

    def refuses(*args):
        calls.append(args)
        raise BadInput("members.txt: line 3 has an empty key; remove it")

    monkeypatch.setattr(corpus_stage, "load_corpus", refuses)
    with pytest.raises(BadInput, match="line 3 has an empty key"):
        build.build_flow(small_config(*corpus_files, tmp_path / "store"))
    assert len(calls) == 1 and _store_entries(tmp_path / "store") == []


def test_the_retry_condition_follows_the_error_type():
    class State:
        def __init__(self, error):
            self.error = error

        def result(self, raise_on_failure):
            assert raise_on_failure is False
            return self.error

    assert build.retry_on_transient(None, None, State(OSError(errno.ESTALE, "Stale file handle")))
    assert build.retry_on_transient(None, None, State(TimeoutError("read timed out")))
    assert not build.retry_on_transient(None, None, State(BadInput("no key column")))
    assert not build.retry_on_transient(None, None, State(ValueError("a bug")))


def _small_toml(directory, corpus_files, store, target=0.05):
    members, lookups = corpus_files
    path = directory / "small.toml"
    model = ", ".join(f"{k} = {v!r}".replace("'", '"') for k, v in SMALL_MODEL.items())
    path.write_text(
        f'[corpus]\nmembers = "{members}"\nnon_members = "{lookups}"\n[target]\nfpr = {target}\n'
        f'[model]\n{model.replace(", ", chr(10))}\n[store]\npath = "{store}"\n'
    )
    return path


def test_a_failing_stage_publishes_nothing_and_says_which_stage(published, corpus_files, tmp_path, monkeypatch, capsys):
    outcome, _ = published
    store = outcome.folder.parent
    before = _store_entries(store)

    def broken(*args):
        raise RuntimeError("the disk said no")

    monkeypatch.setattr(verify, "verification", broken)
    with pytest.raises(build.BuildFailed) as failed:
        # another target: a build of the inputs of the version in service would publish nothing at once
        build.build_flow(small_config(*corpus_files, store, target=0.06))
    assert failed.value.stage == "verify" and isinstance(failed.value.error, RuntimeError)
    assert str(failed.value) == "stage verify failed: RuntimeError: the disk said no"
    # no new version, IN_SERVICE unchanged, and the staging folder is gone
    assert _store_entries(store) == before and publish.current_version(store) == outcome.version



def test_the_command_line_exits_3_with_the_stage_and_the_reason_first(published, corpus_files, tmp_path, monkeypatch, capsys):
    outcome, _ = published
    store = outcome.folder.parent
    before = _store_entries(store)

    def broken(*args):
        raise MemoryError("featurize could not allocate the matrix")

    monkeypatch.setattr(build, "featurize", broken)
    assert cli.main(["build", str(_small_toml(tmp_path, corpus_files, store, target=0.06))]) == cli.EXIT_FAILED
    lines = capsys.readouterr().err.splitlines()
    reason = next(i for i, line in enumerate(lines) if line.startswith("tamis: "))
    # after the progress lines (the corpus stage's), the reason on one line, then the traceback
    assert "corpus    done in" in lines[reason - 1]
    assert lines[reason] == (
        "tamis: the build failed: stage features failed: MemoryError: featurize could not allocate the matrix; "
        f"nothing was published (version {outcome.version} stays current)"
    )
    assert lines[reason + 1].startswith("Traceback") and _store_entries(store) == before


def test_a_held_out_part_too_small_for_the_target_stops_before_training(corpus_files, tmp_path, monkeypatch, capsys):
    def never(*args, **kwargs):
        raise AssertionError("no stage after the corpus may run")

    monkeypatch.setattr(build, "featurize", never)
    monkeypatch.setattr(build, "fit_model", never)
    # 0.1% needs -ln(0.05) x (largest light count) x (tail lookups / all lookups) / 0.001 held-out
    # tail lookups, about 60,000 here: the held-out light keys carry about half of that
    assert cli.main(["build", str(_small_toml(tmp_path, corpus_files, tmp_path / "store", target=0.001))]) == cli.EXIT_BAD_INPUT
    err = capsys.readouterr().err
    # the check belongs to the corpus stage, which never ended: stderr holds the reason alone
    assert err.count("\n") == 1 and err.startswith("tamis: min_heldout: the tail (keys looked up fewer than tau = 44 times) has ")
    assert "held-out tail lookups" in err and "times as much log" in err
    assert _store_entries(tmp_path / "store") == []


def test_each_region_reports_its_rate_as_built_beside_its_measured_rate(published):
    # Held-out light keys are random keys to a region's filter, so each region's lookup-weighted
    # measured rate is a weighted binomial mean around the rate as built: variance
    # p (1 - p) sum c^2 / (sum c)^2 <= p (1 - p) tau / lookups, as every light count is below tau.
    # 5 standard deviations (normal tail, common practice).
    outcome, _ = published
    tau = outcome.report["strata"]["tau"]
    rows = outcome.report["regions"]
    assert sum(row["measured_keys"] for row in rows) == outcome.report["corpus"]["split"]["heldout"]
    for row in rows:
        planned, measured = row["planned_fpr"], row["measured_fpr"]
        assert planned == {"yes": 1.0, "no": 0.0}.get(row["mode"], planned)
        if measured is None:
            continue
        lookups = row["measured_keys"]  # at least the keys' count of lookups (every count >= 1)
        assert abs(measured - planned) <= 5 * math.sqrt(planned * (1 - planned) * tau / lookups) + 1e-12
