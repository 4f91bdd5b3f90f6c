//! Append-only columns kept in chunks of [`CHUNK_ROWS`] rows that the
//! cache and recompute jobs share copy-on-write.

use std::ops::{Index, IndexMut, Range};
use std::sync::Arc;

/// Rows per chunk of a [`ChunkedColumn`].
pub const CHUNK_ROWS: usize = 8192;

/// An append-only column of rows of `width` values, kept in chunks that
/// recompute jobs share instead of copying: a clone costs one pointer per
/// 8,192 rows. A chunk is copied only when it is written (a new row, or an
/// outcome or prediction for a stored unit) while a job still holds it, so
/// a writer pays for at most one chunk per write and a recompute never
/// copies the history.
#[derive(Debug, Clone)]
pub struct ChunkedColumn<T> {
    width: usize,
    rows: usize,
    chunks: Vec<Arc<Vec<T>>>,
}

impl<T: Clone> ChunkedColumn<T> {
    pub fn new(width: usize) -> Self {
        Self {
            width,
            rows: 0,
            chunks: Vec::new(),
        }
    }

    /// A column holding `values`, `width` per row.
    pub fn from_rows(width: usize, values: &[T]) -> Self {
        let mut out = Self::new(width);
        for row in values.chunks_exact(width.max(1)) {
            out.push_row(row);
        }
        out
    }

    /// A column of width one holding `rows` copies of `value`, built chunk
    /// by chunk.
    pub fn filled(rows: usize, value: T) -> Self {
        let mut out = Self::new(1);
        out.extend_filled(rows, value);
        out
    }

    pub fn len(&self) -> usize {
        self.rows
    }

    pub fn is_empty(&self) -> bool {
        self.rows == 0
    }

    pub fn width(&self) -> usize {
        self.width
    }

    /// The chunks, [`CHUNK_ROWS`] rows each (the last may hold fewer).
    pub fn chunks(&self) -> &[Arc<Vec<T>>] {
        &self.chunks
    }

    pub fn row(&self, i: usize) -> &[T] {
        let start = (i % CHUNK_ROWS) * self.width;
        &self.chunks[i / CHUNK_ROWS][start..start + self.width]
    }

    pub fn push_row(&mut self, values: &[T]) {
        debug_assert_eq!(values.len(), self.width);
        if self.rows % CHUNK_ROWS == 0 {
            self.chunks
                .push(Arc::new(Vec::with_capacity(CHUNK_ROWS * self.width)));
        }
        if let Some(last) = self.chunks.last_mut() {
            Arc::make_mut(last).extend_from_slice(values);
        }
        self.rows += 1;
    }

    /// Appends `rows` rows of `value` (every value of a row `value`),
    /// writing each chunk once rather than once per row.
    pub fn extend_filled(&mut self, rows: usize, value: T) {
        let mut left = rows;
        while left > 0 {
            let at = self.rows % CHUNK_ROWS;
            if at == 0 {
                self.chunks
                    .push(Arc::new(Vec::with_capacity(CHUNK_ROWS * self.width)));
            }
            let n = left.min(CHUNK_ROWS - at);
            if let Some(last) = self.chunks.last_mut() {
                let chunk = Arc::make_mut(last);
                chunk.resize(chunk.len() + n * self.width, value.clone());
            }
            self.rows += n;
            left -= n;
        }
    }

    /// Drops every row from `rows` on (copying the last kept chunk if a
    /// recompute still holds it).
    pub fn truncate(&mut self, rows: usize) {
        if rows >= self.rows {
            return;
        }
        if let Some((last, kept)) = cut_chunks(&mut self.chunks, rows) {
            Arc::make_mut(last).truncate(kept * self.width);
        }
        self.rows = rows;
    }

    /// Appends one value to a column of width one.
    pub fn push(&mut self, value: T) {
        self.push_row(std::slice::from_ref(&value));
    }

    pub fn get(&self, i: usize) -> Option<&T> {
        (i < self.rows).then(|| &self[i])
    }

    /// The values of rows `range` (those that exist) of a column of width
    /// one.
    pub fn values(&self, range: Range<usize>) -> impl Iterator<Item = &T> {
        self.chunks
            .iter()
            .flat_map(|c| c.iter())
            .skip(range.start)
            .take(range.len())
    }
}

/// Drops the chunks wholly past `rows` and returns the last kept chunk with
/// the number of its rows that stay, when it keeps only some of them.
fn cut_chunks<C>(chunks: &mut Vec<C>, rows: usize) -> Option<(&mut C, usize)> {
    chunks.truncate(rows.div_ceil(CHUNK_ROWS));
    let kept = rows % CHUNK_ROWS;
    if kept == 0 {
        return None;
    }
    chunks.last_mut().map(|c| (c, kept))
}

impl<T> Index<usize> for ChunkedColumn<T> {
    type Output = T;

    /// The value of row `i` in a column of width one.
    fn index(&self, i: usize) -> &T {
        &self.chunks[i / CHUNK_ROWS][i % CHUNK_ROWS]
    }
}

impl<T: Clone> IndexMut<usize> for ChunkedColumn<T> {
    fn index_mut(&mut self, i: usize) -> &mut T {
        &mut Arc::make_mut(&mut self.chunks[i / CHUNK_ROWS])[i % CHUNK_ROWS]
    }
}

