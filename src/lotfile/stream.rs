//! Records of a lot file read from any byte stream, with the raw bytes of the current record
//! still at hand (for the strict quoting check and for line numbers).
//!
//! The window holds the current record and whatever the last read brought after it; it grows
//! only when one record is longer than the window. A file is never held whole.

use std::io::{self, Read};

use csv_core::ReadRecordResult;

/// Bytes asked of the stream per read.
const READ_CHUNK: usize = 64 * 1024;

/// The largest read buffer kept for the next file (a record longer than this grew it).
const SPARE_BUFFER_MAX: usize = 4 * READ_CHUNK;

thread_local! {
    /// A csv reader with the settings for lot files, and the read buffer, kept per thread
    /// between files: building the reader compiles a DFA, which cost a quarter of the parse
    /// time of a small file when it was done per file, and a fresh zeroed buffer per file
    /// cost a tenth of the rest. (Not a clone of one template: csv-core 0.1.13's `Clone` for
    /// its DFA copies only the transition table, and the clone misreads every byte.)
    static SPARE: std::cell::Cell<Option<(csv_core::Reader, Vec<u8>)>> =
        const { std::cell::Cell::new(None) };
}

/// The thread's spare reader (reset) and buffer (at least `READ_CHUNK` bytes, stale content),
/// or new ones.
fn reader_and_buffer() -> (csv_core::Reader, Vec<u8>) {
    let (reader, buf) = match SPARE.take() {
        Some((mut r, buf)) => {
            r.reset();
            (r, buf)
        }
        None => (
            csv_core::ReaderBuilder::new().comment(Some(b'#')).build(),
            Vec::new(),
        ),
    };
    if buf.len() < READ_CHUNK {
        return (reader, vec![0; READ_CHUNK]);
    }
    (reader, buf)
}

/// One record's fields, unescaped.
#[derive(Default)]
pub(super) struct Record {
    bytes: Vec<u8>,
    ends: Vec<usize>,
    len: usize,
}

impl Record {
    pub(super) fn len(&self) -> usize {
        self.len
    }

    pub(super) fn get(&self, i: usize) -> Option<&[u8]> {
        if i >= self.len {
            return None;
        }
        let start = if i == 0 { 0 } else { self.ends[i - 1] };
        self.bytes.get(start..self.ends[i])
    }

    pub(super) fn iter(&self) -> impl Iterator<Item = &[u8]> {
        (0..self.len).filter_map(|i| self.get(i))
    }
}

/// A sliding window over a byte stream, split into CSV records.
pub(super) struct Window<R> {
    inner: R,
    core: csv_core::Reader,
    buf: Vec<u8>,
    /// Bytes of `buf` the csv reader has consumed.
    pos: usize,
    /// Bytes of `buf` holding data.
    filled: usize,
    /// Stream offset of `buf[0]`.
    base: u64,
    eof: bool,
}

impl<R: Read> Window<R> {
    pub(super) fn new(inner: R) -> Self {
        let (core, buf) = reader_and_buffer();
        Window {
            inner,
            core,
            buf,
            pos: 0,
            filled: 0,
            base: 0,
            eof: false,
        }
    }

    /// The first bytes of the stream (at least `n` unless it is shorter), not yet consumed.
    pub(super) fn peek(&mut self, n: usize) -> io::Result<&[u8]> {
        while self.filled - self.pos < n && !self.eof {
            self.fill(self.pos)?;
        }
        Ok(&self.buf[self.pos..self.filled])
    }

    /// Skips `n` bytes that [`Window::peek`] returned.
    pub(super) fn skip(&mut self, n: usize) {
        self.pos = (self.pos + n).min(self.filled);
    }

    /// Stream offset up to which the csv reader has consumed.
    pub(super) fn offset(&self) -> u64 {
        self.base + self.pos as u64
    }

    /// The bytes from stream offset `from` (still in the window) up to `to`.
    pub(super) fn bytes(&self, from: u64, to: u64) -> &[u8] {
        let at = |o: u64| {
            usize::try_from(o.saturating_sub(self.base)).map_or(self.filled, |i| i.min(self.filled))
        };
        &self.buf[at(from)..at(to).max(at(from))]
    }

