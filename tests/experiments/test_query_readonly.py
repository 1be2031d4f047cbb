"""`query` and `compare` only read: refused statements, and stores unchanged by every command.

Every statement that would write (``COPY ... TO``, ``CREATE``, ``INSERT``, ``EXPORT``), attach a
database, install or load an extension, change a setting, or read a file other than the folder's
tables is refused with exit code 2 and one line, and neither the results folder nor the current
folder gains, loses or changes a file. The DuckDB settings involved are those of the "Securing
DuckDB" page of the DuckDB documentation (``enable_external_access``, ``lock_configuration``).
"""

from __future__ import annotations

import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from _checksums import changes, tree_checksums
from _runner_helpers import write_spec

from propensim.experiments import readonly_query
from propensim.experiments.cli import main
from propensim.experiments.compare import compare_folder
from propensim.experiments.store import StoreError, load, query


@pytest.fixture(scope="module")
def folder(tmp_path_factory):
    """A finished two-arm sweep with rounds and ledger parts and a comparison.csv."""
    tmp = tmp_path_factory.mktemp("readonly")
    spec = write_spec(tmp)
    out = tmp / "res"
    argv = ["run", str(spec), "--out", str(out), "--workers", "1", "--quiet"]
    assert main([*argv, "--set", "collect.ledger=true"]) == 0
    assert (out / "rounds").is_dir() and (out / "ledger").is_dir()
    assert (out / "comparison.csv").is_file()
    return out


@pytest.fixture
def outside(tmp_path_factory):
    """A Parquet file outside the results folder."""
    path = tmp_path_factory.mktemp("outside") / "secret.parquet"
    pq.write_table(pa.table({"secret": [42]}), path)
    return path


@pytest.fixture
def cwd(tmp_path, monkeypatch):
    """An empty current folder: a relative path in the SQL would land here."""
    here = tmp_path / "cwd"
    here.mkdir()
    monkeypatch.chdir(here)
    return here


# (SQL, text the one-line error must hold); {folder} and {outside} are filled in per test.
ATTACKS = [
    ("COPY (SELECT * FROM runs) TO 'copied.csv'", "COPY would write a file"),
    ("COPY runs TO '{folder}/runs.parquet' (FORMAT parquet, USE_TMP_FILE false)", "COPY would"),
    ("COPY (SELECT 1 AS a) TO '{folder}/extra.csv'", "COPY would write a file"),
    ("EXPORT DATABASE 'exported'", "EXPORT would write files"),
    ("CREATE TABLE t AS SELECT * FROM runs", "CREATE would create"),
    ("CREATE VIEW v AS SELECT 1", "CREATE would create"),
    ("INSERT INTO runs SELECT * FROM runs", "INSERT would write"),
    ("DROP VIEW runs", "DROP would drop"),
    ("ATTACH 'attached.db' AS a", "ATTACH would attach a database"),
    ("ATTACH ':memory:' AS m", "ATTACH would attach a database"),
    ("INSTALL httpfs", "INSTALL would install or load an extension"),
    ("LOAD json", "LOAD would install or load an extension"),
    ("LOAD httpfs", "LOAD would install or load an extension"),
    ("UPDATE EXTENSIONS", "UPDATE is not a SELECT"),
    ("SET enable_external_access = true", "SET would change a setting"),
    ("SET lock_configuration = false", "SET would change a setting"),
    ("RESET lock_configuration", "RESET would change a setting"),
    ("PRAGMA database_list", "PRAGMA is not a SELECT"),
    ("CALL pragma_version()", "CALL is not a SELECT"),
    # the first statement would read only, but nothing runs when one statement is refused
    ("SELECT * FROM runs; COPY (SELECT 1 AS a) TO 'later.csv'", "COPY would write a file"),
    ("SELECT * FROM read_csv_auto('/etc/passwd')", '"/etc/passwd"'),
    ("SELECT * FROM read_text('/etc/hostname')", '"/etc/hostname"'),
    ("SELECT * FROM glob('/etc/*')", "opens a file"),
    ("SELECT * FROM read_parquet('{outside}')", "opens a file"),
    ("SELECT * FROM '{outside}'", "opens a file"),
    # inside the folder, but not one of its tables (and not through a view)
    ("SELECT * FROM read_text('{folder}/manifest.json')", "manifest.json"),
    ("SELECT * FROM read_parquet('{folder}/runs.parquet')", "opens a file"),
    ("", "no SQL statement given"),
]


