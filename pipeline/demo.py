"""The fictional demo corpus: Emberfall's banned bot handles and its chat gateway's lookups.

Emberfall is an invented online game. Its chat gateway drops messages from handles of banned bot
accounts, so the demo's members are banned bot handles and its non-members are handles of players
(not banned) that the gateway looked up, each with a lookup count.

Every handle comes from one of a handful of generators. Bots mostly use machine-made patterns
(word plus digits, random base-36 runs, leetspeak, a bot-farm prefix plus a serial, syllable mash);
players mostly pick names, words, years and decorations. A share of bots imitate players and a
share of players look like bots, so a classifier on the characters of a handle is good but not
perfect. Lookup counts follow a Zipf law: most handles are looked up once or a few times, a few
very often.

Everything is vectorised: each generator draws its choices, digits and lengths as numpy arrays and
assembles strings with polars string operations, so no Python code runs per handle except one
`str.split` for random runs. Generation uses only `np.random.default_rng(seed)` and generators
spawned from it; the same arguments always give the same corpus and byte-identical files.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import polars as pl

MEMBERS_FILE = "banned_handles.txt"
LOOKUPS_FILE = "lookups.parquet"

# Handle length limits of the (fictional) Emberfall account system, in characters.
MIN_HANDLE_CHARS = 3
MAX_HANDLE_CHARS = 32

# Exponent a of the lookup-count law P(count = k) = k^-a / zeta(a). At a = 2, 1/zeta(2) = 60.8% of
# handles are looked up exactly once, and with the cap below the busiest 1% of handles carry about
# 45% of all lookups (heavy tail).
ZIPF_EXPONENT = 2.0
# Largest lookup count of one handle in the sample: a thousand chat messages in the sampled day
# (one every 86 s around the clock) is the busiest plausible chatter. The cap also bounds how much
# one handle can weigh: the lookup-weighted effective sample size (sum c)^2 / sum c^2 stays near
# 2.2% of the handles (mean count about 5.2, mean square about 1,216, half of it from capped draws),
# so a false-positive rate weighted by lookups can still be measured tightly on held-out handles.
MAX_LOOKUP_COUNT = 1_000

# Each round of generation draws this many candidates per handle still missing, divided by the
# share of candidates the previous round kept. Common player names repeat, so de-duplication keeps
# only about 68% of a first round of 2.8M player handles, and later rounds keep less (they also
# collide with the handles already found); the margin of 1.4 usually finishes in two rounds.
OVERSAMPLE = 1.4
# Candidates added to every round beyond that estimate, so a request for a handful of handles
# (where one duplicate is a large share) still finishes in one round.
ROUND_EXTRA = 16

GAME_WORDS: tuple[str, ...] = (
    "ember", "frost", "shadow", "wolf", "raven", "blade", "storm", "ash", "night", "stone",
    "iron", "ghost", "fire", "moon", "star", "thorn", "viper", "hawk", "bear", "fox",
    "dragon", "knight", "rogue", "mage", "hunter", "archer", "spark", "flame", "cinder", "smoke",
    "river", "forest", "meadow", "willow", "oak", "pine", "cedar", "maple", "fern", "moss",
    "silent", "swift", "brave", "wild", "dark", "bright", "lucky", "happy", "crazy", "lazy",
    "golden", "silver", "crimson", "azure", "scarlet", "amber", "jade", "onyx", "ivory", "cobalt",
    "pixel", "byte", "turbo", "nova", "comet", "orbit", "rocket", "zephyr", "echo", "pulse",
    "tiger", "lion", "panda", "otter", "badger", "falcon", "owl", "lynx", "moth", "beetle",
    "cookie", "muffin", "pickle", "noodle", "waffle", "biscuit", "pepper", "mango", "berry", "plum",
    "wizard", "paladin", "bard", "druid", "monk", "warden", "scout", "squire", "duke", "baron",
    "skull", "bone", "fang", "claw", "venom", "blood", "doom", "chaos", "void", "rune",
    "sky", "cloud", "rain", "thunder", "breeze", "tide", "wave", "coral", "reef", "pearl",
    "sword", "shield", "arrow", "hammer", "axe", "spear", "lance", "dagger", "bow", "helm",
    "king", "queen", "prince", "lord", "lady", "chief", "boss", "master", "sage", "hero",
    "frog", "toad", "crow", "swan", "goose", "duck", "crab", "shark", "whale", "squid",
    "snow", "ice", "hail", "mist", "fog", "dawn", "dusk", "sun", "haze", "glow",
    "quiet", "grumpy", "sleepy", "sneaky", "mighty", "tiny", "giant", "humble", "noble", "fierce",
    "candle", "lantern", "mirror", "feather", "crystal", "velvet", "copper", "bronze", "marble", "glass",
    "wander", "drift", "roam", "dream", "whisper", "howl", "roar", "dash", "glide", "climb",
    "potato", "carrot", "onion", "tomato", "lemon", "cherry", "peach", "melon", "bean", "nut",
    "vale", "glen", "peak", "cliff", "cave", "marsh", "dune", "isle", "bay", "hollow",
    "cat", "dog", "kitten", "puppy", "bunny", "mouse", "hamster", "pony", "goat", "lamb",
    "banner", "crown", "throne", "castle", "tower", "bridge", "gate", "forge", "anvil", "wheel",
    "jester", "pirate", "ninja", "viking", "ranger", "nomad", "pilgrim", "hermit", "outlaw", "rebel",
)

GIVEN_NAMES: tuple[str, ...] = (
    "mira", "tomas", "aiko", "lena", "oskar", "nadia", "felix", "ines", "marco", "yara",
    "elias", "sofia", "hugo", "clara", "ivan", "maya", "leo", "nora", "samir", "ada",
    "jonas", "lucia", "theo", "emma", "ravi", "alma", "oliver", "freya", "diego", "hana",
    "milo", "zara", "anton", "iris", "pablo", "vera", "kofi", "lina", "arlo", "greta",
    "omar", "elsa", "nico", "rosa", "kai", "ella", "tariq", "june", "viktor", "lila",
    "sam", "max", "alex", "ben", "tom", "kim", "eva", "ana", "jay", "ray",
    "finn", "ivy", "otto", "ruby", "axel", "mila", "emil", "luna", "ezra", "cleo",
    "amir", "bea", "carl", "dana", "erik", "fay", "gus", "hedda", "igor", "jana",
    "karl", "liv", "mads", "nell", "olaf", "pia", "quinn", "rhea", "sven", "tess",
    "uma", "vince", "wren", "xena", "yusuf", "zeke", "arjun", "bianca", "cyrus", "dora",
    "edgar", "fiona", "gideon", "helga", "idris", "jasper", "kira", "lars", "mara", "nils",
    "orla", "piet", "rosalind", "sasha", "tobias", "ursula", "vlad", "wanda", "yuki", "zelda",
    "anya", "boris", "celia", "dmitri", "elena", "farid", "gemma", "henrik", "ilsa", "joel",
    "zoé", "agnès", "björn", "josé", "renée", "jürgen", "ramón", "chloé", "andrés", "søren",
    "paula", "marta", "noemi", "simon", "łukasz", "hilde", "françois", "bruno", "lotte", "nina",
)

# Invented bot-farm prefixes: the kind of tag a farm stamps on the accounts it registers in bulk.
FARM_PREFIXES: tuple[str, ...] = (
    "goldshop", "fastlvl", "cheapore", "lootdrop", "coinfarm", "xpboost", "tradebot", "gemsale",
    "qzx", "vxk", "zzt", "bbq", "efgold", "lvlup", "rushxp", "orebot",
)

SEPARATORS = ("", "_", "-", ".")

SYLLABLES: tuple[str, ...] = tuple(c + v for c in "bdfgklmnprstvz" for v in "aeiou")

# Random runs are base-36 (lower-case letters then digits); the first 26 symbols are the letters.
BASE36 = b"abcdefghijklmnopqrstuvwxyz0123456789"
LETTER_COUNT = 26

# Leetspeak substitutions, from light to heavy; a bot picks one table per handle.
LEET_TABLES: tuple[dict[int, str], ...] = (
    str.maketrans({"e": "3", "o": "0"}),
    str.maketrans({"a": "4", "e": "3", "i": "1", "o": "0"}),
    str.maketrans({"a": "4", "e": "3", "i": "1", "o": "0", "s": "5", "t": "7"}),
)
LEET_SHARES = (0.3, 0.4, 0.3)

# Accented forms a player may type for a plain vowel (precomposed code points, so already NFC).
ACCENTS = {"a": "á", "e": "é", "i": "í", "o": "ö", "u": "ü"}
# Share of player-style handles whose first word has its first vowel accented (beyond the accented
# given names): with those names about 8% of player handles are non-ASCII, about 0.4% of bot handles.
ACCENT_SHARE = 0.03

# A handle generator draws n handles (not necessarily distinct) from the random generator it is given.
HandleGenerator = Callable[[np.random.Generator, int], pl.Series]


@dataclass(frozen=True)
class DemoCorpus:
    """Members (banned bot handles), non-members (looked-up player handles) and their lookup counts.

    `nonmember_counts[i]` is the number of gateway lookups of `nonmember_keys[i]` (int64, >= 1).
    """

    member_keys: list[str]
    nonmember_keys: list[str]
    nonmember_counts: np.ndarray


# ---------------------------------------------------------------------------------------------
# Spellings of one vocabulary word. Spelling is done on the small vocabularies (a few hundred
# words), so a handle costs only a gather, never a string transform.

Spelling = Callable[[str], str]


def as_is(word: str) -> str:
    return word


def capitalised(word: str) -> str:
    return word[:1].upper() + word[1:]


def shouted(word: str) -> str:
    return word.upper()


def accented(word: str) -> str:
    """The word with its first plain vowel accented (unchanged if it has none)."""
    for i, char in enumerate(word):
        fancy = ACCENTS.get(char.lower())
        if fancy is not None:
            return word[:i] + (fancy.upper() if char.isupper() else fancy) + word[i + 1 :]
    return word


def leet(table: dict[int, str]) -> Spelling:
    return lambda word: word.translate(table)


def accented_after(casing: Spelling) -> Spelling:
    return lambda word: accented(casing(word))


# Player casings: indices 0, 1, 2 are plain; index + 3 is the same casing with an accent.
CASINGS: tuple[Spelling, ...] = (as_is, capitalised, shouted)
ACCENTED_CASINGS: tuple[Spelling, ...] = CASINGS + tuple(accented_after(casing) for casing in CASINGS)
AS_IS, CAPITALISED, SHOUTED = range(len(CASINGS))


# ---------------------------------------------------------------------------------------------
# Building blocks: each draws one part of n handles at once.


def _pick(
    rng: np.random.Generator,
    vocabulary: Sequence[str],
    style: np.ndarray,
    spellings: Sequence[Spelling] = (as_is,),
) -> pl.Series:
    """One uniformly drawn vocabulary word per row, row i spelled with spellings[style[i]]."""
    table = pl.Series([spell(word) for spell in spellings for word in vocabulary], dtype=pl.String)
    words = rng.integers(0, len(vocabulary), len(style))
    return table.gather(words + len(vocabulary) * style)


def _plain(n: int) -> np.ndarray:
    """Style index 0 (the first spelling) for n rows."""
    return np.zeros(n, dtype=np.int64)


def _choice(rng: np.random.Generator, n: int, p: Sequence[float]) -> np.ndarray:
    """n indices, index j with probability p[j]."""
    return rng.choice(len(p), size=n, p=p)


def _gather(options: Sequence[str], index: np.ndarray) -> pl.Series:
    """options[index[i]] for every row i."""
    return pl.Series(options, dtype=pl.String).gather(index)


def _select(rng: np.random.Generator, variants: Sequence[pl.Series], p: Sequence[float]) -> pl.Series:
    """Row-wise choice among equally long variants: row i comes from variant j with probability p[j]."""
    choice = _choice(rng, len(variants[0]), p)
    result = variants[0]
    for j in range(1, len(variants)):
        result = variants[j].zip_with(pl.Series(choice == j), result)
    return result


def _empty(n: int) -> pl.Series:
    return pl.repeat("", n, dtype=pl.String, eager=True)


def _optional(rng: np.random.Generator, parts: pl.Series, share: float) -> pl.Series:
    """parts in a share of rows, the empty string elsewhere."""
    return parts.zip_with(pl.Series(rng.random(len(parts)) < share), _empty(len(parts)))


def _separator(rng: np.random.Generator, n: int, p: Sequence[float]) -> pl.Series:
    """One of SEPARATORS (nothing, an underscore, a hyphen or a dot) per row, with shares p."""
    return _gather(SEPARATORS, _choice(rng, n, p))


def _number(rng: np.random.Generator, n: int, min_digits: int, max_digits: int) -> pl.Series:
    """Decimal numbers of min_digits..max_digits digits (uniform digit count), no leading zero."""
    digits = rng.integers(min_digits, max_digits + 1, n)
    return pl.Series(rng.integers(10 ** (digits - 1), 10**digits)).cast(pl.String)


def _serial(rng: np.random.Generator, n: int, min_digits: int, max_digits: int) -> pl.Series:
    """Zero-padded serial numbers of min_digits..max_digits digits, as a farm's counter prints them."""
    digits = rng.integers(min_digits, max_digits + 1, n)
    frame = pl.DataFrame({"value": rng.integers(0, 10**digits), "digits": digits})
    return frame.select(pl.col("value").cast(pl.String).str.zfill(pl.col("digits"))).to_series()


