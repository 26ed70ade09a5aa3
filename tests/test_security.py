"""Security: the loader never runs anything from an artifact and fails with one error type on any
header; header contents are bounded before anything is allocated for them; and nothing a store
holds can point a command outside it (invariant 5).

Already covered elsewhere and not repeated here: a header length over 1 MiB refused before it is
read, a msgpack extension type refused, section dtypes outside the allowed
list (an object dtype included) refused (tests/test_artifact.py); IN_SERVICE holding anything but a
version number, build ids that are not plain names, retention never following a symbolic link
(tests/test_publish.py).
"""

from __future__ import annotations

import ast
import copy
import importlib.util
import pickle
import struct
import subprocess
import sys
import tracemalloc
from pathlib import Path

import msgpack
import numpy as np
import pytest
import xxhash
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from tamis import publish
from tamis.artifact import ArtifactError, read_artifact, write_artifact
from tamis.cli import main
from tamis.config import config_from_dict
from tamis.format import MAGIC, PREAMBLE
from tamis.loader import FilterLoadError, open_filter
from tamis_testing import build_artifact

# Modules a deserialiser or code runner lives in, and builtins that run code: none may be reached
# from the loader.
FORBIDDEN_MODULES = {"pickle", "cPickle", "_pickle", "marshal", "shelve", "dill", "cloudpickle", "joblib",
                     "subprocess", "ctypes", "importlib", "runpy", "code", "codeop"}
FORBIDDEN_CALLS = {"eval", "exec", "compile", "__import__", "breakpoint"}


class Trap:
    """Unpickling this object would create `marker`: proof that something unpickled it."""

    def __init__(self, marker: Path):
        self.marker = marker

    def __reduce__(self):
        return (Path.touch, (self.marker,))


@pytest.fixture(scope="module")
def members() -> list[bytes]:
    return [f"m{i:03d}x{i * 7919 % 1000:03d}".encode() for i in range(60)]


@pytest.fixture(scope="module")
def artifact(tmp_path_factory, members) -> Path:
    path = tmp_path_factory.mktemp("security") / "artifact.tamis"
    train = [f"plain{i}".encode() for i in range(60)]
    validation = [f"other{i}".encode() for i in range(60)]
    build_artifact(path, (members, train, np.ones(60), validation, np.ones(60)), 0.01, how=3)
    return path


def _loader_modules() -> list[str]:
    """The pipeline modules that importing the loader loads, in a fresh interpreter."""
    code = "import sys, tamis.loader; print('\\n'.join(sorted(m for m in sys.modules if m.startswith('tamis'))))"
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return done.stdout.split()


def test_the_loader_and_everything_it_imports_never_deserialise_or_run_code():
    modules = _loader_modules()
    assert "tamis.loader" in modules and "tamis.artifact" in modules
    for name in modules:
        spec = importlib.util.find_spec(name)
        tree = ast.parse(Path(spec.origin).read_text(encoding="utf-8"))
        for node in ast.walk(tree):
            if isinstance(node, ast.Import):
                imported = {alias.name.split(".")[0] for alias in node.names}
            elif isinstance(node, ast.ImportFrom):
                imported = {(node.module or "").split(".")[0]}
            else:
                imported = set()
            assert not imported & FORBIDDEN_MODULES, f"{name} imports {imported & FORBIDDEN_MODULES}"
            if isinstance(node, ast.Call) and isinstance(node.func, ast.Name):
                assert node.func.id not in FORBIDDEN_CALLS, f"{name} calls {node.func.id}()"
            if isinstance(node, ast.keyword) and node.arg == "allow_pickle":
                raise AssertionError(f"{name} passes allow_pickle to numpy")


