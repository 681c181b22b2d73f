"""Reference chi-square and one-way ANOVA results for Trialogue's balance and
attrition tests, from scipy.stats (Debian's python3-scipy).

Reads JSON on stdin: {"chi2": [table, ...], "anova": [[group, ...], ...]}
where a table is a list of rows of counts and a group a list of numbers.
Writes JSON on stdout: {"chi2": [[stat, p, dof], ...], "anova": [[F, p], ...]}.
Pearson's chi-square without Yates's continuity correction (correction=False).
"""
import json
import sys

from scipy import stats

req = json.load(sys.stdin)
out = {"chi2": [], "anova": []}
for table in req["chi2"]:
    stat, p, dof, _ = stats.chi2_contingency(table, correction=False)
    out["chi2"].append([float(stat), float(p), int(dof)])
for groups in req["anova"]:
    f, p = stats.f_oneway(*groups)
    out["anova"].append([float(f), float(p)])
json.dump(out, sys.stdout)