def _year(rng: np.random.Generator, n: int) -> pl.Series:
    """Birth or favourite years as players write them: 4 digits (1965..2012), or the last 2 (45%)."""
    years = pl.Series(rng.integers(1965, 2013, n)).cast(pl.String)
    return years.str.slice(2).zip_with(pl.Series(rng.random(n) < 0.45), years)


def _base36_runs(rng: np.random.Generator, lengths: np.ndarray) -> pl.Series:
    """Random base-36 strings of the given lengths (>= 1), each starting with a letter.

    All characters are drawn in one array and joined with newline separators into one buffer,
    which a single `str.split` cuts into handles.
    """
    ends = np.cumsum(lengths + 1) - 1
    starts = ends - lengths
    codes = rng.integers(0, len(BASE36), len(lengths) + int(lengths.sum()))
    codes[starts] = rng.integers(0, LETTER_COUNT, len(lengths))
    buffer = np.frombuffer(BASE36, dtype=np.uint8)[codes]
    buffer[ends] = ord("\n")
    return pl.Series(buffer.tobytes().decode("ascii").split("\n")[:-1], dtype=pl.String)


def _pick_player_word(
    rng: np.random.Generator, vocabulary: Sequence[str], casing: np.ndarray
) -> pl.Series:
    """Words in the given casings (indices into CASINGS), accented in ACCENT_SHARE of the rows."""
    accent = rng.random(len(casing)) < ACCENT_SHARE
    return _pick(rng, vocabulary, casing + len(CASINGS) * accent, ACCENTED_CASINGS)


