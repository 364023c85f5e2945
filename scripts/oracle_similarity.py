#!/usr/bin/env python3
"""Independent batch computation of simtide's similarities with numpy/scipy, used as the
oracle of the test suite and as the reference timing of the benchmark.

Ratings: adjusted cosine over co-raters (Sarwar, Karypis, Konstan and Riedl, "Item-based
collaborative filtering recommendation algorithms", WWW 2001): each user's ratings are
centered on that user's mean; for items a, b and the users U_ab who rated both,
sim = Σ d_ua·d_ub / (sqrt(Σ d_ua²) · sqrt(Σ d_ub²)), the norms taken over U_ab only.
Purchases: cosine of binary buyer vectors, Jaccard, or Dunning's log-likelihood ratio
(G², computed here with scipy.stats.chi2_contingency(lambda_="log-likelihood")).

Commands (all read simtide CSV `user,item,value,at`: empty value = purchase):
  check-ratings   --events CSV --export JSONL --min-common-users N --neighbors K [--min-score S]
  check-purchases --events CSV --export JSONL --min-common-users N --neighbors K --score KIND
  time-ratings    --events CSV        prints seconds to load and to compute the sparse score matrix
A check prints one summary line `oracle: ...` and exits 1 listing mismatches.
"""
import argparse
import csv
import json
import sys
import time

import numpy as np
import scipy.sparse as sp
from scipy.stats import chi2_contingency

ZERO_NORM = 1e-9  # a co-rater norm below this leaves the pair without a score (docs/design.md, "Scores")
REL_TOL = 1e-9


def load(path, want_ratings):
    users, items, rows, cols, vals = {}, {}, [], [], []
    with open(path, newline="") as f:
        for rec in csv.DictReader(f):
            is_rating = rec["value"].strip() != ""
            if is_rating != want_ratings:
                continue
            u = users.setdefault(rec["user"], len(users))
            i = items.setdefault(rec["item"], len(items))
            rows.append(u)
            cols.append(i)
            vals.append(float(rec["value"]) if is_rating else 1.0)
    names = [None] * len(items)
    for name, idx in items.items():
        names[idx] = name
    m = sp.csr_matrix((vals, (rows, cols)), shape=(len(users), len(items)))
    m.sum_duplicates()
    if not want_ratings:
        m.data[:] = 1.0
    return m, names


BLOCK = 512  # rows of the item-item matrices made dense at a time


def sparse_sums(r):
    """The three sparse item-item products of adjusted cosine over co-raters: co-rater
    count n, dot = Σ d_ua·d_ub and sa[a, b] = Σ_{u rated a and b} d_ua² (sb = saᵀ), with
    d the ratings centered on each user's mean."""
    b = r.copy()
    b.data[:] = 1.0
    counts = np.diff(r.indptr)
    means = np.asarray(r.sum(axis=1)).ravel() / np.maximum(counts, 1)
    d = r.copy()
    d.data = d.data - np.repeat(means, counts)
    n = (b.T.tocsr() @ b).tocsr()
    dot = (d.T.tocsr() @ d).tocsr()
    sa = (d.multiply(d).T.tocsr() @ b).tocsr()
    return n, dot, sa


def sparse_scores(r):
    """Scores as one sparse matrix (the benchmark's reference: products and scores, no
    checks): dot / (√sa · √sb) elementwise, dropping pairs whose dot is exactly 0."""
    _, dot, sa = sparse_sums(r)
    inv = sa.copy()
    inv.data = 1.0 / np.sqrt(np.maximum(inv.data, ZERO_NORM))
    return dot.multiply(inv).multiply(inv.T.tocsr()).tocsr()


def adjusted_cosine_rows(r):
    """Yields (first row, n, score) for blocks of item rows: n is the dense co-rater count
    block, score the adjusted cosine (NaN where undefined). The products stay sparse, so a
    catalogue of ten thousand items needs a few hundred MB, not gigabytes."""
    n, dot, sa = sparse_sums(r)
    sb = sa.T.tocsr()
    for start in range(0, r.shape[1], BLOCK):
        rows = slice(start, min(start + BLOCK, r.shape[1]))
        nb, db, sab, sbb = (m[rows].toarray() for m in (n, dot, sa, sb))
        with np.errstate(divide="ignore", invalid="ignore"):
            score = db / (np.sqrt(sab) * np.sqrt(sbb))
        score[(sab < ZERO_NORM) | (sbb < ZERO_NORM) | (nb == 0)] = np.nan
        score[np.arange(nb.shape[0]), np.arange(rows.start, rows.stop)] = np.nan
        yield rows.start, nb, np.clip(score, -1.0, 1.0)


