//! Moving a SQLite history into an empty PostgreSQL database (`lotdrift migrate-store`).
//!
//! Both sides are opened as stores first, so their migrations are current. The SQLite history
//! is then read through a read-only connection inside one read transaction (one snapshot, so
//! a daemon still writing is not half-copied), and written into PostgreSQL inside one
//! transaction: all or nothing. Every table goes over in foreign-key order with every column
//! and its ids, by `COPY ... FROM STDIN` (text format), generic over the tables: the columns
//! and their types are PostgreSQL's (`information_schema`), read by the same names from
//! SQLite. `sample_values` is the one table whose columns differ (JSON text there, arrays
//! here). User triggers are off while the rows go in, since `pending_sample` and `tally` are
//! copied as they are; the identity sequences are moved past the copied ids.
//!
//! Before the commit each table is read back in primary-key order and compared with what was
//! read from SQLite (row count and a SHA-256 over one canonical text of the rows; doubles by
//! their bits), and `measurement_view` is compared the same way on both databases. Any
//! difference rolls the copy back.

use std::path::Path;

use futures_util::TryStreamExt;
use sha2::{Digest, Sha256};
use sqlx::postgres::{PgPool, PgRow};
use sqlx::sqlite::{SqliteConnectOptions, SqliteRow};
use sqlx::{Column as _, ConnectOptions, Connection, TypeInfo, ValueRef};

use super::postgres::copy as pg_copy;
use super::sqlite::bulk::unpack_values;
use super::*;

/// Every table of the schema, parents before children (foreign keys are checked as rows go
/// in).
const TABLES: &[&str] = &[
    "source",
    "characteristic",
    "series",
    "ingested_file",
    "lot",
    "sample",
    "sample_values",
    "quarantined_file",
    "sample_replacement",
    "replaced_measurement",
    "baseline",
    "baseline_change",
    "baseline_lot",
    "evaluation",
    "series_state",
    "alert",
    "alert_ack",
    "alert_event",
    "digest",
    "outlier",
    "silence",
    "silence_event",
    "health_event",
    "health",
    "outbox",
    "digest_item",
    "pending_sample",
    "tally",
    "characteristic_unit",
];

/// Tables the PostgreSQL migration fills with seed rows, replaced by the copied ones.
const SEEDED: &[&str] = &["health", "tally"];

/// The unit values as PostgreSQL's `measurement_view` shows them, in one order.
const VALUES: &str = "SELECT source, characteristic, lot, seq, unit, value, sampled_at \
     FROM measurement_view ORDER BY sample_id, seq";
const VALUE_KINDS: [Kind; 7] = [
    Kind::Text,
    Kind::Text,
    Kind::Text,
    Kind::Int,
    Kind::Text,
    Kind::Real,
    Kind::Text,
];

/// The same rows of SQLite's `measurement_view`, except the value: SQLite's JSON parser is not
/// correctly rounded (SQLite 3.46 reads `99.632911` as 99.63291100000001), so the values come
/// from the stored text through the store's own parser, fetched once per sample (seq 0).
const SQLITE_VALUES: &str = "SELECT source, characteristic, lot, seq, unit, sampled_at, \
     CASE WHEN seq = 0 THEN (SELECT sv.values_json FROM sample_values sv \
     WHERE sv.sample_id = mv.sample_id) END \
     FROM measurement_view mv ORDER BY sample_id, seq";
const SQLITE_VALUE_KINDS: [Kind; 7] = [
    Kind::Text,
    Kind::Text,
    Kind::Text,
    Kind::Int,
    Kind::Text,
    Kind::Text,
    Kind::Reals,
];

/// Bytes handed to the server per `send`.
const CHUNK_BYTES: usize = 1 << 20;

/// What was copied: per table, in copy order, and the unit values of `measurement_view`.
#[derive(Debug, Clone)]
pub struct CopyReport {
    pub tables: Vec<TableCopy>,
    pub values: TableCopy,
}

/// Rows of one table (or view) and the SHA-256 (hex) of their canonical text, equal on both
/// databases.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct TableCopy {
    pub table: String,
    pub rows: u64,
    pub checksum: String,
}

