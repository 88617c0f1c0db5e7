"""Rows of a grid in parallel: one task per row, on a local process pool (forked, so that the
workers inherit what the parent compiled or loaded), or in this process for one worker. Used by
the envelope (:mod:`.envelope`) and the stability map (:mod:`hilrig.runtime.analysis.grid`)."""
from __future__ import annotations

import multiprocessing as mp
from concurrent.futures import ProcessPoolExecutor, as_completed
from typing import Any, Callable, Sequence


def run_rows(fn: Callable[[Any], Any], tasks: Sequence[Any], workers: int,
             progress: Callable[[int, int], None] | None = None,
             size: Callable[[Any], int] = lambda t: len(t.p)) -> list[Any]:
    """``fn(task)`` for every task, in task order. ``progress(done, total)`` counts
    ``size(task)`` per finished task (the operating points of a row)."""
    results: list[Any] = [None] * len(tasks)
    total = sum(size(t) for t in tasks)
    done = 0
    if workers <= 1:
        for i, t in enumerate(tasks):
            results[i] = fn(t)
            done += size(t)
            if progress:
                progress(done, total)
        return results
    methods = mp.get_all_start_methods()
    ctx = mp.get_context("fork" if "fork" in methods else "spawn")
    with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
        futures = {pool.submit(fn, t): i for i, t in enumerate(tasks)}
        for fut in as_completed(futures):
            i = futures[fut]
            results[i] = fut.result()
            done += size(tasks[i])
            if progress:
                progress(done, total)
    return results
