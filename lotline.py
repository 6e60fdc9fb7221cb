"""lotline command line: a thin shell over the packages. Nothing imports this module.

Each command parses its arguments, calls one library function, prints the result and sets the exit code:
0 = ok, 1 = data or rule errors found, 2 = usage error. Heavy modules are imported inside command bodies so
that ``lotline --help`` stays instant. Library code raises ``warehouse.errors.LotlineError``; only this
module prints ``Error: …``.
"""

from __future__ import annotations

import json
import sys

import click

DB_HELP = "Warehouse file (default: $LOTLINE_DB, else ./lotline.duckdb)."


def db_option(f):
    """The ``--db PATH`` option every command takes."""
    return click.option("--db", "db", type=click.Path(dir_okay=False), default=None, help=DB_HELP)(f)


def fail(exc: Exception, code: int = 1) -> None:
    """Print a library error the one way this CLI prints errors, and exit."""
    click.echo(f"Error: {exc}", err=True)
    sys.exit(code)


def echo_json(obj) -> None:
    click.echo(json.dumps(obj, indent=2, default=str))


def _check_chart_name(con, chart: str | None) -> None:
    """A ``--chart`` filter must name a chart of the plan or of a stored series (a mistyped name would
    otherwise print nothing, which reads as "no limits")."""
    if not chart:
        return
    from warehouse.errors import ConfigError
    from warehouse.plan import current_plan
    from warehouse.queries import stored_chart_names

    if chart in stored_chart_names(con):  # also a chart since removed from the plan: its limit history stays
        return
    plan = current_plan(con)
    if plan is None:
        raise ConfigError("no monitoring plan is loaded", fix="run `lotline plan load PLAN.toml` first")
    plan.entry(chart)  # the plan's own error: did you mean, and the charts it has


def _split_text(split: dict | str | None) -> str:
    """A series' split keys as ``key=value,...`` ("(pooled)" for a series not split)."""
    from warehouse.points import split_text

    return split_text(split) or "(pooled)"


def _lots_text(lots: list[str], limit: int = 10) -> str:
    """Lots of an excursion for a one-line listing: the first ``limit``, then how many more."""
    head = ",".join(lots[:limit])
    return head + (f" (+{len(lots) - limit} more)" if len(lots) > limit else "")


@click.group(context_settings={"help_option_names": ["-h", "--help"]})
@click.version_option(package_name="lotline")
def cli():
    """lotline: SPC and metrology warehouse for wafer-fab CD and defect data.

    Example: lotline demo --dir demo_run
    """


# --- warehouse commands ---


@cli.command("schema")
@click.option("--markdown", is_flag=True, help="Print the data dictionary as Markdown.")
def schema_cmd(markdown: bool):
    """Print the canonical tables and columns (the data dictionary).

    Example: lotline schema --markdown > docs/data_dictionary.md
    """
    from warehouse import schema

    if markdown:
        click.echo(schema.data_dictionary_markdown())
        return
    for t in schema.TABLES:
        click.echo(f"{t.name}: {t.doc}")
        for c in t.columns:
            unit = f" [{c.unit}]" if c.unit else ""
            click.echo(f"  {c.name:<24} {c.dtype:<9}{unit} {c.doc}")


# --- ingest commands ---


@cli.command("init")
@db_option
def init_cmd(db):
    """Create the warehouse file, or migrate an existing one to this lotline's schema.

    Example: lotline init --db lotline.duckdb
    """
    from warehouse import store
    from warehouse.errors import LotlineError

    try:
        info = store.init_warehouse(store.resolve_db_path(db))
    except LotlineError as exc:
        fail(exc)
    verb = "created" if info["created"] else "opened"
    click.echo(f"{verb} {info['path']} (schema version {info['version']})")


def _ingest_table(results) -> list[str]:
    """The per-file summary table of ``lotline ingest`` and ``lotline watch``."""
    head = ("file", "profile", "loaded", "rejected", "superseded", "skipped", "status")
    rows = [
        (
            r.path,
            r.profile or "-",
            str(r.rows_loaded),
            str(r.rows_rejected),
            str(r.rows_superseded),
            str(r.rows_skipped),
            r.status,
        )
        for r in results
    ]
    widths = [max(len(h), *(len(row[i]) for row in rows)) if rows else len(h) for i, h in enumerate(head)]
    right = {2, 3, 4, 5}

    def fmt(cells) -> str:
        return "  ".join(
            c.rjust(w) if i in right else c.ljust(w)
            for i, (c, w) in enumerate(zip(cells, widths, strict=True))
        )

    return [fmt(head).rstrip(), *(fmt(r).rstrip() for r in rows)]


@cli.command("ingest")
@click.argument("paths", nargs=-1, required=True, type=click.Path())
@db_option
@click.option(
    "--profiles",
    "profile_dirs",
    multiple=True,
    type=click.Path(file_okay=False),
    help="Extra folder of export profiles (*.toml); repeatable.",
)
@click.option(
    "--profile", "profile", default=None, help="Use this profile instead of detecting it from the header."
)
@click.option("--json", "as_json", is_flag=True, help="Print the per-file results as JSON.")
@click.option(
    "--wait",
    "wait_s",
    type=float,
    default=60.0,
    show_default=True,
    help="Seconds to wait while another process holds the warehouse.",
)
@click.option(
    "--evaluate",
    "run_evaluate",
    is_flag=True,
    help="Evaluate the monitoring plan after loading (incremental; see `lotline evaluate`).",
)
def ingest_cmd(paths, db, profile_dirs, profile, as_json: bool, wait_s: float, run_evaluate: bool = False):
    """Load exports (files or folders, recursive; CSV, Parquet, JSON lines, optionally .gz) into the warehouse.

    Each file loads in one transaction; bad rows go to the rejects table with file, line, column, value
    and reason. Exit code 0: all loaded; 1: some rows or files rejected; 2: usage error.

    Example: lotline ingest demo_run/exports --db lotline.duckdb
    """
    from pathlib import Path

    from ingest.jobs import ingest_paths
    from warehouse.errors import LotlineError

    for p in paths:
        if not Path(p).exists():
            raise click.BadParameter(f"{p}: no such file or folder.", param_hint="PATH")
    try:
        report = ingest_paths(
            paths, db=db, profile_dirs=profile_dirs, profile=profile, wait_s=wait_s, progress=not as_json
        )
    except LotlineError as exc:
        fail(exc, 2 if "profile" in type(exc).__name__.lower() else 1)
    if as_json:
        echo_json(report.to_dict())
    else:
        for line in _ingest_table(report.files):
            click.echo(line)
        for r in report.files:
            if r.status == "failed":
                click.echo(f"Error: {r.message}", err=True)
        if any(r.rows_rejected for r in report.files):
            click.echo("Rejected rows: lotline rejects --db " + (db or "<warehouse>"), err=True)
    if run_evaluate:
        _evaluate_after_ingest(db, to_stderr=as_json)
    sys.exit(report.exit_code)