/// Copies the SQLite history at `sqlite` into the empty PostgreSQL database at `url` (the
/// password from `password` when given, else from the URL), in one transaction, verified
/// before it commits.
pub async fn copy_sqlite_to_postgres(
    sqlite: &Path,
    url: &str,
    password: Option<&str>,
) -> Result<CopyReport> {
    if !sqlite.is_file() {
        return Err(StoreError::Migration(format!(
            "no SQLite history at {}",
            sqlite.display()
        )));
    }
    let site = default_site();
    let source = Store::connect(Location::Sqlite(sqlite), &site).await?;
    let target = match Store::connect(Location::Postgres { url, password }, &site).await {
        Ok(target) => target,
        Err(e) => {
            source.close().await;
            return Err(e);
        }
    };
    let copied = match &target.db {
        Backend::Postgres(db) => copy_into(sqlite, &db.pool, url).await,
        Backend::Sqlite(_) => unreachable!("opened as PostgreSQL"),
    };
    target.close().await;
    source.close().await;
    copied
}

/// The copy proper; any error drops the PostgreSQL transaction, which rolls it back.
async fn copy_into(sqlite: &Path, pool: &PgPool, url: &str) -> Result<CopyReport> {
    let mut lite = SqliteConnectOptions::new()
        .filename(sqlite)
        .read_only(true)
        .connect()
        .await
        .map_err(|source| StoreError::Open {
            path: sqlite.display().to_string(),
            source,
        })?;
    let mut snapshot = lite.begin().await.doing("reading the SQLite history")?;
    let mut tx = pool.begin().await.doing("beginning the copy")?;
    set_triggers(&mut tx, "DISABLE").await?;
    check_known_tables(&mut tx).await?;
    refuse_unless_empty(&mut tx, url).await?;
    for table in SEEDED {
        sqlx::query(&format!("DELETE FROM {}", quoted(table)))
            .execute(&mut *tx)
            .await
            .doing("removing the seed rows")?;
    }
    let mut copied = Vec::with_capacity(TABLES.len());
    for name in TABLES {
        let table = Table::read(&mut tx, name).await?;
        let sums = copy_table(&mut snapshot, &mut tx, &table).await?;
        tracing::info!(table = name, rows = sums.rows, "table copied");
        copied.push((table, sums));
    }
    for (table, _) in &copied {
        move_identities(&mut tx, table).await?;
    }
    set_triggers(&mut tx, "ENABLE").await?;
    for (table, sums) in &copied {
        let back = pg_sums(&mut tx, &table.select(true), &table.kinds(), table.name).await?;
        compare(sums, &back, url)?;
    }
    let values = sqlite_values(&mut snapshot).await?;
    let values_back = pg_sums(&mut tx, VALUES, &VALUE_KINDS, "measurement_view").await?;
    compare(&values, &values_back, url)?;
    tx.commit().await.doing("committing the copy")?;
    snapshot
        .commit()
        .await
        .doing("reading the SQLite history")?;
    let _ = lite.close().await;
    Ok(CopyReport {
        tables: copied.into_iter().map(|(_, sums)| sums).collect(),
        values,
    })
}

type PgTx = sqlx::Transaction<'static, sqlx::Postgres>;
type LiteTx<'c> = sqlx::Transaction<'c, sqlx::Sqlite>;

/// `ALTER TABLE .. DISABLE|ENABLE TRIGGER USER` on every table (foreign keys stay checked:
/// they are system triggers). Inside the transaction: other sessions never see them off.
async fn set_triggers(tx: &mut PgTx, how: &str) -> Result<()> {
    for table in TABLES {
        sqlx::query(&format!("ALTER TABLE {} {how} TRIGGER USER", quoted(table)))
            .execute(&mut **tx)
            .await
            .doing("switching the triggers for the copy")?;
    }
    Ok(())
}

/// Fails when the PostgreSQL schema has a table this copy does not know (a later migration
/// added one here): copying the others would silently leave it empty.
async fn check_known_tables(tx: &mut PgTx) -> Result<()> {
    let names: Vec<String> = sqlx::query_scalar(
        "SELECT table_name::TEXT FROM information_schema.tables \
         WHERE table_schema = current_schema() AND table_type = 'BASE TABLE' \
         AND table_name <> '_sqlx_migrations' ORDER BY table_name",
    )
    .fetch_all(&mut **tx)
    .await
    .doing("listing the PostgreSQL tables")?;
    let unknown: Vec<&str> = names
        .iter()
        .map(String::as_str)
        .filter(|n| !TABLES.contains(n))
        .collect();
    if unknown.is_empty() {
        Ok(())
    } else {
        Err(StoreError::Migration(format!(
            "the PostgreSQL schema has tables the copy does not know: {}",
            unknown.join(", ")
        )))
    }
}

