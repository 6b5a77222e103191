"""Convergence verdicts: the rule's false-alarm rate, drifts it must catch, sample floors."""

import math

import numpy as np
import pytest
from scipy import stats

from boost.verdict import (DRIFTING, MIN_INDEPENDENT, SETTLED, TOO_FEW, count_crossing_walkers,
                           count_effective, judge)


def test_halves_of_a_stationary_estimate_raise_the_normal_false_alarm_rate():
    # Two independent, unbiased normal estimates of one value differ by more than two
    # combined standard errors with probability 2·Φ(−2) = 0.0455 (exact; scipy.stats.norm).
    rng = np.random.default_rng(11)
    sigma = rng.uniform(0.01, 0.2, size=(4000, 2))
    first, second = 0.7 + sigma[:, 0] * rng.standard_normal(4000), 0.7 + sigma[:, 1] * rng.standard_normal(4000)
    words = [judge(independent=100, first=a, d_first=s, second=b, d_second=t).word
             for a, b, (s, t) in zip(first, second, sigma)]
    rate = np.mean([w == DRIFTING for w in words])
    expected = 2 * stats.norm.sf(2.0)
    assert abs(rate - expected) < 4 * math.sqrt(expected * (1 - expected) / 4000), rate
    assert set(words) == {SETTLED, DRIFTING}


def test_a_drift_of_five_errors_is_caught_and_named():
    verdict = judge(independent=500, first=0.60, d_first=0.01, second=0.67, d_second=0.01)
    assert verdict.word == DRIFTING
    assert verdict.halves_z == pytest.approx(0.07 / math.hypot(0.01, 0.01))
    assert "halves differ by 4.9 combined errors" in verdict.reason and "0.6 then 0.67" in verdict.reason


def test_too_few_samples_wins_over_agreement():
    verdict = judge(independent=MIN_INDEPENDENT - 1, first=0.5, d_first=0.1, second=0.5, d_second=0.1)
    assert verdict.word == TOO_FEW and f"only {MIN_INDEPENDENT - 1} independent samples" in verdict.reason
    assert judge(independent=math.nan, first=0.5, d_first=0.1, second=0.5, d_second=0.1).word == TOO_FEW
    missing_half = judge(independent=100, first=math.nan, d_first=math.nan, second=0.5, d_second=0.1)
    assert missing_half.word == TOO_FEW and "half" in missing_half.reason


def test_no_crossing_walker_is_too_few_samples():
    verdict = judge(independent=100, first=0.5, d_first=0.1, second=0.5, d_second=0.1, crossings=0,
                    what="into and out of basin right")
    assert verdict.word == TOO_FEW and verdict.reason == "no walker has crossed into and out of basin right"
    assert judge(independent=100, first=0.5, d_first=0.1, second=0.5, d_second=0.1, crossings=3).word == SETTLED


def test_kish_effective_sample_size():
    # source: Kish's design effect (exact): equal weights count fully, one weight counts once
    assert count_effective(np.full(37, 0.2)) == pytest.approx(37)
    assert count_effective([0.0, 3.0, 0.0]) == pytest.approx(1)
    assert count_effective([1.0, 1.0, 2.0]) == pytest.approx(16 / 6)
    assert count_effective([]) == 0.0


def test_crossing_walkers_need_both_sides():
    inside_rt = np.array([[True, True, True], [True, False, True], [False, False, False]])
    assert count_crossing_walkers(inside_rt) == 1


# -- forward and reverse cumulative estimates -------------------------------------------
from boost.convergence import FRACTIONS, compute_cumulative  # noqa: E402
from boost.exceptions import AnalysisError  # noqa: E402


def _mean_estimate(x_n):
    def estimate(multiplicity_n):
        if multiplicity_n.sum() < 3:
            raise AnalysisError("too few")
        return [np.average(x_n, weights=multiplicity_n)]
    return estimate


def test_halves_partition_production_and_errors_scale_with_samples():
    # exact: the first and last halves of 1,000 evenly spread samples are disjoint and
    # together are all of them; a linear trend x = t puts their means at 0.25 and 0.75.
    # An average's error over stationary data scales as 1/sqrt(samples) (exact for
    # independent samples): each half's error is sqrt(2) times the whole run's.
    n = 1000
    position_n = np.arange(n) / n
    cumulative = compute_cumulative(_mean_estimate(position_n), position_n, [0.01])
    first, d_first, second, d_second = cumulative.halves(0)
    assert first == pytest.approx(np.mean(position_n[:500])) and second == pytest.approx(np.mean(position_n[500:]))
    assert d_first == pytest.approx(0.01 * math.sqrt(2)) and d_second == pytest.approx(0.01 * math.sqrt(2))
    assert cumulative.forward[0, -1] == cumulative.reverse[0, -1] == pytest.approx(np.mean(position_n))
    assert cumulative.forward[0, 0] == pytest.approx(np.mean(position_n[:100]))
    assert cumulative.reverse[0, 0] == pytest.approx(np.mean(position_n[900:]))
    assert cumulative.d_forward[0, 0] == pytest.approx(0.01 * math.sqrt(10))
    assert len(cumulative.fractions) == len(FRACTIONS)


def test_parts_too_small_to_estimate_are_gaps_not_errors():
    position_n = np.array([0.05, 0.5, 0.55, 0.6, 0.95])
    cumulative = compute_cumulative(_mean_estimate(np.arange(5.0)), position_n, [0.1])
    assert np.isnan(cumulative.forward[0, 0]) and np.isfinite(cumulative.forward[0, -1])
