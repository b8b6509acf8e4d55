"""Database triggers that keep frozen splits and results as they were stored.

* a frozen benchmark split: UPDATE and DELETE of the row refused;
* results (scorecards, per-class and slice rows): append-only, UPDATE and DELETE refused;
* a finished (done or failed) evaluation: its state and result fields cannot change and
  the row cannot be deleted;
* TRUNCATE of any of these tables refused (PostgreSQL: statement triggers; SQLite has no
  TRUNCATE).

Installed by migrations 0002 and 0003 and again after every ``migrate`` (``post_migrate``,
see ``apps.py``: SQLite drops a table's triggers when a migration rebuilds the table).
Triggers bind the table's owner too, but an owner can disable them: the application runs
as a role that owns nothing (README, "Production"; ``manage.py app_role_grants``).
"""

SPLIT = "evaluation_benchmarksplit"
EVALUATION = "evaluation_evaluation"
# Append-only tables and what a refusal calls them.
APPEND_ONLY = {
    "evaluation_scorecard": "stored results",
    "evaluation_classscore": "stored results",
    "evaluation_slicescore": "stored results",
    "evaluation_errorbreakdown": "stored results",
    "evaluation_imageleaveoneout": "stored results",
    "evaluation_storedprotocol": "a stored protocol",
}
# Columns of a finished evaluation that nothing may change (progress, attempts and the
# claim may still be written by a late worker; they are not the result).
FINISHED_COLUMNS = (
    "state",
    "error",
    "error_detail",
    "engine_version",
    "finished_at",
    "split_id",
    "predictions_id",
    "protocol",
    "box_policy",
    "scope",
    "file_name",
    "unknown_images",
    "unknown_classes",
)
FINISHED = ("done", "failed")


def postgres_refuse_function(name):
    """A trigger function that refuses whatever fired it, naming the table's contents
    (its first trigger argument)."""
    return f"""
CREATE OR REPLACE FUNCTION {name}() RETURNS trigger AS $$
BEGIN
    RAISE EXCEPTION '% % refused: % is append-only', TG_OP, TG_TABLE_NAME, TG_ARGV[0]
        USING ERRCODE = 'restrict_violation';
END;
$$ LANGUAGE plpgsql;
"""


def postgres_append_only(table, what, function):
    return f"""
DROP TRIGGER IF EXISTS benchbook_append_only ON {table};
CREATE TRIGGER benchbook_append_only BEFORE UPDATE OR DELETE ON {table}
    FOR EACH ROW EXECUTE FUNCTION {function}('{what}');
DROP TRIGGER IF EXISTS benchbook_no_truncate ON {table};
CREATE TRIGGER benchbook_no_truncate BEFORE TRUNCATE ON {table}
    FOR EACH STATEMENT EXECUTE FUNCTION {function}('{what}');
"""


def postgres_remove(table):
    return f"""
DROP TRIGGER IF EXISTS benchbook_append_only ON {table};
DROP TRIGGER IF EXISTS benchbook_no_truncate ON {table};
"""


def sqlite_append_only(table, what):
    return [
        f"""CREATE TRIGGER IF NOT EXISTS {table}_append_only_{op.lower()} BEFORE {op} ON {table}
        BEGIN SELECT RAISE(ABORT, '{op} {table} refused: {what} is append-only'); END"""
        for op in ("UPDATE", "DELETE")
    ]


def sqlite_remove(table):
    return [f"DROP TRIGGER IF EXISTS {table}_append_only_{op}" for op in ("update", "delete")]


_FINISHED = ", ".join(f"'{s}'" for s in FINISHED)
_FUNCTION = "benchbook_refuse_evaluation_change"


def _postgres_guard(table, trigger, function, condition, message, what):
    """A row trigger refusing UPDATE or DELETE when ``condition`` holds (``message``:
    RAISE's format and arguments), and TRUNCATE of the table (``what`` it holds)."""
    return f"""
CREATE OR REPLACE FUNCTION {function}() RETURNS trigger AS $$
BEGIN
    IF {condition} THEN
        RAISE EXCEPTION {message} USING ERRCODE = 'restrict_violation';
    END IF;
    IF TG_OP = 'DELETE' THEN RETURN OLD; END IF;
    RETURN NEW;
END;
$$ LANGUAGE plpgsql;
DROP TRIGGER IF EXISTS {trigger} ON {table};
CREATE TRIGGER {trigger} BEFORE UPDATE OR DELETE ON {table}
    FOR EACH ROW EXECUTE FUNCTION {function}();
DROP TRIGGER IF EXISTS benchbook_no_truncate ON {table};
CREATE TRIGGER benchbook_no_truncate BEFORE TRUNCATE ON {table}
    FOR EACH STATEMENT EXECUTE FUNCTION {_FUNCTION}('{what}');
"""