@cli.command("watch")
@click.argument("folder", type=click.Path(exists=True, file_okay=False))
@db_option
@click.option(
    "--profiles",
    "profile_dirs",
    multiple=True,
    type=click.Path(file_okay=False),
    help="Extra folder of export profiles (*.toml); repeatable.",
)
@click.option("--interval", type=float, default=5.0, show_default=True, help="Seconds between polls.")
@click.option("--once", is_flag=True, help="Ingest what is ready now and stop (for scripts and tests).")
@click.option("--json", "as_json", is_flag=True, help="Print one JSON object per ingested file.")
@click.option(
    "--evaluate",
    "run_evaluate",
    is_flag=True,
    help="Evaluate the monitoring plan (incremental) once after each poll that loaded files.",
)
def watch_cmd(
    folder, db, profile_dirs, interval: float, once: bool, as_json: bool, run_evaluate: bool = False
):
    """Poll a drop folder and ingest each new or changed file once, after its size stops changing.

    Never moves or deletes files. Ctrl-C stops.

    Example: lotline watch /data/drop --db lotline.duckdb --interval 10
    """
    from ingest.watch import watch_folder
    from warehouse.errors import LotlineError

    def show(result) -> None:
        if as_json:
            click.echo(json.dumps(result.to_dict(), default=str))
        else:
            click.echo(_ingest_table([result])[1])
            if result.status == "failed":
                click.echo(f"Error: {result.message}", err=True)

    def after_poll(results) -> None:
        # one evaluation per batch of files: a drop of many files at once is evaluated once, not per file
        if run_evaluate and any(r.status == "loaded" for r in results):
            _evaluate_after_ingest(db, to_stderr=as_json)

    try:
        results = watch_folder(
            folder,
            db=db,
            profile_dirs=profile_dirs,
            interval_s=interval,
            once=once,
            on_file=show,
            on_poll=after_poll,
        )
    except KeyboardInterrupt:
        sys.exit(0)
    except LotlineError as exc:
        fail(exc)
    bad = any(r.status == "failed" or r.rows_rejected for r in results)
    sys.exit(1 if bad else 0)


@cli.command("rejects")
@db_option
@click.option("--file", "path", default=None, help="Only rejects of this file (path as ingested).")
@click.option("--limit", type=int, default=100, show_default=True, help="At most this many rows.")
@click.option("--json", "as_json", is_flag=True, help="Print JSON objects.")
def rejects_cmd(db, path, limit: int, as_json: bool):
    """List rejected rows: file:line, column, raw value and reason, newest file first.

    Example: lotline rejects --file exports/lot_A17.csv
    """
    from warehouse import load, store
    from warehouse.errors import LotlineError

    try:
        with store.open_warehouse(store.resolve_db_path(db), read_only=True) as con:
            rows = load.list_rejects(con, path=path, limit=limit).to_dicts()
    except LotlineError as exc:
        fail(exc)
    if as_json:
        echo_json(rows)
        return
    for r in rows:
        where = f" {r['column']}" if r["column"] else ""
        val = f' "{r["value"]}"' if r["value"] is not None else ""
        detail = f":{where}{val}" if where or val else ""  # a whole-row reject names no column
        click.echo(f"{r['path']}:{r['line']}{detail}: {r['reason']}")


# --- spc commands ---


def _spc_floats(text: str, what: str, count: int | None = None) -> list[float]:
    """Parse "a,b,..." into floats, or raise a usage error naming the option."""
    try:
        vals = [float(t) for t in text.split(",") if t.strip()]
    except ValueError:
        raise click.BadParameter(f"{what} expects numbers separated by commas, found {text!r}.") from None
    if count is not None and len(vals) != count:
        raise click.BadParameter(f"{what} expects {count} comma-separated numbers, found {text!r}.")
    return vals


def _spc_shifts(shift: tuple[str, ...]) -> list[float]:
    return [v for s in shift for v in _spc_floats(s, "--shift")] or [0.0, 0.5, 1.0, 2.0, 3.0]


def _spc_print_arl(results, as_json: bool, width: tuple[str, float] | None, target: float | None) -> None:
    if as_json:
        rows = []
        for r in results:
            row = {"shift": r.shift, "arl": r.arl}
            if r.method == "simulation":
                row["se"] = r.se
            if width:
                row[width[0]] = width[1]
            rows.append(row)
        click.echo(json.dumps(rows))
        return
    if width:
        click.echo(f"{width[0]} = {width[1]:.4f} for in-control ARL {target:g}")
    sim = any(r.method == "simulation" for r in results)
    click.echo(f"{'shift':>6}  {'ARL':>10}" + (f"  {'SE':>8}" if sim else ""))
    for r in results:
        click.echo(f"{r.shift:>6.2f}  {r.arl:>10.2f}" + (f"  {r.se:>8.2f}" if sim else ""))


@cli.group("arl")
def arl_group():
    """Average run length of a chart design: false-alarm cost and speed at detecting a mean shift.

    Shifts are in sigma units of the plotted statistic; all ARLs are two-sided.

    Example: lotline arl shewhart --rules we1,we2,we3,we4 --shift 0,1
    """


@arl_group.command("shewhart")
@click.option(
    "--rules", default="we1", show_default=True, help="Comma-separated rule ids (we1-we4, nelson1-nelson8)."
)
@click.option("--shift", multiple=True, help="Mean shift(s) in sigma; repeat or separate by commas.")
@click.option(
    "--target-arl", type=float, default=None, help="Solve the beyond-limits width for this in-control ARL."
)
@click.option(
    "--seed", type=int, default=0, show_default=True, help="Seed for rule sets that must be simulated."
)
@click.option("--json", "as_json", is_flag=True, help='Print [{"shift": S, "arl": A}, ...].')
def arl_shewhart_cmd(rules: str, shift, target_arl, seed: int, as_json: bool):
    """ARL of a Shewhart chart with run rules (exact Markov chain; nelson3/nelson4 are simulated).

    Example: lotline arl shewhart --rules we1 --shift 0 --shift 1.5
    """
    from dataclasses import replace

    from spc import arl
    from spc.rules import BeyondLimits, rule_params

    try:
        params = [rule_params(r.strip()) for r in rules.split(",") if r.strip()]
    except ValueError as exc:
        raise click.BadParameter(str(exc), param_hint="--rules") from None
    width = None
    if target_arl is not None:
        try:
            k = arl.solve_shewhart_width(params, target_arl)
        except ValueError as exc:
            raise click.BadParameter(str(exc), param_hint="--target-arl") from None
        params = [replace(p, k=k) if isinstance(p, BeyondLimits) else p for p in params]
        width = ("k", k)
    _spc_print_arl(arl.shewhart_arl(params, _spc_shifts(shift), seed=seed), as_json, width, target_arl)


