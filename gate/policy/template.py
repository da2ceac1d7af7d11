"""`gate policy init [FILE]`: write a commented starter policy (never over an existing file)."""

from __future__ import annotations

import os
from pathlib import Path

from gate.errors import OutputError

DEFAULT_FILE = "gate-policy.yaml"

STARTER_POLICY = """\
# collinearity-gate policy (written by `gate policy init`).
# Check it with `gate policy validate FILE`; its JSON Schema: `gate policy schema`.
# Read as YAML 1.2: only true/false are booleans (off, no, yes, on are words) and 1:30 is text.
# A key given twice, aliases (*name) and merge keys (<<) are refused.
policy_version: 1
name: my-feature-table            # shown in every verdict and report
description: Limits for the features of one model; say which model and who owns it.

columns:
  include: ["*"]                  # shell-style globs over column names
  exclude: []                     # e.g. [row_id, observed_at]: ids and times are no features
  target: []                      # the model's target column(s): never features, named in
                                  # the verdict, e.g. [rentals]
  categorical: []                 # one-hot encoded, one GVIF group each; string and category
                                  # columns are categorical anyway
  reference: {}                   # reference level per categorical column, e.g.
                                  # {weather_kind: clear}; default: its most frequent level
                                  # among the used rows (ties: the first in sort order)
  max_levels: 50                  # a categorical column with more levels is refused; a text
                                  # column not listed in categorical is called identifier-like
                                  # above it, or with a distinct value in >= 90% of >= 20 used
                                  # rows (both rules: common practice, no source)
  weight: null                    # optional column of non-negative row weights

missing: drop_rows                # drop_rows: drop incomplete rows and count them | fail

limits:
  # Each limit has a level: fail | warn | off. Numbers must be finite (no .inf or .nan).
  # |r| >= 0.8 between two features: a common rule of thumb (common practice, no source).
  pairwise_correlation: {max: 0.8, level: warn, method: pearson}
  # VIF > 5: standard errors inflated by more than sqrt(5) = 2.24x (common practice, no
  # source). Groups of dummies are judged on GVIF^(1/df) (Fox & Monette 1992).
  vif: {max: 5.0, level: fail}
  # Condition index > 30: a moderate-to-strong near dependency (Belsley, Kuh & Welsch 1980,
  # unit-length columns with an intercept). proportion: the variance-decomposition share at
  # which a feature counts as involved in a near dependency.
  # scaling: unit_length keeps the intercept, so a column far from zero relative to its spread
  # (a calendar year, epoch seconds) gives a high index with the intercept: centre such a
  # column, or use scaling: standardized (centred, scaled columns, no intercept), which judges
  # only the relations among the features.
  condition_number: {max: 30, level: warn, scaling: unit_length, proportion: 0.5}
  # Exact linear dependencies (constants, duplicates, sums). tolerance: relative
  # singular-value cut-off; null = max(rows, columns) * machine epsilon.
  rank_deficiency: {level: fail, tolerance: null}

# A waiver accepts the findings of one rule over the listed features until a date. An expired
# waiver stops waiving and is itself a warning; one that matches nothing is reported as stale.
waivers: []
#  - rule: pairwise_correlation
#    features: [feature_a, feature_b]
#    reason: both kept on purpose; the model is fitted with a ridge penalty
#    owner: the-team-that-decided
#    expires: 2027-06-30
"""


def write_starter_policy(path: str | Path | None = None) -> Path:
    """Create ``path`` (default gate-policy.yaml) with the starter policy; never overwrite."""
    file = Path(path) if path is not None else Path(DEFAULT_FILE)
    try:
        fd = os.open(file, os.O_WRONLY | os.O_CREAT | os.O_EXCL, 0o644)
    except FileExistsError:
        raise OutputError(f"{file}: already exists; `gate policy init` never overwrites a file. "
                          "Choose another name or move the file away first") from None
    except OSError as exc:
        raise OutputError(f"{file}: cannot create the policy file ({exc.strerror or exc}); "
                          "check that the folder exists and is writable") from None
    with os.fdopen(fd, "w", encoding="utf-8") as handle:
        handle.write(STARTER_POLICY)
    return file