# ---------------------------------------------------------------------------------------------
# Bot generators: machine-made handles.


def bot_word_digits(rng: np.random.Generator, n: int) -> pl.Series:
    """A lower-case word and 3 to 6 random digits, sometimes with a separator: ember48213."""
    word = _pick(rng, GAME_WORDS, _plain(n))
    return word + _separator(rng, n, [0.8, 0.15, 0.05, 0.0]) + _number(rng, n, 3, 6)


def bot_base36_run(rng: np.random.Generator, n: int) -> pl.Series:
    """A letter and 7 to 15 random base-36 characters: k3j9x0qz2m."""
    return _base36_runs(rng, rng.integers(8, 17, n))


def bot_leetspeak(rng: np.random.Generator, n: int) -> pl.Series:
    """Two words in leetspeak (one table per handle) and 0 to 3 digits: d4rkw0lf7."""
    table = _choice(rng, n, LEET_SHARES)
    spellings = [leet(t) for t in LEET_TABLES]
    words = _pick(rng, GAME_WORDS, table, spellings) + _pick(rng, GAME_WORDS, table, spellings)
    return words + _optional(rng, _number(rng, n, 1, 3), 0.6)


def bot_farm_serial(rng: np.random.Generator, n: int) -> pl.Series:
    """A bot-farm prefix, a separator and a zero-padded serial: goldshop_004812."""
    prefix = _pick(rng, FARM_PREFIXES, _plain(n))
    return prefix + _separator(rng, n, [0.4, 0.4, 0.2, 0.0]) + _serial(rng, n, 4, 7)


