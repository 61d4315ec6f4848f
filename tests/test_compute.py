"""Executors give the same results in the same order."""

import pytest

from regional.compute import InProcessExecutor, chunked, make_executor


def _square_all(chunk, context):
    return [context["offset"] + int(x) ** 2 for x in chunk]


def test_chunked_keeps_order_and_sizes():
    assert chunked(list("abcde"), 2) == [["a", "b"], ["c", "d"], ["e"]]
    with pytest.raises(ValueError, match="chunk size must be >= 1"):
        chunked(["a"], 0)


def test_in_process_map_reports_progress_in_basins():
    seen = []
    result = InProcessExecutor().map(
        _square_all, [["1", "2"], ["3"]], {"offset": 10}, progress=lambda d, t: seen.append((d, t))
    )
    assert result == [[11, 14], [19]]
    assert seen == [(2, 3), (3, 3)]


def test_default_executor_is_in_process():
    assert make_executor().name == "in-process"
