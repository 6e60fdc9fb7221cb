"""Excursions: signals of one series grouped over consecutive or overlapping points, with an audit trail.

States go open -> acknowledged -> closed (closed may be reopened to open by a later disposition). Every
change, whether by an engineer (`record_disposition`) or by evaluation (opening, closing an excursion whose
signals were all withdrawn), appends a row to ``excursion_audit``; the ``excursions`` row carries the state
of its newest audit row plus aggregates of its standing signals.

Signals advise; the fab's out-of-control action plan (OCAP) and a qualified engineer decide holds,
releases and tool downs. Record here who decided what, when and why.
"""

from __future__ import annotations

import json
from datetime import UTC, datetime

from warehouse import schema, store
from warehouse.errors import LotlineError
from warehouse.points import ArrowSource

CAUTION = (
    "Signals advise; they do not decide. The fab's out-of-control action plan (OCAP) and a "
    "qualified engineer decide holds, releases, rework and tool downs."
)
AUTO_USER = "lotline-auto"
_TRANSITIONS = {"open": ("acknowledged", "closed"), "acknowledged": ("open", "closed"), "closed": ("open",)}


class DispositionError(LotlineError, ValueError):
    """A disposition that names an unknown excursion, state or classification, or an illegal transition."""


def _audit(
    con,
    excursion_id: int,
    *,
    at,
    by,
    from_state,
    to_state,
    classification=None,
    cause=None,
    action=None,
    lots=None,
    comment=None,
) -> None:
    con.execute(
        "INSERT INTO excursion_audit VALUES (nextval('audit_id_seq'), ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
        [
            excursion_id,
            at,
            by,
            from_state,
            to_state,
            classification,
            cause,
            action,
            None if lots is None else json.dumps(sorted(lots), separators=(",", ":")),
            comment,
        ],
    )


def group_signals(
    con,
    *,
    series_ids: list[int],
    now: datetime,
    gap: int = 2,
    gaps: dict[int, int] | None = None,
    any_withdrawn: bool = True,
) -> int:
    """Assign unassigned standing signals of the series to excursions; refresh aggregates; return opened.

    A signal joins its series' newest unclosed excursion when at most ``gaps[series]`` (else ``gap``)
    unsignalled points lie between them (the plan entry's ``excursion_gap``), else opens a new one.
    """
    if not series_ids:
        return 0
    import polars as pl

    ids = pl.DataFrame({"series_id": series_ids}, schema={"series_id": pl.Int64})
    con.register("touched", ArrowSource(ids))
    try:
        todo = con.execute(
            "SELECT signal_id, series_id, point_seq FROM signals WHERE withdrawn_at IS NULL AND excursion_id IS NULL "
            "AND series_id IN (SELECT series_id FROM touched) ORDER BY series_id, point_seq, signal_id"
        ).fetchall()
        latest = {
            r[0]: (r[1], r[2])
            for r in con.execute(
                """SELECT e.series_id, e.excursion_id, max(s.point_seq) FROM excursions e
                   JOIN signals s ON s.excursion_id = e.excursion_id AND s.withdrawn_at IS NULL
                   WHERE e.state <> 'closed' AND e.series_id IN (SELECT series_id FROM touched)
                   GROUP BY e.series_id, e.excursion_id
                   QUALIFY row_number() OVER (PARTITION BY e.series_id ORDER BY e.excursion_id DESC) = 1"""
            ).fetchall()
        }
        chart = dict(
            con.execute(
                "SELECT series_id, chart FROM chart_series WHERE series_id IN (SELECT series_id FROM touched)"
            ).fetchall()
        )
        assign: list[tuple[int, int]] = []
        new_rows: list[tuple[int, int]] = []  # (placeholder id, series) of excursions to open
        gaps = gaps or {}
        for signal_id, sid, seq in todo:
            cur = latest.get(sid)
            if cur is None or seq - cur[1] > gaps.get(sid, gap) + 1:
                new_rows.append((-(len(new_rows) + 1), sid))
                cur = (new_rows[-1][0], seq)
            latest[sid] = (cur[0], max(cur[1], seq))
            assign.append((signal_id, cur[0]))
        opened = len(new_rows)
        if new_rows:
            ids = [
                r[0]
                for r in con.execute(
                    "SELECT nextval('excursion_id_seq') FROM range(?) ORDER BY range", [opened]
                ).fetchall()
            ]
            real = {ph: xid for (ph, _), xid in zip(new_rows, ids, strict=True)}
            frame = pl.DataFrame(
                {
                    "excursion_id": ids,
                    "series_id": [r[1] for r in new_rows],
                    "chart": [chart[r[1]] for r in new_rows],
                },
                schema={"excursion_id": pl.Int64, "series_id": pl.Int64, "chart": pl.String},
            )
            con.register("new_exc", ArrowSource(frame))
            con.execute(
                "INSERT INTO excursions SELECT excursion_id, series_id, chart, 'open', 'low', ?, ?, '[]', '[]', 0, ? "
                "FROM new_exc ORDER BY excursion_id",
                [now, now, now],
            )
            con.execute(
                "INSERT INTO excursion_audit SELECT nextval('audit_id_seq'), excursion_id, ?, ?, NULL, 'open', NULL, "
                "NULL, NULL, NULL, 'opened by evaluation' FROM new_exc ORDER BY excursion_id",
                [now, AUTO_USER],
            )
            con.unregister("new_exc")
            assign = [(sig, real.get(x, x)) for sig, x in assign]
        if assign:
            frame = pl.DataFrame(
                assign, schema={"signal_id": pl.Int64, "excursion_id": pl.Int64}, orient="row"
            )
            con.register("assign", ArrowSource(frame))
            con.execute(
                "UPDATE signals s SET excursion_id = a.excursion_id FROM assign a WHERE s.signal_id = a.signal_id"
            )
            con.unregister("assign")
        # only excursions that gained or lost signals in this run need their aggregates refreshed
        changed = {x for _, x in assign}
        if any_withdrawn:
            changed |= {
                r[0]
                for r in con.execute(
                    "SELECT DISTINCT excursion_id FROM signals WHERE withdrawn_at = ? AND excursion_id IS NOT NULL "
                    "AND series_id IN (SELECT series_id FROM touched)",
                    [now],
                ).fetchall()
            }
        con.unregister("touched")
        con.register(
            "touched",
            ArrowSource(pl.DataFrame({"excursion_id": sorted(changed)}, schema={"excursion_id": pl.Int64})),
        )
        rank = "CASE severity WHEN 'critical' THEN 4 WHEN 'high' THEN 3 WHEN 'medium' THEN 2 ELSE 1 END"
        con.execute(
            f"""UPDATE excursions e SET first_at = a.first_at, last_at = a.last_at, rules_json = a.rules,
                lots_json = a.lots, n_signals = a.n, severity = a.sev
            FROM (SELECT excursion_id, min(point_at) AS first_at, max(point_at) AS last_at,
                         to_json(list(DISTINCT rule ORDER BY rule))::VARCHAR AS rules,
                         to_json(list(DISTINCT lot_id ORDER BY lot_id))::VARCHAR AS lots, count(*) AS n,
                         CASE max({rank}) WHEN 4 THEN 'critical' WHEN 3 THEN 'high' WHEN 2 THEN 'medium' ELSE 'low' END AS sev
                  FROM signals WHERE withdrawn_at IS NULL AND excursion_id IN (SELECT excursion_id FROM touched)
                  GROUP BY excursion_id) a
            WHERE e.excursion_id = a.excursion_id"""
        )
        if not any_withdrawn:
            return opened  # only a withdrawal can leave an excursion without standing signals
        # an unclosed excursion whose signals were all withdrawn closes itself, with an audit row
        con.execute(
            """CREATE OR REPLACE TEMP TABLE emptied AS SELECT e.excursion_id, e.state FROM excursions e
               WHERE e.excursion_id IN (SELECT excursion_id FROM touched) AND e.state <> 'closed'
                 AND NOT EXISTS (SELECT 1 FROM signals s WHERE s.excursion_id = e.excursion_id
                                 AND s.withdrawn_at IS NULL)"""
        )
        con.execute(
            "INSERT INTO excursion_audit SELECT nextval('audit_id_seq'), excursion_id, ?, ?, state, 'closed', NULL, "
            "NULL, NULL, NULL, 'all signals withdrawn (superseded data or re-evaluation)' FROM emptied "
            "ORDER BY excursion_id",
            [now, AUTO_USER],
        )
        con.execute(
            "UPDATE excursions SET state = 'closed', n_signals = 0 "
            "WHERE excursion_id IN (SELECT excursion_id FROM emptied)"
        )
        con.execute("DROP TABLE emptied")
    finally:
        con.unregister("touched")
    return opened