def bot_syllable_mash(rng: np.random.Generator, n: int) -> pl.Series:
    """3 to 5 random consonant-vowel syllables and 2 to 4 digits: kavorimu93."""
    stem = _empty(n)
    for share in (1.0, 1.0, 1.0, 0.6, 0.3):  # three syllables, a fourth in 60%, a fifth in 30%
        stem = stem + _optional(rng, _pick(rng, SYLLABLES, _plain(n)), share)
    return stem + _number(rng, n, 2, 4)


# ---------------------------------------------------------------------------------------------
# Player generators: names, words, years and decorations.


def player_name_year(rng: np.random.Generator, n: int) -> pl.Series:
    """A given name, maybe a separator, and a year or a number: Mira1994, nora_07, Leo123."""
    name = _pick_player_word(rng, GIVEN_NAMES, _choice(rng, n, [0.35, 0.6, 0.05]))
    suffix = _select(rng, [_empty(n), _year(rng, n), _number(rng, n, 1, 4)], [0.03, 0.47, 0.5])
    return name + _separator(rng, n, [0.6, 0.3, 0.02, 0.08]) + suffix


def _word_pair(rng: np.random.Generator, n: int) -> pl.Series:
    """Two words in CamelCase (50%), or joined by a separator in lower (35%) or Title case (15%).

    SilentFox, swift_otter, Grumpy.Toad; the first word is accented in ACCENT_SHARE of handles.
    """
    form = _choice(rng, n, [0.5, 0.35, 0.15])  # 0 CamelCase, 1 lower case joined, 2 Title case joined
    casing = np.where(form == 1, AS_IS, CAPITALISED)
    first = _pick_player_word(rng, GAME_WORDS, casing)
    second = _pick(rng, GAME_WORDS, casing, CASINGS)
    link = np.where(form == 0, 0, _choice(rng, n, [0.0, 0.8, 0.1, 0.1]))  # indices into SEPARATORS
    return first + _gather(SEPARATORS, link) + second


