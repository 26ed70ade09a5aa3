"""How a filter answers keys unlike its sample: the rate of "maybe" on invented key families.

    python benchmarks/unlike_keys.py STORE_OR_ARTIFACT

The certified rate holds for keys drawn like the held-out non-members. This prints, beside it, the
share of "maybe" on 100,000 keys of each invented family (made up apart from any corpus; a rare
one may happen to be a member), so the gap a service could meet on traffic unlike its sample is a measured figure, not a guess.
"""

from __future__ import annotations

import sys

from tamis.loader import open_filter

FAMILIES = {
    "userNNN.exampleNN.com": [f"user{a:03d}.example{b:02d}.com" for a in range(1000) for b in range(100)],
    "hex digests (16 hex digits)": [f"{(i * 0x9E3779B97F4A7C15) % 2**64:016x}" for i in range(100_000)],
    "numbers": [str(i) for i in range(100_000)],
}


def main() -> None:
    loaded = open_filter(sys.argv[1])
    print(f"{loaded!r}\nmeasured rate (held-out sample): {loaded.fpr:.3%}")
    for name, keys in FAMILIES.items():
        print(f"{name:32s} {len(keys):>8,} keys  maybe {loaded.contains_many(keys).mean():.3%}")


if __name__ == "__main__":
    main()
