"""The command line's own answers, without a build: its version, the store commands on paths that
are not stores, putting any published version back in service, and options typed out of range."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest

from tamis import cli, publish
from tamis import store as store_module
from tamis.version import tool_version


def run(capsys, *argv: str) -> tuple[int, str, str]:
    try:
        code = cli.main(list(argv))
    except SystemExit as exit_:  # argparse's own exits (--version, usage errors)
        code = exit_.code
    out = capsys.readouterr()
    return code, out.out, out.err


def published_store(store: Path, versions: int) -> Path:
    """A store with `versions` published versions (their bytes do not matter to these commands)."""
    for number in range(versions):
        staging = publish.new_staging(store, f"b{number}")
        (staging / publish.ARTIFACT_NAME).write_bytes(b"an artifact")
        with publish.store_lock(store):
            publish.publish_staging(store, staging, keep=10)
    return store


def test_version_prints_the_installed_version(capsys):
    code, out, _ = run(capsys, "--version")
    assert code == 0 and out == f"tamis {tool_version()}\n"
    assert tool_version() != "0+unknown"  # the test extra installs the distribution


def test_versions_of_a_missing_path_is_bad_input(capsys, tmp_path):
    code, out, err = run(capsys, "versions", str(tmp_path / "typo"))
    assert code == cli.EXIT_BAD_INPUT and out == ""
    assert err == f"tamis: no store at {tmp_path / 'typo'}: no such folder; check the path (a store is the folder a build publishes into)\n"


def test_versions_of_a_file_is_bad_input(capsys, tmp_path):
    (tmp_path / "file").write_text("x")
    code, _, err = run(capsys, "versions", str(tmp_path / "file"))
    assert code == cli.EXIT_BAD_INPUT and "is a file, not a folder" in err


def test_rollback_of_a_missing_path_creates_nothing(capsys, tmp_path):
    code, _, err = run(capsys, "rollback", str(tmp_path / "typo"))
    assert code == cli.EXIT_BAD_INPUT and "no store at" in err and "None" not in err
    assert not (tmp_path / "typo").exists()


def test_rollback_of_a_store_with_nothing_in_service_says_so(capsys, tmp_path):
    with publish.store_lock(tmp_path / "store"):  # a store whose builds were all refused holds only its lock
        pass
    code, _, err = run(capsys, "rollback", str(tmp_path / "store"))
    assert code == cli.EXIT_BAD_INPUT
    assert "no version is in service" in err and "None" not in err
    assert run(capsys, "versions", str(tmp_path / "store"))[:2] == (0, f"{tmp_path / 'store'}: no published versions\n")


@pytest.mark.parametrize("command", ["versions", "rollback"])
def test_a_folder_that_is_no_store_is_bad_input_and_stays_untouched(capsys, tmp_path, command):
    (tmp_path / "photos").mkdir()
    (tmp_path / "photos" / "cat.jpg").write_bytes(b"meow")
    code, out, err = run(capsys, command, str(tmp_path / "photos"))
    assert code == cli.EXIT_BAD_INPUT and out == ""
    assert err.startswith(f"tamis: {tmp_path / 'photos'} is not a tamis store") and "check the path" in err
    assert sorted(p.name for p in (tmp_path / "photos").iterdir()) == ["cat.jpg"]  # no .lock left behind


def test_rollback_and_back_again_with_to(capsys, tmp_path):
    store = published_store(tmp_path / "store", 3)
    assert run(capsys, "rollback", str(store)) == (0, "version 2 is in service\n", "")
    assert run(capsys, "rollback", str(store)) == (0, "version 1 is in service\n", "")
    code, _, err = run(capsys, "rollback", str(store))
    assert code == cli.EXIT_BAD_INPUT and "version 1 is the oldest published version" in err
    # --to puts a newer version back, and any published one
    assert run(capsys, "rollback", str(store), "--to", "3") == (0, "version 3 is in service\n", "")
    assert publish.current_version(store) == 3
    assert run(capsys, "rollback", str(store), "--to", "1") == (0, "version 1 is in service\n", "")
    code, _, err = run(capsys, "rollback", str(store), "--to", "9")
    assert code == cli.EXIT_BAD_INPUT and "version 9 is not published here (published: 1, 2, 3)" in err
    assert publish.current_version(store) == 1
    code, out, _ = run(capsys, "versions", str(store))
    assert code == 0 and out.splitlines() == ["* 1", "  2", "  3"]


@pytest.mark.parametrize(
    "typed, says",
    [
        ("5", "option --target-fpr must be between 1e-09 and 0.5, got 5.0; did you mean 0.05 (5%)?"),
        ("1", "option --target-fpr must be between 1e-09 and 0.5, got 1.0; did you mean 0.01 (1%)?"),
        # no obvious reading: 70% is out of range too, and a value below 1 is not a percentage
        ("70", "option --target-fpr must be between 1e-09 and 0.5, got 70.0\n"),
        ("0.7", "option --target-fpr must be between 1e-09 and 0.5, got 0.7\n"),
    ],
)
def test_a_target_out_of_range_names_the_option_typed_and_the_likely_value(capsys, tmp_path, typed, says):
    code, _, err = run(capsys, "build", "--members", "m.txt", "--non-members", "n.txt", "--store", str(tmp_path),
                       "--target-fpr", typed)
    assert code == cli.EXIT_BAD_INPUT
    assert err.startswith("tamis: ") and err.count("\n") == 1 and says in err
    assert "target.fpr" not in err


def test_a_target_out_of_range_in_a_config_names_the_key_and_the_likely_value(capsys, tmp_path):
    config = tmp_path / "build.toml"
    config.write_text("[target]\nfpr = 5\n")
    code, _, err = run(capsys, "build", str(config))
    assert code == cli.EXIT_BAD_INPUT
    assert "config key target.fpr must be between 1e-09 and 0.5, got 5.0; did you mean 0.05 (5%)?" in err


def test_help_says_the_target_defaults_to_one_percent(capsys):
    for command in ("build", "demo"):
        code, out, _ = run(capsys, command, "--help")
        assert code == 0
        assert "0.01 is 1% (default: the config's target.fpr, else 0.01, i.e. 1%)" in " ".join(out.split())


def reference_store(store: Path) -> Path:
    """A store whose version 1 is the format-2.0 reference artifact (forest, Bloom and fuse regions)."""
    staging = publish.new_staging(store, "reference")
    (staging / publish.ARTIFACT_NAME).write_bytes((Path(__file__).parent / "data" / "format-2.0.tamis").read_bytes())
    with publish.store_lock(store):
        publish.publish_staging(store, staging, keep=10)
    return store


def test_show_and_lookup_open_a_store_as_a_service_does_reading_its_pointer_once(capsys, tmp_path, monkeypatch):
    store = reference_store(tmp_path / "store")
    reads = []
    read_pointer = store_module._read_pointer
    monkeypatch.setattr(store_module, "_read_pointer", lambda *args: reads.append(args) or read_pointer(*args))
    code, out, _ = run(capsys, "show", str(store))
    assert code == 0 and out.startswith(f"artifact {store / '1' / publish.ARTIFACT_NAME} (")
    assert f"in service now: version 1 of store {store} (this version)" in out
    assert [name for _, name in reads] == [store_module.POINTER_NAME]
    reads.clear()
    code, out, _ = run(capsys, "lookup", str(store), "frost_wyrm_1984")
    assert code == 0 and out.startswith("frost_wyrm_1984\t") and len(reads) == 1


def test_lookup_answers_no_to_the_empty_key_which_no_build_holds(capsys, tmp_path, monkeypatch):
    # no build can hold the empty key as a member (the corpus and `tamis add` refuse it), so `tamis
    # lookup` says no even where the filter would answer it "maybe" (here every key does)
    from tamis.loader import MembershipFilter

    store = reference_store(tmp_path / "store")
    monkeypatch.setattr(MembershipFilter, "answer_packed", lambda self, packed: np.ones(len(packed), dtype=bool))
    code, out, _ = run(capsys, "lookup", str(store), "", "x")
    assert code == 0 and out == "\tno\nx\tmaybe\n"
