#!/usr/bin/env python3
"""Check the Anderson-Darling percentage points riffle's tail fit uses.

Usage:
    check_ad_points.py src/tail/goodness.rs

The table (Choulakian & Stephens 2001, Technometrics 43(4), Table 2: A^2
when shape and scale of a generalized Pareto are both estimated by maximum
likelihood) is read from the Rust source, so this checks the numbers the
program runs with. Each checked row is simulated: samples of size N drawn
from scipy.stats.genpareto with that shape, refitted with
scipy.stats.genpareto.fit(floc=0), A^2 computed on the fit; the simulated
quantiles at the table's levels 0.5, 0.25, 0.10 and 0.05 must lie within
TOLERANCE (relative) of the table. The table is asymptotic and N finite,
and the simulation has Monte Carlo error (~2% at the 5% point with REPS
samples), hence the tolerance (at N = 300 the row for shape -0.2 lies 3-7%
above the simulation: for negative shapes the fit converges more slowly); a mistyped digit, a swapped row or the
opposite shape convention is far outside it (the rows for shapes 0.5 and
-0.5 differ by 60% at the 5% point). Exits 0 when all agree, 1 otherwise,
2 on unreadable input.
"""

import re
import sys

import numpy as np
from scipy import stats

N = 300
REPS = 1500
TOLERANCE = 0.10
CHECKED_SHAPES = [0.5, 0.2, 0.0, -0.2]
CHECKED_COLUMNS = 4  # levels 0.5, 0.25, 0.10, 0.05


def read_table(path):
    try:
        text = open(path).read()
    except OSError as error:
        print(f"{path}: {error}", file=sys.stderr)
        sys.exit(2)

    def array(name):
        match = re.search(name + r"\s*:[^=]*=\s*\[(.*?)\];", text, re.S)
        if match is None:
            print(f"{path}: no constant {name} found", file=sys.stderr)
            sys.exit(2)
        return [float(x) for x in re.findall(r"-?\d+\.\d+", match.group(1))]

    levels = array("LEVELS")
    shapes = array("SHAPES")
    points = array("POINTS")
    if len(points) != len(levels) * len(shapes):
        print(f"{path}: POINTS has {len(points)} numbers, expected "
              f"{len(levels)} x {len(shapes)}", file=sys.stderr)
        sys.exit(2)
    rows = {s: points[i * len(levels):(i + 1) * len(levels)] for i, s in enumerate(shapes)}
    return levels, rows


def anderson_darling(x, shape, scale):
    x = np.sort(x)
    n = len(x)
    z = np.clip(stats.genpareto.cdf(x, shape, loc=0, scale=scale), 1e-300, 1 - 1e-16)
    i = np.arange(1, n + 1)
    return -n - np.mean((2 * i - 1) * (np.log(z) + np.log1p(-z[::-1])))


def main():
    if len(sys.argv) != 2:
        print(__doc__, file=sys.stderr)
        sys.exit(2)
    levels, rows = read_table(sys.argv[1])
    rng = np.random.default_rng(20011)
    failures = 0
    for shape in CHECKED_SHAPES:
        if shape not in rows:
            print(f"table has no row for shape {shape}", file=sys.stderr)
            sys.exit(2)
        values = []
        for _ in range(REPS):
            x = stats.genpareto.rvs(shape, scale=1.0, size=N, random_state=rng)
            fitted_shape, _, fitted_scale = stats.genpareto.fit(x, floc=0)
            values.append(anderson_darling(x, fitted_shape, fitted_scale))
        for column in range(CHECKED_COLUMNS):
            level = levels[column]
            simulated = float(np.quantile(values, 1 - level))
            table = rows[shape][column]
            ok = abs(simulated - table) <= TOLERANCE * table
            failures += not ok
            print(f"shape {shape:+.1f} level {level:<5} table {table:.3f} "
                  f"simulated {simulated:.3f} {'ok' if ok else 'MISMATCH'}")
    if failures:
        print(f"{failures} percentage points differ from the simulation by more than "
              f"{TOLERANCE:.0%}", file=sys.stderr)
        sys.exit(1)


if __name__ == "__main__":
    main()
