"""The replicate engine: order, thread limits, errors (no computation to check against)."""

from __future__ import annotations

import os

import pytest

from casemix.errors import CasemixError, InputError
from casemix.parallel import SCHEDULER_ENV, replicate_map


def _blas_threads(_item):
    return os.environ.get("OPENBLAS_NUM_THREADS"), os.getpid()


def test_results_come_back_in_order():
    items = list(range(-20, 20))
    assert list(replicate_map(abs, items, workers=2)) == [abs(i) for i in items]


def test_each_worker_process_gets_one_blas_thread(monkeypatch):
    monkeypatch.delenv(SCHEDULER_ENV, raising=False)
    results = list(replicate_map(_blas_threads, range(4), workers=2))
    assert {threads for threads, _ in results} == {"1"}
    assert os.getpid() not in {pid for _, pid in results}  # the work left this process


def test_errors(monkeypatch):
    with pytest.raises(InputError, match="workers must be at least 1, got 0"):
        list(replicate_map(abs, [1], workers=0))
    monkeypatch.setattr("casemix._optional.available", lambda module: False)
    monkeypatch.setenv(SCHEDULER_ENV, "tcp://127.0.0.1:1")
    with pytest.raises(CasemixError, match="needs the 'distributed' package"):
        list(replicate_map(abs, [1]))