@arl_group.command("ewma")
@click.option("--lambda", "lam", type=float, required=True, help="EWMA weight, 0 < lambda <= 1.")
@click.option("--width", "L", type=float, default=None, help="Limit width L in sigma (asymptotic limits).")
@click.option("--shift", multiple=True, help="Mean shift(s) in sigma; repeat or separate by commas.")
@click.option("--target-arl", type=float, default=None, help="Solve L for this in-control ARL.")
@click.option("--json", "as_json", is_flag=True, help='Print [{"shift": S, "arl": A}, ...].')
def arl_ewma_cmd(lam: float, L, shift, target_arl, as_json: bool):
    """ARL of a two-sided EWMA chart (Markov chain after Lucas & Saccucci 1990).

    Example: lotline arl ewma --lambda 0.1 --target-arl 500 --shift 0,0.5,1
    """
    from spc import arl

    if (L is None) == (target_arl is None):
        raise click.UsageError("give exactly one of --width and --target-arl.")
    if not 0 < lam <= 1:
        raise click.BadParameter(f"must be in (0, 1], found {lam}.", param_hint="--lambda")
    width = None
    if target_arl is not None:
        try:
            L = arl.solve_ewma_width(lam, target_arl)
        except ValueError as exc:
            raise click.BadParameter(str(exc), param_hint="--target-arl") from None
        width = ("L", L)
    _spc_print_arl(arl.ewma_arl(lam, L, _spc_shifts(shift)), as_json, width, target_arl)


@arl_group.command("cusum")
@click.option("--k", "k", type=float, required=True, help="Reference value k in sigma.")
@click.option("--h", "h", type=float, default=None, help="Decision interval h in sigma.")
@click.option("--shift", multiple=True, help="Mean shift(s) in sigma; repeat or separate by commas.")
@click.option("--target-arl", type=float, default=None, help="Solve h for this in-control ARL.")
@click.option("--json", "as_json", is_flag=True, help='Print [{"shift": S, "arl": A}, ...].')
def arl_cusum_cmd(k: float, h, shift, target_arl, as_json: bool):
    """ARL of a two-sided tabular CUSUM (Markov chain after Brook & Evans 1972).

    Example: lotline arl cusum --k 0.5 --h 5 --shift 0,0.5,1
    """
    from spc import arl

    if (h is None) == (target_arl is None):
        raise click.UsageError("give exactly one of --h and --target-arl.")
    width = None
    if target_arl is not None:
        try:
            h = arl.solve_cusum_h(k, target_arl)
        except ValueError as exc:
            raise click.BadParameter(str(exc), param_hint="--target-arl") from None
        width = ("h", h)
    _spc_print_arl(arl.cusum_arl(k, h, _spc_shifts(shift)), as_json, width, target_arl)


@cli.command("flag")
@click.argument("file", type=click.Path(exists=True, dir_okay=False))
@click.option("--value", "value_col", required=True, help="Column holding the plotted values.")
@click.option("--series", "series_col", default=None, help="Column that splits the file into series.")
@click.option(
    "--order",
    "order_col",
    default=None,
    help="Column giving the order within a series (default: file order).",
)
@click.option("--center", type=float, required=True, help="Centre line, in data units.")
@click.option("--sigma", type=float, required=True, help="Sigma of the plotted value, in data units.")
@click.option(
    "--rules", default=None, help="Comma-separated rule ids (default we1 unless --ewma/--cusum given)."
)
@click.option("--ewma", "ewma_opt", default=None, metavar="LAMBDA,L", help="Add an EWMA chart.")
@click.option(
    "--cusum", "cusum_opt", default=None, metavar="K,H", help="Add a tabular CUSUM (k, h in sigma)."
)
@click.option(
    "--ewma-limits",
    type=click.Choice(["exact", "asymptotic"]),
    default="exact",
    show_default=True,
    help="EWMA limits: exact time-varying, or steady state.",
)
@click.option("--json", "as_json", is_flag=True, help="Print signals as a JSON list.")
@click.option("--csv", "as_csv", is_flag=True, help="Print signals as CSV.")
def flag_cmd(
    file,
    value_col,
    series_col,
    order_col,
    center,
    sigma,
    rules,
    ewma_opt,
    cusum_opt,
    ewma_limits,
    as_json,
    as_csv,
):
    """Check a CSV of points against run rules, EWMA and CUSUM; print one row per signal.

    Prints series, index (1-based within the series), order, rule and statistic (the value for run
    rules, the EWMA in data units, the CUSUM sum in sigma units). EWMA starts at the centre; CUSUM starts
    at 0 and restarts after a signal. Exit code 0 when the check ran (signals or not), 1 for a bad file,
    2 for bad options. Signals advise; the fab's OCAP and qualified engineers decide.

    Example: lotline flag cd.csv --value cd_nm --series tool --center 45 --sigma 0.8 --rules we1,we2 --ewma 0.2,2.86
    """
    import polars as pl

    from spc.cusum import CusumParams
    from spc.ewma import EwmaParams
    from spc.rules import rule_params
    from spc.signals import evaluate_signals
    from warehouse.errors import IngestError

    if as_json and as_csv:
        raise click.UsageError("give at most one of --json and --csv.")
    if not sigma > 0:
        raise click.BadParameter(f"must be > 0, found {sigma}.", param_hint="--sigma")
    ewma = cusum = None
    if ewma_opt:
        lam, L = _spc_floats(ewma_opt, "--ewma", 2)
        try:
            ewma = EwmaParams(lam=lam, L=L, limits=ewma_limits)
        except ValueError as exc:
            raise click.BadParameter(str(exc), param_hint="--ewma") from None
    if cusum_opt:
        k, h = _spc_floats(cusum_opt, "--cusum", 2)
        cusum = CusumParams(k=k, h=h)
    if rules is None:
        rules = "" if (ewma or cusum) else "we1"
    try:
        rule_list = [rule_params(r.strip()) for r in rules.split(",") if r.strip()]
    except ValueError as exc:
        raise click.BadParameter(str(exc), param_hint="--rules") from None
    try:
        points = _spc_read_points(file, value_col, series_col, order_col, center, sigma)
    except IngestError as exc:
        fail(exc)
    out = evaluate_signals(points, rule_list, ewma=ewma, cusum=cusum, passthrough=["_index", "_order"])
    out = out.select(
        pl.col("series"),
        pl.col("_index").alias("index"),
        pl.col("_order").alias("order"),
        pl.col("rule"),
        pl.col("value").alias("statistic"),
    )
    if as_json:
        click.echo(json.dumps(out.to_dicts()))
    elif as_csv:
        click.echo(out.write_csv(), nl=False)
    else:
        click.echo(f"{'series':<12} {'index':>7} {'order':<20} {'rule':<9} statistic")
        for s, i, o, r, v in out.iter_rows():
            click.echo(f"{s:<12} {i:>7} {o:<20} {r:<9} {v:.6g}")


