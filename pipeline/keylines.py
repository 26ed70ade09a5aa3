"""One key a line: how the bytes of a line file become keys, for the build and for `tamis lookup`.

Lines end at LF (byte 0x0A); a missing final LF is allowed. Two readings:

- "utf-8": the file is text. It must decode as UTF-8; a byte-order mark at its start is not part
  of the first key, and a line may end in CR LF (the CR belongs to the line end, so a text key
  read from lines never ends in CR).
- "bytes": every byte of a line but its LF is the key, unchanged. A line that ends in CR (0x0D) is
  refused: it may be a Windows line end or the key's own last byte, the file cannot say which, and
  a key's bytes are never changed to guess.

Only the stdlib is used, so the loader wing (the lookup command) may share this with the corpus stage.
"""

from __future__ import annotations

KEY_ENCODINGS = ("utf-8", "bytes")

# The longest key a corpus takes unless corpus.max_key_bytes says otherwise; `tamis add` checks
# added members against it too.
DEFAULT_MAX_KEY_BYTES = 4096

# Some editors start UTF-8 text with a byte-order mark; it is not part of the first key.
UTF8_BOM = b"\xef\xbb\xbf"


class KeyLinesError(ValueError):
    """A line file that cannot be read as keys; the message names the line and how to fix it."""


def line_of_offset(raw: bytes, offset: int) -> int:
    """The line (counted from 1) that holds byte `offset` of `raw`."""
    return raw.count(b"\n", 0, offset) + 1


def split_key_lines(raw: bytes, encoding: str, bytes_option: str = "key_encoding = \"bytes\"") -> list[bytes]:
    """The keys of a line file's bytes, read as `encoding` ("utf-8" or "bytes").

    Raises KeyLinesError naming the first line that the reading cannot carry; `bytes_option` names
    the option that reads keys as raw bytes, for the hint of a UTF-8 error.
    """
    if encoding not in KEY_ENCODINGS:
        raise ValueError(f"key encoding must be one of {list(KEY_ENCODINGS)}, got {encoding!r}")
    if encoding == "utf-8":
        try:
            raw.decode("utf-8")
        except UnicodeDecodeError as exc:
            raise KeyLinesError(
                f"line {line_of_offset(raw, exc.start)} is not valid UTF-8 (byte {exc.start}); fix the key, "
                f"or read keys as raw bytes with {bytes_option}"
            ) from None
        if raw.startswith(UTF8_BOM):
            raw = raw[len(UTF8_BOM) :]
    else:
        _refuse_final_carriage_return(raw)
    lines = raw.split(b"\n")
    if lines and lines[-1] == b"":
        lines.pop()
    if encoding == "bytes":
        return lines
    return [line[:-1] if line.endswith(b"\r") else line for line in lines]


def _refuse_final_carriage_return(raw: bytes) -> None:
    at = raw.find(b"\r\n")
    if at < 0 and raw.endswith(b"\r"):
        at = len(raw) - 1
    if at >= 0:
        raise KeyLinesError(
            f"line {line_of_offset(raw, at)} ends in a carriage return (byte 0x0D); read as raw bytes, a key keeps "
            f"every byte, and a line file cannot tell a key's last 0x0D from a Windows line end. If the file has "
            f"Windows line ends, convert them to LF (sed -i 's/\\r$//' FILE); if keys really end in 0x0D, give them "
            f"where no line end is needed (a Parquet table with a binary `key` column, or a key argument)"
        )
