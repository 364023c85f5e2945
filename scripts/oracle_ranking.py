#!/usr/bin/env python3
"""Independent numpy implementation of item-based top-N by similarity mass and of the
popularity baseline, the oracle of `simtide evaluate`'s ranking figures.

Lists: for every training item a, the k items b with the highest adjusted cosine
s(a, b) = sum d_a d_b / sqrt(sum d_a^2 * sum d_b^2) over co-raters (every user
centered on the mean of its training ratings), among pairs with at least
`min_common_users` co-raters, both co-rater norms defined and s > 0; ties by item name.

Similarity mass (Deshpande and Karypis, ACM TOIS 2004): a user's candidates are the
items in the lists of the user's training items that the user has not rated; each scores
m(i) = sum over the user's items j whose list holds i of s(i, j), or with --normalise of
s(i, j) / (sum of j's list). Each candidate's terms are added in ascending order of value
(so the sum is the same to the last bit as simtide's). Ranked by mass, ties by name.

Popularity: the training items by number of distinct raters, ties by name, minus the
user's training items. The head is the first 10 % of them, rounded up.

Users evaluated: those with a held-out rating >= --relevant of an item seen in training.
precision@N = hits / N, recall@N = hits / relevant, hit rate@N = share of users with a
hit, nDCG@N = DCG / IDCG with gains 1 / log2(rank + 1) (Jarvelin and Kekalainen, ACM
TOIS 2002); coverage and head share of the lists cut at 10.

The split is simtide's seeded random split (see oracle_prediction.py).

Prints one JSON object: {"users": U, "mass": {...}, "popularity": {...}} where each
ranking has precision_at_N, recall_at_N, ndcg_at_N, hit_rate_at_N for N in 5, 10, 20,
coverage and head_share.

Usage: oracle_ranking.py --events CSV --seed S --fraction F --neighbors K
                         --min-common-users N [--normalise] [--relevant R]
"""
import json
import math
import sys

import numpy as np

from oracle_prediction import ZERO_NORM, read_ratings, split, split_and_list_args, training_sums

CUTOFFS = (5, 10, 20)
TOP_N = 10


def item_lists(items, common, dot, norm, norm_t, k, min_common):
    """Each item's top-k list as [(neighbor, score)], best first, ties by name."""
    names = sorted(items, key=items.get)
    name_rank = np.empty(len(names), dtype=np.int64)
    name_rank[np.argsort(np.array(names, dtype=object))] = np.arange(len(names))
    lists = {}
    for a in range(len(names)):
        n = common[a].toarray().ravel()
        d = dot[a].toarray().ravel()
        sa = norm[a].toarray().ravel()
        sb = norm_t[a].toarray().ravel()
        with np.errstate(divide="ignore", invalid="ignore"):
            score = np.clip(d / np.sqrt(sa * sb), -1.0, 1.0)
        ok = (n >= max(min_common, 1)) & (sa >= ZERO_NORM) & (sb >= ZERO_NORM)
        ok &= np.nan_to_num(score, nan=-np.inf) > 0.0
        ok[a] = False
        cand = np.nonzero(ok)[0]
        order = cand[np.lexsort((name_rank[cand], -score[cand]))][:k]
        lists[a] = [(int(b), float(score[b])) for b in order]
    return lists, names


def quality(ranked, relevant, catalogue, head):
    out = {}
    users = len(relevant)
    for n in CUTOFFS:
        p = r = g = h = 0.0
        for user, wanted in relevant.items():
            top = ranked[user][:n]
            hits = [i for i in top if i in wanted]
            p += len(hits) / n
            r += len(hits) / len(wanted)
            h += 1.0 if hits else 0.0
            dcg = sum(1.0 / math.log2(rank + 2) for rank, i in enumerate(top) if i in wanted)
            ideal = sum(1.0 / math.log2(rank + 2) for rank in range(min(len(wanted), n)))
            g += dcg / ideal
        out[f"precision_at_{n}"] = p / users
        out[f"recall_at_{n}"] = r / users
        out[f"ndcg_at_{n}"] = g / users
        out[f"hit_rate_at_{n}"] = h / users
    shown = [i for user in relevant for i in ranked[user][:TOP_N]]
    out["coverage"] = len(set(shown)) / catalogue
    out["head_share"] = sum(1 for i in shown if i in head) / max(len(shown), 1)
    return out


def main():
    ap = split_and_list_args()
    ap.add_argument("--normalise", action="store_true")
    ap.add_argument("--relevant", type=float, default=4.0)
    args = ap.parse_args()

    train, test = split(read_ratings(args.events), args.seed, args.fraction)
    users, items, ratings, _, common, dot, norm, norm_t = training_sums(train)
    lists, names = item_lists(items, common, dot, norm, norm_t, args.neighbors, args.min_common_users)

    raters = np.diff((ratings > 0).astype(np.int64).tocsc().indptr)
    popular = sorted(range(len(names)), key=lambda i: (-raters[i], names[i]))
    head = set(popular[: math.ceil(len(popular) * 0.1)])

    relevant = {}
    for user, item, value in test:
        if value >= args.relevant and item in items:
            relevant.setdefault(user, set()).add(items[item])
    length = max(max(CUTOFFS), TOP_N)
    by_mass, by_popularity = {}, {}
    for user in relevant:
        u = users.get(user)
        own = set() if u is None else set(ratings.indices[ratings.indptr[u]:ratings.indptr[u + 1]].tolist())
        parts = {}
        for j in own:
            lst = lists[j]
            total = sum(s for _, s in lst) if args.normalise else 1.0
            if total <= 0.0:
                continue
            for i, s in lst:
                if i not in own:
                    parts.setdefault(i, []).append(1.0 * s / total)
        mass = {i: sum(sorted(p)) for i, p in parts.items()}
        by_mass[user] = sorted(mass, key=lambda i: (-mass[i], names[i]))[:length]
        by_popularity[user] = [i for i in popular if i not in own][:length]

    print(json.dumps({
        "users": len(relevant),
        "mass": quality(by_mass, relevant, len(names), head),
        "popularity": quality(by_popularity, relevant, len(names), head),
    }))
    return 0


if __name__ == "__main__":
    sys.exit(main())
