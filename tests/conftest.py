"""pytest configuration: one BLAS thread in the test process and in what it starts (helpers: tests/helpers.py)."""

from __future__ import annotations

import os

from shardmill.parallel.launch import rank_environment
from threadpoolctl import threadpool_limits

# One BLAS thread per process in every test (ranks on 2 cores would otherwise fight). common practice
# The variables reach the processes tests start (a value set by the caller wins); importing shardmill has
# loaded numpy's BLAS already, so this process is limited in place.
for _name, _value in rank_environment(threads=1, launched=False, base={}).items():
    os.environ.setdefault(_name, _value)
_ONE_BLAS_THREAD = threadpool_limits(limits=1, user_api="blas")
