"""``tallywave sql`` is read-only: writes, file access, settings and extensions are refused.

Every refused statement is checked twice: through :func:`pipeline.query.read_only_query`
(UserError, one line starting "refused") and through the CLI (exit code 2, one line on stderr,
no traceback), and the database file is compared before and after.
"""

from __future__ import annotations

import hashlib
from pathlib import Path

import pandas as pd
import pytest

from tallywave.pipeline import store
from tallywave.pipeline.cli import main
from tallywave.pipeline.errors import UserError
from tallywave.pipeline.ingest import ingest_spec
from tallywave.pipeline.query import read_only_query

INJECTED = "x'); DROP TABLE raw.reports; --"
REGIONS = ["Quillby", INJECTED, "Ros' \"Hollow\"; DELETE FROM core.observations"]


@pytest.fixture(scope="module")
def db(tmp_path_factory: pytest.TempPathFactory) -> Path:
    """A small database with one daily feed, including a region named with SQL fragments."""
    root = tmp_path_factory.mktemp("sqlro")
    (root / "feed").mkdir()
    rows = "".join('"' + r.replace('"', '""') + f'",2026-01-0{i + 1},{i + 1}\n'
                   for i, r in enumerate(REGIONS))
    (root / "feed" / "cases_2026-01-05.csv").write_text("region,date,value\n" + rows)
    (root / "outside.csv").write_text("a,b\n1,2\n")
    pd.DataFrame({"a": [1, 2]}).to_parquet(root / "outside.parquet")
    (root / "feeds.toml").write_text(
        '[source.s]\npath = "feed/*.csv"\nformat = "csv"\nsignal = "cases"\n'
        'value_kind = "daily"\nas_of = { from = "filename", pattern = "%Y-%m-%d" }\n'
        'columns = { region = "region", ref_date = "date", value = "value" }\n')
    path = root / "tw.duckdb"
    con = store.connect(path)
    s = ingest_spec(con, root / "feeds.toml")
    assert [f.status for f in s.files] == ["accepted"]
    con.execute("CHECKPOINT")
    con.close()
    return path


@pytest.fixture(scope="module")
def baseline(db: Path) -> tuple[str, list]:
    """The database file's hash and table contents before any refused statement ran."""
    return _digest(db), _contents(db)


def _digest(path: Path) -> str:
    """SHA-256 of the database file's bytes."""
    return hashlib.sha256(path.read_bytes()).hexdigest()


def _contents(path: Path) -> list:
    """Every row of the ingest tables, sorted."""
    con = store.connect(path, read_only=True)
    try:
        return [con.execute(f"SELECT * FROM {t} ORDER BY ALL").fetchall()
                for t in ("raw.feed_files", "raw.reports", "raw.rejected_rows",
                          "core.observations")]
    finally:
        con.close()


def _refused(db: Path, tmp: Path) -> list[tuple[str, str]]:
    """(case id, SQL) pairs that `tallywave sql` must refuse."""
    out = str(tmp / "leak.csv").replace("'", "''")
    return [
        ("insert", "INSERT INTO raw.reports SELECT * FROM raw.reports"),
        ("update", "UPDATE core.observations SET value = 0"),
        ("delete", "DELETE FROM raw.feed_files"),
        ("create", "CREATE TABLE core.evil AS SELECT 1 AS x"),
        ("create_temp", "CREATE TEMP TABLE t AS SELECT 1"),
        ("drop", "DROP TABLE raw.reports"),
        ("alter", "ALTER TABLE raw.reports ADD COLUMN z INTEGER"),
        ("attach", f"ATTACH '{tmp / 'other.duckdb'}' AS other"),
        ("detach", "DETACH tw"),
        ("copy_to", f"COPY raw.reports TO '{out}'"),
        ("copy_query_to", f"COPY (SELECT * FROM raw.reports) TO '{out}' (FORMAT CSV)"),
        ("export_db", f"EXPORT DATABASE '{tmp / 'dump'}'"),
        ("install", "INSTALL httpfs"),
        ("load", "LOAD httpfs"),
        ("set", "SET threads = 1"),
        ("set_unlock", "SET enable_external_access = true"),
        ("reset", "RESET lock_configuration"),
        ("pragma", "PRAGMA database_list"),
        ("call_checkpoint", "CHECKPOINT"),
        ("vacuum", "VACUUM"),
        ("use", "USE memory"),
        ("begin", "BEGIN TRANSACTION"),
        ("read_csv_passwd", "SELECT * FROM read_csv('/etc/passwd')"),
        ("read_csv_auto", f"SELECT * FROM read_csv_auto('{db.parent / 'outside.csv'}')"),
        ("read_parquet", f"SELECT * FROM read_parquet('{db.parent / 'outside.parquet'}')"),
        ("read_text", "SELECT * FROM read_text('/etc/hostname')"),
        ("read_blob", "SELECT * FROM read_blob('/etc/passwd')"),
        ("glob", "SELECT * FROM glob('/etc/*')"),
        ("replacement_scan", f"SELECT * FROM '{db.parent / 'outside.csv'}'"),
        ("sniff_csv", "SELECT * FROM sniff_csv('/etc/passwd')"),
        ("multi_with_write", "SELECT 1; DROP TABLE raw.reports"),
        ("multi_write_first", "DELETE FROM raw.reports; SELECT 1"),
        ("explain_analyze_delete", "EXPLAIN ANALYZE DELETE FROM raw.reports"),
        ("explain_drop", "EXPLAIN DROP TABLE raw.reports"),
        ("commented_drop", "/* harmless */ -- really\n DROP TABLE raw.reports"),
        ("cte_insert", ("WITH x AS (SELECT 1) INSERT INTO raw.rejected_rows "
                        "SELECT 1, 1, 'x', 'y' FROM x")),
        ("nextval", "SELECT nextval('raw.file_id_seq')"),
    ]


