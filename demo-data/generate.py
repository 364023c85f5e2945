#!/usr/bin/env python3
"""Writes the demo event stream of Fernwick Garden Supply, a fictional garden shop.

Every customer has one or two interests (vegetable growing, lawn care, container
gardening, irrigation, pruning); they rate and buy mostly within those interests, so the
published neighbor lists of the demo visibly group related products. Deterministic: the
same seed always writes the same bytes.

Usage: python3 demo-data/generate.py [OUTPUT]   (default: demo-data/garden-events.jsonl.gz)
"""
import gzip
import json
import random
import sys
from datetime import datetime, timedelta, timezone

CATALOGUE = {
    "vegetables": ["heirloom-tomato-seeds", "sweet-basil-seeds", "raised-bed-kit-120", "organic-compost-40l",
                   "tomato-cage-set", "seed-starting-tray", "runner-bean-seeds", "slug-copper-tape"],
    "lawn": ["shade-lawn-seed-5kg", "spring-lawn-feed", "long-edging-shears", "reel-mower-blades",
             "lawn-aerator-fork", "spring-tine-rake", "lawn-patch-mix", "moss-killer-2kg"],
    "containers": ["terracotta-pot-30cm", "peat-free-potting-mix", "pot-saucer-30cm", "brass-watering-can",
                   "balcony-planter-box", "pot-feet-set", "self-watering-insert", "hanging-basket-35cm"],
    "irrigation": ["drip-irrigation-kit", "digital-hose-timer", "oscillating-sprinkler", "hose-reel-cart",
                   "soaker-hose-15m", "rain-barrel-200l", "hose-connector-set", "spray-gun-8-pattern"],
    "pruning": ["bypass-pruning-shears", "anvil-loppers", "folding-pruning-saw", "soft-tree-ties",
                "blade-sharpening-stone", "telescopic-pole-pruner", "hedge-shears-classic", "pruning-glove-pair"],
}
GENERAL = ["stainless-trowel", "kneeling-pad", "leather-garden-gloves", "hand-fork", "wheelbarrow-90l", "jute-garden-twine"]
START = datetime(2026, 3, 1, 7, 0, tzinfo=timezone.utc)
DAYS = 120


def stamp(t):
    return t.strftime("%Y-%m-%dT%H:%M:%SZ")


def main():
    out_path = sys.argv[1] if len(sys.argv) > 1 else "demo-data/garden-events.jsonl.gz"
    rng = random.Random(20260301)
    topics = list(CATALOGUE)
    every_item = [i for items in CATALOGUE.values() for i in items] + GENERAL
    events = []
    for n in range(1, 901):
        user = f"fw-{n:04d}"
        interests = rng.sample(topics, rng.choice([1, 1, 2]))
        leniency = rng.uniform(-0.6, 0.6)  # some customers rate everything higher
        t = START + timedelta(minutes=rng.randrange(DAYS * 24 * 60))
        liked = [i for topic in interests for i in CATALOGUE[topic]]
        picks = rng.sample(liked, min(len(liked), rng.randint(4, 9)))
        picks += rng.sample(GENERAL, rng.randint(0, 2))
        picks += rng.sample([i for i in every_item if i not in liked], rng.randint(0, 3))
        for item in picks:
            t += timedelta(minutes=rng.randint(5, 60 * 24 * 4))
            fond = item in liked
            base = rng.gauss(4.4, 0.5) if fond else rng.gauss(2.3, 0.8)
            value = min(5.0, max(1.0, round((base + leniency) * 2) / 2))
            events.append((t, {"kind": "rating", "user": user, "item": item, "value": value, "at": stamp(t)}))
            if fond and rng.random() < 0.55:
                bought = t - timedelta(days=rng.randint(1, 10))
                events.append((bought, {"kind": "purchase", "user": user, "item": item, "at": stamp(bought),
                                        "quantity": rng.choice([1, 1, 1, 2, 3])}))
        if rng.random() < 0.03 and picks:
            t += timedelta(days=1)
            events.append((t, {"kind": "unrating", "user": user, "item": picks[0], "at": stamp(t)}))
    # One customer asks to be forgotten; one product is discontinued.
    events.append((START + timedelta(days=DAYS + 1), {"kind": "erase_user", "user": "fw-0007", "at": stamp(START + timedelta(days=DAYS + 1))}))
    events.append((START + timedelta(days=DAYS + 2), {"kind": "item_status", "item": "reel-mower-blades", "available": False,
                                                      "at": stamp(START + timedelta(days=DAYS + 2))}))
    events.sort(key=lambda e: (e[0], e[1]["user"] if "user" in e[1] else ""))
    with open(out_path, "wb") as raw, gzip.GzipFile(fileobj=raw, mode="wb", mtime=0, filename="") as gz:
        for _, event in events:
            gz.write((json.dumps(event, separators=(",", ":")) + "\n").encode())
    print(f"wrote {len(events)} events to {out_path}")


if __name__ == "__main__":
    main()
