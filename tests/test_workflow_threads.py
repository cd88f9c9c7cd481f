"""Jobs that run in threads of Snakemake's process (the local profile's in-process steps, decode among them).

Two decode jobs may run at once in one process, so a job may not rely on
process-wide state: the logistic regression counts scikit-learn's convergence
warnings with ``warnings.catch_warnings``, which swaps process-wide state, and
must count each thread's own warnings (the count is logged and reaches the
report). Checked here against the same fits run one after another.
"""

import threading
import warnings

import numpy as np

from foldwise.decoding.classifiers import logistic_l2_fit_predict


def _problem(converges, seed):
    """Patterns whose lbfgs fits converge (small, centred features) or stop early (large, offset ones, C = 1e6)."""
    rng = np.random.default_rng(seed)
    labels = np.stack([rng.permutation(np.repeat([0, 1, 2, 3], 10)) for _ in range(6)])
    if converges:
        return rng.normal(size=(40, 5)), labels, 1.0
    return rng.normal(size=(40, 5)) * 100 + rng.normal(size=5) * 1000, labels, 1e6


def test_concurrent_logistic_fits_count_only_their_own_convergence_warnings():
    problems = [_problem(converges=index % 2 == 0, seed=index) for index in range(6)]
    expected = [logistic_l2_fit_predict(x, y, x[:4], C=c)[1] for x, y, c in problems]
    assert expected[0] == 0 and expected[1] > 0  # the two kinds differ, so a misattributed warning shows
    original_showwarning, original_filters = warnings.showwarning, list(warnings.filters)
    for _ in range(3):  # a race: several rounds of six threads started together
        counts = [None] * len(problems)
        barrier = threading.Barrier(len(problems))

        def fit(index):
            x, y, c = problems[index]
            barrier.wait()
            counts[index] = logistic_l2_fit_predict(x, y, x[:4], C=c)[1]

        threads = [threading.Thread(target=fit, args=(index,)) for index in range(len(problems))]
        for thread in threads:
            thread.start()
        for thread in threads:
            thread.join()
        assert counts == expected
    assert warnings.showwarning is original_showwarning and warnings.filters == original_filters