POSTGRES_SPLIT = _postgres_guard(
    SPLIT,
    "benchbook_frozen_split",
    "benchbook_refuse_frozen_split",
    "OLD.frozen_at IS NOT NULL",
    "'benchmark split % rev % is frozen', OLD.name, OLD.revision",
    "a frozen split",
)
SQLITE_SPLIT = [
    f"""CREATE TRIGGER IF NOT EXISTS benchbook_frozen_split_{op.lower()} BEFORE {op} ON {SPLIT}
    WHEN OLD.frozen_at IS NOT NULL
    BEGIN SELECT RAISE(ABORT, 'benchmark split is frozen'); END"""
    for op in ("UPDATE", "DELETE")
]


def _postgres_evaluation(columns):
    changed = " OR ".join(f"NEW.{c} IS DISTINCT FROM OLD.{c}" for c in columns)
    return _postgres_guard(
        EVALUATION,
        "benchbook_finished",
        "benchbook_refuse_finished_change",
        f"OLD.state IN ({_FINISHED}) AND (TG_OP = 'DELETE' OR {changed})",
        "'evaluation % is finished (%): its state and result cannot change', OLD.id, OLD.state",
        "a finished evaluation",
    )


def _sqlite_evaluation(columns):
    changed = " OR ".join(f"NEW.{c} IS NOT OLD.{c}" for c in columns)
    return [  # dropped first: the guarded columns may have changed since
        "DROP TRIGGER IF EXISTS benchbook_finished_update",
        "DROP TRIGGER IF EXISTS benchbook_finished_delete",
        f"""CREATE TRIGGER benchbook_finished_update BEFORE UPDATE ON {EVALUATION}
    WHEN OLD.state IN ({_FINISHED}) AND ({changed})
    BEGIN SELECT RAISE(ABORT, 'evaluation is finished: its state and result cannot change');
    END""",
        f"""CREATE TRIGGER benchbook_finished_delete BEFORE DELETE ON {EVALUATION}
    WHEN OLD.state IN ({_FINISHED})
    BEGIN SELECT RAISE(ABORT, 'evaluation is finished: its state and result cannot change');
    END""",
    ]


def execute(connection, statements):
    """Run the statements for this database, ``{vendor: [sql, ...]}``."""
    try:
        chosen = statements[connection.vendor]
    except KeyError:
        raise RuntimeError(f"no trigger for database {connection.vendor!r}") from None
    with connection.cursor() as cursor:
        for statement in chosen:
            cursor.execute(statement)


def _columns(connection, table):
    with connection.cursor() as cursor:
        return {c.name for c in connection.introspection.get_table_description(cursor, table)}


def existing(connection, tables):
    """Those of ``tables`` the database has (a migration may run before some exist)."""
    present = set(connection.introspection.table_names())
    return [t for t in tables if t in present]


def install(connection):
    """Install (or re-install: idempotent) every trigger of this app on the tables that
    exist."""
    tables = existing(connection, [SPLIT, EVALUATION, *APPEND_ONLY])
    postgres = [postgres_refuse_function(_FUNCTION)]
    sqlite = []
    if SPLIT in tables:
        postgres.append(POSTGRES_SPLIT)
        sqlite += SQLITE_SPLIT
    if EVALUATION in tables:
        columns = [c for c in FINISHED_COLUMNS if c in _columns(connection, EVALUATION)]
        postgres.append(_postgres_evaluation(columns))
        sqlite += _sqlite_evaluation(columns)
    for table in tables:
        if table in APPEND_ONLY:
            postgres.append(postgres_append_only(table, APPEND_ONLY[table], _FUNCTION))
            sqlite += sqlite_append_only(table, APPEND_ONLY[table])
    execute(connection, {"postgresql": postgres, "sqlite": sqlite})


def remove(connection):
    """Drop every trigger of this app (tests empty tables this way; an owner can too)."""
    tables = existing(connection, [SPLIT, EVALUATION, *APPEND_ONLY])
    postgres = [postgres_remove(t) for t in tables]
    if SPLIT in tables:
        postgres.append(f"DROP TRIGGER IF EXISTS benchbook_frozen_split ON {SPLIT};")
    if EVALUATION in tables:
        postgres.append(f"DROP TRIGGER IF EXISTS benchbook_finished ON {EVALUATION};")
    postgres.append(
        f"""DROP FUNCTION IF EXISTS {_FUNCTION}();
DROP FUNCTION IF EXISTS benchbook_refuse_finished_change();
DROP FUNCTION IF EXISTS benchbook_refuse_frozen_split();"""
    )
    sqlite = [
        *(f"DROP TRIGGER IF EXISTS benchbook_frozen_split_{op}" for op in ("update", "delete")),
        "DROP TRIGGER IF EXISTS benchbook_finished_update",
        "DROP TRIGGER IF EXISTS benchbook_finished_delete",
        *(s for table in APPEND_ONLY for s in sqlite_remove(table)),
    ]
    execute(connection, {"postgresql": postgres, "sqlite": sqlite})


def protected_tables():
    """Tables the application may read and insert into, never change or empty (a
    finished evaluation is protected by column; the table is not in this list)."""
    return [SPLIT, *APPEND_ONLY]