def _spc_read_points(path, value_col, series_col, order_col, center, sigma):
    """Read the flag command's CSV into the spc points frame; IngestError names file, line and column."""
    import polars as pl

    from warehouse.errors import IngestError

    try:
        header = pl.read_csv(path, n_rows=0, infer_schema=False).columns
    except (pl.exceptions.PolarsError, OSError) as exc:
        raise IngestError(
            "cannot read the file as CSV",
            path=path,
            details=str(exc).splitlines()[0],
            fix="check that it is a comma-separated text file with a header row",
        ) from None
    wanted = [c for c in (value_col, series_col, order_col) if c is not None]
    for c in wanted:
        if c not in header:
            raise IngestError(
                f'header lacks column "{c}"',
                path=path,
                line=1,
                details=f"Found: {', '.join(header)}",
                fix="name an existing column",
            )
    try:
        raw = pl.read_csv(path, columns=list(dict.fromkeys(wanted)), infer_schema=False)
    except pl.exceptions.PolarsError as exc:
        raise IngestError(
            "cannot read the file as CSV",
            path=path,
            details=str(exc).splitlines()[0],
            fix="check the quoting and the number of fields per line",
        ) from None
    raw = raw.with_row_index("_line", offset=2)  # line 1 is the header
    value = raw[value_col].str.strip_chars().cast(pl.Float64, strict=False)
    bad = raw.filter(value.is_null() | ~value.is_finite())
    if bad.height:
        line, text = bad["_line"][0], bad[value_col][0]
        raise IngestError(
            f'column "{value_col}" is not a number',
            path=path,
            line=int(line),
            column=header.index(value_col) + 1,
            found=text if text is not None else "",
            expected="a finite number",
            fix=f"correct the value, or remove the line ({bad.height} bad in all)",
        )
    frame = raw.select(
        pl.col(series_col).fill_null("") if series_col else pl.lit("all").alias("series"),
        value.alias("value"),
        pl.col("_line"),
        (pl.col(order_col) if order_col else pl.col("_line") - 1).cast(pl.String).alias("_order"),
    ).rename({series_col: "series"} if series_col and series_col != "series" else {})
    if order_col:
        num = raw[order_col].cast(pl.Float64, strict=False)
        key = num if num.null_count() == raw[order_col].null_count() else raw[order_col]
        frame = frame.with_columns(key.alias("_key")).sort(["series", "_key"], maintain_order=True)
        dup = frame.filter(pl.struct("series", "_key").is_duplicated())
        if dup.height:
            raise IngestError(
                f'column "{order_col}" repeats an order value within series "{dup["series"][0]}"',
                path=path,
                line=int(dup["_line"].min()),
                column=header.index(order_col) + 1,
                found=dup["_order"][0],
                expected="unique values per series",
                fix="drop the duplicate line or split the series with --series",
            )
    frame = frame.with_columns(
        (pl.int_range(pl.len()).over("series") + 1).alias("_index"),
        pl.lit(center).alias("center"),
        pl.lit(sigma).alias("sigma"),
    )
    return frame.with_columns(pl.col("_index").alias("seq"))


# --- monitoring commands ---


def _evaluate_after_ingest(db, *, to_stderr: bool = False) -> None:
    """Run an incremental evaluation after a load (``ingest --evaluate``, ``watch --evaluate``)."""
    from warehouse import evaluate
    from warehouse.errors import LotlineError

    try:
        s = evaluate.evaluate_after_ingest(db)
    except LotlineError as exc:
        fail(exc)
    if s is None:
        click.echo(
            "notice: no monitoring plan loaded; nothing evaluated (lotline plan load PLAN.toml)", err=True
        )
        return
    click.echo(
        f"evaluated: {s.series} series, {s.signals_new} new signals, {s.signals_withdrawn} withdrawn, "
        f"{s.excursions_opened} excursions opened",
        err=to_stderr,
    )


MONITORING_CAUTION = (
    "Signals advise; they do not decide. The fab's out-of-control action plan (OCAP) and a "
    "qualified engineer decide holds, releases, rework and tool downs."
)


def _user_name() -> str:
    import getpass

    try:
        return getpass.getuser()
    except Exception:  # noqa: BLE001
        return "unknown"


@cli.group("plan")
def plan_group():
    """Monitoring plan: load and show the TOML plan of charts.

    Example: lotline plan load demo_fab/plan.toml --db lotline.duckdb
    """


@plan_group.command("load")
@click.argument("file", type=click.Path(dir_okay=False))
@db_option
@click.option("--check", is_flag=True, help="Only validate the file; store nothing.")
def plan_load_cmd(file, db, check: bool):
    """Validate a monitoring plan (file:line:col errors) and store it as the plan in force.

    Example: lotline plan load demo_fab/plan.toml --db lotline.duckdb
    """
    from warehouse import store
    from warehouse.errors import LotlineError
    from warehouse.plan import read_plan, store_plan

    try:
        plan = read_plan(file)
        if check:
            click.echo(f"{file}: ok, {len(plan.entries)} chart(s)")
            _echo_plan_advice(plan)
            return
        with store.open_warehouse(store.resolve_db_path(db), create=True) as con, store.transaction(con):
            version = store_plan(con, plan, user=_user_name())
            store.bump_data_version(con)
    except LotlineError as exc:
        fail(exc)
    click.echo(
        f"loaded plan {plan.name!r} from {file} as plan version {version}: {len(plan.entries)} chart(s)"
    )
    _echo_plan_advice(plan)


def _echo_plan_advice(plan) -> None:
    """One line per advisory note of the plan's entries (``warehouse.plan.plan_advice``)."""
    from warehouse.plan import plan_advice

    for e in plan.entries:
        for note in plan_advice(e):
            click.echo(f"  note: {e.name}: {note}")


@plan_group.command("show")
@db_option
@click.option("--json", "as_json", is_flag=True, help="Print the entries as JSON.")
def plan_show_cmd(db, as_json: bool):
    """Show the plan in force with the expected in-control ARL of each chart's rule set.

    Example: lotline plan show --db lotline.duckdb
    """
    from warehouse import store
    from warehouse.errors import LotlineError
    from warehouse.plan import DEFAULT_EXCURSION_GAP, current_plan, describe_plan

    try:
        with store.open_warehouse(store.resolve_db_path(db), read_only=True) as con:
            plan = current_plan(con)
    except LotlineError as exc:
        fail(exc)
    if plan is None:
        fail(RuntimeError("no monitoring plan is loaded. Fix: run `lotline plan load PLAN.toml`."))
    rows = describe_plan(plan)
    if as_json:
        echo_json(rows)
        return
    click.echo(f"plan {plan.name!r} ({plan.path}), {len(rows)} chart(s)")
    for r in rows:
        arl = r["in_control_arl"]
        extra = f", {r['chart_type']} ARL0 {arl['chart']}" if arl["chart"] is not None else ""
        sel = r["select"]
        click.echo(
            f"  {r['chart']}: {r['statistic']} of {sel['layer']}/{sel['parameter']} by "
            f"{','.join(r['split']) or '(pooled)'}; {r['chart_type']}; rules {','.join(r['rules'])} "
            f"(in-control ARL {arl['rules']}{extra}; combined ~{arl['combined']}); severity {r['severity']}"
            + (f"; excursion gap {r['excursion_gap']}" if r["excursion_gap"] != DEFAULT_EXCURSION_GAP else "")
        )
        for note in r["advice"]:
            click.echo(f"    note: {note}")


