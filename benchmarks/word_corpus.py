"""An open-data membership corpus: "is this token an English word?", from word-frequency lists.

Run: .venv/bin/python benchmarks/word_corpus.py OUT_DIR

Source: the word-frequency dictionaries shipped inside the `pyspellchecker` package (PyPI
`pyspellchecker`, MIT licence; installed by the project's optional extra `bench`:
`pip install -e '.[bench]'`). Each `spellchecker/resources/<lang>.json.gz` maps a lower-case word
to how often it occurs in that language's text sample. The data stays inside the installed package:
this script only reads it and writes a corpus to the folder it is given. Never commit that folder;
write it outside the repository (or to an ignored path).

Members are the English words. Non-members are the words of the other Latin-script languages
shipped (Spanish, French, German, Italian, Portuguese, Dutch, Basque, Latvian) that are not English
words, each with its occurrence counts summed over those languages as its lookup count.

Why this is a reasonable stand-in for a membership job: a service that checks tokens of mixed-
language text against an English dictionary asks exactly "is this token in the English word list?",
and the tokens it is asked about that are not in the list are mostly words of neighbouring languages,
looked up as often as they occur in text. The task is unlike the Emberfall demo in the ways that
matter for a learned filter: real (not generated) keys, members and non-members sharing one alphabet
and most letter pairs, so a model of the characters can separate them only partly (spelling habits:
"ij", "sch", accents, endings), and lookup counts with a very heavy head (a few function words such as
"un" or "je" carry percents of all lookups).

Files written, in the project's input formats: `english_words.txt` (members, one UTF-8 word a line)
and `foreign_words.parquet` (non-members: columns `key` string and `count` int64), both sorted by
key, so the same package version gives byte-identical files.
"""

from __future__ import annotations

import argparse
import gzip
import json
from collections.abc import Mapping, Sequence
from importlib import resources
from pathlib import Path

import polars as pl

MEMBER_LANGUAGE = "en"
# The Latin-script languages among the package's dictionaries (it also ships Arabic, Persian and
# Russian, whose keys share no letters with English and would make the task trivial).
NONMEMBER_LANGUAGES = ("es", "fr", "de", "it", "pt", "nl", "eu", "lv")

MEMBERS_FILE = "english_words.txt"
NONMEMBERS_FILE = "foreign_words.parquet"

PACKAGE = "spellchecker"
INSTALL_HINT = "install the benchmark extra: .venv/bin/pip install -e '.[bench]' (PyPI pyspellchecker, MIT licence)"


def word_counts(language: str) -> dict[str, int]:
    """The packaged word -> occurrence count dictionary of one language (e.g. "en")."""
    try:
        folder = resources.files(PACKAGE) / "resources"
    except ModuleNotFoundError:
        raise ModuleNotFoundError(f"the word corpus needs the package pyspellchecker; {INSTALL_HINT}") from None
    source = folder / f"{language}.json.gz"
    if not source.is_file():
        shipped = sorted(p.name.split(".")[0] for p in folder.iterdir() if p.name.endswith(".json.gz"))
        raise ValueError(f"pyspellchecker ships no dictionary for language {language!r}; it has {', '.join(shipped)}")
    with source.open("rb") as raw, gzip.open(raw, "rt", encoding="utf-8") as text:
        return json.load(text)


def membership_corpus(members: Mapping[str, int], others: Sequence[Mapping[str, int]]) -> tuple[list[str], pl.DataFrame]:
    """(member words sorted; the other lists' words that are not members, sorted, with their counts
    summed over the lists, as a table with columns key and count)."""
    tables = [
        pl.DataFrame({"key": list(counts), "count": list(counts.values())}, schema={"key": pl.String, "count": pl.Int64})
        for counts in others
    ]
    nonmembers = (
        pl.concat(tables)
        .join(pl.DataFrame({"key": list(members)}, schema={"key": pl.String}), on="key", how="anti")
        .group_by("key")
        .agg(pl.col("count").sum())
        .sort("key")
    )
    return sorted(members), nonmembers


def write_corpus_files(directory: Path, members: Sequence[str], nonmembers: pl.DataFrame) -> tuple[Path, Path]:
    """Write the members file and the non-member Parquet table into `directory` (created if
    needed) and return their paths."""
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    members_path, nonmembers_path = directory / MEMBERS_FILE, directory / NONMEMBERS_FILE
    members_path.write_bytes("".join(word + "\n" for word in members).encode("utf-8"))
    nonmembers.write_parquet(nonmembers_path)
    return members_path, nonmembers_path


def write_word_corpus(
    directory: Path, member_language: str = MEMBER_LANGUAGE, nonmember_languages: Sequence[str] = NONMEMBER_LANGUAGES
) -> tuple[Path, Path]:
    """The word corpus of the packaged dictionaries, written into `directory`; returns the two paths."""
    members, nonmembers = membership_corpus(word_counts(member_language), [word_counts(lang) for lang in nonmember_languages])
    return write_corpus_files(directory, members, nonmembers)


def main(argv: Sequence[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("out_dir", type=Path, help="folder to write into (keep it out of the repository)")
    args = parser.parse_args(argv)
    members_path, nonmembers_path = write_word_corpus(args.out_dir)
    print(f"wrote {members_path} and {nonmembers_path}")


if __name__ == "__main__":
    main()
