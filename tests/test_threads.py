"""The parent's column threads: order, laziness, errors, and figures that do not depend on
the number of threads."""

import os
import threading
import time
from pathlib import Path

import numpy as np
import pytest

from tolerance import stats
from tolerance.threads import parent_threads, thread_map


@pytest.mark.parametrize("threads", [1, 2, 5])
def test_results_keep_the_order_of_the_items(threads):
    # later items finish first: the results must still come back in item order
    def slow_for_small(i):
        time.sleep(0.002 * (10 - i))
        return i * i

    assert thread_map(slow_for_small, range(10), threads) == [i * i for i in range(10)]
    assert thread_map(slow_for_small, [], threads) == []


def test_calls_run_at_once_up_to_the_thread_count():
    # three calls must meet at the barrier (it breaks after 10 s if fewer run at once), and
    # the counter sees no more than three at a time; no timing is assumed
    running, most = 0, 0
    lock = threading.Lock()
    meet = threading.Barrier(3, timeout=10.0)

    def call(_):
        nonlocal running, most
        with lock:
            running += 1
            most = max(most, running)
        meet.wait()
        with lock:
            running -= 1

    thread_map(call, range(12), 3)
    assert most == 3

    def alone(_):
        nonlocal running, most
        with lock:
            running += 1
            most = max(most, running)
        time.sleep(0.002)
        with lock:
            running -= 1

    most = 0
    thread_map(alone, range(12), 1)
    assert most == 1


@pytest.mark.parametrize("threads", [2, 3])
def test_items_are_read_lazily_at_most_one_ahead_of_the_calls(threads):
    # a generator that would read one column from disk per item: no more than threads + 1
    # items may be alive at once, or a long run's columns would all sit in memory together
    alive, most = 0, 0
    lock = threading.Lock()

    class Item:
        def __init__(self):
            nonlocal alive, most
            with lock:
                alive += 1
                most = max(most, alive)

        def __del__(self):
            nonlocal alive
            with lock:
                alive -= 1

    def produce():
        for _ in range(20):
            yield Item()

    def use(item):
        time.sleep(0.005)
        return 1

    assert sum(thread_map(use, produce(), threads)) == 20
    assert most <= threads + 1
    assert alive == 0


def test_the_first_error_is_raised_and_later_items_are_not_read():
    read = []

    def produce():
        for i in range(50):
            read.append(i)
            yield i

    def fail_at_three(i):
        if i == 3:
            raise ValueError("column 3 is broken")
        return i

    with pytest.raises(ValueError, match="column 3"):
        thread_map(fail_at_three, produce(), 2)
    assert len(read) < 10


def test_parent_threads_follow_the_jobs_within_the_cores():
    cores = os.cpu_count() or 1
    assert parent_threads(1) == 1
    assert parent_threads(0) == 1
    assert parent_threads(2) == min(2, cores)
    assert parent_threads(10_000) == cores


def test_percentiles_in_threads_equal_one_thread():
    rng = np.random.default_rng(3)
    columns = [rng.normal(size=20_000) for _ in range(6)]
    columns[2][::7] = np.nan
    columns[4][:] = np.inf
    one = [stats.percentile_summary(c) for c in columns]
    two = thread_map(stats.percentile_summary, iter(columns), 2)
    assert repr(one) == repr(two)  # NaN included, to the last digit


def test_summary_and_insights_do_not_depend_on_the_threads(tmp_path):
    from tolerance.analysis import insights
    from tolerance.api import SAMPLES_DIR, load_study, make_spec, run
    from tolerance.runner import ChunkColumns
    from tolerance.summary import comparable, summarize

    root = Path(__file__).resolve().parents[1]
    study = load_study(root / "studies" / "beacon_lamp_darlington.toml")
    run(study, samples=3_000, out=tmp_path / "r", insights=False)
    spec = make_spec(study, 3_000, None, None, None)
    meta = dict(study_path=study.path, title=study.title, stage_name=study.stage_name,
                allowed_rate=study.settings.max_failure_rate)
    got = {}
    for threads in (1, 2):
        with ChunkColumns(tmp_path / "r" / SAMPLES_DIR) as column:
            extra = insights(study, column, threads)
            got[threads] = comparable(summarize(spec, column, **meta, extra=extra,
                                                threads=threads))
    assert got[1]["failure_drivers"], "the study should have failures to explain"
    assert repr(got[1]) == repr(got[2])