@cli.group("limits")
def limits_group():
    """Control limits: frozen versions per series, with who/when/why.

    Example: lotline limits show --chart m1-cd-wafer --db lotline.duckdb
    """


@limits_group.command("show")
@db_option
@click.option("--chart", default=None, help="Only this plan entry.")
@click.option("--json", "as_json", is_flag=True, help="Print JSON objects.")
def limits_show_cmd(db, chart, as_json: bool):
    """Show the limits in force per series (empty limits: not frozen yet).

    Example: lotline limits show --chart m1-cd-wafer --json
    """
    from warehouse import queries, store
    from warehouse.errors import LotlineError

    try:
        with store.open_warehouse(store.resolve_db_path(db), read_only=True) as con:
            _check_chart_name(con, chart)
            df = queries.series_info(con, chart=chart)
    except LotlineError as exc:
        fail(exc)
    rows = df.to_dicts()
    if as_json:
        echo_json(rows)
        return
    for r in rows:
        lim = (
            "not frozen"
            if r["limit_version"] is None
            else f"v{r['limit_version']} center {r['center']:.4g} sigma {r['sigma']:.4g} LCL {r['lcl']:.4g} UCL {r['ucl']:.4g}"
        )
        click.echo(
            f"{r['series_id']:>6} {r['chart']} {r['layer']}/{r['parameter']} {_split_text(r['split_json'])}: {lim}"
        )


@limits_group.command("history")
@db_option
@click.option("--chart", default=None, help="Only this plan entry.")
@click.option("--json", "as_json", is_flag=True, help="Print JSON objects.")
def limits_history_cmd(db, chart, as_json: bool):
    """List every frozen limit version with its baseline, who froze it, when and why.

    Example: lotline limits history --chart m1-cd-wafer
    """
    from warehouse import queries, store
    from warehouse.errors import LotlineError

    try:
        with store.open_warehouse(store.resolve_db_path(db), read_only=True) as con:
            _check_chart_name(con, chart)
            df = queries.series_limits(con, chart=chart)
    except LotlineError as exc:
        fail(exc)
    rows = df.to_dicts()
    if as_json:
        echo_json(rows)
        return
    for r in rows:
        click.echo(
            f"{r['series_id']:>6} v{r['version']} {r['chart']} {_split_text(r['split_json'])}: center {r['center']:.4g} "
            f"sigma {r['sigma']:.4g} ({r['sigma_source']}, n={r['baseline_n']}) frozen {r['frozen_at']:%Y-%m-%d %H:%M} "
            f"by {r['frozen_by']}: {r['reason']}"
        )


@limits_group.command("freeze")
@db_option
@click.option("--chart", required=True, help="Plan entry whose series get a new limit version.")
@click.option("--series", "series_id", type=int, default=None, help="Only this series id.")
@click.option(
    "--window", default=None, metavar="FROM..TO", help="Baseline window of point times (ISO dates)."
)
@click.option("--first", type=int, default=None, help="Baseline = the first N points of each series.")
@click.option("--reason", required=True, help="Why the limits are (re)frozen; kept in the history.")
@click.option("--by", "user", default=None, help="Engineer freezing them (default: login name).")
def limits_freeze_cmd(db, chart, series_id, window, first, reason, user):
    """Freeze Phase I limits as a new numbered version (evaluation never re-estimates them).

    Example: lotline limits freeze --chart m1-cd-wafer --window 2026-09-01..2026-09-14 --reason "new resist lot"
    """
    from datetime import datetime

    from warehouse import evaluate, store
    from warehouse.errors import LotlineError

    win = None
    if window:
        a, sep, b = window.partition("..")
        try:
            win = (datetime.fromisoformat(a), datetime.fromisoformat(b))
        except ValueError:
            raise click.BadParameter(
                "expected FROM..TO with ISO dates, e.g. 2026-09-01..2026-09-14", param_hint="--window"
            ) from None
    try:
        rows = evaluate.freeze_limits(
            store.resolve_db_path(db),
            chart=chart,
            reason=reason,
            user=user or _user_name(),
            first=first,
            window=win,
            series_id=series_id,
        )
    except LotlineError as exc:
        fail(exc)
    for r in rows:
        if "skipped" in r:
            click.echo(f"series {r['series_id']}: skipped, {r['skipped']}")
        else:
            click.echo(
                f"series {r['series_id']}: v{r['version']} center {r['center']:.4g} sigma {r['sigma']:.4g} "
                f"(n={r['baseline_n']})"
            )


@cli.command("evaluate")
@db_option
@click.option("--full", is_flag=True, help="Recompute every series from its first point.")
@click.option("--json", "as_json", is_flag=True, help="Print the run summary as JSON.")
@click.option(
    "--engine",
    type=click.Choice(["local", "spark"]),
    default="local",
    show_default=True,
    help="local: the warehouse file; spark: a Parquet lake (see `lotline lake export`).",
)
@click.option(
    "--lake",
    "lake_dir",
    type=click.Path(file_okay=False),
    default=None,
    help="Lake folder to evaluate (--engine spark).",
)
@click.option("--master", default="local[2]", show_default=True, help="Spark master URL (--engine spark).")
def evaluate_cmd(
    db, full: bool, as_json: bool, engine: str = "local", lake_dir=None, master: str = "local[2]"
):
    """Evaluate every chart of the plan: new signals, withdrawn ones, excursions (incremental by default).

    Example: lotline evaluate --db lotline.duckdb
    """
    if engine == "spark":
        _lake_evaluate(lake_dir, master, as_json)
        return
    from warehouse import evaluate, store
    from warehouse.errors import LotlineError

    try:
        s = evaluate.evaluate_warehouse(store.resolve_db_path(db), full=full, user=_user_name())
    except LotlineError as exc:
        fail(exc)
    if as_json:
        echo_json(s.as_dict())
        return
    click.echo(
        f"{s.mode} evaluation: {s.series} series ({s.series_appended} appended, {s.series_recomputed} recomputed), "
        f"{s.points} points, {s.signals_new} new signals, {s.signals_withdrawn} withdrawn, "
        f"{s.excursions_opened} excursions opened, {s.limits_frozen} limit versions auto-frozen, "
        f"{s.waiting_for_baseline} series waiting for their baseline ({s.seconds} s)"
    )
    for n in s.notices:
        click.echo(f"notice: {n}")
    click.echo(MONITORING_CAUTION)


@cli.group("excursions")
def excursions_group():
    """Excursions: grouped signals and their dispositions.

    Example: lotline excursions list --open --json
    """


