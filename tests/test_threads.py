"""The thread policy (classifier/threads.py): its logic, not its speed (see docs/threads.md)."""

from __future__ import annotations

import pytest
from callsieve.classifier.errors import InputError
from callsieve.classifier.threads import (
    THREADS_ENV,
    fit_threads,
    free_cores,
    limited_threads,
    thread_setting,
    worker_threads,
)
from threadpoolctl import threadpool_info


def _pools() -> list[dict]:
    # Load the OpenMP runtime scikit-learn's boosting uses, so that it is among the pools.
    import sklearn.ensemble  # noqa: F401

    return threadpool_info()


@pytest.mark.parametrize(
    "value,expected",
    [(None, None), ("", None), ("auto", None), (" AUTO ", None), ("1", 1), ("4", 4), (" 2 ", 2)],
)
def test_the_override_is_parsed(value, expected):
    env = {} if value is None else {THREADS_ENV: value}
    assert thread_setting(env) == expected


@pytest.mark.parametrize("value", ["0", "-1", "two", "1.5", "2 threads", "1e3"])
def test_a_bad_override_is_refused_naming_the_variable_and_the_fix(value):
    with pytest.raises(InputError) as err:
        thread_setting({THREADS_ENV: value})
    text = str(err.value)
    assert THREADS_ENV in text and repr(value) in text and "'auto'" in text and "\n" not in text


@pytest.mark.parametrize(
    "cores,load,expected",
    [
        (2, 0.0, 2),  # nothing else runs: every core
        (2, 0.3, 1),  # a partly busy core counts as busy
        (2, 1.0, 1),  # one busy process (or this one) on 2 cores
        (2, 5.0, 1),  # overloaded: never fewer than 1
        (16, 1.0, 15),
        (16, 8.2, 7),
        (4, float("nan"), 1),  # a load that is no number: assume every core busy
    ],
)
def test_free_cores_follow_the_load_average(cores, load, expected):
    assert free_cores(cpu_count=cores, load_1min=load) == expected


def test_fit_threads_take_the_override_before_the_load():
    assert fit_threads({THREADS_ENV: "3"}, cpu_count=2, load_1min=9.0) == 3
    assert fit_threads({}, cpu_count=8, load_1min=2.5) == 5


def test_workers_get_one_thread_each_unless_told():
    assert worker_threads(2, {}) == 1
    assert worker_threads(8, {}) == 1
    assert worker_threads(4, {THREADS_ENV: "2"}) == 2
    # One process: the fit's rule.
    assert worker_threads(1, {THREADS_ENV: "3"}) == 3


def test_limits_hold_inside_the_block_and_are_restored_after():
    before = {p["filepath"]: p["num_threads"] for p in _pools()}
    assert any(p["user_api"] == "openmp" for p in _pools())
    with limited_threads(1) as n:
        assert n == 1
        # Every BLAS and OpenMP pool of the process is capped (threadpoolctl's own report).
        assert all(p["num_threads"] == 1 for p in threadpool_info())
    assert {p["filepath"]: p["num_threads"] for p in threadpool_info()} == before


def test_limits_below_one_are_a_programming_error():
    with pytest.raises(ValueError), limited_threads(0):
        pass


def test_training_refuses_a_bad_override_before_describing(tmp_path, monkeypatch, capsys):
    # A bad CALLSIEVE_THREADS is exit 2 with one line, before any file is read.
    from callsieve.classifier.cli import main

    monkeypatch.setenv(THREADS_ENV, "many")
    code = main(
        ["train", "--deployment", str(tmp_path / "m.toml"), "--labels", "x.csv", "--out", str(tmp_path / "m.skops")]
    )
    err = capsys.readouterr().err.strip()
    assert code == 2 and err.startswith("callsieve: error: ") and THREADS_ENV in err and "\n" not in err


def test_the_fit_runs_under_the_policy(labelled, tmp_path, monkeypatch):
    # The training records how many threads its fit had: the override's number here.
    from callsieve.classifier.training import train

    manifest, labels, config = labelled
    monkeypatch.setenv(THREADS_ENV, "1")
    seen = []
    import callsieve.classifier.training as training

    real = training._estimator

    def spy(*args, **kwargs):
        seen.extend(p["num_threads"] for p in threadpool_info())
        return real(*args, **kwargs)

    monkeypatch.setattr(training, "_estimator", spy)
    report = train([manifest], [labels], tmp_path / "m.skops", config_path=config, track=False)
    assert report["threads"] == 1 and seen and set(seen) == {1}
