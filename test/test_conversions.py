"""Stamp conversions: builtin_interfaces/Time keeps 0 ≤ nanosec < 1e9 (its message definition)."""

from builtin_interfaces.msg import Time

from riskbound.ros.conversions import seconds_to_stamp, stamp_to_seconds


def test_rounding_up_to_a_whole_second_carries_into_sec():
    stamp = seconds_to_stamp(1.9999999999, Time)
    assert (stamp.sec, stamp.nanosec) == (2, 0)


def test_round_trip_to_the_nanosecond():
    for seconds in (0.0, 0.3, 12.000000001, 1796166898.708941641):
        stamp = seconds_to_stamp(seconds, Time)
        assert 0 <= stamp.nanosec < 1_000_000_000
        assert abs(stamp_to_seconds(stamp) - seconds) < 1e-6
