#!/usr/bin/env python3
"""Cross-check riffle's two-group tests with scipy.

Usage: check_scipy.py PATH/TO/riffle

Writes small matrices (4 vs 5 samples, with and without ties) as Arrow IPC
files, runs `riffle scan` for every test and side, and compares
- p_perm with scipy.stats.permutation_test(..., n_resamples=np.inf), i.e. the
  exact permutation p-value over all 126 splits, to 1e-12;
- p_param with scipy.stats.ttest_ind (equal_var False/True) and
  scipy.stats.mannwhitneyu (asymptotic, continuity-corrected), to 1e-10;
- with missing values (a text matrix with NA, NaN and empty cells, 5 vs 5
  samples): p_param with ttest_ind(nan_policy='omit') and mannwhitneyu on
  the observed values, and p_perm with scipy.stats.permutation_test over
  all 252 splits of the ten samples with a statistic that drops the
  missing values (riffle's relabelings move every sample; a missing one
  drops out of whichever group it lands in); the same for one-way F and
  Kruskal-Wallis (f_oneway, kruskal) on 3 + 3 + 3 samples, and for paired
  t and signed-rank (ttest_rel(nan_policy='omit'), wilcoxon) on 9 pairs,
  and for Pearson (pearsonr on the observed samples) on 7 samples; Spearman
  (spearmanr on the observed samples, exact p_perm as permutation_test with
  a statistic that drops the missing samples) on 7 samples with a tied
  trait; covariate designs (two groups t, three groups F, a trait t) on 8
  samples against statsmodels OLS on the observed rows, exact p_perm as
  permutation_test over the observed rows' nuisance residuals.
Exits 0 when everything agrees, 1 otherwise.
"""

import csv
import math
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import pyarrow as pa
import pyarrow.ipc as ipc
from scipy import stats

RIFFLE = sys.argv[1]
N_A, N_B = 4, 5


def features():
    rng = np.random.default_rng(20261202)
    group_b = np.r_[np.zeros(N_A), np.ones(N_B)]
    rows = [rng.normal(size=N_A + N_B) + 0.6 * k * group_b for k in range(8)]
    rows.append(np.array([1, 2, 2, 1, 3, 1, 2, 2, 3], dtype=float))
    rows.append(np.array([0, 1, 1, 0, 1, 0, 0, 1, 1], dtype=float))
    rows.append(np.round(rng.normal(size=N_A + N_B) * 2))
    return rows


def write_inputs(folder, rows):
    samples = [f"s{i + 1}" for i in range(N_A + N_B)]
    columns = {"feature": pa.array([f"f{k}" for k in range(len(rows))])}
    for i, s in enumerate(samples):
        columns[s] = pa.array([float(r[i]) for r in rows], type=pa.float64())
    table = pa.table(columns)
    matrix = folder / "m.arrow"
    with ipc.new_file(str(matrix), table.schema) as writer:
        writer.write_table(table)
    sheet = folder / "sheet.tsv"
    lines = ["sample\tgroup"] + [f"{s}\t{'A' if i < N_A else 'B'}" for i, s in enumerate(samples)]
    sheet.write_text("\n".join(lines) + "\n")
    return matrix, sheet


def run_riffle(matrix, sheet, out, test, side):
    subprocess.run(
        [RIFFLE, "scan", "--matrix", str(matrix), "--samples", str(sheet), "--group", "group",
         "--levels", "A,B", "--test", test, "--side", side, "--perms", "1000", "--seed", "5",
         "--out", str(out), "--format", "tsv", "--quiet"],
        check=True,
    )
    with open(out / "results.tsv", newline="") as f:
        return list(csv.DictReader(f, delimiter="\t"))


def signed_statistic(test):
    if test == "welch":
        return lambda x, y, axis: stats.ttest_ind(x, y, equal_var=False, axis=axis).statistic
    if test == "student":
        return lambda x, y, axis: stats.ttest_ind(x, y, equal_var=True, axis=axis).statistic
    if test == "mean-diff":
        return lambda x, y, axis: np.mean(x, axis=axis) - np.mean(y, axis=axis)
    # Rank sum of B, centred at its null mean.
    return lambda x, y, axis: stats.mannwhitneyu(x, y, axis=axis, method="asymptotic").statistic - N_A * N_B / 2


def scipy_perm_p(test, side, b, a):
    stat = signed_statistic(test)
    if side == "both":
        statistic, alternative = (lambda x, y, axis: np.abs(stat(x, y, axis))), "greater"
    else:
        statistic, alternative = stat, side
    res = stats.permutation_test((b, a), statistic, permutation_type="independent",
                                 n_resamples=np.inf, alternative=alternative, vectorized=True)
    return res.pvalue


def scipy_param_p(test, side, b, a):
    alternative = "two-sided" if side == "both" else side
    if test == "welch":
        return stats.ttest_ind(b, a, equal_var=False, alternative=alternative).pvalue
    if test in ("student", "mean-diff"):
        return stats.ttest_ind(b, a, equal_var=True, alternative=alternative).pvalue
    return stats.mannwhitneyu(b, a, use_continuity=True, alternative=alternative,
                              method="asymptotic").pvalue


