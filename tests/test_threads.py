"""thread_map: the serial result, in input order, whatever the number of threads."""
import numpy as np

from meshcheck.threads import thread_map


def test_results_in_input_order_and_equal_to_serial():
    rng = np.random.default_rng(2)
    arrays = [rng.random(200_000) for _ in range(7)]
    got = thread_map(np.sort, arrays)
    want = [np.sort(a) for a in arrays]
    assert all(np.array_equal(g, w) for g, w in zip(got, want))
    assert thread_map(lambda x: x * x, range(5), parallel=False) == [0, 1, 4, 9, 16]
    assert thread_map(len, []) == []
