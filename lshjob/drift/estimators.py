"""Drift estimators: how much of an entity's set in one period it had before, from signatures.

For each row (an entity's set A_t in period t, key order entity, [segment], period) two
comparisons with the entity's own recent history, both from the stored signatures:

* **similarity** to the previous period: the Jaccard J(A_t, A_p), where p is the entity's
  latest earlier period within the last ``history`` periods (``compared_with``).
* **containment** of the new period in the history: C = |A_t and H| / |A_t|, where H is the
  union of the entity's sets in the ``history`` periods before t. The union's signature is
  the element-wise minimum of theirs (numpy.minimum, as
  :func:`lshjob.sign.signatures.merge_signatures` folds files), for both schemes (oph keeps
  empty bins empty, :mod:`lshjob.sign.oph`).

Estimators. Position i of two signatures a, b of sets A, B (positions where both bins are
empty, which only the ``oph`` scheme has, are skipped):

* ``a[i] == b[i]`` iff the minimum of A or B lies in A and B: probability J(A, B) (Broder,
  "On the resemblance and containment of documents", 1997). The similarity estimate is the
  fraction of equal positions over the positions used; for ``oph`` without densification
  this is Li, Owen and Zhang's N_mat / (k - N_emp) ("One Permutation Hashing", NeurIPS 2012).
* ``a[i] <= b[i]`` iff the minimum of A or B lies in A: probability |A| / |A or B|. Given
  that, it lies in A and B with probability |A and B| / |A| = C. So the containment estimate
  is (positions equal) / (positions with a <= b): a ratio of the two counts, which needs no
  set sizes (derived here from the same min-wise property as Broder's).

Standard errors. For ``kperm`` the positions are independent draws, so the equal count is
binomial: se(J) = sqrt(J (1 - J) / k) over the k positions used, and, given the m positions
with a <= b, se(C) = sqrt(C (1 - C) / m) (binomial variance; from memory, the standard
result for k-permutation MinHash, e.g. Mining of Massive Datasets, section 3.3). For ``oph``
the bins are drawn without replacement, which makes the variance no larger than that of the
same number of independent positions (Li, Owen and Zhang 2012, from memory), so the same
formulas are used as an upper estimate. Reported errors are plug-in (at the estimate).
"""

from __future__ import annotations

import numpy as np

from lshjob.core._jit import numba

EMPTY = np.uint64(0xFFFFFFFFFFFFFFFF)
NONE = -1  # no earlier period within the history


@numba.njit(parallel=True, cache=True)
def compare_with_history(signatures, group_starts, period_index, history):
    """Per row of ``signatures`` (n x k, rows sorted by group then period; group g holds rows
    group_starts[g]..group_starts[g + 1] - 1, ``period_index`` the period's calendar number):

    ``previous``: the row compared with (latest earlier row of the group within ``history``
    periods), or -1; ``sim_equal``, ``sim_used``: equal positions and positions used against
    that row; ``cont_equal``, ``cont_below``: positions where the row equals, and where it is
    at most, the element-wise minimum of the group's rows within the history; ``periods``:
    how many rows that minimum is over."""
    n, k = signatures.shape
    previous = np.full(n, -1, dtype=np.int64)
    sim_equal = np.zeros(n, dtype=np.int32)
    sim_used = np.zeros(n, dtype=np.int32)
    cont_equal = np.zeros(n, dtype=np.int32)
    cont_below = np.zeros(n, dtype=np.int32)
    periods = np.zeros(n, dtype=np.int32)
    for g in numba.prange(group_starts.shape[0] - 1):
        union = np.empty(k, dtype=np.uint64)
        for j in range(group_starts[g] + 1, group_starts[g + 1]):
            first = j
            while first > group_starts[g] and period_index[first - 1] >= period_index[j] - history:
                first -= 1
            if first == j:
                continue
            previous[j] = j - 1
            periods[j] = j - first
            row = signatures[j]
            prev = signatures[j - 1]
            union[:] = prev
            for i in range(first, j - 1):
                other = signatures[i]
                for q in range(k):
                    if other[q] < union[q]:
                        union[q] = other[q]
            eq = 0
            used = 0
            ceq = 0
            below = 0
            for q in range(k):
                a = row[q]
                b = prev[q]
                if a != EMPTY or b != EMPTY:
                    used += 1
                    if a == b:
                        eq += 1
                if a != EMPTY:
                    u = union[q]
                    if a <= u:
                        below += 1
                        if a == u:
                            ceq += 1
            sim_equal[j] = eq
            sim_used[j] = used
            cont_equal[j] = ceq
            cont_below[j] = below
    return previous, sim_equal, sim_used, cont_equal, cont_below, periods


def ratio_and_error(hits: np.ndarray, trials: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """hits / trials and its binomial standard error sqrt(p (1 - p) / trials) (module
    docstring); NaN where there are no trials."""
    trials = trials.astype(np.float64)
    with np.errstate(divide="ignore", invalid="ignore"):
        p = np.where(trials > 0, hits / trials, np.nan)
        se = np.where(trials > 0, np.sqrt(p * (1.0 - p) / trials), np.nan)
    return p, se
