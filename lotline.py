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


# --- spc commands ---


# --- monitoring commands ---


# --- drill-down commands ---


# --- tool-health commands ---


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
        fail(FileNotFoundError(f"{path}: warehouse not found. Fix: run `lotline demo` or `lotline ingest PATH` first, or pass --db."))
    click.echo(f"Serving {path} at http://{address}:{port} (Ctrl-C stops)")
    sys.exit(run_server(path, port=port, address=address, user_header=user_header))


# --- demo commands ---


def main():
    cli()


if __name__ == "__main__":
    main()