def test_code_and_pickles_in_a_header_stay_data(tmp_path, members):
    marker = tmp_path / "unpickled"
    code = f"__import__('pathlib').Path({str(marker)!r}).touch()"
    provenance = {"built_at": code, "build_id": "{{7*7}} ${7*7} `touch x`", "blob": pickle.dumps(Trap(marker)),
                  "nested": [{"__reduce__": code}]}
    path = tmp_path / "artifact.tamis"
    build_artifact(path, (members, [b"a1", b"b2", b"c3"], np.ones(3), [b"d4", b"e5"], np.ones(2)), 0.01, how=1,
                   provenance=provenance)
    loaded = open_filter(path)
    assert loaded.contains_many(members).all()
    assert loaded.info["provenance"] == provenance  # the same bytes and strings, unchanged
    assert main(["show", str(path)]) == 0
    assert not marker.exists(), "something in the header was run"


def _file_with_header(path: Path, packed: bytes) -> Path:
    """A container of the documented layout with these header bytes and no sections."""
    path.write_bytes(PREAMBLE.pack(MAGIC, 1, 0, len(packed), xxhash.xxh3_64_intdigest(packed)) + packed)
    return path


def _with_header(artifact: Path, edit, path: Path) -> Path:
    """A copy of `artifact` whose msgpack header went through `edit(decoded)`, with every section
    left at its offset (the header may only shrink; zero padding fills the gap, as the format allows)."""
    raw = artifact.read_bytes()
    (length,) = struct.unpack_from("<I", raw, 12)
    decoded = msgpack.unpackb(raw[PREAMBLE.size : PREAMBLE.size + length], raw=False)
    edit(decoded)
    packed = msgpack.packb(decoded, use_bin_type=True)
    first = min(entry["offset"] for entry in decoded["sections"])
    assert PREAMBLE.size + len(packed) <= first, "the edit must not grow the header past the first section"
    preamble = PREAMBLE.pack(MAGIC, 1, 0, len(packed), xxhash.xxh3_64_intdigest(packed))
    path.write_bytes(preamble + packed + bytes(first - PREAMBLE.size - len(packed)) + raw[first:])
    return path


def test_a_timestamp_extension_in_the_header_is_refused(tmp_path, artifact):
    # msgpack decodes extension -1 (timestamps) itself, without asking the reader's extension hook
    def stamp(decoded):
        decoded["meta"]["provenance"]["built_at"] = msgpack.Timestamp(1_700_000_000, 0)

    path = _with_header(artifact, stamp, tmp_path / "stamped")
    with pytest.raises(FilterLoadError, match=r"header\.meta\.provenance\.built_at has type Timestamp"):
        open_filter(path)


def test_a_header_map_with_a_key_that_is_not_text_is_refused(tmp_path, artifact):
    def integer_key(decoded):
        decoded["meta"][7] = "seven"

    path = _with_header(artifact, integer_key, tmp_path / "keyed")
    with pytest.raises(FilterLoadError, match="header is not valid msgpack .int is not allowed for map key"):
        open_filter(path)


@pytest.mark.parametrize(
    "claim",
    [
        b"\xdd\xff\xff\xff\xff",  # an array of 2^32 - 1 items
        b"\xdf\xff\xff\xff\xff",  # a map of 2^32 - 1 pairs
        b"\xdb\xff\xff\xff\xff",  # a string of 2^32 - 1 bytes
        b"\xc6\xff\xff\xff\xff",  # a binary of 2^32 - 1 bytes
        b"\x91" * 200_000 + b"\xc0",  # arrays nested 200,000 deep
    ],
)
def test_lengths_claimed_inside_the_header_are_refused_before_allocation(tmp_path, claim):
    packed = b"\x82\xa4meta" + claim + b"\xa8sections\x90"
    path = _file_with_header(tmp_path / "claims", packed)
    tracemalloc.start()
    try:
        with pytest.raises(ArtifactError, match="not valid msgpack"):
            read_artifact(path)
        peak = tracemalloc.get_traced_memory()[1]
    finally:
        tracemalloc.stop()
    assert peak < 8 * len(packed) + (1 << 20), f"{peak} bytes allocated for a {len(packed)}-byte header"


