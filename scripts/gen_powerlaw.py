#!/usr/bin/env python3
"""Writes a synthetic rating set for benchmarks: item popularity follows a power law
(Zipf, exponent 1.0), user activity is geometric, ratings depend on a hidden user taste
and item quality so that similarities are not pure noise. Deterministic for a given seed.

Usage: gen_powerlaw.py OUTPUT.csv [EVENTS] [USERS] [ITEMS]
"""
import os
import sys

import numpy as np


def main():
    out = sys.argv[1]
    events = int(sys.argv[2]) if len(sys.argv) > 2 else 5_000_000
    users = int(sys.argv[3]) if len(sys.argv) > 3 else 200_000
    items = int(sys.argv[4]) if len(sys.argv) > 4 else 3_000
    rng = np.random.default_rng(20261202)
    popularity = 1.0 / np.arange(1, items + 1)
    popularity /= popularity.sum()
    activity = rng.geometric(1.0 / (events / users), size=users).clip(1, 2000)
    activity = np.maximum(1, np.round(activity * events / activity.sum())).astype(int)
    taste = rng.normal(size=(users, 4))
    traits = rng.normal(size=(items, 4))
    quality = rng.normal(3.4, 0.5, size=items)
    start = 1_767_225_600  # 2026-01-01T00:00:00Z
    written = 0
    with open(out + ".tmp", "w") as f:
        f.write("user,item,value,at\n")
        for u in range(users):
            k = min(int(activity[u]), items // 2)
            chosen = np.sort(rng.choice(items, size=k, replace=False, p=popularity))
            affinity = traits[chosen] @ taste[u] * 0.4
            values = np.clip(np.round((quality[chosen] + affinity + rng.normal(0, 0.6, size=len(chosen))) * 2) / 2, 1, 5)
            times = start + rng.integers(0, 180 * 86400, size=len(chosen))
            f.write("".join(f"b{u},t{i},{v:g},{t}\n" for i, v, t in zip(chosen, values, times)))
            written += len(chosen)
    os.replace(out + ".tmp", out)
    print(f"wrote {written} ratings ({users} users, {items} items) to {out}")


if __name__ == "__main__":
    main()
