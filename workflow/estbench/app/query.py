"""``estbench query``: one read-only SQL query against the store, CSV on stdout.

Three guards, each closing what the others might miss:

- only a query runs: one SELECT (also WITH, FROM-first, DESCRIBE, SHOW,
  SUMMARIZE, PIVOT) or EXPLAIN; any other statement (COPY, EXPORT, ATTACH,
  INSTALL, LOAD, SET, PRAGMA, CREATE, INSERT, UPDATE, DELETE, DROP, CHECKPOINT,
  VACUUM, transactions) is refused before anything runs;
- the store is opened read-only, so nothing can change it;
- DuckDB's own settings: no external access (no file but the store is read or
  written, no database attached, no extension installed or loaded), the
  configuration locked, no extension installed or loaded automatically.
"""

from __future__ import annotations

from pathlib import Path

import duckdb
import pyarrow as pa

from estbench.analyse.store import open_read_only, reading_store
from estbench.core.errors import UserError

#: DuckDB settings of the query connection (DuckDB's "Securing DuckDB" page).
QUERY_SETTINGS = {"enable_external_access": False, "lock_configuration": True,
                  "autoinstall_known_extensions": False, "autoload_known_extensions": False}
#: Statement types that only read. MULTI is PIVOT, which DuckDB runs as a few reads.
READING = ("SELECT", "EXPLAIN", "MULTI")
_WHAT_RUNS = "one SELECT (also WITH, FROM, DESCRIBE, SHOW, SUMMARIZE, PIVOT) or EXPLAIN"


def statement_problem(sql: str) -> str | None:
    """Why *sql* is not one read-only query, or None if it is."""
    try:
        kinds = [statement.type.name for statement in duckdb.extract_statements(sql)]
    except duckdb.Error as exc:
        return f"query failed: {str(exc).splitlines()[0]}"
    except ValueError:  # a statement type this DuckDB package cannot even name
        return f"`estbench query` only reads the store: it runs {_WHAT_RUNS}, not this statement"
    if len(kinds) != 1:
        return f"`estbench query` runs {_WHAT_RUNS}; got {len(kinds)} statements"
    kind = kinds[0]
    if kind not in READING:
        return f"`estbench query` only reads the store: it runs {_WHAT_RUNS}, not a statement of type {kind}"
    return None


def _csv_problem(table: pa.Table) -> str | None:
    """A column a CSV cannot hold (a list, struct or map), named with a way out."""
    for field in table.schema:
        if pa.types.is_nested(field.type):
            return (f"column {field.name!r} holds {field.type}, which a CSV cannot; "
                    f"cast it to text in the query, e.g. {field.name}::VARCHAR")
    return None


def run_query(store: Path, sql: str) -> pa.Table:
    """The result of the read-only query *sql* on *store*; ``UserError`` if *sql* is
    not one, if DuckDB refuses it, or if its result cannot be written as CSV."""
    problem = statement_problem(sql)
    if problem:
        raise UserError(problem)
    con = open_read_only(store, QUERY_SETTINGS)
    try:
        with reading_store(store):
            table = con.sql(sql).to_arrow_table()
    except duckdb.PermissionException as exc:
        raise UserError(f"query failed: {str(exc).splitlines()[0]} (`estbench query` reads the "
                        f"store's tables only)") from None
    except duckdb.Error as exc:
        raise UserError(f"query failed: {str(exc).splitlines()[0]}") from None
    finally:
        con.close()
    problem = _csv_problem(table)
    if problem:
        raise UserError(f"query failed: {problem}")
    return table
