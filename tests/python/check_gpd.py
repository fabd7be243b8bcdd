#!/usr/bin/env python3
"""Compare riffle's generalized Pareto fits with scipy.stats.genpareto.

Usage:
    RIFFLE_GPD_CHECK_OUT=/tmp/gpd.tsv cargo test --lib export_fits_for_scipy_check
    check_gpd.py /tmp/gpd.tsv

The TSV has a header and one row per sample with the columns sample, shape,
scale, log_likelihood (riffle's fit), points and cdf (riffle's fitted CDF at
those points) and values (the exceedances), lists comma-separated. For each
sample the script refits with scipy.stats.genpareto.fit(values, floc=0)
(its shape c has riffle's sign: c > 0 is a heavy tail) and checks that
riffle's log-likelihood is at least scipy's minus 1e-6 and that the two
fitted CDFs agree within 1e-3 at the points. Exits 0 when all agree, 1 on a
mismatch, 2 on unreadable input.
"""

import csv
import sys

import numpy as np
from scipy import stats

LOGLIK_SLACK = 1e-6
CDF_TOLERANCE = 1e-3
COLUMNS = ["sample", "shape", "scale", "log_likelihood", "points", "cdf", "values"]


def fail_input(path, row, column, message):
    print(f"{path}: row {row}, column '{column}': {message}", file=sys.stderr)
    sys.exit(2)


def numbers(text, path, row, column):
    try:
        return np.array([float(x) for x in text.split(",")])
    except ValueError:
        fail_input(path, row, column, f"expected comma-separated numbers, found {text[:40]!r}")


def main():
    if len(sys.argv) != 2:
        print(__doc__, file=sys.stderr)
        sys.exit(2)
    path = sys.argv[1]
    try:
        handle = open(path, newline="")
    except OSError as error:
        print(f"{path}: {error}", file=sys.stderr)
        sys.exit(2)
    failures = 0
    with handle:
        reader = csv.DictReader(handle, delimiter="\t")
        absent = [c for c in COLUMNS if c not in (reader.fieldnames or [])]
        if absent:
            fail_input(path, 1, absent[0], "missing column")
        for row_number, row in enumerate(reader, start=2):
            values = numbers(row["values"], path, row_number, "values")
            points = numbers(row["points"], path, row_number, "points")
            riffle_cdf = numbers(row["cdf"], path, row_number, "cdf")
            shape = numbers(row["shape"], path, row_number, "shape")[0]
            scale = numbers(row["scale"], path, row_number, "scale")[0]
            riffle_ll = numbers(row["log_likelihood"], path, row_number, "log_likelihood")[0]

            c, _, scipy_scale = stats.genpareto.fit(values, floc=0)
            scipy_ll = np.sum(stats.genpareto.logpdf(values, c, loc=0, scale=scipy_scale))
            # riffle's own log-likelihood, recomputed by scipy.
            check_ll = np.sum(stats.genpareto.logpdf(values, shape, loc=0, scale=scale))
            scipy_cdf = stats.genpareto.cdf(points, c, loc=0, scale=scipy_scale)
            cdf_gap = float(np.max(np.abs(scipy_cdf - riffle_cdf)))
            ok = (
                riffle_ll >= scipy_ll - LOGLIK_SLACK
                and abs(check_ll - riffle_ll) <= 1e-8 * max(1.0, abs(riffle_ll))
                and cdf_gap <= CDF_TOLERANCE
            )
            failures += not ok
            print(
                f"sample {row['sample']}: riffle shape {shape:.5f} scale {scale:.5f} "
                f"loglik {riffle_ll:.6f} | scipy c {c:.5f} scale {scipy_scale:.5f} "
                f"loglik {scipy_ll:.6f} | max cdf gap {cdf_gap:.2e} {'ok' if ok else 'MISMATCH'}"
            )
    sys.exit(1 if failures else 0)


if __name__ == "__main__":
    main()
