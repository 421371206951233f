"""bench/treelayout.py: the varint sizes it prices rows with, and its walk of a real tree.

The sizes are checked against published worked examples of the two encodings it uses
(values from memory of those documents): unsigned LEB128 as in the DWARF standard's
examples (section 7.6, "Variable Length Data") and Wikipedia's "LEB128" article, and
the zigzag mapping of Protocol Buffers' encoding guide. The walk is checked on trees a
tracker grows from plain data (two parallel streets, fixes between them so both stay
live): the rows it keeps are the ones the compiled ``kept_rows`` counts, and the three
layouts order as they must.
"""

from __future__ import annotations

import pytest

from livematch.core.build import Road, network_from_roads
from livematch.core.fix import Fix
from livematch.core.settings import MatchSettings
from livematch.core.tracker import Tracker
from tests.catalogue import bench_module


@pytest.mark.parametrize(("value", "size"), [
    (0, 1), (1, 1), (127, 1),  # DWARF 7.6 examples: 2 -> 0x02, 127 -> 0x7f
    (128, 2), (129, 2), (12857, 2),  # DWARF 7.6: 128 -> 0x80 0x01, 12857 -> 0xb9 0x64
    (150, 2),  # Protocol Buffers encoding guide: 150 -> 0x96 0x01
    (624485, 3),  # Wikipedia "LEB128": 624485 -> 0xE5 0x8E 0x26
    (2 ** 32 - 1, 5),  # 32 bits in groups of 7: five bytes (protobuf: uint32 at most 5)
])
def test_varint_sizes_match_published_examples(value: int, size: int) -> None:
    tl = bench_module("treelayout")
    assert tl.varint(value) == size


@pytest.mark.parametrize(("signed", "mapped"), [
    # Protocol Buffers encoding guide, "Signed Integers" table
    (0, 0), (-1, 1), (1, 2), (-2, 3), (2147483647, 4294967294), (-2147483648, 4294967295),
])
def test_zigzag_matches_protocol_buffers(signed: int, mapped: int) -> None:
    tl = bench_module("treelayout")
    assert tl.zigzag(signed) == mapped


def test_varint_refuses_negative() -> None:
    with pytest.raises(ValueError, match="negative"):
        bench_module("treelayout").varint(-1)


def test_price_walks_the_rows_kept_rows_counts() -> None:
    tl = bench_module("treelayout")
    from livematch.core import _tree_kernel as tk

    # two parallel two-way streets 12 m apart, 600 m long; the vehicle drives between them
    north = Road([(float(x), 12.0) for x in range(0, 601, 25)], way=1)
    south = Road([(float(x), 0.0) for x in range(0, 601, 25)], way=2)
    net = network_from_roads([north, south])
    tracker = Tracker(net, "v", MatchSettings())
    priced = 0
    for i in range(60):
        tracker.update(Fix("v", float(i), 0.0, 0.0, 10.0 + 8.0 * i, 6.0 + (i % 3) - 1.0))
        if i % 10 != 5:
            continue
        for level in tracker.levels:
            ti, tf = level.tree.ti, level.tree.tf
            rows, vias, fixes = tk.kept_rows(ti)
            p = tl.price(ti, tf)  # raises if its walk keeps other rows than kept_rows
            assert (p["rows"], p["vias"], p["fixes"]) == (rows, vias, fixes)
            if rows:
                priced += 1
                assert p["live"] >= 1
                assert p["packed_f32"] <= p["packed"] <= p["today"] <= p["held"]
    assert priced >= 12  # every level had a tree at most samples (both streets live)
