"""Sizes typed by people, and display formatting."""

import math

import pytest

from eaves.errors import InputError
from eaves.units import format_bytes, format_duration, format_figure, format_rate, parse_int_list, parse_size


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


@pytest.mark.parametrize("seconds, shown", [
    (1.5, "1.5 s"), (0.0123, "12.3 ms"), (4.2e-6, "4.2 µs"), (7e-9, "7 ns"), (1e-3, "1 ms"), (250.0, "250 s"),
])
def test_durations_take_the_largest_si_prefix_that_keeps_one_or_more(seconds, shown):
    # SI prefixes milli 1e-3, micro 1e-6, nano 1e-9 (BIPM, The International System of Units, 9th ed., Table 7)
    assert format_duration(seconds) == shown


@pytest.mark.parametrize("value", [None, math.nan, math.inf, -math.inf])
def test_a_missing_or_non_finite_figure_is_a_dash(value):
    assert format_duration(value) == format_rate(value, "B/s") == format_figure(value, "bytes_per_s") == "-"


def test_a_figure_is_shown_through_the_one_formatter_of_its_kind():
    # latency (ns per load) and time are durations, efficiency a percentage, the rest rates
    assert format_figure(112.0, "ns_per_load") == format_duration(112e-9) == "112 ns"
    assert format_figure(2400.0, "ns_per_load") == "2.4 µs"
    assert format_figure(0.0021, "seconds") == format_duration(0.0021) == "2.1 ms"
    assert format_figure(0.4567, "efficiency") == "45.7%"
    assert format_figure(3.2e10, "bytes_per_s") == format_rate(3.2e10, "B/s") == "32 GB/s"
    assert format_figure(1.9e11, "ops_per_s") == "190 GOP/s" and format_figure(3.1e9, "hz") == "3.1 GHz"