@excursions_group.command("list")
@db_option
@click.option("--open", "open_only", is_flag=True, help="Only open and acknowledged excursions.")
@click.option("--since", default=None, help="Only excursions whose last point is at or after this ISO date.")
@click.option("--json", "as_json", is_flag=True, help="Print JSON objects.")
def excursions_list_cmd(db, open_only: bool, since, as_json: bool):
    """List excursions, newest first.

    Example: lotline excursions list --open --since 2026-09-01 --json
    """
    from datetime import datetime

    from warehouse import queries, store
    from warehouse.errors import LotlineError

    try:
        t = datetime.fromisoformat(since) if since else None
    except ValueError:
        raise click.BadParameter("expected an ISO date such as 2026-09-01", param_hint="--since") from None
    try:
        with store.open_warehouse(store.resolve_db_path(db), read_only=True) as con:
            df = queries.list_excursions(con, open_only=open_only, since=t)
    except LotlineError as exc:
        fail(exc)
    rows = [
        {
            "id": r["excursion_id"],
            "state": r["state"],
            "severity": r["severity"],
            "chart": r["chart"],
            "layer": r["layer"],
            "parameter": r["parameter"],
            "split": json.loads(r["split_json"]),
            "rules": json.loads(r["rules_json"]),
            "first_at": r["first_at"],
            "last_at": r["last_at"],
            "lots": json.loads(r["lots_json"]),
            "signals": r["n_signals"],
        }
        for r in df.to_dicts()
    ]
    if as_json:
        echo_json(rows)
        return
    for r in rows:
        split = _split_text(r["split"])
        click.echo(
            f"#{r['id']} {r['state']} {r['severity']} {r['chart']} {r['layer']}/{r['parameter']} {split} "
            f"rules {','.join(r['rules'])} {r['first_at']:%Y-%m-%d %H:%M}..{r['last_at']:%Y-%m-%d %H:%M} "
            f"lots {_lots_text(r['lots'])}"
        )
    click.echo(MONITORING_CAUTION)


@excursions_group.command("set")
@click.argument("excursion_id", type=int)
@db_option
@click.option(
    "--state", type=click.Choice(["open", "acknowledged", "closed"]), required=True, help="New state."
)
@click.option("--by", "user", required=True, help="Engineer who decided (kept in the audit trail).")
@click.option(
    "--classification",
    type=click.Choice(["real", "measurement", "false_alarm"]),
    default=None,
    help="What the excursion was.",
)
@click.option("--cause", default=None, help="Cause category, e.g. process_tool, metrology, material.")
@click.option("--action", default=None, help="Action taken under the fab's OCAP.")
@click.option("--lots", default=None, help="Comma-separated lots the disposition covers.")
@click.option("--comment", default=None, help="Free text.")
def excursions_set_cmd(excursion_id, db, state, user, classification, cause, action, lots, comment):
    """Record a disposition: append it to the audit trail and move the excursion's state.

    Example: lotline excursions set 12 --state closed --by a.engineer --classification measurement --cause metrology
    """
    from warehouse import excursions, store
    from warehouse.errors import LotlineError

    try:
        row = excursions.record_disposition(
            store.resolve_db_path(db),
            excursion_id,
            user=user,
            state=state,
            classification=classification,
            cause=cause,
            action=action,
            lots=[x for x in (lots or "").split(",") if x] or None,
            comment=comment,
        )
    except LotlineError as exc:
        fail(exc)
    click.echo(f"excursion #{excursion_id}: {row['from_state']} -> {row['to_state']} by {row['changed_by']}")
    click.echo(MONITORING_CAUTION)


# --- drill-down commands ---


def _explain_lines(ex, top: int) -> list[str]:
    """The terminal report of one explanation (formatting only; the numbers come from warehouse.drilldown)."""
    x = ex.excursion
    split = ", ".join(f"{k}={v}" for k, v in x["split"].items()) or "(pooled)"
    lines = [
        f"Excursion #{x['excursion_id']} ({x['state']}, {x['severity']}): chart {x['chart']}",
        f"  layer {x['layer']}  parameter {x['parameter']}  statistic {x['statistic']}  chart {x['chart_type']}",
        f"  split {split}",
        f"  rules {', '.join(x['rules'])}  first {x['first_at']:%Y-%m-%d %H:%M}  last {x['last_at']:%Y-%m-%d %H:%M}"
        f"  signals {x['n_signals']}",
        f"  lots ({len(ex.affected_lots)}): {', '.join(ex.affected_lots[:12])}"
        + (f" and {len(ex.affected_lots) - 12} more" if len(ex.affected_lots) > 12 else ""),
        "",
        f"Commonality: {len(ex.affected_lots)} affected vs {len(ex.reference_lots)} reference lots "
        f"({ex.periods['population_from']:%Y-%m-%d} to {ex.periods['population_to']:%Y-%m-%d})",
    ]
    if ex.commonality is None or ex.commonality.height == 0:
        lines.append("  (nothing to rank)")
    else:
        lines.append(
            f"  {'rank':>4}  {'step':<12} {'kind':<8} {'candidate':<16} {'affected':>8} {'lots':>5} "
            f"{'q':>9}  flags"
        )
        for r in ex.commonality.head(top).iter_rows(named=True):
            flags = []
            if r["ran_most_lots"]:
                flags.append("ran most lots")
            if r["aliases"]:
                flags.append(f"aliased with {len(r['aliases'])}")
            q = r["q_best"]
            qtxt = "n/a" if q is None or q != q else f"{q:.2g}"
            lines.append(
                f"  {r['rank']:>4}  {r['step']:<12} {r['kind']:<8} {r['candidate']:<16} "
                f"{r['n_affected']:>8} {r['n_lots']:>5} {qtxt:>9}  {'; '.join(flags)}"
            )
            lines.append(f"        {r['reason']}")
    if ex.signatures is not None and ex.signatures.height:
        counts = ex.signatures.group_by("label").len().sort(["len", "label"], descending=[True, False])
        lines += [
            "",
            f"Wafer signatures ({ex.signatures.height} affected wafers vs the chart's baseline wafers):",
        ]
        lines += [f"  {r['label']}: {r['len']} wafer(s)" for r in counts.iter_rows(named=True)]
        emc = ex.signatures["edge_minus_centre"].drop_nulls()
        if emc.len():
            lines.append(f"  mean edge minus centre: {emc.mean():+.2f}")
    if ex.defect_clusters is not None:
        lines += ["", f"Defect clusters on the affected wafers: {ex.defect_clusters.height}"]
        for r in ex.defect_clusters.iter_rows(named=True):
            lines.append(
                f"  {r['wafer_id']}: {r['kind']} of {r['n_defects']} defects, {r['length_mm']:.0f} mm long "
                f"at ({r['centroid_x_mm']:.0f}, {r['centroid_y_mm']:.0f}) mm"
            )
    lines += ["", f"Process or metrology: {ex.verdict}"]
    if ex.attribution is not None:
        ev = ex.evidence
        lines.append(
            f"  measuring tool {ev.metrology_tool}, shift {ev.shift_nm:+.2f} nm "
            f"(votes: process {ex.attribution.process_votes}, metrology {ex.attribution.metrology_votes})"
        )
        lines += [f"  - {t}" for t in ex.attribution.evidence]
    for n in ex.notes:
        lines.append(f"note: {n}")
    lines += ["", "Cautions:"] + [f"  - {c}" for c in ex.cautions]
    return lines


