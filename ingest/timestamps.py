"""Timestamp parsing into canonical UTC (naive ``Datetime('us')`` holding UTC), vectorised over a column.

Rules (issue 2, item 4): an offset or ``Z`` in the data is honoured; a naive local time is localised with the
profile's IANA zone (``zoneinfo`` rules, as Polars uses the same tz database); a naive time that falls in a
DST fall-back overlap (ambiguous) or a spring-forward gap (nonexistent) is rejected with a reason, never
guessed; a naive time with no zone in the profile is rejected.
"""

from __future__ import annotations

import polars as pl

ISO = "iso"
_OFFSET_RE = r"(?:[Zz]|[+-]\d\d(?::?\d\d)?)$"


def parse_timestamps(raw: pl.Series, *, fmt: str, zone: str | None) -> tuple[pl.Series, pl.Series]:
    """Return (UTC values, reason or null) for a column of raw timestamps.

    ``fmt`` is ``"iso"`` (ISO 8601, ``T`` or space, optional fraction, optional offset) or a strftime
    pattern (``%z`` in it means the offset is in the data). ``zone`` localises naive values.

    >>> v, r = parse_timestamps(pl.Series(["2026-09-03T07:14:05+02:00"]), fmt="iso", zone=None)
    >>> str(v[0])
    '2026-09-03 05:14:05'
    """
    n = len(raw)
    if raw.dtype == pl.Datetime or isinstance(raw.dtype, pl.Datetime):
        return _from_datetime(raw, zone)
    if raw.dtype == pl.Date:
        return _from_datetime(raw.cast(pl.Datetime("us")), zone)
    s = raw.cast(pl.String).str.strip_chars()
    utc_dtype = pl.Datetime("us")
    if fmt == ISO:
        # fast path: every value ends in "Z" (the common UTC export)
        ends_z = s.str.ends_with("Z")
        if ends_z.fill_null(True).all():
            v = s.str.to_datetime("%Y-%m-%dT%H:%M:%S%.fZ", strict=False, time_unit="us")
            if v.null_count() > s.null_count():
                v2 = (
                    _norm_iso(s)
                    .str.to_datetime("%Y-%m-%dT%H:%M:%S%.f%#z", strict=False, time_unit="us", time_zone="UTC")
                    .dt.replace_time_zone(None)
                )
                v = v.fill_null(v2)
            reason = pl.select(
                pl.when(s.is_not_null() & v.is_null())
                .then(pl.lit("not an ISO 8601 timestamp"))
                .otherwise(None)
            ).to_series()
            return v.cast(utc_dtype), reason
        s = _norm_iso(s)
        has_off = s.str.contains(_OFFSET_RE).fill_null(False)
        aware_fmt, naive_fmt = "%Y-%m-%dT%H:%M:%S%.f%#z", "%Y-%m-%dT%H:%M:%S%.f"
        bad_text = "not an ISO 8601 timestamp"
    else:
        has_off = pl.Series([("%z" in fmt or "%#z" in fmt or "%:z" in fmt)] * n, dtype=pl.Boolean)
        aware_fmt = naive_fmt = fmt
        bad_text = f"not a timestamp in the format {fmt}"
    values = pl.Series([None] * n, dtype=utc_dtype)
    reason = pl.Series([None] * n, dtype=pl.String)
    if has_off.any():
        aware = s.str.to_datetime(
            aware_fmt, strict=False, time_unit="us", time_zone="UTC"
        ).dt.replace_time_zone(None)
        values = pl.select(pl.when(has_off).then(aware).otherwise(values)).to_series()
        reason = pl.select(
            pl.when(has_off & s.is_not_null() & aware.is_null()).then(pl.lit(bad_text)).otherwise(reason)
        ).to_series()
    naive_mask = ~has_off & s.is_not_null()
    if naive_mask.any():
        naive = s.str.to_datetime(naive_fmt, strict=False, time_unit="us")
        if zone is None:
            reason = pl.select(
                pl.when(naive_mask & naive.is_null())
                .then(pl.lit(bad_text))
                .when(naive_mask)
                .then(pl.lit("timestamp has no UTC offset and the profile sets no time zone"))
                .otherwise(reason)
            ).to_series()
        else:
            local, why = _localise(naive, zone)
            values = pl.select(pl.when(naive_mask).then(local).otherwise(values)).to_series()
            reason = pl.select(
                pl.when(naive_mask & naive.is_null())
                .then(pl.lit(bad_text))
                .when(naive_mask)
                .then(why)
                .otherwise(reason)
            ).to_series()
    return values.cast(utc_dtype), reason


def _norm_iso(s: pl.Series) -> pl.Series:
    s = s.str.replace(" ", "T", literal=True)
    return pl.select(pl.when(s.str.len_chars() == 10).then(s + "T00:00:00").otherwise(s)).to_series()


def _localise(naive: pl.Series, zone: str) -> tuple[pl.Series, pl.Series]:
    """Naive local times in ``zone`` -> (naive UTC, reason for the ones that cannot be localised)."""
    if zone in ("UTC", "Etc/UTC"):
        return naive, pl.Series([None] * len(naive), dtype=pl.String)
    exact = naive.dt.replace_time_zone(zone, ambiguous="null", non_existent="null")
    failed = naive.is_not_null() & exact.is_null()
    if failed.any():
        earliest = naive.dt.replace_time_zone(zone, ambiguous="earliest", non_existent="null")
        why = pl.select(
            pl.when(failed & earliest.is_not_null())
            .then(
                pl.lit(
                    f"ambiguous local time in {zone} (occurs twice at the DST change); export with a UTC offset"
                )
            )
            .when(failed)
            .then(
                pl.lit(
                    f"nonexistent local time in {zone} (skipped at the DST change); export with a UTC offset"
                )
            )
            .otherwise(None)
        ).to_series()
    else:
        why = pl.Series([None] * len(naive), dtype=pl.String)
    return exact.dt.convert_time_zone("UTC").dt.replace_time_zone(None), why


def _from_datetime(raw: pl.Series, zone: str | None) -> tuple[pl.Series, pl.Series]:
    dt = raw.dtype
    tz = getattr(dt, "time_zone", None)
    if tz is not None:
        v = raw.dt.convert_time_zone("UTC").dt.replace_time_zone(None)
        return v.cast(pl.Datetime("us")), pl.Series([None] * len(raw), dtype=pl.String)
    if zone is None:
        reason = pl.select(
            pl.when(raw.is_not_null()).then(
                pl.lit("timestamp has no UTC offset and the profile sets no time zone")
            )
        ).to_series()
        return pl.Series([None] * len(raw), dtype=pl.Datetime("us")), reason
    v, why = _localise(raw.cast(pl.Datetime("us")), zone)
    return v.cast(pl.Datetime("us")), why