/// Refuses a database that holds anything besides the migration's seed rows.
async fn refuse_unless_empty(tx: &mut PgTx, url: &str) -> Result<()> {
    let mut holding = Vec::new();
    for table in TABLES.iter().filter(|t| !SEEDED.contains(t)) {
        let any: bool =
            sqlx::query_scalar(&format!("SELECT EXISTS (SELECT 1 FROM {})", quoted(table)))
                .fetch_one(&mut **tx)
                .await
                .doing("checking that the PostgreSQL database is empty")?;
        if any {
            holding.push(*table);
        }
    }
    if holding.is_empty() {
        return Ok(());
    }
    Err(StoreError::Migration(format!(
        "{} is not empty (rows in {}); migrate-store copies a SQLite history only into an \
         empty database",
        crate::config::redacted(url),
        holding.join(", ")
    )))
}

/// Moves each identity sequence of `table` past its largest copied id, so the next row the
/// daemon inserts gets a new id.
async fn move_identities(tx: &mut PgTx, table: &Table) -> Result<()> {
    for column in table.columns.iter().filter(|c| c.identity) {
        sqlx::query(&format!(
            "SELECT setval(pg_get_serial_sequence($1, $2), \
             (SELECT COALESCE(MAX({col}), 0) + 1 FROM {tab}), false)",
            col = quoted(&column.name),
            tab = quoted(table.name),
        ))
        .bind(table.name)
        .bind(&column.name)
        .execute(&mut **tx)
        .await
        .doing("moving an id sequence past the copied ids")?;
    }
    Ok(())
}

/// An error naming the table whose copy differs from its SQLite rows.
fn compare(sqlite: &TableCopy, postgres: &TableCopy, url: &str) -> Result<()> {
    if sqlite == postgres {
        return Ok(());
    }
    Err(StoreError::Migration(format!(
        "the copy of {} differs from the SQLite history ({} rows, sha256 {} there; {} rows, \
         sha256 {} in PostgreSQL); nothing was written to {}",
        sqlite.table,
        sqlite.rows,
        sqlite.checksum,
        postgres.rows,
        postgres.checksum,
        crate::config::redacted(url)
    )))
}

fn quoted(name: &str) -> String {
    format!("\"{}\"", name.replace('"', "\"\""))
}

/// A column's type, as PostgreSQL declares it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    Int,
    Real,
    Text,
    /// `DOUBLE PRECISION[]` (SQLite: a JSON array of numbers).
    Reals,
    /// `TEXT[]` (SQLite: a JSON array of strings and nulls).
    Texts,
}

struct Column {
    name: String,
    kind: Kind,
    identity: bool,
}

/// A table's columns in PostgreSQL's order and its primary key.
struct Table {
    name: &'static str,
    columns: Vec<Column>,
    key: Vec<String>,
}

impl Table {
    async fn read(tx: &mut PgTx, name: &'static str) -> Result<Table> {
        let rows = sqlx::query(
            "SELECT column_name::TEXT, data_type::TEXT, udt_name::TEXT, is_identity::TEXT \
             FROM information_schema.columns \
             WHERE table_schema = current_schema() AND table_name = $1 \
             ORDER BY ordinal_position",
        )
        .bind(name)
        .fetch_all(&mut **tx)
        .await
        .doing("reading the PostgreSQL columns")?;
        let mut columns = Vec::with_capacity(rows.len());
        for row in &rows {
            let column: String = row.get(0);
            let kind = kind_of(row.get(1), row.get(2)).ok_or_else(|| {
                StoreError::Migration(format!(
                    "column {name}.{column} has a type the copy does not know ({})",
                    row.get::<String, _>(2)
                ))
            })?;
            columns.push(Column {
                name: column,
                kind,
                identity: row.get::<String, _>(3) == "YES",
            });
        }
        let key: Vec<String> = sqlx::query_scalar(
            "SELECT a.attname::TEXT FROM pg_index i \
             JOIN pg_attribute a ON a.attrelid = i.indrelid AND a.attnum = ANY (i.indkey) \
             WHERE i.indrelid = to_regclass($1) AND i.indisprimary \
             ORDER BY array_position(i.indkey::INT2[], a.attnum)",
        )
        .bind(name)
        .fetch_all(&mut **tx)
        .await
        .doing("reading a PostgreSQL primary key")?;
        if columns.is_empty() || key.is_empty() {
            return Err(StoreError::Migration(format!(
                "table {name} is missing from the PostgreSQL schema or has no primary key"
            )));
        }
        Ok(Table { name, columns, key })
    }

