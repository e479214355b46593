//! Splits formula text into tokens, each tagged with its 1-based *character* column
//! (not byte offset), so error columns are right for non-ASCII input too.
//!
//! The lexer is a plain loop: no recursion, so hostile input can only make it slow in
//! proportion to its length, which the caller has already bounded.

use super::error::Fault;

/// The kinds of token the grammar knows.
#[derive(Debug, Clone, PartialEq)]
pub(crate) enum Tok {
    Num(f64),
    Name(String),
    Plus,
    Minus,
    Star,
    Slash,
    Caret,
    LParen,
    RParen,
    Comma,
    End,
}

impl Tok {
    /// How the token is named in an error message.
    pub(crate) fn describe(&self) -> String {
        match self {
            Tok::Num(_) => "number".to_string(),
            Tok::Name(n) => format!("name '{n}'"),
            Tok::Plus => "'+'".to_string(),
            Tok::Minus => "'-'".to_string(),
            Tok::Star => "'*'".to_string(),
            Tok::Slash => "'/'".to_string(),
            Tok::Caret => "'^'".to_string(),
            Tok::LParen => "'('".to_string(),
            Tok::RParen => "')'".to_string(),
            Tok::Comma => "','".to_string(),
            Tok::End => "end of formula".to_string(),
        }
    }
}

/// A token and the column where it starts.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Token {
    pub(crate) tok: Tok,
    pub(crate) col: usize,
}

fn is_name_start(c: char) -> bool {
    c.is_alphabetic() || c == '_'
}

fn is_name_char(c: char) -> bool {
    c.is_alphabetic() || c.is_ascii_digit() || c == '_'
}

/// Tokenise `text`; the last token is always [`Tok::End`] at column `chars + 1`.
pub(crate) fn lex(text: &str) -> Result<Vec<Token>, Fault> {
    let chars: Vec<char> = text.chars().collect();
    let mut toks = Vec::with_capacity(chars.len() / 2 + 1);
    let at = |i: usize| chars.get(i).copied();
    let mut i = 0;
    while let Some(c) = at(i) {
        let col = i + 1;
        if c.is_whitespace() {
            i += 1;
            continue;
        }
        let simple = match c {
            '+' => Some(Tok::Plus),
            '-' => Some(Tok::Minus),
            '*' => Some(Tok::Star),
            '/' => Some(Tok::Slash),
            '^' => Some(Tok::Caret),
            '(' => Some(Tok::LParen),
            ')' => Some(Tok::RParen),
            ',' => Some(Tok::Comma),
            _ => None,
        };
        if let Some(tok) = simple {
            toks.push(Token { tok, col });
            i += 1;
            continue;
        }
        let digit_at = |k: usize| at(k).is_some_and(|d| d.is_ascii_digit());
        if c.is_ascii_digit() || (c == '.' && digit_at(i + 1)) {
            let start = i;
            let mut ok = true;
            while digit_at(i) {
                i += 1;
            }
            if at(i) == Some('.') {
                i += 1;
                while digit_at(i) {
                    i += 1;
                }
            }
            if matches!(at(i), Some('e' | 'E')) {
                let mut j = i + 1;
                if matches!(at(j), Some('+' | '-')) {
                    j += 1;
                }
                if digit_at(j) {
                    while digit_at(j) {
                        j += 1;
                    }
                } else {
                    ok = false;
                }
                i = j;
            }
            // A number glued to letters or a second point ("2x", "1.2.3") is one bad
            // token; reporting it whole reads better than "unexpected name 'x'".
            while at(i).is_some_and(|d| is_name_char(d) || d == '.') {
                ok = false;
                i += 1;
            }
            let s: String = chars[start..i].iter().collect();
            let value = if ok { s.parse::<f64>().ok() } else { None };
            match value {
                Some(v) if v.is_finite() => toks.push(Token {
                    tok: Tok::Num(v),
                    col,
                }),
                Some(_) => {
                    return Err(Fault::new(
                        col,
                        format!("number '{s}' at column {col} is too large"),
                    ))
                }
                None => return Err(Fault::new(col, format!("bad number '{s}' at column {col}"))),
            }
            continue;
        }
        if is_name_start(c) {
            let start = i;
            while at(i).is_some_and(is_name_char) {
                i += 1;
            }
            toks.push(Token {
                tok: Tok::Name(chars[start..i].iter().collect()),
                col,
            });
            continue;
        }
        return Err(Fault::new(
            col,
            format!("unexpected character '{c}' at column {col}"),
        ));
    }
    toks.push(Token {
        tok: Tok::End,
        col: chars.len() + 1,
    });
    Ok(toks)
}
