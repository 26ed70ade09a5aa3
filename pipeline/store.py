"""A store as a service reads it: the version in service, and the bytes of its artifact.

    STORE/IN_SERVICE          the version in service: a decimal number and a newline
    STORE/1/ 2/ 3/ ...        published versions: artifact.tamis, report.json, report.html

Only the publish stage writes a store (`tamis.publish`, which takes these names from here); this
module only reads, with the standard library, so that the loader can use it. A store written
before the pointer had this name holds `CURRENT` instead: it is read while `IN_SERVICE` is
missing, and the next build or rollback on the store replaces it (`tamis.publish.migrate_pointer`).

Reading races nothing. The pointer changes by one rename, and a version folder is removed only
once the pointer has moved past it. So a reader reads the pointer, then the artifact's bytes; if
the version's folder is gone by then, the pointer has moved on, and it reads both again.

The names read from the store must be canonical version numbers ("1", "2", ...; no sign, no
leading zero, ASCII digits only), so no `..`, absolute path or other text can point elsewhere.
"""

from __future__ import annotations

from pathlib import Path

from tamis.errors import BadInput

POINTER_NAME = "IN_SERVICE"
LEGACY_POINTER_NAME = "CURRENT"
ARTIFACT_NAME = "artifact.tamis"

# A version number (what the pointer holds and what a version folder is named) has up to 18
# digits, so every one fits in int64.
_VERSION_MAX_DIGITS = 18
# The pointer holds a version number and a newline; anything longer is not read, let alone trusted.
_POINTER_MAX_BYTES = 64
# Rounds of reading the pointer and then the artifact before giving up: a round fails only when a
# publish moved the pointer and removed the version between the two reads, which a build takes
# minutes to do; three in a row mean something else is removing versions.
READ_ATTEMPTS = 3


class StoreError(BadInput):
    """A store that cannot be used as asked (no version in service, a pointer that names none)."""


def is_version_name(name: str) -> bool:
    """True for a canonical version number: the name of a version folder, the pointer's content."""
    return name.isascii() and name.isdigit() and not name.startswith("0") and len(name) <= _VERSION_MAX_DIGITS


def _read_pointer(store: Path, name: str) -> int | None:
    try:
        with open(store / name, "rb") as handle:
            raw = handle.read(_POINTER_MAX_BYTES + 1)
    except FileNotFoundError:
        return None
    except NotADirectoryError:
        raise StoreError(f"store {store} is a file, not a folder; give the path of a store folder") from None
    text = raw.decode("ascii", errors="replace").strip()
    if len(raw) > _POINTER_MAX_BYTES or not is_version_name(text):
        shown = text if len(raw) <= _POINTER_MAX_BYTES else text[:_POINTER_MAX_BYTES] + "..."
        raise StoreError(
            f"{store / name} holds {shown!r}, not a version number; run `tamis rollback` or write the number of "
            f"a version folder into it"
        )
    return int(text)


def version_in_service(store: Path) -> int | None:
    """The version the store's pointer names; None when there is no pointer. StoreError when it
    holds anything but a version number (a path such as `../x` included)."""
    # the new name once more after the old one: a migration may replace the old by the new between
    for name in (POINTER_NAME, LEGACY_POINTER_NAME, POINTER_NAME):
        version = _read_pointer(store, name)
        if version is not None:
            return version
    return None


def artifact_in_service(store: Path) -> Path | None:
    """The path of the artifact in service; None when the store has no version in service."""
    version = version_in_service(store)
    return None if version is None else store / str(version) / ARTIFACT_NAME


def read_in_service(store: Path) -> tuple[int, Path, bytes]:
    """(version, artifact path, artifact bytes) of the version in service, read as one: the bytes
    are those of the version the pointer named, even while a publish moves the pointer and prunes."""
    for _ in range(READ_ATTEMPTS):
        version = version_in_service(store)
        if version is None:
            raise StoreError(
                f"{store}: no version in service (no {POINTER_NAME} file); publish a build into it first, "
                f"or give the path of an artifact file"
            )
        path = store / str(version) / ARTIFACT_NAME
        try:
            return version, path, path.read_bytes()
        except FileNotFoundError:
            if version_in_service(store) == version:
                raise StoreError(
                    f"{store}: {POINTER_NAME} names version {version}, but {path} is missing; put a published "
                    f"version back in service (tamis rollback)"
                ) from None
    raise StoreError(f"{store}: the version in service was removed {READ_ATTEMPTS} times while being read; try again")