    fn kinds(&self) -> Vec<Kind> {
        self.columns.iter().map(|c| c.kind).collect()
    }

    /// `SELECT` of every column in primary-key order; text keys sort by bytes on PostgreSQL
    /// as SQLite sorts them.
    fn select(&self, postgres: bool) -> String {
        let columns: Vec<String> = self
            .columns
            .iter()
            .map(|c| match postgres {
                true => quoted(&c.name),
                false => quoted(sqlite_name(self.name, &c.name)),
            })
            .collect();
        let key: Vec<String> = self
            .key
            .iter()
            .map(|k| {
                let text = self
                    .columns
                    .iter()
                    .any(|c| &c.name == k && c.kind == Kind::Text);
                match postgres && text {
                    true => format!("{} COLLATE \"C\"", quoted(k)),
                    false => quoted(k),
                }
            })
            .collect();
        format!(
            "SELECT {} FROM {} ORDER BY {}",
            columns.join(", "),
            quoted(self.name),
            key.join(", ")
        )
    }

    fn copy_statement(&self) -> String {
        let columns: Vec<String> = self.columns.iter().map(|c| quoted(&c.name)).collect();
        format!(
            "COPY {} ({}) FROM STDIN",
            quoted(self.name),
            columns.join(", ")
        )
    }
}

fn kind_of(data_type: String, udt: String) -> Option<Kind> {
    match (data_type.as_str(), udt.as_str()) {
        ("bigint", _) => Some(Kind::Int),
        ("double precision", _) => Some(Kind::Real),
        ("text", _) => Some(Kind::Text),
        ("ARRAY", "_float8") => Some(Kind::Reals),
        ("ARRAY", "_text") => Some(Kind::Texts),
        _ => None,
    }
}

/// SQLite's name of a PostgreSQL column: the same, except for `sample_values`' arrays.
fn sqlite_name<'a>(table: &str, column: &'a str) -> &'a str {
    match (table, column) {
        ("sample_values", "unit_values") => "values_json",
        ("sample_values", "unit_serials") => "units_json",
        ("sample_values", "unit_times") => "sampled_at_json",
        _ => column,
    }
}

/// One value of a row, read from either database.
#[derive(Debug, Clone, PartialEq)]
enum Cell {
    Null,
    Int(i64),
    Real(f64),
    Text(String),
    Reals(Vec<f64>),
    Texts(Vec<Option<String>>),
}

/// Row count and SHA-256 over the canonical text of rows, fed in order.
struct Sums {
    sha: Sha256,
    rows: u64,
    line: String,
}

impl Sums {
    fn new() -> Sums {
        Sums {
            sha: Sha256::new(),
            rows: 0,
            line: String::new(),
        }
    }

    fn add(&mut self, cells: &[Cell]) {
        self.line.clear();
        for cell in cells {
            canonical(&mut self.line, cell);
        }
        self.line.push('\n');
        self.sha.update(self.line.as_bytes());
        self.rows += 1;
    }

    fn finish(self, table: &str) -> TableCopy {
        let digest = self.sha.finalize();
        TableCopy {
            table: table.to_string(),
            rows: self.rows,
            checksum: digest.iter().map(|b| format!("{b:02x}")).collect(),
        }
    }
}

/// One cell as text that no other cell shares: a tag, lengths before texts, doubles as their
/// bits (so -0.0 and 0.0 differ, and no formatting can round).
fn canonical(out: &mut String, cell: &Cell) {
    use std::fmt::Write;
    let text = |out: &mut String, t: &str| {
        let _ = write!(out, "T{}:{t};", t.len());
    };
    match cell {
        Cell::Null => out.push_str("N;"),
        Cell::Int(v) => {
            let _ = write!(out, "I{v};");
        }
        Cell::Real(v) => {
            let _ = write!(out, "R{:016x};", v.to_bits());
        }
        Cell::Text(t) => text(out, t),
        Cell::Reals(vs) => {
            let _ = write!(out, "A{}[", vs.len());
            for v in vs {
                let _ = write!(out, "{:016x},", v.to_bits());
            }
            out.push_str("];");
        }
        Cell::Texts(ts) => {
            let _ = write!(out, "S{}[", ts.len());
            for t in ts {
                match t {
                    Some(t) => text(out, t),
                    None => out.push_str("N;"),
                }
            }
            out.push_str("];");
        }
    }
}