def purchase_scores(m, kind):
    co = (m.T @ m).toarray()
    buyers = np.diag(co).copy()
    total = int(np.sum(np.diff(m.indptr) > 0))
    na, nb = buyers[:, None], buyers[None, :]
    with np.errstate(divide="ignore", invalid="ignore"):
        if kind == "cosine":
            score = co / np.sqrt(na * nb)
        elif kind == "jaccard":
            score = co / (na + nb - co)
        else:
            score = np.full(co.shape, np.nan)
            for a, b in zip(*np.nonzero(co)):
                if a == b or co[a, b] * total <= buyers[a] * buyers[b]:
                    continue  # only pairs whose common buyers exceed what independence predicts
                table = [[co[a, b], buyers[a] - co[a, b]], [buyers[b] - co[a, b], total - buyers[a] - buyers[b] + co[a, b]]]
                score[a, b] = chi2_contingency(table, correction=False, lambda_="log-likelihood")[0]
    score[co == 0] = np.nan
    np.fill_diagonal(score, np.nan)
    return co, score


def close(x, y):
    return abs(x - y) <= REL_TOL * max(abs(x), abs(y), 1e-3)


def read_export(export_path, signal):
    ours = {}
    with open(export_path) as f:
        for line in f:
            rec = json.loads(line)
            if rec["signal"] == signal:
                ours[rec["item"]] = rec["neighbors"]
    return ours


def check(blocks, names, export_path, signal, min_common_users, neighbors, min_score):
    """Compares every item's published list with the oracle's rows, given as blocks of
    (first row, support, score)."""
    index = {name: i for i, name in enumerate(names)}
    ours = read_export(export_path, signal)
    problems, checked, max_diff = [], 0, 0.0
    for start, support, score in blocks:
        publishable = (support >= max(min_common_users, 1)) & ~np.isnan(score) & (np.nan_to_num(score, nan=-np.inf) > min_score)
        for row in range(support.shape[0]):
            name = names[start + row]
            cand = np.nonzero(publishable[row])[0]
            expected = np.sort(score[row, cand])[::-1][:neighbors]
            got = ours.get(name, [])
            if len(got) != len(expected):
                problems.append(f"{name}: {len(got)} neighbors published, oracle has {len(expected)}")
                continue
            for rank, (g, e) in enumerate(zip(got, expected)):
                checked += 1
                b = index.get(g["item"])
                if b is None or not publishable[row, b]:
                    problems.append(f"{name}: neighbor {g['item']} is not publishable in the oracle")
                    continue
                max_diff = max(max_diff, abs(g["score"] - e), abs(g["score"] - score[row, b]))
                if not close(g["score"], e):
                    problems.append(f"{name} rank {rank + 1}: score {g['score']!r}, oracle's {rank + 1}th best is {e!r}")
                if not close(g["score"], score[row, b]):
                    problems.append(f"{name}->{g['item']}: score {g['score']!r}, oracle {score[row, b]!r}")
                if g["support"] != int(support[row, b]):
                    problems.append(f"{name}->{g['item']}: support {g['support']}, oracle {int(support[row, b])}")
            scores = [g["score"] for g in got]
            if scores != sorted(scores, reverse=True):
                problems.append(f"{name}: list is not sorted by score")
    extra = set(ours) - set(names)
    problems += [f"{x}: published but unknown to the oracle" for x in sorted(extra)]
    print(f"oracle: {signal}: {len(names)} items, {checked} neighbors checked, max |diff| {max_diff:.3e}, {len(problems)} problems")
    for p in problems[:20]:
        print("  " + p)
    return 1 if problems else 0


def main():
    ap = argparse.ArgumentParser()
    ap.add_argument("command", choices=["check-ratings", "check-purchases", "time-ratings"])
    ap.add_argument("--events", required=True)
    ap.add_argument("--export")
    ap.add_argument("--min-common-users", type=int, default=1)
    ap.add_argument("--neighbors", type=int, default=50)
    ap.add_argument("--min-score", type=float, default=0.0)
    ap.add_argument("--score", default="cosine", choices=["cosine", "jaccard", "log_likelihood"])
    args = ap.parse_args()
    if args.command == "time-ratings":
        t0 = time.perf_counter()
        r, names = load(args.events, True)
        t1 = time.perf_counter()
        scored = sparse_scores(r).nnz
        t2 = time.perf_counter()
        print(f"scipy: load {t1 - t0:.3f}s, matrix {t2 - t1:.3f}s, {len(names)} items, {scored} scored pairs")
        return 0
    if args.command == "check-ratings":
        r, names = load(args.events, True)
        return check(adjusted_cosine_rows(r), names, args.export, "rating", args.min_common_users, args.neighbors, args.min_score)
    m, names = load(args.events, False)
    co, score = purchase_scores(m, args.score)
    return check([(0, co, score)], names, args.export, "purchase", args.min_common_users, args.neighbors, args.min_score)


if __name__ == "__main__":
    sys.exit(main())
