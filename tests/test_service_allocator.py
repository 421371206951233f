"""The daemon shell's allocator hook (livematch.service.allocator)."""

from __future__ import annotations

import gc
import sys
from pathlib import Path

import pytest

from livematch.service.allocator import TRIM_EVERY_S, Trimmer


def _rss_kb() -> int:
    for line in Path("/proc/self/status").read_text().splitlines():
        if line.startswith("VmRSS:"):
            return int(line.split()[1])
    raise RuntimeError("no VmRSS")


def test_maybe_trims_at_most_once_per_period() -> None:
    calls: list[int] = []

    def fake(pad: int) -> int:
        calls.append(pad)
        return 1

    t = Trimmer(10.0, trim=fake)
    made = [t.maybe(now) for now in (100.0, 105.0, 109.99, 110.0, 110.5, 125.0)]
    assert made == [True, False, False, True, False, True]
    assert calls == [0, 0, 0]  # pad 0: keep nothing spare at the top of the heap
    assert t.trims == 3
    assert t.available


def test_without_a_trim_function_nothing_happens() -> None:
    t = Trimmer(trim=None)
    t._trim = None  # as on a C library without malloc_trim
    assert not t.available
    assert not t.trim()
    assert not t.maybe(1e9)
    assert t.trims == 0


def test_default_period_is_positive() -> None:
    assert TRIM_EVERY_S > 0
    assert Trimmer().every_s == TRIM_EVERY_S


@pytest.mark.skipif(not sys.platform.startswith("linux") or not Trimmer().available,
                    reason="glibc malloc_trim and /proc only")
def test_trim_gives_freed_holes_back_to_the_system() -> None:
    # Checked against the kernel's own accounting (VmRSS in /proc/self/status, Linux
    # proc(5)), not against anything this project computes: 1 KB blocks (above
    # pymalloc's 512-byte limit, so glibc's malloc serves them), every 16th kept alive,
    # the rest freed. The freed blocks are holes between live ones, which glibc keeps
    # until malloc_trim hands their pages back (glibc manual, "Memory Allocation
    # Tunables" and malloc_trim(3)).
    gc.collect()
    blocks = [bytes(1000) + bytes([i & 255]) for i in range(120_000)]  # about 120 MB
    kept = blocks[::16]
    del blocks
    gc.collect()
    before = _rss_kb()
    assert Trimmer().trim() in (True, False)
    after = _rss_kb()
    assert before - after > 50_000, (before, after)  # most of the ~112 MB freed
    assert len(kept) == 7_500


def test_daemon_trims_once_a_period_and_logs_a_slow_trim(
        tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    """The checkpoint loop's hook: one trim per period, off the event loop, a warning
    when a trim is slow."""
    import asyncio
    import logging
    import time

    from services import town, write_config

    from livematch.config import load_config
    from livematch.pipeline import Pipeline
    from livematch.service.daemon import _GC_LOG_S, Daemon

    config = load_config(write_config(tmp_path, "trim", broker="mqtt://127.0.0.1:1"), env={})
    daemon = Daemon(config, Pipeline(town(), config.matcher, limits=config.feed))
    calls: list[int] = []

    def slow(pad: int) -> int:
        calls.append(pad)
        time.sleep(_GC_LOG_S + 0.05)
        return 1

    daemon._trimmer = Trimmer(3600.0, trim=slow)

    async def run() -> int:
        ticks = 0

        async def beat() -> None:  # what the loop serves while a trim runs
            nonlocal ticks
            while True:
                await asyncio.sleep(0.01)
                ticks += 1

        beating = asyncio.create_task(beat())
        await daemon._trim_memory()
        await daemon._trim_memory()  # within the period: no second trim
        beating.cancel()
        return ticks

    with caplog.at_level(logging.WARNING, logger="livematch"):
        ticks = asyncio.run(run())
    assert calls == [0]
    assert ticks >= 5, ticks  # the loop ran on during the 0.3 s trim
    assert [r.getMessage() for r in caplog.records].count("malloc_trim was slow") == 1


def test_due_says_what_maybe_would_do() -> None:
    """``due`` answers as ``maybe`` then acts, at every step of a clock (the fake trim
    counts the calls), and never calls the trim itself."""
    calls: list[int] = []
    t = Trimmer(10.0, trim=lambda pad: calls.append(pad) or 1)
    for now in (0.0, 3.0, 9.99, 10.0, 10.5, 19.0, 20.0, 45.0, 45.1):
        before = len(calls)
        said = t.due(now)
        assert len(calls) == before  # asking trims nothing
        assert t.maybe(now) == said
    assert len(calls) == 4  # 0, 10, 20, 45
    none = Trimmer()
    none._trim = None  # as on a C library without malloc_trim: never due
    assert not none.due(1e9)


def test_daemon_hands_only_due_trims_to_a_thread(tmp_path: Path,
                                                 monkeypatch: pytest.MonkeyPatch) -> None:
    """The checkpoint loop's trim step goes through the thread pool only when a trim is
    due: ten rounds within one period make one thread call (the trim), not ten."""
    import asyncio

    from services import town, write_config

    from livematch.config import load_config
    from livematch.pipeline import Pipeline
    from livematch.service import daemon as daemon_module

    config = load_config(write_config(tmp_path, "trim2", broker="mqtt://127.0.0.1:1"),
                         env={})
    daemon = daemon_module.Daemon(config, Pipeline(town(), config.matcher, limits=config.feed))
    calls: list[int] = []
    daemon._trimmer = Trimmer(3600.0, trim=lambda pad: calls.append(pad) or 1)
    handed: list[object] = []
    real = asyncio.to_thread

    async def counting(func: object, /, *args: object) -> object:
        handed.append(func)
        return await real(func, *args)  # type: ignore[arg-type]

    monkeypatch.setattr(daemon_module.asyncio, "to_thread", counting)

    async def rounds() -> None:
        for _ in range(10):
            await daemon._trim_memory()

    asyncio.run(rounds())
    assert calls == [0]
    assert len(handed) == 1