def player_word_pair(rng: np.random.Generator, n: int) -> pl.Series:
    """Two words, maybe a number or a year: SilentFox, swift_otter12, Grumpy.Toad1999."""
    suffix = _select(rng, [_empty(n), _number(rng, n, 1, 3), _year(rng, n)], [0.45, 0.35, 0.2])
    return _word_pair(rng, n) + suffix


# Wrappers players put around a core, with the casing of the core inside each.
WRAPPERS: tuple[tuple[str, str, int], ...] = (
    ("xX", "Xx", CAPITALISED),
    ("xx_", "_xx", AS_IS),
    ("_", "_", CAPITALISED),
    ("x", "x", CAPITALISED),
    ("XX", "XX", SHOUTED),
)
WRAPPER_SHARES = (0.4, 0.2, 0.15, 0.15, 0.1)


def player_wrapped(rng: np.random.Generator, n: int) -> pl.Series:
    """A word or name, maybe a second word, inside an xX..Xx-style wrapper: xXShadowXx, xx_mira_xx."""
    wrapper = _choice(rng, n, WRAPPER_SHARES)
    casing = np.array([c for _, _, c in WRAPPERS])[wrapper]
    first = _pick_player_word(rng, GAME_WORDS + GIVEN_NAMES, casing)
    core = first + _optional(rng, _pick(rng, GAME_WORDS, casing, CASINGS), 0.75)
    left, right = _gather([w[0] for w in WRAPPERS], wrapper), _gather([w[1] for w in WRAPPERS], wrapper)
    return left + core + right + _optional(rng, _number(rng, n, 1, 2), 0.4)