def _cases() -> list[str]:
    """The case ids (paths do not matter for the ids)."""
    return [c[0] for c in _refused(Path("/x/y"), Path("/x"))]


@pytest.mark.parametrize("name", _cases())
def test_refused(name: str, db: Path, baseline: tuple[str, list], tmp_path: Path,
                 capsys: pytest.CaptureFixture) -> None:
    """Refused through the API and the CLI (exit 2, one line), database unchanged."""
    sql = dict(_refused(db, tmp_path))[name]
    with pytest.raises(UserError) as info:
        read_only_query(db, sql)
    msg = str(info.value)
    assert msg.startswith("refused: ") and "\n" not in msg
    assert info.value.exit_code == 2
    rc = main(["--db", str(db), "sql", sql])
    out, err = capsys.readouterr()
    assert rc == 2
    assert err.startswith("tallywave: error: refused: ") and err.count("\n") == 1
    assert "Traceback" not in err and out == ""
    # Same bytes in the database file and no write-ahead log: nothing changed.
    assert _digest(db) == baseline[0] and not Path(f"{db}.wal").exists()
    assert not (tmp_path / "leak.csv").exists() and not (tmp_path / "dump").exists()
    assert not (tmp_path / "other.duckdb").exists()


def test_refusal_names_the_statement(db: Path) -> None:
    """The message names the statement kind (INSTALL as INSTALL, a CTE by its write)."""
    for sql, word in [("DROP TABLE raw.reports", "DROP"), ("INSTALL httpfs", "INSTALL"),
                      ("INSERT INTO raw.reports SELECT * FROM raw.reports", "INSERT"),
                      ("WITH x AS (SELECT 1) DELETE FROM raw.reports", "DELETE"),
                      ("ATTACH 'x.duckdb'", "ATTACH")]:
        with pytest.raises(UserError, match=rf"^refused: {word} statement; "):
            read_only_query(db, sql)
    with pytest.raises(UserError, match="^refused: .*file system operations are disabled"):
        read_only_query(db, "SELECT * FROM read_csv('/etc/passwd')")


def test_select_works(db: Path, capsys: pytest.CaptureFixture) -> None:
    """Queries, EXPLAIN and CTEs run and return the stored values."""
    df = read_only_query(db, "SELECT region, value FROM core.observations ORDER BY value")
    assert df["region"].tolist() == REGIONS
    assert df["value"].tolist() == [1.0, 2.0, 3.0]
    assert read_only_query(db, "EXPLAIN SELECT * FROM raw.reports").shape[0] >= 1
    assert read_only_query(db, "WITH t AS (SELECT 2 AS k) SELECT k * 21 AS v FROM t"
                           )["v"].tolist() == [42]
    assert main(["--db", str(db), "sql", "SELECT count(*) AS n FROM raw.reports"]) == 0
    out = capsys.readouterr().out
    assert out.split() == ["n", "3"]


def test_bad_sql_is_a_one_line_user_error(db: Path, capsys: pytest.CaptureFixture) -> None:
    """Syntax errors, unknown tables and empty SQL: one-line user errors, exit 2."""
    for sql in ("SELEC 1", "SELECT * FROM no_such_table", "", "   ;  "):
        with pytest.raises(UserError) as info:
            read_only_query(db, sql)
        assert "\n" not in str(info.value)
        assert main(["--db", str(db), "sql", sql]) == 2
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "Traceback" not in err


def test_injection_through_region_names_is_data(db: Path) -> None:
    """The region named with SQL fragments was stored verbatim, the tables it names still
    exist, and a query for it by value finds exactly that row."""
    esc = INJECTED.replace("'", "''")
    df = read_only_query(db, f"SELECT region, ref_date, value FROM raw.reports "
                             f"WHERE region = '{esc}'")
    assert df["region"].tolist() == [INJECTED] and df["value"].tolist() == [2.0]
    counts = read_only_query(db, "SELECT (SELECT count(*) FROM raw.reports) AS r, "
                                 "(SELECT count(*) FROM core.observations) AS o")
    assert counts.iloc[0].tolist() == [3, 3]
    names = read_only_query(db, "SELECT DISTINCT region FROM core.observations ORDER BY 1")
    assert sorted(names["region"]) == sorted(REGIONS)


def test_database_unchanged_after_everything(db: Path, baseline: tuple[str, list]) -> None:
    """Runs last in this module: every table still holds exactly what the feed put there."""
    assert _digest(db) == baseline[0]
    assert _contents(db) == baseline[1]
    assert len(baseline[1][1]) == 3  # raw.reports: the three rows of the feed