def write_matrix(folder, name, rows, samples):
    columns = {"feature": pa.array([f"f{k}" for k in range(len(rows))])}
    for i, s in enumerate(samples):
        columns[s] = pa.array([float(r[i]) for r in rows], type=pa.float64())
    table = pa.table(columns)
    matrix = folder / name
    with ipc.new_file(str(matrix), table.schema) as writer:
        writer.write_table(table)
    return matrix


def scan(matrix, sheet, out, args):
    subprocess.run([RIFFLE, "scan", "--matrix", str(matrix), "--samples", str(sheet), "--out", str(out),
                    "--format", "tsv", "--quiet", "--seed", "5"] + args, check=True)
    with open(out / "results.tsv", newline="") as f:
        return list(csv.DictReader(f, delimiter="\t"))


def check_designs(folder):
    """p_param of k-group, correlation and paired tests against scipy; exact
    sign-flip p_perm against scipy.stats.permutation_test."""
    rng = np.random.default_rng(99)
    failures = 0
    # k groups: 4 + 4 + 5 samples.
    classes = [0] * 4 + [1] * 4 + [2] * 5
    samples = [f"k{i}" for i in range(len(classes))]
    rows = [rng.normal(size=len(classes)) + 0.5 * k * np.array(classes) for k in range(6)]
    rows.append(np.round(rng.normal(size=len(classes))))
    matrix = write_matrix(folder, "k.arrow", rows, samples)
    sheet = folder / "k.tsv"
    sheet.write_text("sample\tdose\n" + "".join(f"{s}\td{c}\n" for s, c in zip(samples, classes)))
    for test, ref in [("anova", lambda *g: stats.f_oneway(*g).pvalue), ("kruskal", lambda *g: stats.kruskal(*g).pvalue)]:
        res = scan(matrix, sheet, folder / f"out-{test}", ["--test", test, "--group", "dose", "--perms", "200"])
        worst = max(abs(float(r["p_param"]) - ref(*[row[np.array(classes) == g] for g in range(3)]))
                    for r, row in zip(res, rows))
        ok = worst <= 1e-10
        failures += not ok
        print(f"{'ok ' if ok else 'BAD'} {test:11} max|p_param - scipy| = {worst:.2e}")
    # Correlation with a trait: 12 samples.
    trait = rng.normal(size=12)
    samples = [f"t{i}" for i in range(12)]
    rows = [rng.normal(size=12) + 0.4 * k * trait for k in range(6)]
    matrix = write_matrix(folder, "t.arrow", rows, samples)
    sheet = folder / "t.tsv"
    sheet.write_text("sample\tage\n" + "".join(f"{s}\t{v!r}\n" for s, v in zip(samples, trait.tolist())))
    for test, ref in [("pearson", stats.pearsonr), ("spearman", stats.spearmanr)]:
        for side, alt in [("both", "two-sided"), ("greater", "greater"), ("less", "less")]:
            res = scan(matrix, sheet, folder / f"out-{test}-{side}",
                       ["--test", test, "--trait", "age", "--side", side, "--perms", "200"])
            worst = max(max(abs(float(r["p_param"]) - ref(row, trait, alternative=alt).pvalue),
                            abs(float(r["statistic"]) - ref(row, trait).statistic))
                        for r, row in zip(res, rows))
            ok = worst <= 1e-10
            failures += not ok
            print(f"{'ok ' if ok else 'BAD'} {test:11} {side:7} max|p_param, r - scipy| = {worst:.2e}")
    # Pairs: 9 pairs (512 sign flips, all enumerated).
    m = 9
    samples = [f"pre{i}" for i in range(m)] + [f"post{i}" for i in range(m)]
    rows = []
    for k in range(6):
        base = rng.normal(size=m)
        rows.append(np.r_[base, base + rng.normal(size=m) * 0.7 + 0.3 * k])
    rows.append(np.r_[np.arange(m, dtype=float), np.arange(m, dtype=float) + np.array([1, -1, 2, 0, 1, 3, -2, 1, 1.0])])
    matrix = write_matrix(folder, "p.arrow", rows, samples)
    sheet = folder / "p.tsv"
    sheet.write_text("sample\ttime\tsubject\n" + "".join(
        f"{s}\t{'pre' if i < m else 'post'}\tsubj{i % m}\n" for i, s in enumerate(samples)))
    for test in ["paired-t", "signed-rank"]:
        for side, alt in [("both", "two-sided"), ("greater", "greater"), ("less", "less")]:
            res = scan(matrix, sheet, folder / f"out-{test}-{side}",
                       ["--test", test, "--group", "time", "--levels", "pre,post", "--pair", "subject",
                        "--side", side, "--perms", "1000"])
            worst_param = worst_perm = 0.0
            for r, row in zip(res, rows):
                pre, post = row[:m], row[m:]
                if test == "paired-t":
                    p_ref = stats.ttest_rel(post, pre, alternative=alt).pvalue
                    stat = lambda x, y, axis: stats.ttest_rel(x, y, axis=axis).statistic
                else:
                    p_ref = stats.wilcoxon(post - pre, alternative=alt, method="approx").pvalue
                    # Signed-rank sum W+ - W- (sign flips keep the ranks).
                    def stat(x, y, axis):
                        d = x - y
                        # Zero differences are dropped before ranking (Wilcoxon's
                        # convention, scipy's default zero_method): they hold the
                        # lowest ranks of |d|, so shift the others down.
                        zeros = np.sum(d == 0, axis=axis, keepdims=True)
                        ranks = np.where(d == 0, 0, stats.rankdata(np.abs(d), axis=axis) - zeros)
                        return np.sum(np.sign(d) * ranks, axis=axis)
                if side == "both":
                    statistic, alternative = (lambda x, y, axis, s=stat: np.abs(s(x, y, axis))), "greater"
                else:
                    statistic, alternative = stat, alt
                p_perm_ref = stats.permutation_test((post, pre), statistic, permutation_type="samples",
                                                    n_resamples=np.inf, alternative=alternative,
                                                    vectorized=True).pvalue
                worst_param = max(worst_param, abs(float(r["p_param"]) - p_ref))
                worst_perm = max(worst_perm, abs(float(r["p_perm"]) - p_perm_ref))
            ok = worst_param <= 1e-10 and worst_perm <= 1e-12
            failures += not ok
            print(f"{'ok ' if ok else 'BAD'} {test:11} {side:7} max|p_param - scipy| = {worst_param:.2e}"
                  f"  max|p_perm - scipy| = {worst_perm:.2e}")
    # Covariates: OLS t of the group after age and site (statsmodels).
    import statsmodels.api as sm
    n = 16
    group = np.array([0, 1] * 8, dtype=float)
    age = rng.normal(50, 10, size=n) + 5 * group
    site = np.array(["north", "south", "east", "north"] * 4)
    samples = [f"c{i}" for i in range(n)]
    rows = [2 + 0.03 * age + rng.normal(size=n) + 0.4 * k * group for k in range(6)]
    matrix = write_matrix(folder, "c.arrow", rows, samples)
    sheet = folder / "c.tsv"
    sheet.write_text("sample\tarm\tage\tsite\n" + "".join(
        f"{s}\t{'treated' if g else 'control'}\t{float(a)!r}\t{st}\n"
        for s, g, a, st in zip(samples, group.tolist(), age.tolist(), site)))
    design = np.column_stack([group, np.ones(n), age,
                              (site == "north").astype(float), (site == "south").astype(float)])
    res = scan(matrix, sheet, folder / "out-ols", ["--test", "student", "--group", "arm", "--levels",
                                                    "control,treated", "--covariates", "age,site",
                                                    "--perms", "200"])
    worst = 0.0
    for r, y in zip(res, rows):
        fit = sm.OLS(y, design).fit()
        worst = max(worst, abs(float(r["statistic"]) - fit.tvalues[0]), abs(float(r["p_param"]) - fit.pvalues[0]),
                    abs(float(r["effect"]) - fit.params[0]))
    ok = worst <= 1e-9
    failures += not ok
    print(f"{'ok ' if ok else 'BAD'} covariates  max|t, p, effect - statsmodels OLS| = {worst:.2e}")
    # k groups with covariates: the extra-sum-of-squares F of the arm
    # indicators after age and site (statsmodels compare_f_test).
    arms = np.array(["low", "mid", "high"] * 6)[:n + 2]
    n3 = len(arms)
    age3 = rng.normal(50, 10, size=n3)
    site3 = np.array(["north", "south"] * (n3 // 2))
    samples3 = [f"k{i}" for i in range(n3)]
    level = {"high": 0.0, "low": 1.0, "mid": 2.0}
    rows3 = [1 + 0.02 * age3 + rng.normal(size=n3) + 0.3 * k * np.array([level[a] for a in arms])
             for k in range(6)]
    matrix3 = write_matrix(folder, "k.arrow", rows3, samples3)
    sheet3 = folder / "k.tsv"
    sheet3.write_text("sample\tarm\tage\tsite\n" + "".join(
        f"{s}\t{a}\t{float(g)!r}\t{st}\n" for s, a, g, st in zip(samples3, arms, age3.tolist(), site3)))
    reduced_design = np.column_stack([np.ones(n3), age3, (site3 == "south").astype(float)])
    full_design = np.column_stack([reduced_design, (arms == "low").astype(float),
                                   (arms == "mid").astype(float)])
    res3 = scan(matrix3, sheet3, folder / "out-ols-k", ["--test", "anova", "--group", "arm",
                                                        "--covariates", "age,site", "--perms", "200"])
    worst = 0.0
    for r, y in zip(res3, rows3):
        full_fit, reduced_fit = sm.OLS(y, full_design).fit(), sm.OLS(y, reduced_design).fit()
        f_ref, p_ref, _ = full_fit.compare_f_test(reduced_fit)
        eta = (reduced_fit.ssr - full_fit.ssr) / reduced_fit.ssr
        worst = max(worst, abs(float(r["statistic"]) - f_ref) / (1 + f_ref),
                    abs(float(r["p_param"]) - p_ref), abs(float(r["effect"]) - eta))
    ok = worst <= 1e-9
    failures += not ok
    print(f"{'ok ' if ok else 'BAD'} covariates, k groups  max|F, p, partial eta2 - statsmodels OLS| = {worst:.2e}")
    return failures


def check_missing(folder):
    """Features with missing values: p_param as scipy on the observed values,
    exact p_perm as scipy.stats.permutation_test with a NaN-dropping
    statistic; the matrix is text with NA, NaN and empty cells."""
    rng = np.random.default_rng(77)
    n_a = n_b = 5
    group_b = np.r_[np.zeros(n_a), np.ones(n_b)]
    rows = []
    for k in range(8):
        row = rng.normal(size=n_a + n_b) + 0.5 * k * group_b
        row[rng.choice(n_a + n_b, size=1 + k % 3, replace=False)] = np.nan
        rows.append(row)
    rows.append(np.array([1, 2, np.nan, 1, 3, 1, 2, 2, 3, 2], dtype=float))
    rows.append(np.array([0, 1, 1, np.nan, 1, 0, np.nan, 1, 1, 0], dtype=float))
    samples = [f"m{i}" for i in range(n_a + n_b)]
    tokens = ["NA", "", "NaN"]
    lines = ["feature\t" + "\t".join(samples)]
    for k, row in enumerate(rows):
        cells = [tokens[(k + i) % 3] if np.isnan(v) else repr(float(v)) for i, v in enumerate(row)]
        lines.append(f"g{k}\t" + "\t".join(cells))
    matrix = folder / "missing.tsv"
    matrix.write_text("\n".join(lines) + "\n")
    sheet = folder / "missing-sheet.tsv"
    sheet.write_text("sample\tgroup\n" + "".join(
        f"{s}\t{'A' if i < n_a else 'B'}\n" for i, s in enumerate(samples)))

    def observed_stat(test, x, y):
        """Signed statistic of B = x against A = y on their observed values;
        0 when a group has too few values for it (riffle's documented rule;
        mean-diff is permuted through the pooled-variance t)."""
        x, y = x[~np.isnan(x)], y[~np.isnan(y)]
        if test == "welch":
            if len(x) < 2 or len(y) < 2:
                return 0.0
            t = stats.ttest_ind(x, y, equal_var=False).statistic
            return 0.0 if np.isnan(t) else t
        if len(x) == 0 or len(y) == 0:
            return 0.0
        if test in ("student", "mean-diff"):
            return stats.ttest_ind(x, y, equal_var=True).statistic
        # Tie-corrected z-score of the Mann-Whitney U of B (no continuity).
        nx, ny = len(x), len(y)
        n = nx + ny
        _, counts = np.unique(np.r_[x, y], return_counts=True)
        ties = float(np.sum(counts ** 3 - counts))
        u = stats.mannwhitneyu(x, y, method="asymptotic").statistic
        return (u - nx * ny / 2) / np.sqrt(nx * ny / 12 * ((n + 1) - ties / (n * (n - 1))))

    failures = 0
    for test in ["welch", "student", "mean-diff", "rank-sum"]:
        for side in ["both", "greater", "less"]:
            res = scan(matrix, sheet, folder / f"out-missing-{test}-{side}",
                       ["--test", test, "--group", "group", "--levels", "A,B", "--side", side,
                        "--perms", "1000", "--min-observed", "2"])
            alternative = "two-sided" if side == "both" else side
            worst_param = worst_perm = 0.0
            for r, row in zip(res, rows):
                a, b = row[:n_a], row[n_a:]
                ao, bo = a[~np.isnan(a)], b[~np.isnan(b)]
                if test == "rank-sum":
                    p_ref = stats.mannwhitneyu(bo, ao, use_continuity=True, alternative=alternative,
                                               method="asymptotic").pvalue
                else:
                    p_ref = stats.ttest_ind(b, a, equal_var=(test != "welch"), nan_policy="omit",
                                            alternative=alternative).pvalue
                if side == "both":
                    statistic = lambda x, y, t=test: abs(observed_stat(t, x, y))
                    alt = "greater"
                else:
                    statistic = lambda x, y, t=test: observed_stat(t, x, y)
                    alt = side
                perm = stats.permutation_test((b, a), statistic, permutation_type="independent",
                                              n_resamples=np.inf, alternative=alt).pvalue
                worst_param = max(worst_param, abs(float(r["p_param"]) - p_ref))
                worst_perm = max(worst_perm, abs(float(r["p_perm"]) - perm))
                if (int(r["n_a"]), int(r["n_b"])) != (len(ao), len(bo)):
                    worst_param = math.inf
            ok = worst_param <= 1e-10 and worst_perm <= 1e-12
            failures += not ok
            print(f"{'ok ' if ok else 'BAD'} missing {test:9} {side:7} max|p_param - scipy| = {worst_param:.2e}"
                  f"  max|p_perm - scipy| = {worst_perm:.2e}")

    # k groups (3 + 3 + 3 samples, 1680 arrangements): f_oneway and kruskal
    # on the observed values; a class left without values scores 0.
    classes = np.array([0, 1, 2] * 3)
    samples = [f"q{i}" for i in range(len(classes))]
    rows = []
    for k in range(6):
        row = rng.normal(size=len(classes)) + 0.6 * k * classes
        # One or two values missing, never two of one class.
        row[[k % 9, (k + 4) % 9][: 1 + k % 2]] = np.nan
        rows.append(row)
    matrix = write_matrix(folder, "kmissing.arrow", rows, samples)
    sheet = folder / "kmissing.tsv"
    sheet.write_text("sample\tdose\n" + "".join(f"{s}\td{c}\n" for s, c in zip(samples, classes)))
    for test, ref in [("anova", stats.f_oneway), ("kruskal", stats.kruskal)]:
        res = scan(matrix, sheet, folder / f"out-missing-{test}",
                   ["--test", test, "--group", "dose", "--perms", "5000", "--min-observed", "2"])
        worst_param = worst_perm = 0.0
        for r, row in zip(res, rows):
            groups = [row[classes == g] for g in range(3)]

            def statistic(*gs, ref=ref):
                gs = [g[~np.isnan(g)] for g in gs]
                return 0.0 if any(len(g) == 0 for g in gs) else ref(*gs).statistic
            p_ref = ref(*[g[~np.isnan(g)] for g in groups]).pvalue
            perm = stats.permutation_test(groups, statistic, permutation_type="independent",
                                          n_resamples=np.inf, alternative="greater").pvalue
            worst_param = max(worst_param, abs(float(r["p_param"]) - p_ref))
            worst_perm = max(worst_perm, abs(float(r["p_perm"]) - perm))
        ok = worst_param <= 1e-10 and worst_perm <= 1e-12
        failures += not ok
        print(f"{'ok ' if ok else 'BAD'} missing {test:9} both    max|p_param - scipy| = {worst_param:.2e}"
              f"  max|p_perm - scipy| = {worst_perm:.2e}")
    failures += check_missing_pairs(folder, rng)
    failures += check_missing_trait(folder, rng)
    failures += check_missing_spearman(folder, rng)
    failures += check_missing_covariates(folder, rng)
    return failures


def check_missing_trait(folder, rng):
    """Pearson with missing values (7 samples, all 5040 pairings): p_param
    as pearsonr on the observed samples, exact p_perm as permutation_test
    (permutation_type='pairings') with a statistic that drops the missing
    samples (a missing value stays missing whichever trait value it meets)."""
    trait = np.array([3.1, 0.5, 2.2, 4.8, 1.0, 2.6, 1.7])
    samples = [f"c{i}" for i in range(len(trait))]
    rows = []
    for k in range(6):
        row = rng.normal(size=len(trait)) + 0.4 * k * trait
        row[rng.choice(len(trait), size=1 + k % 2, replace=False)] = np.nan
        rows.append(row)
    tokens = ["NA", "", "NaN"]
    lines = ["feature\t" + "\t".join(samples)]
    for k, row in enumerate(rows):
        cells = [tokens[(k + i) % 3] if np.isnan(v) else repr(float(v)) for i, v in enumerate(row)]
        lines.append(f"c{k}\t" + "\t".join(cells))
    matrix = folder / "tmissing.tsv"
    matrix.write_text("\n".join(lines) + "\n")
    sheet = folder / "tmissing-sheet.tsv"
    sheet.write_text("sample\tage\n" + "".join(f"{s}\t{v!r}\n" for s, v in zip(samples, trait.tolist())))

    def observed_r(x, y, axis=-1):
        # Product-moment r over the samples where x is observed (vectorized
        # over resamples, so that all 5040 pairings take a second).
        x, y = np.broadcast_arrays(x, y)
        keep = ~np.isnan(x)
        n = keep.sum(axis=axis, keepdims=True)
        mx = np.where(keep, x, 0.0).sum(axis=axis, keepdims=True) / n
        my = np.where(keep, y, 0.0).sum(axis=axis, keepdims=True) / n
        dx, dy = np.where(keep, x - mx, 0.0), np.where(keep, y - my, 0.0)
        return (dx * dy).sum(axis=axis) / np.sqrt((dx * dx).sum(axis=axis) * (dy * dy).sum(axis=axis))

    failures = 0
    for side, alt in [("both", "two-sided"), ("greater", "greater"), ("less", "less")]:
        res = scan(matrix, sheet, folder / f"out-tmissing-{side}",
                   ["--test", "pearson", "--trait", "age", "--side", side, "--perms", "10000"])
        worst_param = worst_perm = 0.0
        for r, row in zip(res, rows):
            keep = ~np.isnan(row)
            p_ref = stats.pearsonr(row[keep], trait[keep], alternative=alt).pvalue
            if side == "both":
                statistic, alternative = (lambda x, axis=-1: np.abs(observed_r(x, trait, axis))), "greater"
            else:
                statistic, alternative = (lambda x, axis=-1: observed_r(x, trait, axis)), alt
            # One sample with "pairings": all 7! orders of the feature's
            # values against the fixed trait (its NaN move with them).
            perm = stats.permutation_test((row,), statistic, permutation_type="pairings",
                                          vectorized=True, n_resamples=np.inf,
                                          alternative=alternative).pvalue
            worst_param = max(worst_param, abs(float(r["p_param"]) - p_ref),
                              abs(float(r["statistic"]) - stats.pearsonr(row[keep], trait[keep]).statistic))
            worst_perm = max(worst_perm, abs(float(r["p_perm"]) - perm))
            if int(r["n_a"]) != int(keep.sum()):
                worst_param = math.inf
        ok = worst_param <= 1e-10 and worst_perm <= 1e-12
        failures += not ok
        print(f"{'ok ' if ok else 'BAD'} missing pearson     {side:7} max|p_param, r - scipy| = {worst_param:.2e}"
              f"  max|p_perm - scipy| = {worst_perm:.2e}")
    return failures


def write_text_matrix(folder, name, rows, samples):
    """A text matrix with NA, empty and NaN cells for missing values."""
    tokens = ["NA", "", "NaN"]
    lines = ["feature\t" + "\t".join(samples)]
    for k, row in enumerate(rows):
        cells = [tokens[(k + i) % 3] if np.isnan(v) else repr(float(v)) for i, v in enumerate(row)]
        lines.append(f"f{k}\t" + "\t".join(cells))
    matrix = folder / name
    matrix.write_text("\n".join(lines) + "\n")
    return matrix


def check_missing_spearman(folder, rng):
    """Spearman with missing values and a tied trait (7 samples, all 5040
    pairings): p_param and rho as spearmanr on the observed samples; exact
    p_perm as permutation_test (permutation_type='pairings') with a
    statistic that ranks both sides among the samples where the feature is
    observed (riffle's trait moves over all samples, the mask stays)."""
    trait = np.array([3.1, 0.5, 2.2, 3.1, 1.0, 2.2, 1.7])
    samples = [f"r{i}" for i in range(len(trait))]
    rows = []
    for k in range(6):
        row = np.round(rng.normal(size=len(trait)) + 0.5 * k * trait, 1 if k % 2 else 3)
        row[rng.choice(len(trait), size=1 + k % 3, replace=False)] = np.nan
        rows.append(row)
    matrix = write_text_matrix(folder, "smissing.tsv", rows, samples)
    sheet = folder / "smissing-sheet.tsv"
    sheet.write_text("sample\tage\n" + "".join(f"{s}\t{v!r}\n" for s, v in zip(samples, trait.tolist())))

    def observed_rho(x, axis=-1):
        # rho over the samples where x is observed, vectorized over resamples.
        x, y = np.broadcast_arrays(x, trait)
        keep = ~np.isnan(x)
        rx = stats.rankdata(x, axis=axis, nan_policy="omit")
        ry = stats.rankdata(np.where(keep, y, np.nan), axis=axis, nan_policy="omit")
        n = keep.sum(axis=axis, keepdims=True)
        mx = np.where(keep, rx, 0.0).sum(axis=axis, keepdims=True) / n
        my = np.where(keep, ry, 0.0).sum(axis=axis, keepdims=True) / n
        dx, dy = np.where(keep, rx - mx, 0.0), np.where(keep, ry - my, 0.0)
        return (dx * dy).sum(axis=axis) / np.sqrt((dx * dx).sum(axis=axis) * (dy * dy).sum(axis=axis))

    failures = 0
    for side, alt in [("both", "two-sided"), ("greater", "greater"), ("less", "less")]:
        res = scan(matrix, sheet, folder / f"out-smissing-{side}",
                   ["--test", "spearman", "--trait", "age", "--side", side, "--perms", "10000"])
        worst_param = worst_perm = 0.0
        for r, row in zip(res, rows):
            keep = ~np.isnan(row)
            ref = stats.spearmanr(row[keep], trait[keep], alternative=alt)
            if side == "both":
                statistic, alternative = (lambda x, axis=-1: np.abs(observed_rho(x, axis))), "greater"
            else:
                statistic, alternative = observed_rho, alt
            perm = stats.permutation_test((row,), statistic, permutation_type="pairings",
                                          vectorized=True, n_resamples=np.inf,
                                          alternative=alternative).pvalue
            worst_param = max(worst_param, abs(float(r["p_param"]) - ref.pvalue),
                              abs(float(r["statistic"]) - ref.statistic),
                              abs(float(r["effect"]) - ref.statistic))
            worst_perm = max(worst_perm, abs(float(r["p_perm"]) - perm))
            if int(r["n_a"]) != int(keep.sum()):
                worst_param = math.inf
        ok = worst_param <= 1e-10 and worst_perm <= 1e-12
        failures += not ok
        print(f"{'ok ' if ok else 'BAD'} missing spearman    {side:7} max|p_param, rho - scipy| = {worst_param:.2e}"
              f"  max|p_perm - scipy| = {worst_perm:.2e}")
    return failures


def check_missing_covariates(folder, rng):
    """Covariate designs with missing values (8 samples, all 8! relabelings
    listed): t (two groups, a trait) or F (three groups) of the effect,
    p_param and effect as statsmodels OLS on the observed rows (compare_f_test
    for F; a covariate level absent from them is left out of that row's
    model), exact p_perm as permutation_test over every order of the
    observed rows' residuals after the covariates, added back to their
    fitted values (Freedman-Lane on the observed rows)."""
    import statsmodels.api as sm
    n = 8
    age = np.array([31.0, 45.0, 52.0, 38.0, 61.0, 29.0, 50.0, 44.0])
    site = np.array(["x", "y", "x", "z", "x", "y", "z", "x"])
    samples = [f"v{i}" for i in range(n)]
    designs = [
        ("student", ["--group", "arm"], np.array([0, 1, 0, 1, 1, 0, 1, 0]), "age,site"),
        # Three groups leave room for one covariate on eight samples.
        ("anova", ["--group", "arm"], np.array([0, 1, 2, 0, 1, 2, 1, 0]), "age"),
        ("pearson", ["--trait", "score"], None, "age,site"),
    ]
    score = np.round(age / 10 + rng.normal(size=n), 2)
    failures = 0
    for test, args, arms, covariates in designs:
        if arms is None:
            effect_cols = score[:, None]
        else:
            effect_cols = np.column_stack([(arms == level).astype(float) for level in range(1, arms.max() + 1)])
        signal = effect_cols.sum(axis=1)
        rows = []
        for k in range(6):
            row = 1 + 0.03 * age + 0.5 * (site == "y") + rng.normal(size=n) + 0.6 * k * signal
            if k == 1:
                row[site == "z"] = np.nan  # level z absent from this row
            elif k > 1:
                row[rng.choice(n, size=1 + k % 2, replace=False)] = np.nan
            rows.append(row)
        matrix = write_text_matrix(folder, f"cmissing-{test}.tsv", rows, samples)
        sheet = folder / f"cmissing-{test}-sheet.tsv"
        arm_cells = ["" if arms is None else f"a{a}" for a in (arms if arms is not None else range(n))]
        sheet.write_text("sample\tarm\tscore\tage\tsite\n" + "".join(
            f"{s}\t{a}\t{float(t)!r}\t{float(g)!r}\t{st}\n"
            for s, a, t, g, st in zip(samples, arm_cells, score.tolist(), age.tolist(), site)))
        res = scan(matrix, sheet, folder / f"out-cmissing-{test}",
                   ["--test", test, "--covariates", covariates, "--perms", "50000", "--min-observed", "2"]
                   + args)
        worst_param = worst_perm = 0.0
        tested = 0
        for k, (r, y) in enumerate(zip(res, rows)):
            keep = ~np.isnan(y)
            if k == 1 and "site" in covariates and r["note"] != "":
                worst_param = math.inf  # the row without level z must be tested
            if arms is not None and min(np.sum(keep & (arms == a)) for a in range(arms.max() + 1)) < 2:
                worst_param = max(worst_param, 0.0 if r["note"] == "too few observed values" else math.inf)
                continue
            tested += 1
            levels = [lv for lv in ["y", "z"] if np.any(site[keep] == lv) and "site" in covariates]
            nuisance = np.column_stack([np.ones(keep.sum()), age[keep]]
                                       + [(site[keep] == lv).astype(float) for lv in levels])
            full = np.column_stack([effect_cols[keep], nuisance])
            yo = y[keep]
            e_cols = effect_cols.shape[1]
            rank_full, rank_nuisance = np.linalg.matrix_rank(full), np.linalg.matrix_rank(nuisance)
            if rank_full < rank_nuisance + e_cols or len(yo) - rank_full < 2:
                # Confounded on the observed rows, or under two residual df.
                expected = ("effect explained by the covariates on the observed values"
                            if rank_full < rank_nuisance + e_cols else "too few observed values")
                worst_param = max(worst_param, 0.0 if r["note"] == expected else math.inf)
                tested -= 1
                continue
            full_fit, reduced_fit = sm.OLS(yo, full).fit(), sm.OLS(yo, nuisance).fit()
            if e_cols == 1:
                stat_ref, p_ref, effect_ref = full_fit.tvalues[0], full_fit.pvalues[0], full_fit.params[0]
            else:
                stat_ref, p_ref, _ = full_fit.compare_f_test(reduced_fit)
                effect_ref = (reduced_fit.ssr - full_fit.ssr) / reduced_fit.ssr
            worst_param = max(worst_param, abs(float(r["statistic"]) - stat_ref) / (1 + abs(stat_ref)),
                              abs(float(r["p_param"]) - p_ref), abs(float(r["effect"]) - effect_ref))
            fitted, resid = reduced_fit.fittedvalues, reduced_fit.resid
            pinv = np.linalg.pinv(full)
            unscaled = np.linalg.inv(full.T @ full)
            df = len(yo) - full.shape[1]
            pinv_r = np.linalg.pinv(nuisance)

            def statistic(e, axis=-1):
                ys = np.moveaxis(np.atleast_2d(e), axis, -1) + fitted
                beta = ys @ pinv.T
                rss = ((ys - beta @ full.T) ** 2).sum(axis=-1)
                if e_cols == 1:
                    return np.abs(beta[..., 0] / np.sqrt(rss / df * unscaled[0, 0]))
                rss0 = ((ys - (ys @ pinv_r.T) @ nuisance.T) ** 2).sum(axis=-1)
                return ((rss0 - rss) / e_cols) / (rss / df)

            perm = stats.permutation_test((np.asarray(resid),), statistic, permutation_type="pairings",
                                          vectorized=True, n_resamples=np.inf,
                                          alternative="greater").pvalue
            worst_perm = max(worst_perm, abs(float(r["p_perm"]) - perm))
        ok = worst_param <= 1e-9 and worst_perm <= 1e-12 and tested >= 3
        failures += not ok
        print(f"{'ok ' if ok else 'BAD'} missing covariates {test:8} ({tested} rows) max|stat, p_param, effect"
              f" - statsmodels| = {worst_param:.2e}  max|p_perm - scipy| = {worst_perm:.2e}")
    return failures


def check_missing_pairs(folder, rng):
    """Paired tests with missing values (9 pairs, 512 sign flips): a pair
    is missing when either sample is; p_param as ttest_rel(nan_policy='omit')
    and wilcoxon on the observed differences, exact p_perm as
    permutation_test over all flips of all pairs with a statistic that drops
    the missing pairs (a flip swaps a pair's samples, so it stays missing)."""
    m = 9
    samples = [f"pre{i}" for i in range(m)] + [f"post{i}" for i in range(m)]
    rows = []
    for k in range(7):
        base = rng.normal(size=m)
        row = np.r_[base, base + rng.normal(size=m) * 0.7 + 0.3 * k]
        row[rng.choice(2 * m, size=1 + k % 3, replace=False)] = np.nan
        rows.append(row)
    tied = np.r_[np.arange(m, dtype=float), np.arange(m, dtype=float) + np.array([1, -1, 2, 0, 1, 3, -2, 1, 1.0])]
    tied[[2, m + 6]] = np.nan
    rows.append(tied)
    tokens = ["NA", "", "NaN"]
    lines = ["feature\t" + "\t".join(samples)]
    for k, row in enumerate(rows):
        cells = [tokens[(k + i) % 3] if np.isnan(v) else repr(float(v)) for i, v in enumerate(row)]
        lines.append(f"p{k}\t" + "\t".join(cells))
    matrix = folder / "pmissing.tsv"
    matrix.write_text("\n".join(lines) + "\n")
    sheet = folder / "pmissing-sheet.tsv"
    sheet.write_text("sample\ttime\tsubject\n" + "".join(
        f"{s}\t{'pre' if i < m else 'post'}\tsubj{i % m}\n" for i, s in enumerate(samples)))

    def signed_rank_sum(d):
        # W+ - W- over the nonzero differences (zeros dropped before ranking).
        d = d[d != 0]
        return float(np.sum(np.sign(d) * stats.rankdata(np.abs(d)))) if len(d) else 0.0

    failures = 0
    for test in ["paired-t", "signed-rank"]:
        for side, alt in [("both", "two-sided"), ("greater", "greater"), ("less", "less")]:
            res = scan(matrix, sheet, folder / f"out-pmissing-{test}-{side}",
                       ["--test", test, "--group", "time", "--levels", "pre,post", "--pair", "subject",
                        "--side", side, "--perms", "1000", "--min-observed", "2"])
            worst_param = worst_perm = 0.0
            for r, row in zip(res, rows):
                pre, post = row[:m], row[m:]
                kept = ~np.isnan(pre) & ~np.isnan(post)
                d = post[kept] - pre[kept]
                if test == "paired-t":
                    p_ref = stats.ttest_rel(post, pre, nan_policy="omit", alternative=alt).pvalue

                    def stat(x, y):
                        return stats.ttest_rel(x, y, nan_policy="omit").statistic
                else:
                    p_ref = stats.wilcoxon(d, alternative=alt, method="approx").pvalue

                    def stat(x, y):
                        keep = ~np.isnan(x) & ~np.isnan(y)
                        return signed_rank_sum(x[keep] - y[keep])
                if side == "both":
                    statistic, alternative = (lambda x, y, s=stat: abs(s(x, y))), "greater"
                else:
                    statistic, alternative = stat, alt
                perm = stats.permutation_test((post, pre), statistic, permutation_type="samples",
                                              vectorized=False, n_resamples=np.inf,
                                              alternative=alternative).pvalue
                worst_param = max(worst_param, abs(float(r["p_param"]) - p_ref))
                worst_perm = max(worst_perm, abs(float(r["p_perm"]) - perm))
                if int(r["n_a"]) != int(kept.sum()):
                    worst_param = math.inf
            ok = worst_param <= 1e-10 and worst_perm <= 1e-12
            failures += not ok
            print(f"{'ok ' if ok else 'BAD'} missing {test:11} {side:7} max|p_param - scipy| = {worst_param:.2e}"
                  f"  max|p_perm - scipy| = {worst_perm:.2e}")
    return failures


def main():
    rows = features()
    failures = 0
    checked = 0
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        matrix, sheet = write_inputs(folder, rows)
        for test in ["welch", "student", "mean-diff", "rank-sum"]:
            for side in ["both", "greater", "less"]:
                results = run_riffle(matrix, sheet, folder / f"out-{test}-{side}", test, side)
                worst_perm = worst_param = 0.0
                for k, row in enumerate(rows):
                    a, b = row[:N_A], row[N_A:]
                    p_perm = float(results[k]["p_perm"])
                    p_param = float(results[k]["p_param"])
                    worst_perm = max(worst_perm, abs(p_perm - scipy_perm_p(test, side, b, a)))
                    worst_param = max(worst_param, abs(p_param - scipy_param_p(test, side, b, a)))
                    checked += 1
                ok = worst_perm <= 1e-12 and worst_param <= 1e-10
                failures += not ok
                print(f"{'ok ' if ok else 'BAD'} {test:9} {side:7} max|p_perm - scipy| = {worst_perm:.2e}"
                      f"  max|p_param - scipy| = {worst_param:.2e}")
        failures += check_designs(folder)
        failures += check_missing(folder)
    print(f"scipy cross-check: {checked} two-group feature-tests compared; {failures} configurations failed")
    return 1 if failures else 0


if __name__ == "__main__":
    sys.exit(main())