# Links between a name and its epithet: CamelCase forms, then lower-case forms.
CAMEL_LINKS, CAMEL_LINK_SHARES = ("", "The", "Of"), (0.6, 0.3, 0.1)
LOWER_LINKS, LOWER_LINK_SHARES = ("_", "_the_", "_of_", "."), (0.55, 0.2, 0.15, 0.1)


def player_name_word(rng: np.random.Generator, n: int) -> pl.Series:
    """A given name with an epithet word, maybe a number: MiraStorm, TheoTheBrave, lena_of_frost7."""
    is_camel = rng.random(n) < 0.65
    casing = np.where(is_camel, CAPITALISED, AS_IS)
    name = _pick_player_word(rng, GIVEN_NAMES, casing)
    link = np.where(
        is_camel,
        _choice(rng, n, CAMEL_LINK_SHARES),
        len(CAMEL_LINKS) + _choice(rng, n, LOWER_LINK_SHARES),
    )
    word = _pick(rng, GAME_WORDS, casing, CASINGS)
    suffix = _optional(rng, _select(rng, [_number(rng, n, 1, 3), _year(rng, n)], [0.6, 0.4]), 0.55)
    return name + _gather(CAMEL_LINKS + LOWER_LINKS, link) + word + suffix


# Who draws from which generator. Bots are mostly machine-made, but 5% imitate players; players are
# mostly hand-picked, but 3.5% look like bots (leetspeak, word and many digits, random runs). These
# shares set how far the classes overlap: roughly, each point of imitation costs half a point of AUC
# on top of the overlap the generators have by nature (word + digits against word + year).
BOT_MIX: tuple[tuple[HandleGenerator, float], ...] = (
    (bot_word_digits, 0.27),
    (bot_base36_run, 0.18),
    (bot_leetspeak, 0.16),
    (bot_farm_serial, 0.18),
    (bot_syllable_mash, 0.16),
    (player_name_year, 0.02),
    (player_word_pair, 0.02),
    (player_name_word, 0.01),
)
PLAYER_MIX: tuple[tuple[HandleGenerator, float], ...] = (
    (player_name_year, 0.28),
    (player_word_pair, 0.32),
    (player_wrapped, 0.10),
    (player_name_word, 0.265),
    (bot_word_digits, 0.015),
    (bot_leetspeak, 0.015),
    (bot_base36_run, 0.005),
)


# ---------------------------------------------------------------------------------------------
# Drawing a class and the lookup counts.


def draw_handles(
    rng: np.random.Generator, mix: Sequence[tuple[HandleGenerator, float]], n: int
) -> pl.Series:
    """n candidate handles (not de-duplicated): generators chosen per handle with the mix weights."""
    weights = np.array([w for _, w in mix])
    per_generator = rng.multinomial(n, weights / weights.sum())
    parts = [generate(rng, int(count)) for (generate, _), count in zip(mix, per_generator) if count]
    handles = pl.concat(parts) if parts else pl.Series([], dtype=pl.String)
    return handles.gather(rng.permutation(len(handles)))


def _is_valid(handles: pl.Series) -> pl.Series:
    return handles.str.len_chars().is_between(MIN_HANDLE_CHARS, MAX_HANDLE_CHARS)