def _fill(sql: str, folder, outside) -> str:
    return sql.format(folder=folder, outside=outside)


@pytest.mark.parametrize("sql, text", ATTACKS, ids=[a[0][:40] for a in ATTACKS])
def test_cli_query_refuses_with_exit_2_and_changes_nothing(sql, text, folder, outside, cwd, capsys):
    sql = _fill(sql, folder, outside)
    before = tree_checksums(folder)
    code = main(["query", str(folder), sql])
    out, err = capsys.readouterr()
    assert code == 2, (out, err)
    assert err.startswith("propensim: error: query") and err.count("\n") == 1, err
    assert text in err and "Traceback" not in err and out == ""
    assert changes(before, tree_checksums(folder)) == []
    assert list(cwd.iterdir()) == []
    assert pq.read_table(outside).to_pylist() == [{"secret": 42}]


@pytest.mark.parametrize("sql, text", ATTACKS[::3], ids=[a[0][:40] for a in ATTACKS[::3]])
def test_python_query_refuses_with_a_one_line_store_error(sql, text, folder, outside, cwd):
    before = tree_checksums(folder)
    with pytest.raises(StoreError) as info:
        query(folder, _fill(sql, folder, outside))
    assert text in str(info.value) and "\n" not in str(info.value)
    assert changes(before, tree_checksums(folder)) == []
    assert list(cwd.iterdir()) == []


# The statement check refuses these before DuckDB sees them; with the check switched off, DuckDB's
# own settings (no external access, configuration locked) must still refuse every one.
LOCKED_DOWN = [
    "COPY (SELECT * FROM runs) TO 'copied.csv'",
    "COPY (SELECT 1 AS a) TO '{folder}/runs.parquet' (FORMAT csv, USE_TMP_FILE false)",
    "COPY (SELECT 1 AS a) TO '{folder}/extra.csv'",
    "EXPORT DATABASE 'exported'",
    "ATTACH 'attached.db' AS a",
    "INSTALL httpfs",
    "LOAD httpfs",
    "SET enable_external_access = true",
    "SET lock_configuration = false",
    "RESET enable_external_access",
    "SET allowed_directories = ['/']",
    "SELECT * FROM read_csv_auto('/etc/passwd')",
    "SELECT * FROM read_parquet('{outside}')",
    "SELECT * FROM read_parquet('{folder}/runs.parquet')",
]


@pytest.mark.parametrize("sql", LOCKED_DOWN, ids=[s[:40] for s in LOCKED_DOWN])
def test_duckdb_settings_alone_refuse_writes_attach_install_and_reads(
    sql, folder, outside, cwd, monkeypatch
):
    monkeypatch.setattr(readonly_query, "_check_statements", lambda *args: None)
    before = tree_checksums(folder)
    with pytest.raises(StoreError) as info:
        query(folder, _fill(sql, folder, outside))
    msg = str(info.value)
    assert "disabled" in msg or "locked" in msg, msg
    assert changes(before, tree_checksums(folder)) == []
    assert list(cwd.iterdir()) == []


def test_reads_still_work_over_every_view(folder, cwd):
    res = load(folder)
    tables = query(folder, "SHOW TABLES")["name"].tolist()
    assert {"ledger", "rounds", "runs", "timings"} <= set(tables)
    assert "failures" not in tables  # every run ok: no failures.parquet, so no view
    out = query(folder, "SELECT arm, count(*) AS n, avg(efficiency) AS e FROM runs GROUP BY arm")
    out = out.sort_values("arm").reset_index(drop=True)
    expected = res.runs.groupby("arm")["efficiency"].mean().sort_index()
    assert list(out["arm"]) == list(expected.index) and list(out["n"]) == [4, 4]
    assert out["e"].to_numpy() == pytest.approx(expected.to_numpy())
    n = query(folder, "WITH r AS (SELECT * FROM rounds) SELECT count(*) AS n FROM r")
    assert int(n["n"].iloc[0]) == len(res.rounds)
    q = query(folder, "SELECT sum(quantity) AS q FROM ledger")
    assert int(q["q"].iloc[0]) == int(res.ledger["quantity"].sum())
    assert len(query(folder, "SUMMARIZE runs")) == len(res.runs.columns) - 2  # without timings
    settings = query(
        folder,
        "SELECT current_setting('enable_external_access') AS ext, "
        "current_setting('lock_configuration') AS locked",
    )
    assert settings.to_dict("records") == [{"ext": False, "locked": True}]
    assert list(cwd.iterdir()) == []


