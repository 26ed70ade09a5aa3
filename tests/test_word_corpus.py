"""The open word corpus of the benchmark (benchmarks/word_corpus.py): members are the English words of
pyspellchecker's frequency lists, non-members the other languages' words that are not English, with
their counts summed. The packaged data is read only when the `bench` extra (pyspellchecker) is
installed, and then only the English and the smallest (Basque) lists, so the module runs in seconds."""

from __future__ import annotations

import importlib.util
from pathlib import Path

import polars as pl
import pytest

from tamis.config import CorpusSettings
from tamis.corpus import load_corpus


def _word_corpus_module():
    path = Path(__file__).resolve().parent.parent / "benchmarks" / "word_corpus.py"
    spec = importlib.util.spec_from_file_location("word_corpus", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


word_corpus = _word_corpus_module()

ENGLISH = {"the": 900, "house": 40, "art": 25}
SPANISH = {"casa": 30, "el": 800, "art": 3}
DUTCH = {"huis": 20, "casa": 2, "het": 500}


def test_members_are_the_first_list_and_non_members_the_rest_with_counts_summed():
    members, nonmembers = word_corpus.membership_corpus(ENGLISH, [SPANISH, DUTCH])
    assert members == ["art", "house", "the"]
    # "art" is an English word, so it is no non-member; "casa" is in both other lists: 30 + 2
    assert nonmembers.to_dicts() == [
        {"key": "casa", "count": 32},
        {"key": "el", "count": 800},
        {"key": "het", "count": 500},
        {"key": "huis", "count": 20},
    ]


def test_the_files_are_byte_identical_whatever_order_the_lists_come_in(tmp_path):
    first = word_corpus.write_corpus_files(tmp_path / "a", *word_corpus.membership_corpus(ENGLISH, [SPANISH, DUTCH]))
    reversed_english = dict(reversed(list(ENGLISH.items())))
    second = word_corpus.write_corpus_files(tmp_path / "b", *word_corpus.membership_corpus(reversed_english, [DUTCH, SPANISH]))
    assert [p.read_bytes() for p in first] == [p.read_bytes() for p in second]
    assert first[0].read_text(encoding="utf-8") == "art\nhouse\nthe\n"


@pytest.fixture(scope="module")
def packaged(tmp_path_factory):
    """The corpus of the packaged English and Basque lists, written and read by the corpus stage."""
    pytest.importorskip("spellchecker", reason="the word corpus needs the bench extra: pip install -e '.[bench]'")
    folder = tmp_path_factory.mktemp("words")
    members_path, nonmembers_path = word_corpus.write_word_corpus(folder, nonmember_languages=("eu",))
    english, basque = word_corpus.word_counts("en"), word_corpus.word_counts("eu")
    return english, basque, nonmembers_path, load_corpus(members_path, nonmembers_path, CorpusSettings())


def test_the_packaged_lists_make_a_corpus_the_corpus_stage_reads(packaged):
    english, basque, nonmembers_path, corpus = packaged
    assert len(english) > 100_000 and all(isinstance(c, int) for c in english.values())
    assert corpus.has_counts
    assert sorted(corpus.members) == sorted(w.encode("utf-8") for w in english)
    assert corpus.stats["conflicts"] == 0 and corpus.stats["non_member_duplicates"] == 0
    foreign = {w: c for w, c in basque.items() if w not in english}
    parts = corpus.non_member_parts
    assert sum(len(part.keys) for part in parts) == len(foreign)
    assert all(count >= corpus.tau for count in corpus.heavy.counts) and len(corpus.heavy.keys) > 0
    assert sum(part.lookups for part in parts) == sum(foreign.values())
    assert pl.read_parquet(nonmembers_path).schema == {"key": pl.String, "count": pl.Int64}


def test_an_unknown_language_is_refused_with_the_shipped_ones_listed():
    pytest.importorskip("spellchecker", reason="the word corpus needs the bench extra: pip install -e '.[bench]'")
    with pytest.raises(ValueError, match="no dictionary for language 'xx'.*en"):
        word_corpus.word_counts("xx")
