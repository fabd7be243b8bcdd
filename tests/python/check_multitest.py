#!/usr/bin/env python3
"""Compare riffle's adjusted p-values with statsmodels.

Usage: check_multitest.py TABLE.tsv

TABLE.tsv is tab-separated with a header naming at least the columns p,
q_bh, q_by, p_holm, p_hochberg and p_bonferroni (others are ignored).
Missing p-values (NaN or empty) must have missing adjusted values and are
left out of m, as riffle does. Each adjusted column is compared with
statsmodels.stats.multitest.multipletests on the non-missing p-values; the
largest absolute difference must be <= 1e-10. Prints one line per method;
exits 0 when all agree, 1 on a mismatch, 2 on unreadable input.
"""

import csv
import math
import sys

TOLERANCE = 1e-10

# riffle column -> multipletests method name.
METHODS = [
    ("q_bh", "fdr_bh"),
    ("q_by", "fdr_by"),
    ("p_holm", "holm"),
    ("p_hochberg", "simes-hochberg"),
    ("p_bonferroni", "bonferroni"),
]


def parse_number(text, path, row, column):
    text = text.strip()
    if text == "" or text.lower() in ("nan", "na"):
        return math.nan
    try:
        return float(text)
    except ValueError:
        print(f"{path}: row {row}, column '{column}': expected a number, found {text!r}", file=sys.stderr)
        sys.exit(2)


def read_table(path):
    columns = {"p": []}
    columns.update({name: [] for name, _ in METHODS})
    try:
        with open(path, newline="") as handle:
            reader = csv.DictReader(handle, delimiter="\t")
            header = reader.fieldnames or []
            absent = [name for name in columns if name not in header]
            if absent:
                print(f"{path}: header: missing column(s) {', '.join(absent)}", file=sys.stderr)
                sys.exit(2)
            # Row numbers count the header as row 1.
            for row_number, row in enumerate(reader, start=2):
                for name, values in columns.items():
                    values.append(parse_number(row[name] or "", path, row_number, name))
    except OSError as error:
        print(f"{path}: {error}", file=sys.stderr)
        sys.exit(2)
    return columns


def main():
    if len(sys.argv) != 2:
        print(__doc__, file=sys.stderr)
        return 2
    path = sys.argv[1]
    try:
        import numpy as np
        from statsmodels.stats.multitest import multipletests
    except ImportError as error:
        print(f"needs numpy and statsmodels: {error}", file=sys.stderr)
        return 2

    columns = read_table(path)
    p = np.array(columns["p"], dtype=float)
    present = ~np.isnan(p)
    if not present.any():
        print(f"{path}: no non-missing p-value to check", file=sys.stderr)
        return 2
    all_ok = True
    for name, sm_method in METHODS:
        ours = np.array(columns[name], dtype=float)
        _, expected, _, _ = multipletests(p[present], alpha=0.05, method=sm_method)
        stray = int(np.count_nonzero(~np.isnan(ours[~present])))
        unexpected_missing = int(np.count_nonzero(np.isnan(ours[present])))
        max_diff = float(np.max(np.abs(ours[present] - expected))) if unexpected_missing == 0 else math.inf
        ok = max_diff <= TOLERANCE and stray == 0 and unexpected_missing == 0
        all_ok &= ok
        detail = f"max |diff| = {max_diff:.3e} over m = {int(present.sum())}"
        if stray:
            detail += f", {stray} value(s) where p is missing"
        if unexpected_missing:
            detail += f", {unexpected_missing} missing value(s) where p is present"
        print(f"{name} vs multipletests('{sm_method}'): {detail}: {'OK' if ok else 'MISMATCH'}")
    return 0 if all_ok else 1


if __name__ == "__main__":
    sys.exit(main())