@cli.command("explain")
@click.argument("excursion_id", type=int)
@db_option
@click.option("--top", type=int, default=10, show_default=True, help="Commonality rows to print.")
@click.option("--json", "as_json", is_flag=True, help="Print the whole explanation as JSON.")
def explain_cmd(excursion_id: int, db, top: int, as_json: bool):
    """Explain one excursion: commonality, wafer signatures, defect clusters, process or metrology.

    Example: lotline explain 12 --db demo_run/lotline.duckdb
    """
    from warehouse import drilldown, store
    from warehouse.errors import LotlineError

    try:
        ex = drilldown.explain_excursion(store.resolve_db_path(db), excursion_id)
    except LotlineError as exc:
        fail(exc)
    if as_json:
        echo_json(ex.to_dict())
        return
    for line in _explain_lines(ex, top):
        click.echo(line)


# --- tool-health commands ---


@cli.group("report")
def report_group():
    """Static reports written from the warehouse.

    Example: lotline report weekly --week 2026-W48 --out tool_health.html
    """


@report_group.command("weekly")
@click.option("--week", default=None, help="ISO week YYYY-Www (default: the latest week with data).")
@click.option(
    "--out",
    "out",
    type=click.Path(dir_okay=False),
    default=None,
    help="HTML file to write (default: tool_health_<week>.html).",
)
@click.option(
    "--pdf",
    "pdf",
    type=click.Path(dir_okay=False),
    default=None,
    help="Also print the report to this PDF with headless Chromium.",
)
@click.option("--json", "as_json", is_flag=True, help="Print the scorecards as JSON instead of a summary.")
@db_option
def report_weekly_cmd(week, out, pdf, as_json: bool, db):
    """Weekly tool-health review: CD-SEM, inspection and process-chamber scorecards with charts (one HTML file).

    The file embeds plotly.js once and opens offline. Signals advise; the fab's OCAP and qualified engineers
    decide.

    Example: lotline report weekly --week 2026-W48 --out tw48.html --pdf tw48.pdf
    """
    from pathlib import Path

    from dashboard.report import print_pdf, render_weekly_report
    from warehouse.errors import LotlineError
    from warehouse.health import read_weekly_health

    try:
        h = read_weekly_health(db, week=week)
    except LotlineError as exc:
        fail(exc)
    path = Path(out or f"tool_health_{h.week.label}.html")
    path.write_text(render_weekly_report(h), encoding="utf-8")
    if pdf:
        try:
            print_pdf(path, Path(pdf))
        except (RuntimeError, OSError) as exc:
            fail(exc)
    if as_json:
        echo_json({**h.to_dict(), "html": str(path), "pdf": pdf})
        return
    click.echo(
        f"Week {h.week.label}: wrote {path} ({path.stat().st_size / 1e6:.1f} MB)"
        + (f" and {pdf}" if pdf else "")
    )
    for line in h.attention or ["No tool flagged this week."]:
        click.echo(f"  {line}")
    click.echo("Signals advise; the fab's OCAP and qualified engineers decide.")


@cli.command("capacity")
@click.option("--beams", type=click.IntRange(min=1), required=True, help="Parallel beams.")
@click.option(
    "--current-density",
    "current_density",
    type=click.FloatRange(min=0, min_open=True),
    required=True,
    help="Beam current density J at the sample (A/cm²).",
)
@click.option(
    "--contrast", type=click.FloatRange(0, 1, min_open=True), required=True, help="Defect contrast C (0..1]."
)
@click.option(
    "--pixel-nm",
    "pixel_nm",
    type=click.FloatRange(min=0, min_open=True),
    required=True,
    help="Pixel size (nm), set by the smallest defect to catch.",
)
@click.option(
    "--care-area-cm2",
    "care_area",
    type=click.FloatRange(min=0, min_open=True),
    required=True,
    help="Area inspected per wafer (cm²).",
)
@click.option(
    "--overhead-s",
    "overhead_s",
    type=click.FloatRange(min=0),
    default=0.0,
    show_default=True,
    help="Load and align time per wafer (s).",
)
@click.option(
    "--reference",
    default=None,
    metavar="BEAMS,J,C,PIXEL_NM,CM2_PER_H",
    help="A measured operating point of your tool that calibrates the rate constant.",
)
@click.option("--json", "as_json", is_flag=True, help="Print the plan as JSON.")
def capacity_cmd(beams, current_density, contrast, pixel_nm, care_area, overhead_s, reference, as_json: bool):
    """E-beam inspection capacity: time per wafer, wafers per hour, and the cost of halving the defect size.

    Shot-noise-limited: area rate = k * beams * J * C² * pixel⁴ (common practice); k comes from --reference.
    Without it only the relative cost is printed. lotline operates no equipment.

    Example: lotline capacity --beams 9 --current-density 0.5 --contrast 0.3 --pixel-nm 10 --care-area-cm2 5
    --reference 1,0.5,0.3,10,0.8
    """
    import polars as pl

    from spc import inspection

    slowdown = float(inspection.defect_size_slowdown(0.5))
    out: dict = {
        "beams": beams,
        "current_density_a_per_cm2": current_density,
        "contrast": contrast,
        "pixel_nm": pixel_nm,
        "care_area_cm2": care_area,
        "overhead_s": overhead_s,
        "halving_defect_size_slowdown": slowdown,
    }
    if reference:
        b, j, c, p, rate = _spc_floats(reference, "--reference", 5)
        k = inspection.calibrate_area_rate_constant(inspection.BeamSetup(int(b), j, c, p), rate)
        opts = pl.DataFrame(
            {
                "beams": [beams, beams],
                "current_density_a_per_cm2": current_density,
                "contrast": contrast,
                "pixel_nm": [pixel_nm, pixel_nm / 2.0],
                "care_area_cm2": care_area,
                "overhead_s": overhead_s,
            }
        )
        plan = inspection.plan_inspection_capacity(opts, rate_constant=k).to_dicts()
        out.update(
            rate_constant=k,
            area_rate_cm2_per_h=plan[0]["area_rate_cm2_per_h"],
            s_per_wafer=plan[0]["total_s_per_wafer"],
            wafers_per_hour=plan[0]["wafers_per_hour"],
            half_size_s_per_wafer=plan[1]["total_s_per_wafer"],
            half_size_wafers_per_hour=plan[1]["wafers_per_hour"],
        )
    if as_json:
        echo_json(out)
        return
    if reference:
        click.echo(
            f"area rate {out['area_rate_cm2_per_h']:.4g} cm²/h: {out['s_per_wafer']:.4g} s per wafer, "
            f"{out['wafers_per_hour']:.4g} wafers/hour"
        )
        click.echo(
            f"half the defect size (pixel {pixel_nm / 2:g} nm): {out['half_size_s_per_wafer']:.4g} s per wafer, "
            f"{out['half_size_wafers_per_hour']:.4g} wafers/hour ({slowdown:g}x the scan time)"
        )
    else:
        click.echo(
            f"half the defect size: {slowdown:g}x the scan time (rate ∝ pixel⁴ at fixed current density)."
        )
        click.echo("Pass --reference BEAMS,J,C,PIXEL_NM,CM2_PER_H measured on your tool for times per wafer.")


