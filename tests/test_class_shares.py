import numpy as np

from nbkit.analyze.class_shares import STACK_ORDER, bucket_median, class_shares


def test_shares_sum_to_one_and_ordinary_is_the_rest():
    steps = np.arange(6)
    r = np.array([0.1, 0.2, np.nan, 0.0, 0.5, 0.3])
    d = np.array([0.2, 0.2, 0.1, 0.0, 0.5, 0.3])
    a = np.array([0.3, 0.1, 0.1, 1.0, 0.2, 0.0])
    x, s = class_shares(steps, r, d, a)
    assert x.tolist() == [0, 1, 3, 4, 5]                      # step 2 has no reversed share: dropped
    assert np.allclose(s.sum(axis=0), 1)
    assert STACK_ORDER[0] == "reversed" and np.isclose(s[2, 0], 0.4)   # ordinary = 1 - 0.6
    assert s[2, 3] == 0                                       # over-full (1.2) step: ordinary floored at 0


def test_many_steps_are_averaged_into_columns_still_summing_to_one():
    rng = np.random.default_rng(0)
    r, d, a = (rng.uniform(0, 0.3, 10_000) for _ in range(3))
    x, s = class_shares(np.arange(10_000), r, d, a, columns=100)
    assert s.shape == (4, 100) and np.allclose(s.sum(axis=0), 1) and x[1] == 100
    m = bucket_median(np.arange(10_000), np.arange(10_000.0), x)
    assert m[0] == 49.5


def test_no_shares_at_all():
    x, s = class_shares(np.arange(3), np.full(3, np.nan), np.zeros(3), np.zeros(3))
    assert len(x) == 0 and s.shape == (4, 0)
