//! The fast reader's cursor: one pass over the bytes of a plain measurement line
//! (`{"t": <number> | "<timestamp>", "values": {...}}`; a timestamp is read with
//! [`Scan::key`], a string without escapes), used by `ReadingParser::parse_plain` in
//! `reading.rs`. Kept apart so the line grammar it accepts reads on its own; it gives up
//! (`None`) on anything unusual and the serde reader takes over, so it only has to be
//! right on what it accepts: numbers follow JSON's grammar and are converted by
//! `f64::from_str`, which rounds correctly, as serde_json does with `float_roundtrip`.
//! Every method is small and marked `#[inline]` so it folds into the caller's loop as it
//! did when it lived beside it.

/// A cursor over one line's bytes; every method skips
/// JSON whitespace first and returns `None` (or false) on anything unexpected.
pub(crate) struct Scan<'a> {
    /// The line, and the same as bytes; slices of `s` at ASCII positions need no UTF-8
    /// check.
    s: &'a str,
    b: &'a [u8],
    i: usize,
}

impl<'a> Scan<'a> {
    /// A cursor at the start of `s`.
    #[inline]
    pub(crate) fn new(s: &'a str) -> Self {
        Self {
            s,
            b: s.as_bytes(),
            i: 0,
        }
    }

    #[inline]
    fn ws(&mut self) {
        while matches!(self.b.get(self.i), Some(b' ' | b'\t' | b'\n' | b'\r')) {
            self.i += 1;
        }
    }

    #[inline]
    pub(crate) fn eat_if(&mut self, c: u8) -> bool {
        self.ws();
        let hit = self.b.get(self.i) == Some(&c);
        self.i += hit as usize;
        hit
    }

    #[inline]
    pub(crate) fn eat(&mut self, c: u8) -> Option<()> {
        self.eat_if(c).then_some(())
    }

    #[inline]
    pub(crate) fn literal(&mut self, word: &[u8]) -> bool {
        self.ws();
        let hit = self.b[self.i..].starts_with(word);
        if hit {
            self.i += word.len();
        }
        hit
    }

    /// Whitespace to the end of the text.
    #[inline]
    pub(crate) fn end(&mut self) -> Option<()> {
        self.ws();
        (self.i == self.b.len()).then_some(())
    }

    /// A string without escapes or control characters (the usual key).
    #[inline]
    pub(crate) fn key(&mut self) -> Option<&'a str> {
        self.eat(b'"')?;
        let start = self.i;
        loop {
            match *self.b.get(self.i)? {
                b'"' => break,
                b'\\' => return None,
                c if c < 0x20 => return None,
                _ => self.i += 1,
            }
        }
        let s = self.s.get(start..self.i)?;
        self.i += 1;
        Some(s)
    }

    /// A finite JSON number: -?(0|[1-9][0-9]*)(.[0-9]+)?([eE][+-]?[0-9]+)?.
    #[inline]
    pub(crate) fn number(&mut self) -> Option<f64> {
        self.ws();
        let start = self.i;
        let digit = |s: &Self| matches!(s.b.get(s.i), Some(b'0'..=b'9'));
        let digits = |s: &mut Self| {
            let from = s.i;
            while digit(s) {
                s.i += 1;
            }
            s.i > from
        };
        self.eat_if_raw(b'-');
        match self.b.get(self.i)? {
            b'0' => self.i += 1,
            b'1'..=b'9' => {
                digits(self);
            }
            _ => return None,
        }
        if self.eat_if_raw(b'.') && !digits(self) {
            return None;
        }
        if matches!(self.b.get(self.i), Some(b'e' | b'E')) {
            self.i += 1;
            if !self.eat_if_raw(b'+') {
                self.eat_if_raw(b'-');
            }
            if !digits(self) {
                return None;
            }
        }
        let x: f64 = self.s.get(start..self.i)?.parse().ok()?;
        x.is_finite().then_some(x)
    }

    /// `c` at the cursor itself, without skipping whitespace.
    #[inline]
    fn eat_if_raw(&mut self, c: u8) -> bool {
        let hit = self.b.get(self.i) == Some(&c);
        self.i += hit as usize;
        hit
    }
}

#[cfg(test)]
mod tests {
    use super::Scan;

    fn number(text: &str) -> Option<f64> {
        let mut sc = Scan::new(text);
        let x = sc.number()?;
        sc.end().map(|()| x)
    }

    #[test]
    fn numbers_follow_the_json_grammar() {
        // JSON's number grammar (RFC 8259 §6): no leading zeros, no bare dot, no plus sign.
        for (text, want) in [
            ("0", 0.0),
            ("-0.5", -0.5),
            (" 12e-1 ", 1.2),
            ("3E+2", 300.0),
        ] {
            assert_eq!(number(text), Some(want), "{text}");
        }
        for text in ["01", ".5", "1.", "+1", "1e", "-", "1e999", "NaN", "0x10"] {
            assert_eq!(number(text), None, "{text}");
        }
    }

    #[test]
    fn keys_without_escapes_only() {
        let mut sc = Scan::new(r#" "values": "#);
        assert_eq!(sc.key(), Some("values"));
        assert_eq!(sc.eat(b':'), Some(()));
        assert_eq!(Scan::new(r#""va\"l""#).key(), None);
        let mut sc = Scan::new(" null,");
        assert!(sc.literal(b"null") && sc.eat_if(b',') && sc.end().is_some());
    }
}
