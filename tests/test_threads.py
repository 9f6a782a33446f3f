"""The process-wide BLAS limit (webapp.threads.one_blas_thread), read back through threadpoolctl
(the general-purpose library that sets it)."""

import threading

from threadpoolctl import threadpool_info

from webapp.threads import one_blas_thread


def _blas_threads():
    return {lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"}


def test_the_limit_holds_until_the_last_user_leaves():
    before = _blas_threads()
    inside, leave_first, first_left = threading.Event(), threading.Event(), threading.Event()

    def first_user():
        with one_blas_thread():
            inside.set()
            leave_first.wait(10)
        first_left.set()

    t = threading.Thread(target=first_user)
    t.start()
    assert inside.wait(10)
    with one_blas_thread():
        assert _blas_threads() == {1}
        leave_first.set()
        assert first_left.wait(10)
        # a plain threadpool_limits block ending here would give BLAS its threads back while
        # this user (a conversion) still runs; the shared limit stays
        assert _blas_threads() == {1}
    t.join(10)
    assert _blas_threads() == before