/// One cell in COPY's text format (`\N` for NULL, text escaped, doubles that read back to the
/// same bits, arrays as literals).
fn copy_cell(out: &mut String, cell: &Cell) {
    match cell {
        Cell::Null => out.push_str("\\N"),
        Cell::Int(v) => out.push_str(&v.to_string()),
        Cell::Real(v) if v.is_finite() => out.push_str(ryu::Buffer::new().format_finite(*v)),
        Cell::Real(v) if v.is_nan() => out.push_str("NaN"),
        Cell::Real(v) => out.push_str(if *v > 0.0 { "Infinity" } else { "-Infinity" }),
        Cell::Text(t) => {
            for c in t.chars() {
                match c {
                    '\\' => out.push_str("\\\\"),
                    '\t' => out.push_str("\\t"),
                    '\n' => out.push_str("\\n"),
                    '\r' => out.push_str("\\r"),
                    c => out.push(c),
                }
            }
        }
        Cell::Reals(vs) => pg_copy::values(out, vs),
        Cell::Texts(ts) => pg_copy::element_list(out, ts.iter().map(Option::as_deref)),
    }
}

/// Streams `table` from the SQLite snapshot into PostgreSQL's `COPY`, summing what it sends.
async fn copy_table(snapshot: &mut LiteTx<'_>, tx: &mut PgTx, table: &Table) -> Result<TableCopy> {
    let kinds = table.kinds();
    let select = table.select(false);
    let mut rows = sqlx::query(&select).fetch(&mut **snapshot);
    let mut copy = tx
        .copy_in_raw(&table.copy_statement())
        .await
        .doing("starting to copy a table")?;
    let mut sums = Sums::new();
    let mut buf = String::with_capacity(CHUNK_BYTES + 4096);
    let mut cells = Vec::with_capacity(kinds.len());
    while let Some(row) = rows.try_next().await.doing("reading the SQLite history")? {
        sqlite_cells(&row, &kinds, &mut cells)
            .map_err(|why| table_error(table.name, sums.rows, why))?;
        for (k, cell) in cells.iter().enumerate() {
            if k > 0 {
                buf.push('\t');
            }
            copy_cell(&mut buf, cell);
        }
        buf.push('\n');
        sums.add(&cells);
        if buf.len() >= CHUNK_BYTES {
            copy.send(buf.as_bytes()).await.doing("copying a table")?;
            buf.clear();
        }
    }
    if !buf.is_empty() {
        copy.send(buf.as_bytes()).await.doing("copying a table")?;
    }
    copy.finish().await.doing("copying a table")?;
    Ok(sums.finish(table.name))
}

fn table_error(table: &str, row: u64, why: String) -> StoreError {
    StoreError::Migration(format!("SQLite table {table}, row {}: {why}", row + 1))
}

/// Count and checksum of SQLite's unit values, in the cells of [`VALUES`].
async fn sqlite_values(snapshot: &mut LiteTx<'_>) -> Result<TableCopy> {
    let name = "measurement_view";
    let mut rows = sqlx::query(SQLITE_VALUES).fetch(&mut **snapshot);
    let mut sums = Sums::new();
    let mut cells = Vec::with_capacity(SQLITE_VALUE_KINDS.len());
    let mut sample = Vec::new();
    while let Some(row) = rows.try_next().await.doing("reading the SQLite history")? {
        sqlite_cells(&row, &SQLITE_VALUE_KINDS, &mut cells)
            .map_err(|why| table_error(name, sums.rows, why))?;
        if let Some(Cell::Reals(values)) = cells.pop() {
            sample = values;
        }
        let value = match &cells[3] {
            Cell::Int(seq) => usize::try_from(*seq).ok().and_then(|k| sample.get(k)),
            _ => None,
        };
        let Some(value) = value.copied() else {
            let why = "a seq without its value in sample_values".to_string();
            return Err(table_error(name, sums.rows, why));
        };
        let sampled_at = cells.pop().expect("seven cells");
        cells.push(Cell::Real(value));
        cells.push(sampled_at);
        sums.add(&cells);
    }
    Ok(sums.finish(name))
}

/// Count and checksum of `select`'s rows in the PostgreSQL transaction.
async fn pg_sums(tx: &mut PgTx, select: &str, kinds: &[Kind], name: &str) -> Result<TableCopy> {
    let mut rows = sqlx::query(select).fetch(&mut **tx);
    let mut sums = Sums::new();
    let mut cells = Vec::with_capacity(kinds.len());
    while let Some(row) = rows.try_next().await.doing("reading the copy back")? {
        pg_cells(&row, kinds, &mut cells).doing("reading the copy back")?;
        sums.add(&cells);
    }
    Ok(sums.finish(name))
}