def distinct_handles(
    rng: np.random.Generator,
    mix: Sequence[tuple[HandleGenerator, float]],
    n: int,
    exclude: pl.Series | None = None,
) -> pl.Series:
    """Exactly n distinct valid handles from mix, none of them in exclude, in order of first draw.

    Draws rounds of candidates until enough distinct ones are found; raises RuntimeError if a round
    adds nothing (the generators cannot produce that many distinct handles).
    """
    found = pl.Series([], dtype=pl.String)
    kept_share = 1.0
    while len(found) < n:
        drawn = math.ceil((n - len(found)) * OVERSAMPLE / kept_share) + ROUND_EXTRA
        candidates = draw_handles(rng, mix, drawn)
        keep = _is_valid(candidates)
        if exclude is not None:
            keep = keep & ~candidates.is_in(exclude.implode())
        if len(found):
            keep = keep & ~candidates.is_in(found.implode())
        fresh = candidates.filter(keep).unique(maintain_order=True)
        if fresh.is_empty():
            raise RuntimeError(
                f"demo corpus: the generators ran out of distinct handles after {len(found):,} of "
                f"{n:,}; ask for fewer handles or give the generators a larger vocabulary"
            )
        kept_share = len(fresh) / drawn
        found = pl.concat([found, fresh])
    return found.head(n)


def lookup_counts(rng: np.random.Generator, n: int) -> np.ndarray:
    """n lookup counts from the Zipf law P(k) = k^-a / zeta(a), a = ZIPF_EXPONENT, capped (int64)."""
    return np.minimum(rng.zipf(ZIPF_EXPONENT, n), MAX_LOOKUP_COUNT).astype(np.int64)


def _check_size(name: str, value: object) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, np.integer)) or value < 0:
        raise ValueError(f"demo corpus: {name} must be a non-negative integer, got {value!r}")
    return int(value)


def _demo_tables(members: int, non_members: int, seed: int) -> tuple[pl.Series, pl.DataFrame]:
    """Banned handles and the lookups table (key, count) as polars objects, for both entry points."""
    members = _check_size("members", members)
    non_members = _check_size("non_members", non_members)
    member_rng, player_rng, count_rng = np.random.default_rng(seed).spawn(3)
    member_keys = distinct_handles(member_rng, BOT_MIX, members)
    lookups = pl.DataFrame(
        {
            "key": distinct_handles(player_rng, PLAYER_MIX, non_members, exclude=member_keys),
            "count": lookup_counts(count_rng, non_members),
        },
        schema={"key": pl.String, "count": pl.Int64},
    )
    return member_keys, lookups


def generate_demo_corpus(
    members: int = 200_000, non_members: int = 2_000_000, seed: int = 7
) -> DemoCorpus:
    """The Emberfall demo corpus: `members` banned bot handles, `non_members` looked-up player handles.

    The two key lists are disjoint and duplicate-free (a player handle that a bot also drew is
    dropped from the players: the ban list wins). Members, non-members and counts each use their
    own generator spawned from `np.random.default_rng(seed)`, so the members do not depend on how
    many non-members are asked for.
    """
    member_keys, lookups = _demo_tables(members, non_members, seed)
    return DemoCorpus(
        member_keys=member_keys.to_list(),
        nonmember_keys=lookups["key"].to_list(),
        nonmember_counts=lookups["count"].to_numpy(),
    )


def write_demo_corpus(
    directory: Path, members: int = 200_000, non_members: int = 2_000_000, seed: int = 7
) -> tuple[Path, Path]:
    """Write `banned_handles.txt` (one handle a line, UTF-8, no header) and `lookups.parquet`.

    The Parquet file has columns `key` (string) and `count` (int64). Creates directory if needed
    and returns the two paths. The same arguments give byte-identical files.
    """
    member_keys, lookups = _demo_tables(members, non_members, seed)
    directory = Path(directory)
    directory.mkdir(parents=True, exist_ok=True)
    members_path, lookups_path = directory / MEMBERS_FILE, directory / LOOKUPS_FILE
    members_path.write_bytes("".join(key + "\n" for key in member_keys.to_list()).encode("utf-8"))
    lookups.write_parquet(lookups_path)
    return members_path, lookups_path
