"""Timestamp parsing checked against Python's zoneinfo (the IANA time zone database)."""

from datetime import UTC, datetime, timedelta
from zoneinfo import ZoneInfo

import polars as pl

from ingest.timestamps import parse_timestamps

AMS = ZoneInfo("Europe/Amsterdam")


def _utc_naive(local: datetime, zone: ZoneInfo, fold: int = 0) -> datetime:
    return local.replace(tzinfo=zone, fold=fold).astimezone(UTC).replace(tzinfo=None)


def test_parse_timestamps_naive_local_time_matches_zoneinfo_summer_and_winter():
    raw = pl.Series(["03.09.2026 09:14:05", "15.01.2026 09:14:05"])
    values, reasons = parse_timestamps(raw, fmt="%d.%m.%Y %H:%M:%S", zone="Europe/Amsterdam")
    expected = [
        _utc_naive(datetime(2026, 9, 3, 9, 14, 5), AMS),
        _utc_naive(datetime(2026, 1, 15, 9, 14, 5), AMS),
    ]
    assert values.to_list() == expected  # IANA: CEST = UTC+2, CET = UTC+1
    assert reasons.to_list() == [None, None]


def test_parse_timestamps_offsets_in_data_are_honoured_over_the_zone():
    raw = pl.Series(["2026-09-03T10:02:11+02:00", "2026-09-03T08:02:11Z", "2026-09-03T03:02:11-0500"])
    values, _ = parse_timestamps(raw, fmt="iso", zone="Asia/Tokyo")
    assert values.to_list() == [datetime(2026, 9, 3, 8, 2, 11)] * 3


def test_parse_timestamps_dst_fall_back_hour_is_rejected_as_ambiguous():
    local = datetime(2026, 10, 25, 2, 30)
    # zoneinfo (IANA): the two folds of 02:30 on 2026-10-25 in Amsterdam differ by one hour -> ambiguous
    assert local.replace(tzinfo=AMS, fold=0).utcoffset() - local.replace(
        tzinfo=AMS, fold=1
    ).utcoffset() == timedelta(hours=1)
    values, reasons = parse_timestamps(pl.Series(["2026-10-25 02:30:00"]), fmt="iso", zone="Europe/Amsterdam")
    assert values.to_list() == [None]
    assert reasons.to_list() == [
        "ambiguous local time in Europe/Amsterdam (occurs twice at the DST change); export with a UTC offset"
    ]


def test_parse_timestamps_dst_spring_forward_gap_is_rejected_as_nonexistent():
    local = datetime(2026, 3, 29, 2, 30)
    # zoneinfo (IANA): 02:30 on 2026-03-29 does not survive a round trip through UTC -> it does not exist
    roundtrip = local.replace(tzinfo=AMS).astimezone(UTC).astimezone(AMS).replace(tzinfo=None)
    assert roundtrip != local
    values, reasons = parse_timestamps(pl.Series(["2026-03-29T02:30:00"]), fmt="iso", zone="Europe/Amsterdam")
    assert values.to_list() == [None]
    assert reasons.to_list() == [
        "nonexistent local time in Europe/Amsterdam (skipped at the DST change); export with a UTC offset"
    ]


def test_parse_timestamps_naive_without_zone_is_rejected():
    values, reasons = parse_timestamps(
        pl.Series(["2026-09-03T07:14:05", "2026-09-03T07:14:05Z"]), fmt="iso", zone=None
    )
    assert values.to_list() == [None, datetime(2026, 9, 3, 7, 14, 5)]
    assert reasons.to_list() == ["timestamp has no UTC offset and the profile sets no time zone", None]


def test_parse_timestamps_garbage_names_the_expected_format():
    _, reasons = parse_timestamps(pl.Series(["yesterday"]), fmt="%d.%m.%Y %H:%M:%S", zone="Europe/Amsterdam")
    assert reasons.to_list() == ["not a timestamp in the format %d.%m.%Y %H:%M:%S"]


def test_parse_timestamps_typed_aware_column_converts_to_utc():
    s = pl.Series([datetime(2026, 9, 3, 10, 0, tzinfo=AMS)]).dt.convert_time_zone("Europe/Amsterdam")
    values, _ = parse_timestamps(s, fmt="iso", zone=None)
    assert values.to_list() == [_utc_naive(datetime(2026, 9, 3, 10, 0), AMS)]
