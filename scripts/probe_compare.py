"""Compare two runs of the held-out probe written with ``probe_heldout.py --jsonl``.

Prints the counts of each run (maps reported ok, silent failures, maps whose
virtual gates and Cdg are within the fitter's bounds) over the seeds both runs
hold, then every map whose verdict, warnings or errors changed, with the
warnings the second run added. A change of the analysis is judged by these
counts (no new silent failure above all) before its per-map numbers.

Usage::

    python scripts/probe_heldout.py --seeds 0:64 --jsonl base.jsonl   # before the change
    python scripts/probe_heldout.py --seeds 0:64 --jsonl new.jsonl    # after it
    python scripts/probe_compare.py base.jsonl new.jsonl
"""

from __future__ import annotations

import argparse
import json
import math
import sys

from probe_heldout import within_bounds


def load(path: str) -> dict[int, dict]:
    """The records of a --jsonl file by seed."""
    with open(path, encoding="utf-8") as fh:
        return {r["seed"]: r for r in map(json.loads, filter(str.strip, fh))}


def _same(a: float, b: float) -> bool:
    return a == b or (math.isnan(a) and math.isnan(b))  # (NaN equals NaN here)


def changed(a: dict, b: dict) -> bool:
    """Whether the verdict, the warnings or an error against the truth differ between two records."""
    return (a["ok"] != b["ok"] or a["warnings"] != b["warnings"]
            or not all(_same(a[k], b[k]) for k in ("vg", "cdg", "la", "ec")))


def counts(rows: list[dict]) -> tuple[int, int, int]:
    """Maps reported ok, silent failures (ok beyond a bound), maps within the bounds."""
    return sum(r["ok"] for r in rows), sum(r["silent"] for r in rows), sum(within_bounds(r) for r in rows)


def compare(base: dict[int, dict], new: dict[int, dict]) -> list[str]:
    """The report lines: the counts over the common seeds, then one block per changed map."""
    seeds = sorted(set(base) & set(new))
    (ok0, si0, wi0), (ok1, si1, wi1) = counts([base[s] for s in seeds]), counts([new[s] for s in seeds])
    out = [f"{len(seeds)} maps: ok {ok0} → {ok1}, silent {si0} → {si1}, within the bounds {wi0} → {wi1}"]
    for s in seeds:
        a, b = base[s], new[s]
        if not changed(a, b):
            continue
        tag = "  SILENT" if b["silent"] and not a["silent"] else ""
        out.append(f"  seed {s}: ok {a['ok']} → {b['ok']}, vg {a['vg']:.4g} → {b['vg']:.4g}, "
                   f"cdg {a['cdg']:.4g} → {b['cdg']:.4g}, beyond {a['beyond']} → {b['beyond']}{tag}")
        out += [f"      + {w}" for w in b["warnings"] if w not in a["warnings"]]
    return out


def main(argv: list[str] | None = None) -> int:
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("base", help="--jsonl file of the run before the change")
    p.add_argument("new", help="--jsonl file of the run after it")
    a = p.parse_args(argv)
    for line in compare(load(a.base), load(a.new)):
        print(line)
    return 0


if __name__ == "__main__":
    sys.exit(main())