/// A column of Unix-millisecond stamps, 0 meaning "not stamped", kept in
/// chunks of 8,192 rows where a chunk without any stamp takes no memory:
/// many deployments never stamp, and the stamps are read only by intake's
/// checks (ordering rules, re-sent rows) and the recent window. A chunk is
/// allocated at the first nonzero stamp written into it; as in a
/// [`ChunkedColumn`], chunks are shared between clones and copied only when
/// written while shared.
#[derive(Debug, Clone, Default)]
pub struct Stamps {
    rows: usize,
    /// One entry per chunk of rows; None while every row in it is 0.
    chunks: Vec<Option<Arc<[i64]>>>,
}

impl Stamps {
    /// A column of `rows` unstamped rows.
    pub fn zeros(rows: usize) -> Self {
        Self {
            rows,
            chunks: vec![None; rows.div_ceil(CHUNK_ROWS)],
        }
    }

    pub fn len(&self) -> usize {
        self.rows
    }

    pub fn is_empty(&self) -> bool {
        self.rows == 0
    }

    pub fn push(&mut self, stamp: i64) {
        if self.rows % CHUNK_ROWS == 0 {
            self.chunks.push(None);
        }
        self.rows += 1;
        self.set(self.rows - 1, stamp);
    }

    /// Appends `rows` unstamped rows (they take no memory until stamped:
    /// an allocated chunk's rows past the end are always 0).
    pub fn extend_zeros(&mut self, rows: usize) {
        self.rows += rows;
        self.chunks.resize(self.rows.div_ceil(CHUNK_ROWS), None);
    }

    /// Drops every row from `rows` on.
    pub fn truncate(&mut self, rows: usize) {
        if rows >= self.rows {
            return;
        }
        if let Some((Some(last), kept)) = cut_chunks(&mut self.chunks, rows) {
            Arc::make_mut(last)[kept..].fill(0);
        }
        self.rows = rows;
    }

    /// Sets row `i`, allocating its chunk only for a nonzero stamp.
    pub fn set(&mut self, i: usize, stamp: i64) {
        assert!(i < self.rows, "stamp {i} of {}", self.rows);
        let chunk = &mut self.chunks[i / CHUNK_ROWS];
        if chunk.is_none() && stamp == 0 {
            return;
        }
        let chunk = chunk.get_or_insert_with(|| vec![0; CHUNK_ROWS].into());
        Arc::make_mut(chunk)[i % CHUNK_ROWS] = stamp;
    }
}

impl Index<usize> for Stamps {
    type Output = i64;

    fn index(&self, i: usize) -> &i64 {
        assert!(i < self.rows, "stamp {i} of {}", self.rows);
        match &self.chunks[i / CHUNK_ROWS] {
            Some(chunk) => &chunk[i % CHUNK_ROWS],
            None => &0,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_filled_column_grows_like_a_pushed_one() {
        for rows in [0, 1, CHUNK_ROWS - 1, CHUNK_ROWS, 2 * CHUNK_ROWS + 5] {
            let mut filled = ChunkedColumn::filled(rows, 7u32);
            let mut pushed = ChunkedColumn::new(1);
            for _ in 0..rows {
                pushed.push(7u32);
            }
            for col in [&mut filled, &mut pushed] {
                col.push(9);
            }
            assert_eq!(filled.len(), rows + 1);
            assert!((0..=rows).all(|i| filled[i] == pushed[i]));
            assert_eq!(filled.chunks.len(), pushed.chunks.len());
        }
    }

    #[test]
    fn values_of_a_range_cross_chunks_and_stop_at_the_end() {
        let rows = 2 * CHUNK_ROWS + 3;
        let mut col = ChunkedColumn::new(1);
        for i in 0..rows as u32 {
            col.push(i);
        }
        let got: Vec<u32> = col
            .values(CHUNK_ROWS - 2..CHUNK_ROWS + 3)
            .copied()
            .collect();
        let want: Vec<u32> = (CHUNK_ROWS as u32 - 2..CHUNK_ROWS as u32 + 3).collect();
        assert_eq!(got, want);
        assert_eq!(col.values(rows - 1..rows + 5).count(), 1);
        assert_eq!(col.values(rows + 1..rows + 5).count(), 0);
        assert_eq!(col.values(0..rows).count(), rows);
    }

    #[test]
    fn stamps_read_back_exactly_and_unstamped_chunks_stay_empty() {
        let rows = 3 * CHUNK_ROWS + 10;
        let mut stamps = Stamps::default();
        let mut plain = Vec::new();
        for i in 0..rows {
            // Stamps only in the second chunk and the tail.
            let t = if i / CHUNK_ROWS == 1 || i >= 3 * CHUNK_ROWS {
                (i as i64) * 1_000 + 1
            } else {
                0
            };
            stamps.push(t);
            plain.push(t);
        }
        let shared = stamps.clone();
        stamps.set(5, i64::MAX);
        stamps.set(CHUNK_ROWS + 1, 0);
        stamps.set(2 * CHUNK_ROWS, 0);
        plain[5] = i64::MAX;
        plain[CHUNK_ROWS + 1] = 0;
        let held: Vec<bool> = stamps.chunks.iter().map(Option::is_some).collect();
        assert_eq!(held, [true, true, false, true]);
        assert!((0..rows).all(|i| stamps[i] == plain[i]));
        // The clone kept its own values.
        assert_eq!(shared[5], 0);
        assert_eq!(shared[CHUNK_ROWS + 1], (CHUNK_ROWS as i64 + 1) * 1_000 + 1);
        assert_eq!(Stamps::zeros(rows).chunks.len(), held.len());
    }
}