# --- dashboard commands ---


@cli.command("serve")
@db_option
@click.option("--port", type=int, default=8501, show_default=True, help="TCP port to listen on.")
@click.option(
    "--address",
    default="127.0.0.1",
    show_default=True,
    help="Address to bind. Keep 127.0.0.1 unless an authenticating reverse proxy fronts the server.",
)
@click.option(
    "--user-header",
    default=None,
    help="Request header, set by a trusted authenticating reverse proxy, that names the signed-in user.",
)
def serve_cmd(db, port: int, address: str, user_header: str | None):
    """Serve the dashboard (Streamlit) over the warehouse, bound to 127.0.0.1 by default.

    Example: lotline serve --db demo_run/lotline.duckdb --port 8501
    """
    from dashboard.server import run_server
    from warehouse.store import resolve_db_path

    path = resolve_db_path(db)
    if not path.exists():
        fail(
            FileNotFoundError(
                f"{path}: warehouse not found. Fix: run `lotline demo` or `lotline ingest PATH` first, or pass --db."
            )
        )
    click.echo(f"Serving {path} at http://{address}:{port} (Ctrl-C stops)")
    sys.exit(run_server(path, port=port, address=address, user_header=user_header))


# --- lake commands ---


@cli.group("lake")
def lake_group():
    """Parquet lake: export the warehouse for a distributed engine (see the README, "Scaling").

    Example: lotline lake export lake/ --db lotline.duckdb
    """


@lake_group.command("export")
@click.argument("lake_dir", metavar="DIR", type=click.Path(file_okay=False))
@db_option
@click.option("--json", "as_json", is_flag=True, help="Print rows and files written per table as JSON.")
def lake_export_cmd(lake_dir, db, as_json: bool):
    """Append what is new in the warehouse to the lake at DIR (never rewrites its files).

    Example: lotline lake export lake/ --db lotline.duckdb
    """
    from warehouse import lake, store
    from warehouse.errors import LotlineError

    try:
        summary = lake.export_lake(store.resolve_db_path(db), lake_dir)
    except LotlineError as exc:
        fail(exc)
    if as_json:
        echo_json(summary)
        return
    rows = sum(v["rows"] for v in summary.values())
    files = sum(v["files"] for v in summary.values())
    click.echo(f"lake {lake_dir}: {rows} rows in {files} new files")
    for name, v in summary.items():
        if v["files"]:
            click.echo(f"  {name}: {v['rows']} rows, {v['files']} files")


def _lake_evaluate(lake_dir, master: str, as_json: bool) -> None:
    """`lotline evaluate --engine spark`: the plan over the lake on a Spark session."""
    from warehouse.errors import ConfigError, LotlineError

    if not lake_dir:
        fail(
            ConfigError(
                "--engine spark needs a lake", fix="pass --lake DIR (made by `lotline lake export DIR`)"
            ),
            2,
        )
    try:
        from warehouse import spark_engine

        s = spark_engine.evaluate_lake(lake_dir, master=master)
    except LotlineError as exc:
        fail(exc)
    if as_json:
        echo_json(s)
        return
    click.echo(
        f"spark evaluation of {lake_dir}: {s['series']} series, {s['points']} points, {s['signals']} signals "
        f"written to {s['table']} snapshot {s['snapshot']} (session {s['session_seconds']} s, "
        f"evaluation {s['seconds']} s)"
    )
    for n in s["notices"]:
        click.echo(f"notice: {n}")
    click.echo(MONITORING_CAUTION)


# --- demo commands ---


@cli.command("demo")
@click.option(
    "--dir",
    "out_dir",
    type=click.Path(file_okay=False),
    default="demo_run",
    show_default=True,
    help="Where the demo writes: DIR/exports/, DIR/lotline.duckdb, DIR/truth.json.",
)
@click.option(
    "--days", type=click.IntRange(5, 400), default=60, show_default=True, help="Days of fab history."
)
@click.option("--seed", type=int, default=7, show_default=True, help="Seed of the generator (deterministic).")
@click.option("--no-serve", is_flag=True, help="Stop after the summary instead of serving the dashboard.")
@click.option(
    "--score",
    is_flag=True,
    help="Score the existing warehouse in --dir against its truth.json (does not regenerate).",
)
@click.option("--port", type=int, default=8501, show_default=True, help="Dashboard port.")
@click.option("--json", "as_json", is_flag=True, help="Print the summary (or score) as JSON.")
def demo_cmd(out_dir, days: int, seed: int, no_serve: bool, score: bool, port: int, as_json: bool):
    """Run lotline's whole job on an invented fab: generate, ingest, plan, evaluate, summarise, serve.

    With --score, compare the open excursions of an existing demo warehouse with the injected faults:
    detected or missed, delay in lots and hours, attribution, false excursions per 1,000 chart points.

    Example: lotline demo --dir demo_run --days 60 --no-serve && lotline demo --dir demo_run --score
    """
    from pathlib import Path

    from warehouse.errors import LotlineError

    if score:
        from demo_fab.score import render_score, score_demo

        if not (Path(out_dir) / "truth.json").exists():
            fail(
                FileNotFoundError(
                    f"{out_dir}/truth.json not found. Fix: run `lotline demo --dir {out_dir}` first."
                ),
                2,
            )
        try:
            result = score_demo(out_dir)
        except LotlineError as exc:
            fail(exc)
        if as_json:
            echo_json(result)
        else:
            click.echo(render_score(result))
        return

    from demo_fab.pipeline import render_summary, run_demo

    try:
        run = run_demo(out_dir, days=days, seed=seed, progress=lambda m: click.echo(m, err=True))
    except LotlineError as exc:
        fail(exc)
    if as_json:
        echo_json(run.to_dict())
    else:
        click.echo(render_summary(run))
    if no_serve:
        return
    from dashboard.server import run_server

    click.echo(f"Dashboard: http://127.0.0.1:{port}/  (Ctrl-C stops; bound to 127.0.0.1 only)")
    sys.exit(run_server(run.db, port=port))


def main():
    cli()


if __name__ == "__main__":
    main()