def record_disposition(
    path,
    excursion_id: int,
    *,
    user: str,
    state: str,
    classification: str | None = None,
    cause: str | None = None,
    action: str | None = None,
    lots: list[str] | None = None,
    comment: str | None = None,
) -> dict:
    """Append a disposition to an excursion's audit trail and move it to ``state``; return the audit row.

    Example:
        >>> record_disposition("lotline.duckdb", 7, user="a.engineer", state="acknowledged",
        ...                    classification="real", cause="process_tool", action="tool down per OCAP")  # doctest: +SKIP
    """
    if state not in schema.EXCURSION_STATES:
        raise DispositionError(
            "unknown excursion state", found=state, expected=" / ".join(schema.EXCURSION_STATES)
        )
    if classification is not None and classification not in schema.CLASSIFICATIONS:
        raise DispositionError(
            "unknown classification", found=classification, expected=" / ".join(schema.CLASSIFICATIONS)
        )
    if not user:
        raise DispositionError(
            "a disposition needs the name of the engineer who decided", fix="pass --by NAME"
        )
    now = datetime.now(UTC).replace(tzinfo=None)
    with store.open_warehouse(path) as con, store.transaction(con):
        row = con.execute("SELECT state FROM excursions WHERE excursion_id = ?", [excursion_id]).fetchall()
        if not row:
            raise DispositionError(
                "no excursion with this id",
                found=excursion_id,
                fix="list them with `lotline excursions list`",
            )
        before = row[0][0]
        if state != before and state not in _TRANSITIONS[before]:
            raise DispositionError(
                f"an excursion cannot go from {before} to {state}", expected=" or ".join(_TRANSITIONS[before])
            )
        if state == "closed" and classification is None:
            last = con.execute(
                "SELECT classification FROM excursion_audit WHERE excursion_id = ? AND classification IS NOT NULL "
                "ORDER BY audit_id DESC LIMIT 1",
                [excursion_id],
            ).fetchall()
            if not last:
                raise DispositionError(
                    "closing an excursion needs a classification",
                    expected=" / ".join(schema.CLASSIFICATIONS),
                    fix="pass --classification",
                )
        con.execute("UPDATE excursions SET state = ? WHERE excursion_id = ?", [state, excursion_id])
        _audit(
            con,
            excursion_id,
            at=now,
            by=user,
            from_state=before,
            to_state=state,
            classification=classification,
            cause=cause,
            action=action,
            lots=lots,
            comment=comment,
        )
        store.bump_data_version(con)
    return {
        "excursion_id": excursion_id,
        "from_state": before,
        "to_state": state,
        "changed_by": user,
        "changed_at": now.isoformat(),
        "classification": classification,
    }
