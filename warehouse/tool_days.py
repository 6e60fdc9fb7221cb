"""Data freshness per tool and day (``tool_days``), kept up to date inside each file's ingest transaction.

Why: "when did each tool last report" was a group-by over every current fact row (0.6-0.9 s at 30M
measurements). ``tool_days`` holds, per tool, tool kind and UTC day, the current rows and the newest time
seen, so the freshness read touches a few hundred rows plus the facts of one day.

Refresh rule (:func:`refresh_for_file`): the tool-days a loaded file wrote or superseded are recomputed from
the rows current after the file, so a corrected re-export that moves or removes rows leaves exact counts.
Which time stamps a row:

    * measurements: ``measured_at`` (day and last seen);
    * inspections: ``inspected_at`` (day and last seen);
    * process history: ``started_at`` (day, and the rows counted) and ``coalesce(ended_at, started_at)``
      (last seen), as the freshness read always did.

Coverage: ``meta.tool_days_file_id`` is the newest loaded file the table reflects (absent: none). A refresh whose
previous file is not that one (rows written by another path) rebuilds the whole table instead; a read
that finds the table behind the newest loaded file computes from the facts (see :func:`is_current`).
"""

from __future__ import annotations

from datetime import datetime, timedelta

META_KEY = "tool_days_file_id"
"""meta key: the newest loaded source file whose rows tool_days reflects."""

# (kind, table, tool column, day column, last-seen expression)
SOURCES = (
    ("metrology", "measurements", "metrology_tool", "measured_at", "max(f.measured_at)"),
    ("inspection", "inspections", "inspection_tool", "inspected_at", "max(f.inspected_at)"),
    ("process", "process_history", "process_tool", "started_at", "max(coalesce(f.ended_at, f.started_at))"),
)


def _newest_loaded(con, *, below: int | None = None) -> int:
    row = con.execute(
        "SELECT coalesce(max(file_id), 0) FROM source_files WHERE status = 'loaded' AND (?::BIGINT IS NULL OR file_id < ?)",
        [below, below],
    ).fetchall()
    return int(row[0][0])


def _covered(con) -> int:
    rows = con.execute("SELECT value FROM meta WHERE key = ?", [META_KEY]).fetchall()
    return (
        int(rows[0][0]) if rows else 0
    )  # absent: no file yet (migration 4 fills the table of a used warehouse)


def _set_covered(con, file_id: int) -> None:
    con.execute("DELETE FROM meta WHERE key = ?", [META_KEY])
    if file_id:
        con.execute("INSERT INTO meta VALUES (?, ?)", [META_KEY, str(file_id)])


def is_current(con) -> bool:
    """Whether tool_days reflects every loaded file (else freshness is computed from the facts)."""
    return _covered(con) == _newest_loaded(con)


def rebuild(con) -> None:
    """Recompute the whole table from the current facts (migration, or after writes by another path)."""
    con.execute("DELETE FROM tool_days")
    for kind, table, tool, day, last in SOURCES:
        con.execute(
            f"""INSERT INTO tool_days
SELECT f.{tool}, ?, date_trunc('day', f.{day})::TIMESTAMP AS day, count(*), {last}
FROM {table} f WHERE f._superseded_by IS NULL GROUP BY f.{tool}, day""",
            [kind],
        )
    _set_covered(con, _newest_loaded(con))


def refresh_for_file(con, *, file_id: int, superseded_files: list[int]) -> None:
    """Recompute the tool-days file ``file_id`` wrote or superseded (call inside the file's transaction).

    ``superseded_files``: the older files whose rows it superseded (bounds the scan by their zone maps).
    """
    if _covered(con) != _newest_loaded(con, below=file_id):
        rebuild(con)
        return
    if not superseded_files:
        _add_file(con, file_id)
        return
    lo, hi = (min(superseded_files), max(superseded_files)) if superseded_files else (None, None)
    for kind, table, tool, day, last in SOURCES:
        old = (
            ""
            if lo is None
            else f" UNION SELECT DISTINCT f.{tool} AS tool, date_trunc('day', f.{day})::TIMESTAMP AS day FROM {table} f"
            " WHERE f._superseded_by = $fid AND f._source_file_id BETWEEN $lo AND $hi"
        )
        params = {"fid": file_id} if lo is None else {"fid": file_id, "lo": lo, "hi": hi}
        con.execute(
            "CREATE OR REPLACE TEMP TABLE __lotline_tool_days AS "
            f"SELECT DISTINCT f.{tool} AS tool, date_trunc('day', f.{day})::TIMESTAMP AS day FROM {table} f "
            f"WHERE f._source_file_id = $fid{old}",
            params,
        )
        try:
            span = con.execute("SELECT min(day), max(day) FROM __lotline_tool_days").fetchall()[0]
            if span[0] is None:
                continue
            con.execute(
                "DELETE FROM tool_days t WHERE t.tool_kind = ? AND EXISTS "
                "(SELECT 1 FROM __lotline_tool_days k WHERE k.tool = t.tool AND k.day = t.day)",
                [kind],
            )
            # the day bounds let DuckDB skip row groups of other days by their zone maps
            con.execute(
                f"""INSERT INTO tool_days
SELECT f.{tool}, ?, date_trunc('day', f.{day})::TIMESTAMP AS day, count(*), {last}
FROM {table} f
WHERE f._superseded_by IS NULL AND f.{day} >= ? AND f.{day} < ?
  AND EXISTS (SELECT 1 FROM __lotline_tool_days k WHERE k.tool = f.{tool}
              AND k.day = date_trunc('day', f.{day})::TIMESTAMP)
GROUP BY f.{tool}, day""",
                [kind, span[0], span[1] + timedelta(days=1)],
            )
        finally:
            con.execute("DROP TABLE IF EXISTS __lotline_tool_days")
    _set_covered(con, file_id)


