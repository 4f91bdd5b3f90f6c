//! A rebuild's bulk read of the predictions table, which at a thousand
//! models holds a thousand rows per unit (110M at 100,000 units).
//!
//! sqlx runs each statement on a worker thread and sends every row across a
//! channel to the async side, as a row of boxed values: about 370,000 rows
//! a second on the reference host, so a restart at that size spent over six
//! minutes in this one query. Here the statement is stepped in place on a
//! read-only connection of its own (rusqlite, on the same SQLite library),
//! on a blocking thread, and the records go to the async side in chunks:
//! about 2.7M rows a second on the same host.
//!
//! The read is one statement, so it sees one snapshot of the database (WAL
//! readers do not block the writer or each other), exactly as the sqlx
//! query it replaces did. When the consumer stops early (a rebuild that
//! meets a row naming a unit it has not read), the channel closes and the
//! thread stops at its next chunk.

use std::path::{Path, PathBuf};
use std::pin::Pin;
use std::task::{Context, Poll};
use std::time::Duration;

use rusqlite::{Connection, OpenFlags};
use tokio::sync::mpsc;
use tokio_stream::Stream;

use crate::domain::PredictionRecord;
use crate::store::{arm_of, RowStream, StoreError, StoreResult};

/// Records per chunk sent to the async side: large enough that the channel
/// costs nothing per row, small enough (about 400 KiB) not to matter in
/// memory.
const CHUNK: usize = 8192;

/// Chunks in flight between the reader thread and the consumer.
const CHUNKS_AHEAD: usize = 4;

/// Every stored prediction of one dataset, in the table's order (by model,
/// arm and unit: the primary key's), read on a blocking thread.
pub(super) fn predictions(path: PathBuf, dataset_id: i64) -> RowStream<'static, PredictionRecord> {
    let (tx, rx) = mpsc::channel::<StoreResult<Vec<PredictionRecord>>>(CHUNKS_AHEAD);
    tokio::task::spawn_blocking(move || {
        if let Err(e) = read(&path, dataset_id, &tx) {
            // A consumer that has gone needs no error.
            let _ = tx.blocking_send(Err(e));
        }
    });
    Box::pin(Chunks {
        rx,
        current: Vec::new().into_iter(),
    })
}

/// The records of the chunks received, one at a time.
struct Chunks {
    rx: mpsc::Receiver<StoreResult<Vec<PredictionRecord>>>,
    current: std::vec::IntoIter<PredictionRecord>,
}

impl Stream for Chunks {
    type Item = StoreResult<PredictionRecord>;

    fn poll_next(mut self: Pin<&mut Self>, cx: &mut Context<'_>) -> Poll<Option<Self::Item>> {
        loop {
            if let Some(record) = self.current.next() {
                return Poll::Ready(Some(Ok(record)));
            }
            match self.rx.poll_recv(cx) {
                Poll::Ready(Some(Ok(chunk))) => self.current = chunk.into_iter(),
                Poll::Ready(Some(Err(e))) => return Poll::Ready(Some(Err(e))),
                Poll::Ready(None) => return Poll::Ready(None),
                Poll::Pending => return Poll::Pending,
            }
        }
    }
}

/// Steps the query, sending full chunks; returns when the table is read or
/// the consumer has gone.
fn read(
    path: &Path,
    dataset_id: i64,
    tx: &mpsc::Sender<StoreResult<Vec<PredictionRecord>>>,
) -> StoreResult<()> {
    let failed = |e: rusqlite::Error| {
        StoreError::Backend(format!("reading predictions from {}: {e}", path.display()))
    };
    let conn = Connection::open_with_flags(
        path,
        OpenFlags::SQLITE_OPEN_READ_ONLY | OpenFlags::SQLITE_OPEN_NO_MUTEX,
    )
    .map_err(failed)?;
    conn.busy_timeout(Duration::from_secs(10)).map_err(failed)?;
    let mut statement = conn
        .prepare(
            "SELECT model_id, unit_seq, seq, effect, predicted_at_ms, arm FROM predictions \
             WHERE dataset_id = ?1",
        )
        .map_err(failed)?;
    let rows = statement
        .query_map([dataset_id], |row| {
            let record = PredictionRecord {
                model_id: row.get(0)?,
                unit_seq: row.get(1)?,
                seq: row.get(2)?,
                effect: row.get(3)?,
                predicted_at_ms: row.get(4)?,
                arm: 0,
            };
            Ok((record, row.get::<_, i64>(5)?))
        })
        .map_err(failed)?;
    let mut chunk = Vec::with_capacity(CHUNK);
    for row in rows {
        let (record, arm) = row.map_err(failed)?;
        chunk.push(PredictionRecord {
            arm: arm_of(arm)?,
            ..record
        });
        if chunk.len() == CHUNK {
            let full = std::mem::replace(&mut chunk, Vec::with_capacity(CHUNK));
            if tx.blocking_send(Ok(full)).is_err() {
                return Ok(());
            }
        }
    }
    if !chunk.is_empty() {
        let _ = tx.blocking_send(Ok(chunk));
    }
    Ok(())
}