def test_a_section_claiming_a_terabyte_is_refused_without_mapping_it(tmp_path):
    # offset 1024: past this short header, a multiple of 64
    entry = {"dtype": "|u1", "length": 1 << 40, "name": "huge", "offset": 1024, "shape": [1 << 40], "xxh3_64": 0}
    packed = msgpack.packb({"meta": {}, "sections": [entry]}, use_bin_type=True)
    path = _file_with_header(tmp_path / "huge", packed)
    with pytest.raises(ArtifactError, match="truncated"):
        read_artifact(path)


_PLAIN = st.recursive(
    st.none() | st.booleans() | st.integers(-(2**63), 2**64 - 1) | st.floats() | st.text(max_size=20) | st.binary(max_size=20),
    lambda inner: st.lists(inner, max_size=4) | st.dictionaries(st.text(max_size=8), inner, max_size=4),
    max_leaves=12,
)


def _field_paths(value, prefix=()) -> list[tuple]:
    """Every path of keys and indexes into a header, maps and lists included."""
    paths = [prefix] if prefix else []
    if isinstance(value, dict):
        for key, inner in value.items():
            paths += _field_paths(inner, (*prefix, key))
    elif isinstance(value, list):
        for index, inner in enumerate(value):
            paths += _field_paths(inner, (*prefix, index))
    return paths


@pytest.fixture(scope="module")
def header_and_sections(artifact):
    header, sections = read_artifact(artifact)
    return header, {name: np.array(array) for name, array in sections.items()}


@settings(max_examples=60, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(data=st.data())
def test_any_header_value_anywhere_opens_or_fails_with_the_one_error_type(tmp_path, header_and_sections, members, data):
    header, sections = header_and_sections
    header = copy.deepcopy(header)
    path_to = data.draw(st.sampled_from(_field_paths(header)))
    value = data.draw(_PLAIN)
    *parents, last = path_to
    holder = header
    for key in parents:
        holder = holder[key]
    holder[last] = value
    path = tmp_path / "edited.tamis"
    write_artifact(path, header, sections)
    try:
        loaded = open_filter(path)
    except FilterLoadError:
        return
    loaded.contains_many(members)  # answers, whatever they are, without any other exception


# --- the store: nothing in it points outside ----------------------------------------------------


@pytest.mark.parametrize("content", ["../x", "/etc/passwd", "1/../../2", "..", "1\x00"])
@pytest.mark.parametrize("command", ["lookup", "show", "versions", "rollback"])
def test_a_current_pointing_outside_the_store_is_refused_by_every_command(tmp_path, capsys, content, command):
    store = tmp_path / "store"
    store.mkdir()
    (store / publish.POINTER_NAME).write_text(content)
    argv = [command, str(store)] + (["some-key"] if command == "lookup" else [])
    assert main(argv) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "not a version number" in err


def test_version_folders_with_path_like_names_are_not_versions(tmp_path):
    store = tmp_path / "store"
    for name in ("..x", "-1", "1.0", "01", " 1"):
        (store / name).mkdir(parents=True)
        (store / name / publish.ARTIFACT_NAME).write_bytes(b"x")
    assert publish.published_versions(store) == []


def test_a_config_store_path_is_the_user_s_folder_relative_to_the_config(tmp_path):
    # A store path names the store itself, so there is nothing for it to escape: `..` and absolute
    # paths are taken as written, relative ones from the config file's folder. What is refused is
    # a store that cannot be one (tests/test_bad_input.py: a store path that is a file).
    configs = tmp_path / "configs"
    relative = config_from_dict({"store": {"path": "../stores/nightly"}}, configs)
    absolute = config_from_dict({"store": {"path": str(tmp_path / "elsewhere")}}, configs)
    assert relative.store.path == (tmp_path / "stores" / "nightly").resolve()
    assert absolute.store.path == (tmp_path / "elsewhere").resolve()
