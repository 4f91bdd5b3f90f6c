//! The parallel fast path for well-formed, quote-free files.
//!
//! Numeric CSV files as pipelines write them have no quotes, so every line
//! break ends a record and a file can be cut at line breaks into pieces that
//! are parsed on all cores at once. The text is read in waves of
//! [`WAVE_BYTES`], so a file is still never held in memory whole.
//!
//! The fast path only ever accepts: anything it does not fully understand (a
//! quote, a bare carriage return, an empty line, a ragged row, invalid UTF-8,
//! a cell the caller rejects) makes it give up and return `None`, and the
//! caller then reads the file again with the full CSV reader, which reports
//! the first problem with its exact row and column. So the two paths accept
//! exactly the same files with the same values, and every error comes from
//! the one careful reader.

use std::fs::File;
use std::io::{Read, Seek, SeekFrom};
use std::path::Path;

use rayon::prelude::*;

/// Bytes of text read before the pieces are handed out.
const WAVE_BYTES: usize = 16 << 20;
/// Bytes per piece: the unit of parallel parsing.
const PIECE_BYTES: usize = 1 << 20;

/// Cuts the data lines of `file`, from byte `start` on (just after the
/// header), into pieces of whole lines and hands each piece to `parse` (in
/// parallel; see [`each_row`]), returning the pieces' results in file order.
/// None when the fast path does not apply: `parse` gave up on a piece, or
/// the file could not be read as expected.
pub(super) fn pieces<T, F>(file: &Path, start: u64, parse: F) -> Option<Vec<T>>
where
    T: Send,
    F: Fn(&str) -> Option<T> + Sync,
{
    let mut f = File::open(file).ok()?;
    // The header must end exactly where the data starts. After a CRLF
    // header the CSV reader's position sits between the CR and the LF.
    let mut start = start;
    if start > 0 {
        f.seek(SeekFrom::Start(start - 1)).ok()?;
        let mut around = [0u8; 2];
        let got = f.read(&mut around).ok()?;
        match (around[0], got == 2 && around[1] == b'\n') {
            (b'\n', _) => {}
            (b'\r', true) => start += 1,
            _ => return None,
        }
        f.seek(SeekFrom::Start(start)).ok()?;
    }
    let mut out = Vec::new();
    let mut text: Vec<u8> = Vec::with_capacity(WAVE_BYTES + PIECE_BYTES);
    let mut at_end = false;
    while !at_end {
        let have = text.len();
        text.resize(have + WAVE_BYTES, 0);
        let mut filled = have;
        while filled < text.len() {
            match f.read(&mut text[filled..]) {
                Ok(0) => {
                    at_end = true;
                    break;
                }
                Ok(k) => filled += k,
                Err(e) if e.kind() == std::io::ErrorKind::Interrupted => {}
                Err(_) => return None,
            }
        }
        text.truncate(filled);
        // Whole lines only; the rest waits for the next wave.
        let complete = if at_end {
            text.len()
        } else {
            text.iter().rposition(|&b| b == b'\n')? + 1
        };
        let cuts = piece_bounds(&text[..complete]);
        let parsed: Option<Vec<T>> = cuts
            .par_iter()
            .map(|&(a, b)| parse(std::str::from_utf8(&text[a..b]).ok()?))
            .collect();
        out.extend(parsed?);
        text.drain(..complete);
    }
    Some(out)
}

/// Piece boundaries: cuts of about [`PIECE_BYTES`] moved forward to just
/// after a line break.
fn piece_bounds(text: &[u8]) -> Vec<(usize, usize)> {
    let mut bounds = Vec::new();
    let mut a = 0;
    while a < text.len() {
        let want = (a + PIECE_BYTES).min(text.len());
        let b = match text[want..].iter().position(|&c| c == b'\n') {
            Some(k) => want + k + 1,
            None => text.len(),
        };
        bounds.push((a, b));
        a = b;
    }
    bounds
}

/// Calls `row` with the `width` cells of every line of `piece`, in order,
/// and returns the number of lines; None, at once, for a line the fast path
/// does not take (a quote, a carriage return other than one just before the
/// line break, an empty line, a cell count other than `width`) or when `row`
/// gives up.
pub(super) fn each_row<'a>(
    piece: &'a str,
    width: usize,
    mut row: impl FnMut(&[&'a str]) -> Option<()>,
) -> Option<usize> {
    let bytes = piece.as_bytes();
    let mut cells: Vec<&str> = Vec::with_capacity(width);
    let mut count = 0;
    let mut line_start = 0;
    let mut cell_start = 0;
    // One pass over the bytes: commas end cells, line breaks end rows.
    // Commas and line breaks are ASCII, so every cut is a char boundary.
    for (i, &b) in bytes.iter().enumerate() {
        match b {
            b',' => {
                cells.push(&piece[cell_start..i]);
                cell_start = i + 1;
            }
            b'\n' => {
                let end = if i > cell_start && bytes[i - 1] == b'\r' {
                    i - 1
                } else {
                    i
                };
                if end == line_start {
                    return None;
                }
                cells.push(&piece[cell_start..end]);
                if cells.len() != width {
                    return None;
                }
                row(&cells)?;
                count += 1;
                cells.clear();
                line_start = i + 1;
                cell_start = i + 1;
            }
            b'"' => return None,
            // Only as the first half of a CRLF line break.
            b'\r' if bytes.get(i + 1) != Some(&b'\n') => return None,
            _ => {}
        }
    }
    if line_start < bytes.len() {
        cells.push(&piece[cell_start..]);
        if cells.len() != width {
            return None;
        }
        row(&cells)?;
        count += 1;
    }
    Some(count)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn pieces_end_at_line_breaks() {
        let text = "a,1\n".repeat(PIECE_BYTES / 2);
        let bounds = piece_bounds(text.as_bytes());
        assert!(bounds.len() >= 2);
        assert_eq!(bounds.first().map(|b| b.0), Some(0));
        assert_eq!(bounds.last().map(|b| b.1), Some(text.len()));
        for w in bounds.windows(2) {
            assert_eq!(w[0].1, w[1].0);
            assert_eq!(text.as_bytes()[w[0].1 - 1], b'\n');
        }
    }

    fn take(piece: &str) -> Option<Vec<String>> {
        let mut seen = Vec::new();
        each_row(piece, 2, |cells| {
            seen.push(cells.join("|"));
            Some(())
        })?;
        Some(seen)
    }

    #[test]
    fn lines_the_fast_path_does_and_does_not_take() {
        let both = Some(vec!["a|1".to_string(), "b|2".to_string()]);
        assert_eq!(take("a,1\r\nb,2\n"), both);
        assert_eq!(take("a,1\nb,2"), both);
        assert_eq!(take("\"a\",1\n"), None);
        assert_eq!(take("a,1\rb,2\n"), None);
        assert_eq!(take("a,1,2\n"), None);
        assert_eq!(take("a,1\n\nb,2\n"), None);
    }
}