    /// Reads the next record into `rec`; false at the end of the stream. The bytes from
    /// `keep` (a stream offset at or before the record's start) stay in the window.
    pub(super) fn next_record(&mut self, rec: &mut Record, keep: u64) -> io::Result<bool> {
        let (mut nout, mut nend) = (0, 0);
        if rec.bytes.is_empty() {
            rec.bytes.resize(256, 0);
            rec.ends.resize(16, 0);
        }
        loop {
            if self.pos == self.filled && !self.eof {
                let keep = usize::try_from(keep.saturating_sub(self.base)).unwrap_or(self.pos);
                self.fill(keep.min(self.pos))?;
            }
            let input = &self.buf[self.pos..self.filled];
            let empty = input.is_empty();
            let (res, nin, o, e) =
                self.core
                    .read_record(input, &mut rec.bytes[nout..], &mut rec.ends[nend..]);
            self.pos += nin;
            nout += o;
            nend += e;
            match res {
                ReadRecordResult::InputEmpty if empty => return Ok(false),
                ReadRecordResult::InputEmpty => {}
                ReadRecordResult::OutputFull => rec.bytes.resize(rec.bytes.len() * 2, 0),
                ReadRecordResult::OutputEndsFull => rec.ends.resize(rec.ends.len() * 2, 0),
                ReadRecordResult::Record => {
                    rec.len = nend;
                    return Ok(true);
                }
                ReadRecordResult::End => return Ok(false),
            }
        }
    }

    /// Drops the bytes before `keep` (an index into `buf`), then reads more.
    fn fill(&mut self, keep: usize) -> io::Result<()> {
        if keep > 0 {
            self.buf.copy_within(keep..self.filled, 0);
            self.base += keep as u64;
            self.pos -= keep;
            self.filled -= keep;
        }
        if self.buf.len() - self.filled < READ_CHUNK / 2 {
            let grown = (self.buf.len() * 2).max(self.filled + READ_CHUNK);
            self.buf.resize(grown, 0);
        }
        loop {
            match self.inner.read(&mut self.buf[self.filled..]) {
                Ok(0) => {
                    self.eof = true;
                    return Ok(());
                }
                Ok(n) => {
                    self.filled += n;
                    return Ok(());
                }
                Err(e) if e.kind() == io::ErrorKind::Interrupted => {}
                Err(e) => return Err(e),
            }
        }
    }
}

impl<R> Drop for Window<R> {
    fn drop(&mut self) {
        let mut buf = std::mem::take(&mut self.buf);
        if buf.len() > SPARE_BUFFER_MAX {
            buf = Vec::new();
        }
        SPARE.set(Some((std::mem::take(&mut self.core), buf)));
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn records(text: &[u8]) -> Vec<Vec<Vec<u8>>> {
        let mut w = Window::new(text);
        let mut rec = Record::default();
        let mut out = Vec::new();
        while w.next_record(&mut rec, w.offset()).unwrap() {
            out.push(rec.iter().map(<[u8]>::to_vec).collect());
        }
        out
    }

    #[test]
    fn a_reused_reader_starts_afresh() {
        // The second file is read by the reader the first one left, mid-quote.
        let first = records(b"a,\"b\nc");
        assert_eq!(first, vec![vec![b"a".to_vec(), b"b\nc".to_vec()]]);
        let second = records(b"x,y\n#note\nz\n");
        assert_eq!(
            second,
            vec![vec![b"x".to_vec(), b"y".to_vec()], vec![b"z".to_vec()]]
        );
    }

    #[test]
    fn a_reused_buffer_shows_nothing_of_the_file_before() {
        // A long first file fills (and grows) the buffer with its bytes; the short second
        // file, read with the same buffer, must see only its own. Then a record longer than
        // the largest kept buffer, and a short file after it again.
        let long: Vec<u8> = (0..30_000)
            .flat_map(|k| format!("row{k},{k}\n").into_bytes())
            .collect();
        assert_eq!(records(&long).len(), 30_000);
        assert_eq!(records(b"x,1"), vec![vec![b"x".to_vec(), b"1".to_vec()]]);
        let huge = vec![b'q'; SPARE_BUFFER_MAX + 10];
        assert_eq!(records(&huge), vec![vec![huge.clone()]]);
        assert_eq!(records(b"\n\ny\n"), vec![vec![b"y".to_vec()]]);
    }
}
