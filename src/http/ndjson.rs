//! Splitting a byte stream into NDJSON lines with a bounded buffer.
//!
//! Chunks arrive cut anywhere; complete lines inside a chunk are handed on as slices of
//! it (no copy), and only a line cut across chunks is gathered in a buffer that never
//! exceeds the line limit. So memory is bounded by the limit, whatever the stream's length.

use bytes::{Bytes, BytesMut};

/// A line that passed the limit before its end was seen.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct LineError {
    /// 1-based number of the offending line.
    pub line_no: u64,
    /// The limit in force, bytes.
    pub limit: usize,
}

impl std::fmt::Display for LineError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(
            f,
            "line {} is longer than the limit of {} bytes",
            self.line_no, self.limit
        )
    }
}

/// Turns chunks into `(line_no, line)` pairs; blank lines are counted but not emitted,
/// and a trailing `\r` is dropped so CRLF files work.
#[derive(Debug)]
pub struct LineSplitter {
    partial: BytesMut,
    max: usize,
    /// Number of the line being gathered (1-based).
    line_no: u64,
}

impl LineSplitter {
    /// A splitter refusing lines longer than `max_line_bytes`.
    pub fn new(max_line_bytes: usize) -> Self {
        Self {
            partial: BytesMut::new(),
            max: max_line_bytes,
            line_no: 1,
        }
    }

    /// Refuse lines longer than `max_line_bytes` from now on (a stream's header may be
    /// longer than the lines that follow it, and a family run's lines longer than a
    /// plain one's).
    pub fn set_max(&mut self, max_line_bytes: usize) {
        self.max = max_line_bytes;
    }

    /// Number of the next line to be completed.
    pub fn line_no(&self) -> u64 {
        self.line_no
    }

    /// Split one chunk, appending its complete lines to `out`.
    pub fn push(&mut self, chunk: Bytes, out: &mut Vec<(u64, Bytes)>) -> Result<(), LineError> {
        let mut rest = chunk;
        while let Some(i) = memchr::memchr(b'\n', &rest) {
            let head = rest.split_to(i + 1);
            let line = if self.partial.is_empty() {
                head.slice(..i)
            } else {
                self.check(self.partial.len() + i)?;
                self.partial.extend_from_slice(&head[..i]);
                self.partial.split().freeze()
            };
            self.check(line.len())?;
            self.emit(line, out);
        }
        if !rest.is_empty() {
            self.check(self.partial.len() + rest.len())?;
            self.partial.extend_from_slice(&rest);
        }
        Ok(())
    }

    /// The stream ended: a last line without a newline is still a line.
    pub fn finish(&mut self, out: &mut Vec<(u64, Bytes)>) -> Result<(), LineError> {
        if !self.partial.is_empty() {
            let line = self.partial.split().freeze();
            self.emit(line, out);
        }
        Ok(())
    }

    fn check(&self, len: usize) -> Result<(), LineError> {
        if len > self.max {
            Err(LineError {
                line_no: self.line_no,
                limit: self.max,
            })
        } else {
            Ok(())
        }
    }

    fn emit(&mut self, mut line: Bytes, out: &mut Vec<(u64, Bytes)>) {
        if line.last() == Some(&b'\r') {
            line.truncate(line.len() - 1);
        }
        if !line.iter().all(u8::is_ascii_whitespace) {
            out.push((self.line_no, line));
        }
        self.line_no += 1;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn split_all(chunks: &[&str], max: usize) -> Result<Vec<(u64, String)>, LineError> {
        let mut s = LineSplitter::new(max);
        let mut out = Vec::new();
        for c in chunks {
            s.push(Bytes::copy_from_slice(c.as_bytes()), &mut out)?;
        }
        s.finish(&mut out)?;
        Ok(out
            .into_iter()
            .map(|(n, b)| (n, String::from_utf8(b.to_vec()).unwrap()))
            .collect())
    }

    #[test]
    fn lines_cut_anywhere_come_out_whole_and_numbered() {
        let text = "{\"a\":1}\n\n{\"b\":2}\r\n  \n{\"c\":3}";
        let whole = split_all(&[text], 64).unwrap();
        assert_eq!(
            whole,
            vec![
                (1, "{\"a\":1}".to_string()),
                (3, "{\"b\":2}".to_string()),
                (5, "{\"c\":3}".to_string())
            ]
        );
        // Every way of cutting the text in two gives the same lines.
        for cut in 0..=text.len() {
            let (a, b) = text.split_at(cut);
            assert_eq!(split_all(&[a, b], 64).unwrap(), whole, "cut at {cut}");
        }
        // And so does one byte at a time.
        let bytes: Vec<String> = text.chars().map(String::from).collect();
        let refs: Vec<&str> = bytes.iter().map(String::as_str).collect();
        assert_eq!(split_all(&refs, 64).unwrap(), whole);
    }

    #[test]
    fn a_line_over_the_limit_is_refused_with_its_number() {
        assert_eq!(
            split_all(&["ok\n", "0123456789ab\n"], 8),
            Err(LineError {
                line_no: 2,
                limit: 8
            })
        );
        // Also when it arrives in pieces and never ends.
        assert_eq!(
            split_all(&["ok\n0123", "45678", "9ab"], 8),
            Err(LineError {
                line_no: 2,
                limit: 8
            })
        );
        // Exactly at the limit is fine.
        assert_eq!(split_all(&["01234567\n"], 8).unwrap().len(), 1);
    }
}
