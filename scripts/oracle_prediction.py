#!/usr/bin/env python3
"""Independent numpy/scipy implementation of item-based weighted-sum rating prediction,
the oracle of `simtide evaluate` with the `rated` neighborhood.

For a held-out rating of item i by user u: the neighbors are the k items j the user rated
in training whose adjusted cosine s(i, j) is publishable (at least `min_common_users`
co-raters, both co-rater norms defined, score above `min_score`), the k best by score
(ties: the item that appeared first in the training events); the prediction is
p(u, i) = sum_j s(i, j) * r_uj / sum_j |s(i, j)| (Sarwar, Karypis, Konstan and Riedl,
WWW 2001). Adjusted cosine is computed exactly (every user centered on the mean of its
training ratings) from three sparse products, as in oracle_similarity.py, but written
again here from the formula.

The split is simtide's seeded random split, reproduced from its definition: the events
are numbered in file order from 0; for each user, its ratings are ordered by
(splitmix64(seed XOR number) read as a signed 64-bit integer, number) and the last
floor(count * fraction) of them are held out.

Prints one JSON object: mae, rmse and predicted_share of the item-based predictions,
and the per-user-mean baseline (mean of the user's training ratings) on the same
held-out ratings: baseline_mae and baseline_rmse.

Usage: oracle_prediction.py --events CSV --seed S --fraction F --neighbors K
                            --min-common-users N [--min-score X]
"""
import argparse
import csv
import json
import math
import sys

import numpy as np
import scipy.sparse as sp

MASK = (1 << 64) - 1
ZERO_NORM = 1e-9


def splitmix64(x):
    """SplitMix64 finaliser (Steele, Lea and Flood, OOPSLA 2014), as 64-bit unsigned."""
    x = (x + 0x9E3779B97F4A7C15) & MASK
    x = ((x ^ (x >> 30)) * 0xBF58476D1CE4E5B9) & MASK
    x = ((x ^ (x >> 27)) * 0x94D049BB133111EB) & MASK
    return x ^ (x >> 31)


def signed(x):
    return x - (1 << 64) if x >= 1 << 63 else x


def read_ratings(path):
    with open(path, newline="") as f:
        return [(r["user"], r["item"], float(r["value"])) for r in csv.DictReader(f)]


def split(events, seed, fraction):
    by_user = {}
    for number, (user, _, _) in enumerate(events):
        by_user.setdefault(user, []).append((signed(splitmix64(seed ^ number)), number))
    held = set()
    for order in by_user.values():
        order.sort()
        keep = len(order) - math.floor(len(order) * fraction)
        held.update(number for _, number in order[keep:])
    train = [e for n, e in enumerate(events) if n not in held]
    test = [e for n, e in enumerate(events) if n in held]
    return train, test


def training_sums(train):
    """Users and items numbered in order of first appearance in training; the rating
    matrix, each user's mean, and per item pair (a, b) the co-rater count, the sum of
    d_a * d_b and the co-rater norms sum d_a^2 (norm) and sum d_b^2 (norm_t), where d is
    a rating minus its user's mean."""
    users, items = {}, {}
    for user, item, _ in train:
        users.setdefault(user, len(users))
        items.setdefault(item, len(items))
    rows = np.array([users[u] for u, _, _ in train])
    cols = np.array([items[i] for _, i, _ in train])
    vals = np.array([v for _, _, v in train])
    ratings = sp.csr_matrix((vals, (rows, cols)), shape=(len(users), len(items)))
    counts = np.diff(ratings.indptr)
    means = np.asarray(ratings.sum(axis=1)).ravel() / counts
    dev = ratings.copy()
    dev.data = dev.data - np.repeat(means, counts)
    rated = ratings.copy()
    rated.data[:] = 1.0
    common = (rated.T @ rated).tocsr()
    dot = (dev.T @ dev).tocsr()
    norm = (dev.multiply(dev).T @ rated).tocsr()  # norm[a, b] = sum over co-raters of d_a^2
    norm_t = norm.T.tocsr()
    return users, items, ratings, means, common, dot, norm, norm_t


def split_and_list_args():
    """The arguments every oracle of an evaluation takes: the events, the split and the
    list settings."""
    ap = argparse.ArgumentParser()
    ap.add_argument("--events", required=True)
    ap.add_argument("--seed", type=int, required=True)
    ap.add_argument("--fraction", type=float, required=True)
    ap.add_argument("--neighbors", type=int, required=True)
    ap.add_argument("--min-common-users", type=int, required=True)
    return ap


def main():
    ap = split_and_list_args()
    ap.add_argument("--min-score", type=float, default=0.0)
    args = ap.parse_args()

    train, test = split(read_ratings(args.events), args.seed, args.fraction)
    users, items, ratings, means, common, dot, norm, norm_t = training_sums(train)

    held_by_user = {}
    for user, item, value in test:
        held_by_user.setdefault(user, []).append((item, value))
    abs_err = sq_err = base_abs = base_sq = 0.0
    predicted = 0
    for user, held in held_by_user.items():
        u = users[user]
        own = ratings.indices[ratings.indptr[u]:ratings.indptr[u + 1]]
        own_values = ratings.data[ratings.indptr[u]:ratings.indptr[u + 1]]
        targets = [(items[i], v) for i, v in held if i in items]
        if not targets:
            continue
        t = np.array([i for i, _ in targets])
        n = common[t][:, own].toarray()
        d = dot[t][:, own].toarray()
        sa = norm[t][:, own].toarray()
        sb = norm_t[t][:, own].toarray()
        with np.errstate(divide="ignore", invalid="ignore"):
            score = np.clip(d / np.sqrt(sa * sb), -1.0, 1.0)
        ok = (n >= max(args.min_common_users, 1)) & (sa >= ZERO_NORM) & (sb >= ZERO_NORM)
        ok &= np.nan_to_num(score, nan=-np.inf) > args.min_score
        ok &= own[None, :] != t[:, None]
        for row, (_, value) in enumerate(targets):
            cand = np.nonzero(ok[row])[0]
            order = sorted(cand, key=lambda c: (-score[row, c], own[c]))[: args.neighbors]
            weights = [score[row, c] for c in order]
            den = sum(abs(w) for w in weights)
            if den <= 0.0:
                continue
            p = sum(w * own_values[c] for w, c in zip(weights, order)) / den
            predicted += 1
            abs_err += abs(p - value)
            sq_err += (p - value) ** 2
            base_abs += abs(means[u] - value)
            base_sq += (means[u] - value) ** 2
    k = max(predicted, 1)
    print(json.dumps({
        "held_out": len(test),
        "predicted": predicted,
        "mae": abs_err / k,
        "rmse": math.sqrt(sq_err / k),
        "predicted_share": predicted / max(len(test), 1),
        "baseline_mae": base_abs / k,
        "baseline_rmse": math.sqrt(base_sq / k),
    }))
    return 0


if __name__ == "__main__":
    sys.exit(main())
