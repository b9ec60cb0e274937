"""Sizes typed by people, and display formatting."""

import pytest

from eaves.errors import InputError
from eaves.units import format_bytes, format_rate, parse_int_list, parse_size


@pytest.mark.parametrize("text,expected", [
    ("4096", 4096), ("64KiB", 65536), ("64k", 65536), ("1.5GiB", 3 * 2**29), ("2GB", 2 * 10**9),
    ("512 MiB", 512 * 2**20), ("1m", 2**20),
])
def test_parse_size(text, expected):
    assert parse_size(text) == expected


@pytest.mark.parametrize("text", ["", "abc", "12 parsecs", "-4KiB", "0", "4 KiBs"])
def test_parse_size_refuses(text):
    with pytest.raises(InputError):
        parse_size(text, "--max-memory")


def test_int_list():
    assert parse_int_list("1,2, 4", "--threads") == [1, 2, 4]
    with pytest.raises(InputError, match="--threads"):
        parse_int_list("1,two", "--threads")


def test_formatting_uses_binary_sizes_and_decimal_rates():
    # common practice: memory sizes in powers of 1024, transfer rates in powers of 1000
    assert format_bytes(48 * 1024) == "48 KiB"
    assert format_rate(3.2e10, "B/s") == "32 GB/s"
    assert format_rate(None, "B/s") == "-"
