"""SQL for reading edge tables through DuckDB, and the checks on their schema."""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import dataclass, replace
from pathlib import Path

import duckdb

from ..errors import BadInputError
from .sources import InputFile

INT_TYPES = {
    "TINYINT",
    "SMALLINT",
    "INTEGER",
    "BIGINT",
    "UTINYINT",
    "USMALLINT",
    "UINTEGER",
    "UBIGINT",
    "HUGEINT",
    "UHUGEINT",
}
STRING_TYPES = {"VARCHAR"}
NUMBER_TYPES = INT_TYPES | {"FLOAT", "DOUBLE", "REAL"}


def sql_str(s: str) -> str:
    """A SQL string literal."""
    return "'" + s.replace("'", "''") + "'"


def sql_ident(s: str) -> str:
    """A quoted SQL identifier."""
    return '"' + s.replace('"', '""') + '"'


def scan_sql(files: list[InputFile]) -> str:
    """A FROM-clause expression reading every file (one reader per format, UNION ALL BY NAME)."""
    parts = []
    pq = [f for f in files if f.kind == "parquet"]
    csv = [f for f in files if f.kind == "csv"]
    if pq:
        lst = ", ".join(sql_str(str(f.path)) for f in pq)
        parts.append(f"SELECT * FROM read_parquet([{lst}], union_by_name = true)")
    groups: dict[tuple[str | None, bool | None], list[InputFile]] = {}
    for f in csv:  # one reader per (delimiter, header) that sniff_text decided
        groups.setdefault((f.delim, f.header), []).append(f)
    for (delim, header), fs in groups.items():
        lst = ", ".join(sql_str(str(f.path)) for f in fs)
        opts = "" if delim is None else f", delim = {sql_str(delim)}"
        opts += "" if header is None else f", header = {str(header).lower()}"
        parts.append(f"SELECT * FROM read_csv([{lst}], comment = '#', union_by_name = true{opts})")
    return "(" + " UNION ALL BY NAME ".join(parts) + ")"


def _sniff(
    con: duckdb.DuckDBPyConnection, f: InputFile, delim: str | None
) -> tuple[str, bool, list[tuple[str, str]]]:
    opt = "" if delim is None else f", delim = {sql_str(delim)}"
    try:
        row = con.execute(
            "SELECT Delimiter, HasHeader, Columns "
            f"FROM sniff_csv({sql_str(str(f.path))}, comment = '#'{opt})"
        ).fetchall()[0]
    except duckdb.Error as e:
        raise BadInputError(
            f"{f.path}: cannot be read as a delimited text edge list ({str(e).splitlines()[0]})",
            hint="check that the file is a complete CSV/TSV file (or Parquet)",
        ) from None
    return str(row[0]), bool(row[1]), [(c["name"], c["type"]) for c in row[2]]


def sniff_text(
    con: duckdb.DuckDBPyConnection,
    files: list[InputFile],
    header: str,
    names: Sequence[str],
    min_columns: int = 2,
) -> list[InputFile]:
    """Decide each text file's delimiter and whether its first line is a header.

    A sniffer guesses "header" whenever every column holds text, which would silently drop the
    first edge of a headerless list of string keys. So a header is taken only when the first
    line does not parse like the rest (text over numbers), when it holds ``names`` (the columns
    the user asked for), or when ``header`` is "yes"; otherwise the ambiguity is an error.
    A single column is retried with a space delimiter ("1 2" edge lists).
    """
    out: list[InputFile] = []
    decided: tuple[Path, bool] | None = None
    for f in files:
        if f.kind != "csv":
            out.append(f)
            continue
        delim, has_header, cols = _sniff(con, f, None)
        if len(cols) < min_columns:
            d2 = _sniff(con, f, " ")
            if len(d2[2]) >= min_columns:
                delim, has_header, cols = d2
            else:
                raise BadInputError(
                    f"{f.path}: found one column ({cols[0][0]!r}), not an edge list: rows "
                    "must hold the same number of fields, separated by a comma, tab or space",
                    hint="fix the malformed rows (a sniffer reads the file as one column when row "
                    "lengths differ), or export the edges as Parquet",
                )
        if header != "auto":
            h = header == "yes"
        elif not has_header:
            h = False
        elif any(t.upper() != "VARCHAR" for _n, t in cols) or set(names) <= {n for n, _t in cols}:
            h = True
        else:
            first = ", ".join(repr(n) for n, _t in cols)
            raise BadInputError(
                f"{f.path}: cannot tell whether the first line ({first}) is a header or an edge "
                "(every column holds text)",
                hint="pass --header yes if it names the columns or --header no if it is an edge "
                "(or name its columns with --src/--dst)",
            )
        if decided is not None and decided[1] != h:
            with_h, without = (f.path, decided[0]) if h else (decided[0], f.path)
            raise BadInputError(
                f"{with_h} starts with a header line but {without} does not",
                hint="give every text file a header or none, or pass --header yes/no",
            )
        decided = (f.path, h)
        out.append(replace(f, delim=delim, header=h))
    return out


def key_class(duck_type: str) -> str | None:
    t = duck_type.upper()
    if t in INT_TYPES or t.startswith("DECIMAL") and t.endswith(",0)"):
        return "int64"
    if t in STRING_TYPES:
        return "string"
    return None