/// A SQLite row as cells of the PostgreSQL kinds; a value of another storage class is an
/// error (an integer in a REAL column reads as its double, as SQLite's REAL affinity does).
fn sqlite_cells(
    row: &SqliteRow,
    kinds: &[Kind],
    out: &mut Vec<Cell>,
) -> std::result::Result<(), String> {
    out.clear();
    for (i, kind) in kinds.iter().enumerate() {
        let column = || row.columns()[i].name().to_string();
        let why = |e: &dyn std::fmt::Display| format!("column {}: {e}", column());
        let raw = row.try_get_raw(i).map_err(|e| why(&e))?;
        if raw.is_null() {
            out.push(Cell::Null);
            continue;
        }
        let class = raw.type_info().name().to_string();
        let cell = match (kind, class.as_str()) {
            (Kind::Int, "INTEGER") => Cell::Int(row.try_get(i).map_err(|e| why(&e))?),
            (Kind::Real, "REAL" | "INTEGER") => {
                Cell::Real(row.try_get_unchecked(i).map_err(|e| why(&e))?)
            }
            (Kind::Text, "TEXT") => Cell::Text(row.try_get(i).map_err(|e| why(&e))?),
            (Kind::Reals, "TEXT") => {
                let text: &str = row.try_get(i).map_err(|e| why(&e))?;
                Cell::Reals(
                    unpack_values(text)
                        .ok_or_else(|| why(&"not a JSON array of finite numbers"))?,
                )
            }
            (Kind::Texts, "TEXT") => {
                let text: &str = row.try_get(i).map_err(|e| why(&e))?;
                Cell::Texts(serde_json::from_str(text).map_err(|e| why(&e))?)
            }
            (kind, class) => return Err(why(&format!("{class} where PostgreSQL has {kind:?}"))),
        };
        out.push(cell);
    }
    Ok(())
}

/// A PostgreSQL row as cells.
fn pg_cells(row: &PgRow, kinds: &[Kind], out: &mut Vec<Cell>) -> sqlx::Result<()> {
    out.clear();
    for (i, kind) in kinds.iter().enumerate() {
        let cell = match kind {
            Kind::Int => row.try_get::<Option<i64>, _>(i)?.map(Cell::Int),
            Kind::Real => row.try_get::<Option<f64>, _>(i)?.map(Cell::Real),
            Kind::Text => row.try_get::<Option<String>, _>(i)?.map(Cell::Text),
            Kind::Reals => row.try_get::<Option<Vec<f64>>, _>(i)?.map(Cell::Reals),
            Kind::Texts => row
                .try_get::<Option<Vec<Option<String>>>, _>(i)?
                .map(Cell::Texts),
        };
        out.push(cell.unwrap_or(Cell::Null));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn line(cells: &[Cell]) -> String {
        let mut out = String::new();
        for c in cells {
            canonical(&mut out, c);
        }
        out
    }

    #[test]
    fn canonical_text_tells_cells_apart() {
        // A text that looks like two cells is still one.
        assert_ne!(
            line(&[Cell::Text("a;T1:b".into())]),
            line(&[Cell::Text("a".into()), Cell::Text("b".into())])
        );
        assert_ne!(line(&[Cell::Real(0.0)]), line(&[Cell::Real(-0.0)]));
        assert_ne!(line(&[Cell::Null]), line(&[Cell::Text(String::new())]));
        assert_ne!(
            line(&[Cell::Texts(vec![None])]),
            line(&[Cell::Texts(vec![Some("N;".into())])])
        );
        assert_eq!(line(&[Cell::Int(-3)]), "I-3;");
    }

    #[test]
    fn copy_text_escapes_and_keeps_doubles() {
        let mut out = String::new();
        copy_cell(&mut out, &Cell::Text("a\tb\\c\nd\\N".into()));
        assert_eq!(out, "a\\tb\\\\c\\nd\\\\N");
        out.clear();
        copy_cell(&mut out, &Cell::Real(0.1 + 0.2));
        assert_eq!(out.parse::<f64>().unwrap(), 0.1 + 0.2);
        out.clear();
        copy_cell(&mut out, &Cell::Null);
        assert_eq!(out, "\\N");
    }
}