def test_part_files_with_different_columns_are_unified_by_name(tmp_path):
    """As DuckDB's ``union_by_name``: a column missing from one part file is null there."""
    import shutil

    src = tmp_path / "src"
    src.mkdir()
    (src / "manifest.json").write_text('{"format": "propensim-results"}')
    (src / "rounds").mkdir()
    pq.write_table(pa.table({"run_id": ["a"], "v": [1]}), src / "rounds/part-00000.parquet")
    pq.write_table(
        pa.table({"run_id": ["b"], "v": [2.5], "w": [True]}), src / "rounds/part-00001.parquet"
    )
    out = query(src, "SELECT * FROM rounds ORDER BY run_id")
    assert out["v"].tolist() == [1.0, 2.5] and out["w"].isna().tolist() == [True, False]
    shutil.rmtree(src / "rounds")
    assert query(src, "SHOW TABLES").empty


def test_a_non_text_sql_is_refused(folder):
    with pytest.raises(StoreError, match="SQL must be text, got int"):
        query(folder, 42)


# -- nothing changes a store: compare and query ----------------------------------------------
@pytest.mark.parametrize(
    "argv",
    [
        ["query", "{folder}", "SELECT arm, avg(volume) FROM runs GROUP BY arm"],
        ["query", "{folder}", "SELECT * FROM rounds JOIN runs USING (run_id)"],
        ["query", "{folder}", "SELECT * FROM nowhere"],
        ["compare", "{folder}", "--csv", "{tmp}/cmp.csv"],
        ["compare", "{folder}", "--metric", "mean_price", "--by-point", "--csv", "{tmp}/p.csv"],
        ["compare", "{folder}", "--baseline", "nobody"],
        ["compare", "{folder}", "--metric", "no_such_metric"],
        # writes FOLDER/comparison.csv, with the same bytes `run` wrote (the same settings)
        ["compare", "{folder}"],
    ],
)
def test_compare_and_query_leave_every_file_unchanged(argv, folder, tmp_path, cwd, capsys):
    before = tree_checksums(folder)
    main([a.format(folder=folder, tmp=tmp_path) for a in argv])
    capsys.readouterr()
    assert changes(before, tree_checksums(folder)) == []
    assert list(cwd.iterdir()) == []


def test_python_compare_leaves_every_file_unchanged(folder):
    before = tree_checksums(folder)
    compare_folder(folder, ["volume"], "match", by_point=True)
    load(folder).ledger  # noqa: B018 - reading a table is all it does
    assert changes(before, tree_checksums(folder)) == []


def test_compare_with_other_options_and_no_csv_leaves_the_store_unchanged(folder, capsys):
    before = tree_checksums(folder)
    assert main(["compare", str(folder), "--metric", "mean_price", "--by-point"]) == 0
    capsys.readouterr()
    assert changes(before, tree_checksums(folder)) == []


def test_checksums_see_every_kind_of_change(tmp_path):
    """The helper itself: an added, removed or changed file, and a new empty folder, all count."""
    (tmp_path / "a").write_bytes(b"1")
    (tmp_path / "sub").mkdir()
    (tmp_path / "sub" / "b").write_bytes(b"2")
    before = tree_checksums(tmp_path)
    assert changes(before, tree_checksums(tmp_path)) == []
    (tmp_path / "a").write_bytes(b"x")
    (tmp_path / "sub" / "b").unlink()
    (tmp_path / ".tmp-c").write_bytes(b"")
    (tmp_path / "empty").mkdir()
    assert changes(before, tree_checksums(tmp_path)) == [
        "added .tmp-c",
        "added empty",
        "removed sub/b",
        "changed a",
    ]