@dataclass(frozen=True)
class Columns:
    src: str
    dst: str
    weight: str | None
    key_type: str  # "int64" | "string"


def describe(con: duckdb.DuckDBPyConnection, files: list[InputFile]) -> list[tuple[str, str]]:
    """Column names and DuckDB types of the files read together (errors name the file)."""
    try:
        rows = con.execute(f"DESCRIBE SELECT * FROM {scan_sql(files)}").fetchall()
    except duckdb.Error as e:
        where = str(files[0].path) if len(files) == 1 else f"{len(files)} input files"
        raise BadInputError(
            f"{where}: cannot be read as {files[0].kind.upper()} ({str(e).splitlines()[0]})",
            hint="check that the file is a complete Parquet file or a delimited text edge list",
        ) from None
    return [(r[0], r[1]) for r in rows]


def choose_columns(
    schema: list[tuple[str, str]], where: str, src: str | None, dst: str | None, weight: str | None
) -> Columns:
    """Pick the src/dst/weight columns (defaults: src/dst by name, else the first two)."""
    names = [n for n, _ in schema]
    types = dict(schema)
    found = ", ".join(names)

    def need(col: str, flag: str) -> str:
        if col not in types:
            raise BadInputError(
                f"{where} has no column '{col}' (found: {found})", hint=f"pass {flag} COLUMN"
            )
        return col

    if src is None and dst is None and "src" in types and "dst" in types:
        src, dst = "src", "dst"
    if src is None or dst is None:
        rest = [n for n in names if n not in (src, dst, weight)]
        if len(rest) < 2 - (src is not None) - (dst is not None):
            raise BadInputError(
                f"{where} has too few columns for an edge list (found: {found})",
                hint="an edge table needs a source and a destination column",
            )
        if src is None:
            src = rest.pop(0)
        if dst is None:
            dst = rest.pop(0)
    need(src, "--src")
    need(dst, "--dst")
    if weight is not None:
        need(weight, "--weight")
        if types[weight].upper() not in NUMBER_TYPES and not types[weight].upper().startswith(
            "DECIMAL"
        ):
            raise BadInputError(
                f"{where}: weight column '{weight}' has type {types[weight]}, not a number",
                hint="weights must be positive finite numbers",
            )
    ks, kd = key_class(types[src]), key_class(types[dst])
    for col, k in ((src, ks), (dst, kd)):
        if k is None:
            raise BadInputError(
                f"{where}: key column '{col}' has type {types[col]}; "
                "keys must be integers or strings",
                hint="cast the column to BIGINT or VARCHAR before building",
            )
    if ks != kd:
        raise BadInputError(
            f"{where}: keys of mixed types: '{src}' is {types[src]} but '{dst}' is {types[dst]}",
            hint="make both key columns integers or both strings",
        )
    assert ks is not None
    return Columns(src=src, dst=dst, weight=weight, key_type=ks)


def check_same_key_types(
    con: duckdb.DuckDBPyConnection, files: list[InputFile], cols: Columns
) -> None:
    """Every Parquet file must agree on the key type (cheap: reads footers only).

    The error names two files that disagree, so the user knows where to look.
    """
    seen: dict[str, tuple[str, str]] = {}  # key class -> (first file with it, its DuckDB type)
    for f in files:
        if f.kind != "parquet":
            continue
        schema = dict(describe(con, [f]))
        for col in (cols.src, cols.dst):
            if col not in schema:
                raise BadInputError(
                    f"{f.path} has no column '{col}' (found: {', '.join(schema)})",
                    hint="all edge files must share the key columns",
                )
            k = key_class(schema[col]) or schema[col]
            if seen and k not in seen:
                other, other_type = next(iter(seen.values()))
                raise BadInputError(
                    f"keys of mixed types: column '{col}' is {schema[col]} in {f.path} but "
                    f"{other_type} in {other}",
                    hint="make every file's key columns one type (all integers or all strings)",
                )
            seen.setdefault(k, (str(f.path), schema[col]))
    if seen and cols.key_type not in seen:  # the text inputs hold keys of the other type
        other, other_type = next(iter(seen.values()))
        raise BadInputError(
            f"keys of mixed types: {other} has {other_type} keys but the text edge files hold "
            f"{'integer' if cols.key_type == 'int64' else 'text'} keys",
            hint="make every file's key columns one type (all integers or all strings)",
        )


def arrow_reader(con: duckdb.DuckDBPyConnection, sql: str, batch_rows: int):  # type: ignore[no-untyped-def]
    """Stream a query's result as Arrow record batches (DuckDB 1.x and 2.x name this apart)."""
    rel = con.sql(sql)
    if hasattr(rel, "to_arrow_reader"):
        return rel.to_arrow_reader(batch_rows)
    return rel.fetch_arrow_reader(batch_rows)


def arrow_table(con: duckdb.DuckDBPyConnection, sql: str):  # type: ignore[no-untyped-def]
    """A query's whole result as an Arrow table (only for N-sized or smaller results)."""
    rel = con.sql(sql)
    if hasattr(rel, "to_arrow_table"):
        return rel.to_arrow_table()
    return rel.arrow()
