//! The accepted bearer keys and their constant-time comparison. Keys are compared in
//! constant time per key so a wrong key's answer time does not reveal how much of it
//! matched. The check on each request is [`super::middleware::auth`].

/// The set of accepted keys (possibly empty: then every request passes).
#[derive(Clone, Default)]
pub struct ApiKeys {
    keys: Vec<Vec<u8>>,
}

impl ApiKeys {
    /// Keys from any source; blank entries and surrounding spaces are dropped.
    pub fn new(keys: impl IntoIterator<Item = String>) -> Self {
        let keys = keys
            .into_iter()
            .map(|k| k.trim().as_bytes().to_vec())
            .filter(|k| !k.is_empty())
            .collect();
        Self { keys }
    }

    /// Keys listed one per line (`#` starts a comment line), as in a key file.
    pub fn parse_lines(text: &str) -> Vec<String> {
        text.lines()
            .map(str::trim)
            .filter(|l| !l.is_empty() && !l.starts_with('#'))
            .map(str::to_string)
            .collect()
    }

    /// Keys separated by commas, as in `TACIT_API_KEYS`.
    pub fn parse_list(text: &str) -> Vec<String> {
        text.split(',')
            .map(str::trim)
            .filter(|k| !k.is_empty())
            .map(str::to_string)
            .collect()
    }

    /// How many keys are configured.
    pub fn len(&self) -> usize {
        self.keys.len()
    }

    /// True when no key is configured and the API is open.
    pub fn is_empty(&self) -> bool {
        self.keys.is_empty()
    }

    /// Whether `candidate` is one of the keys. Every key is compared, and each comparison
    /// reads every byte, so the time depends only on the lengths.
    pub fn accepts(&self, candidate: &[u8]) -> bool {
        let mut found = false;
        for k in &self.keys {
            found |= ct_eq(k, candidate);
        }
        found
    }
}

/// Constant-time equality for equal lengths; unequal lengths are simply unequal (key
/// lengths are not secret enough to hide at the cost of padding).
fn ct_eq(a: &[u8], b: &[u8]) -> bool {
    if a.len() != b.len() {
        return false;
    }
    let mut diff = 0u8;
    for (x, y) in a.iter().zip(b) {
        diff |= x ^ y;
    }
    std::hint::black_box(diff) == 0
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn accepts_only_configured_keys() {
        let keys = ApiKeys::new(vec!["alpha".into(), " beta ".into(), "".into()]);
        assert_eq!(keys.len(), 2);
        assert!(keys.accepts(b"alpha"));
        assert!(keys.accepts(b"beta"));
        assert!(!keys.accepts(b"alph"));
        assert!(!keys.accepts(b"alphb"));
        assert!(!keys.accepts(b""));
    }

    #[test]
    fn key_file_skips_comments_and_blanks() {
        let got = ApiKeys::parse_lines("# staff\nk1\n\n  k2  \n#k3\n");
        assert_eq!(got, vec!["k1", "k2"]);
        assert_eq!(ApiKeys::parse_list("a, b,,c "), vec!["a", "b", "c"]);
    }
}