def _add_file(con, file_id: int) -> None:
    """A file that superseded nothing only adds rows: add its counts to the tool-days it touched.

    One pass over the file's own rows (their zone maps bound the scan), instead of recounting whole days.
    """
    for kind, table, tool, day, last in SOURCES:
        con.execute(
            "CREATE OR REPLACE TEMP TABLE __lotline_tool_days AS "
            f"SELECT f.{tool} AS tool, date_trunc('day', f.{day})::TIMESTAMP AS day, count(*) AS n, "
            f"{last} AS last_seen FROM {table} f WHERE f._source_file_id = ? AND f._superseded_by IS NULL "
            "GROUP BY ALL",
            [file_id],
        )
        try:
            if not con.execute("SELECT count(*) FROM __lotline_tool_days").fetchall()[0][0]:
                continue
            con.execute(
                "CREATE OR REPLACE TEMP TABLE __lotline_tool_days_new AS "
                "SELECT k.tool, ? AS tool_kind, k.day, k.n + coalesce(t.n_rows, 0) AS n_rows, "
                "CASE WHEN t.last_seen IS NULL OR k.last_seen > t.last_seen THEN k.last_seen "
                "ELSE t.last_seen END AS last_seen "
                "FROM __lotline_tool_days k LEFT JOIN tool_days t "
                "ON t.tool_kind = ? AND t.tool = k.tool AND t.day = k.day",
                [kind, kind],
            )
            con.execute(
                "DELETE FROM tool_days t WHERE t.tool_kind = ? AND EXISTS "
                "(SELECT 1 FROM __lotline_tool_days k WHERE k.tool = t.tool AND k.day = t.day)",
                [kind],
            )
            con.execute("INSERT INTO tool_days BY NAME SELECT * FROM __lotline_tool_days_new")
        finally:
            con.execute("DROP TABLE IF EXISTS __lotline_tool_days")
            con.execute("DROP TABLE IF EXISTS __lotline_tool_days_new")
    _set_covered(con, file_id)


def freshness_sql() -> str:
    """SQL of the freshness read over tool_days (parameters: boundary day, its end, day_ago x3, at x2, hours).

    Rows in the last 24 h = the rows of the whole days after the boundary day (from tool_days) plus the rows
    of the boundary day at or after ``day_ago`` (from the facts, bounded to that one day).
    """
    edge = " UNION ALL ".join(
        f"SELECT f.{tool} AS tool, '{kind}' AS tool_kind, count(*) AS n FROM {table} f "
        f"WHERE f._superseded_by IS NULL AND f.{day} >= $day_ago AND f.{day} < $day_end GROUP BY 1"
        for kind, table, tool, day, _ in SOURCES
    )
    return f"""
WITH d AS (
    SELECT tool, tool_kind, max(last_seen) AS last_seen, sum(n_rows) FILTER (WHERE day > $day0) AS later
    FROM tool_days GROUP BY tool, tool_kind
), e AS ({edge})
SELECT d.tool, d.tool_kind, d.last_seen, (coalesce(d.later, 0) + coalesce(e.n, 0))::BIGINT AS rows_last_day,
       date_diff('second', d.last_seen, $at::TIMESTAMP) / 3600.0 AS hours_since,
       date_diff('second', d.last_seen, $at::TIMESTAMP) / 3600.0 > $hours AS stale
FROM d LEFT JOIN e ON e.tool = d.tool AND e.tool_kind = d.tool_kind
ORDER BY d.tool_kind, d.tool
"""


def freshness_params(*, at: datetime, day_ago: datetime, stale_after_h: float) -> dict:
    """Bound parameters of :func:`freshness_sql`."""
    day0 = day_ago.replace(hour=0, minute=0, second=0, microsecond=0)
    return {
        "day0": day0,
        "day_end": day0 + timedelta(days=1),
        "day_ago": day_ago,
        "at": at,
        "hours": stale_after_h,
    }
