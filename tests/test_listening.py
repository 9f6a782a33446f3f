"""Blind-trial statistics against the general-purpose reference (scipy.stats.binomtest, the
exact one-sided binomial test with p = 1/2)."""

import pytest
from scipy import stats

from webapp.listening import binomial_tail


@pytest.mark.parametrize("correct, trials", [(0, 1), (9, 10), (12, 16), (520, 1000),
                                             (5100, 10000), (10000, 10000), (30000, 60000)])
def test_binomial_tail_equals_the_exact_binomial_test(correct, trials):
    ref = stats.binomtest(correct, trials, 0.5, alternative="greater").pvalue
    assert binomial_tail(correct, trials) == pytest.approx(ref, rel=1e-9, abs=1e-300)
