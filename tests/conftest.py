"""Session set-up shared by the tests.

The dense stage solves many small (p × p, p ≤ a few hundred) problems. A multi-threaded
BLAS gains nothing there, and on a busy two-core machine its spinning threads fight the
numba kernels' threads and other processes: the same test file was measured at 6 s with one
BLAS thread and over 100 s with the default two on a loaded machine. The tests therefore
run BLAS single-threaded; results do not depend on it beyond rounding.
"""

from __future__ import annotations

import pytest

try:
    from threadpoolctl import threadpool_limits
except ImportError:  # threadpoolctl comes with scikit-learn (test extra); skip if absent
    threadpool_limits = None


@pytest.fixture(autouse=True, scope="session")
def _single_threaded_blas():
    if threadpool_limits is None:
        yield
        return
    with threadpool_limits(limits=1, user_api="blas"):
        yield


@pytest.fixture
def interrupt_fit():
    """``interrupt_fit(fit, after_pass)`` calls ``fit(progress)`` with a progress callback
    that raises KeyboardInterrupt (as Ctrl-C would) when data pass ``after_pass`` of the full
    data ends, before its sums are recorded, and checks that the fit was interrupted."""
    def run(fit, after_pass: int) -> None:
        ended = [0]

        def progress(event):
            if event.kind == "end" and event.task.startswith("pass"):
                ended[0] += 1
                if ended[0] == after_pass:
                    raise KeyboardInterrupt
        with pytest.raises(KeyboardInterrupt):
            fit(progress)
    return run
