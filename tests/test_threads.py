"""The process-wide BLAS limit (webapp.threads.one_blas_thread), read back through threadpoolctl
(the general-purpose library that sets it), in a fresh interpreter each time: the BLAS library
keeps its thread setting for the whole process, and what earlier tests set would blur it."""

import json
import subprocess
import sys

# Two users overlap: a thread enters first, the main thread second; the thread leaves first,
# then the main thread reads the BLAS thread count while it is still inside.
_SCRIPT = r"""
import json, sys, threading
from threadpoolctl import threadpool_info, threadpool_limits
import webapp.pipeline  # loads numpy's and scipy's BLAS as a conversion does
from webapp.threads import one_blas_thread

def blas():
    return sorted({lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"})

def guard():
    if sys.argv[1] == "shared":
        return one_blas_thread()
    return threadpool_limits(limits=1, user_api="blas")

seen = {"before": blas()}
inside, leave_first, first_left = threading.Event(), threading.Event(), threading.Event()

def first_user():
    with guard():
        inside.set()
        leave_first.wait(10)
    first_left.set()

t = threading.Thread(target=first_user)
t.start()
inside.wait(10)
with guard():
    seen["both inside"] = blas()
    leave_first.set()
    first_left.wait(10)
    seen["first left"] = blas()
t.join(10)
seen["after"] = blas()
print(json.dumps(seen))
"""


def _run(kind):
    out = subprocess.run([sys.executable, "-c", _SCRIPT, kind], capture_output=True, text=True,
                         timeout=120, check=True)
    return json.loads(out.stdout)


def test_the_limit_holds_until_the_last_user_leaves():
    seen = _run("shared")
    assert seen["both inside"] == [1]
    assert seen["first left"] == [1]        # the main thread's conversion still runs on one
    assert seen["after"] == seen["before"]


def test_a_plain_limit_per_user_gives_the_threads_back_too_early():
    # why the shared one exists: the first user out restores what it found, under the other
    seen = _run("plain")
    if seen["before"] == [1]:
        return                              # a one-core machine: nothing to give back
    assert seen["both inside"] == [1]
    assert seen["first left"] == seen["before"]


# The page's server: the main thread measures the demo at start (and lives on); every later user
# is a request's thread. Each alone must get one BLAS thread, and the last one out of two
# overlapping users (not the one that came first, which is still alive) must give them back.
_LATER_THREADS = r"""
import json, threading
from threadpoolctl import threadpool_info
import webapp.pipeline  # loads numpy's and scipy's BLAS as a conversion does
from webapp.threads import one_blas_thread

def blas():
    return sorted({lib["num_threads"] for lib in threadpool_info() if lib["user_api"] == "blas"})

seen = {"before": blas()}
with one_blas_thread():                # the main thread first, as at the server's start
    pass
seen["main left"] = blas()

def alone():
    with one_blas_thread():
        seen["a request alone"] = blas()

t = threading.Thread(target=alone)
t.start()
t.join(10)
seen["request left"] = blas()

inside, main_left = threading.Event(), threading.Event()

def second():
    with one_blas_thread():
        inside.set()
        main_left.wait(10)
        seen["main left, request inside"] = blas()

with one_blas_thread():
    t = threading.Thread(target=second)
    t.start()
    inside.wait(10)
main_left.set()
t.join(10)
seen["after"] = blas()
print(json.dumps(seen))
"""


def test_a_request_thread_gets_the_limit_after_the_main_thread_has_used_it():
    out = subprocess.run([sys.executable, "-c", _LATER_THREADS], capture_output=True, text=True,
                         timeout=120, check=True)
    seen = json.loads(out.stdout)
    assert seen["main left"] == seen["before"]
    assert seen["a request alone"] == [1]
    assert seen["request left"] == seen["before"]
    assert seen["main left, request inside"] == [1]
    assert seen["after"] == seen["before"]        # the last one out gave the threads back
