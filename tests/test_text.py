"""blockyard.text: the shared writers of tables, counts, bytes and axis points.

The unit conventions are the SI decimal prefixes (BIPM SI Brochure, 9th ed. 2019, table 7) and the
IEC 80000-13:2008 binary prefixes (KiB = 1024 B); the rest is common practice, no source.
"""

from __future__ import annotations

import math

from blockyard.text import (
    aligned_table,
    axis_point_text,
    binary_bytes,
    count_text,
    decimal_bytes,
    is_finite_number,
    value_text,
)


def test_aligned_table_pads_to_the_widest_cell() -> None:
    text = aligned_table(["a", "bbb"], [["cccc", 1], ["d", 22]])
    assert text.splitlines() == ["a     bbb", "cccc  1", "d     22"]
    right = aligned_table(["a", "bbb"], [["cccc", 1]], right=True, indent="  ")
    assert right.splitlines() == ["     a  bbb", "  cccc    1"]


def test_bytes_decimal_and_binary_differ_by_their_base() -> None:
    assert decimal_bytes(1536) == "1.5 KB"
    assert [decimal_bytes(n) for n in (999, 1500, 2_500_000, 3.2e9)] == ["999 B", "1.5 KB", "2.5 MB", "3.2 GB"]
    assert binary_bytes(1536) == "1.5 KiB"
    assert decimal_bytes(10**9) == "1.0 GB"
    assert binary_bytes(2**30) == "1 GiB"
    assert binary_bytes(1000) == "1000 B"


def test_counts_values_and_finiteness() -> None:
    assert count_text(1_234_567) == "1.23M"
    assert count_text(999) == "999"
    assert value_text([1, True, "x"]) == "[1, true, x]"
    assert is_finite_number(2.5) and not is_finite_number(math.nan) and not is_finite_number(True)


def test_axis_points_share_one_unit() -> None:
    assert [axis_point_text(x, 1.4e6) for x in (0, 2e5, 1.4e6)] == ["0", "0.2M", "1.4M"]
    assert axis_point_text(500, 900) == "500"
