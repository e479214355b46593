//! Recursive-descent parser that emits straight into the shared, hash-consed graph
//! (the graph *is* the syntax tree, with sharing). Grammar, loosest first:
//!
//! ```text
//! expr    = term  (('+' | '-') term)*          left-associative
//! term    = unary (('*' | '/') unary)*         left-associative
//! unary   = ('-' | '+')* power                 so -x^2 = -(x^2)
//! power   = primary ('^' unary)?               right-associative, 2^-1 = 2^(-1)
//! primary = number | name | name '(' expr (',' expr)* ')' | '(' expr ')'
//! ```
//!
//! Every nesting construct (parenthesis, call, unary sign, exponent) raises a depth
//! counter that is checked *before* descending, so nesting is refused cleanly at the
//! limit instead of overflowing the stack.

use std::collections::HashMap;

use super::builder::Builder;
use super::error::Fault;
use super::instr::{self, Instr, FUNCTIONS};
use super::lexer::{Tok, Token};

/// Highest nesting depth ever allowed, whatever the configured limit: each level costs
/// a few stack frames, and this keeps a parse well inside a small thread stack even in
/// unoptimised builds.
pub const MAX_DEPTH_CEILING: usize = 256;

/// Most names listed in an "unknown name" message; a model with hundreds of states
/// would otherwise bury the point of the message.
const MAX_LISTED_NAMES: usize = 40;

/// What a name stands for.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Meaning {
    Slot(u32),
    Const(f64),
}

/// The names a program's formulas may use, resolved once for all its formulas.
#[derive(Debug)]
pub(crate) struct Names<'a> {
    map: HashMap<&'a str, Meaning>,
    known: String,
}

impl<'a> Names<'a> {
    /// Slots win over caller constants, which win over `pi` and `e`; the first of two
    /// equal slot names wins.
    pub(crate) fn new(slots: &[&'a str], constants: &[(&'a str, f64)]) -> Names<'a> {
        let mut map = HashMap::new();
        map.insert("pi", Meaning::Const(std::f64::consts::PI));
        map.insert("e", Meaning::Const(std::f64::consts::E));
        for &(name, v) in constants {
            map.insert(name, Meaning::Const(v));
        }
        for (s, &name) in slots.iter().enumerate().rev() {
            map.insert(name, Meaning::Slot(s as u32));
        }
        let mut listed: Vec<&str> = Vec::new();
        for &name in slots.iter().chain(constants.iter().map(|(n, _)| n)) {
            if !listed.contains(&name) {
                listed.push(name);
            }
        }
        let mut known = listed
            .iter()
            .take(MAX_LISTED_NAMES)
            .copied()
            .collect::<Vec<_>>()
            .join(", ");
        if listed.len() > MAX_LISTED_NAMES {
            known.push_str(&format!(" and {} more", listed.len() - MAX_LISTED_NAMES));
        }
        Names { map, known }
    }
}

/// Parses one formula's tokens into nodes of `b`.
pub(crate) struct Parser<'t, 'n, 'b> {
    toks: &'t [Token],
    pos: usize,
    depth: usize,
    max_depth: usize,
    names: &'n Names<'n>,
    b: &'b mut Builder,
}

type R = Result<u32, Fault>;

impl<'t, 'n, 'b> Parser<'t, 'n, 'b> {
    /// A parser over `toks` (which end with [`Tok::End`]).
    pub(crate) fn new(
        toks: &'t [Token],
        max_depth: usize,
        names: &'n Names<'n>,
        b: &'b mut Builder,
    ) -> Self {
        Parser {
            toks,
            pos: 0,
            depth: 0,
            max_depth: max_depth.min(MAX_DEPTH_CEILING),
            names,
            b,
        }
    }

    /// Parse the whole formula, returning the node of its value.
    pub(crate) fn formula(mut self) -> R {
        if self.peek().tok == Tok::End {
            return Err(Fault::new(1, "empty formula".to_string()));
        }
        let v = self.expr()?;
        let t = self.peek();
        match t.tok {
            Tok::End => Ok(v),
            Tok::RParen => Err(Fault::new(
                t.col,
                format!("unmatched ')' at column {}", t.col),
            )),
            _ => Err(Fault::new(
                t.col,
                format!(
                    "unexpected {} at column {}; expected an operator or the end of the formula",
                    t.tok.describe(),
                    t.col
                ),
            )),
        }
    }

    fn peek(&self) -> &'t Token {
        // The last token is End and is never consumed, so this index is always valid.
        &self.toks[self.pos.min(self.toks.len() - 1)]
    }

    fn bump(&mut self) {
        if self.pos + 1 < self.toks.len() {
            self.pos += 1;
        }
    }

    fn enter(&mut self, col: usize) -> Result<(), Fault> {
        self.depth += 1;
        if self.depth > self.max_depth {
            return Err(Fault::new(
                col,
                format!(
                    "formula nests deeper than {} levels at column {col}",
                    self.max_depth
                ),
            ));
        }
        Ok(())
    }

    fn expr(&mut self) -> R {
        let mut lhs = self.term()?;
        loop {
            let make: fn(u32, u32) -> Instr = match self.peek().tok {
                Tok::Plus => Instr::Add,
                Tok::Minus => Instr::Sub,
                _ => return Ok(lhs),
            };
            self.bump();
            let rhs = self.term()?;
            lhs = self.b.op(make(lhs, rhs));
        }
    }

    fn term(&mut self) -> R {
        let mut lhs = self.unary()?;
        loop {
            let make: fn(u32, u32) -> Instr = match self.peek().tok {
                Tok::Star => Instr::Mul,
                Tok::Slash => Instr::Div,
                _ => return Ok(lhs),
            };
            self.bump();
            let rhs = self.unary()?;
            lhs = self.b.op(make(lhs, rhs));
        }
    }

    fn unary(&mut self) -> R {
        // A run of signs is read in a loop rather than by recursion; each still counts
        // as a nesting level, as the limits promise.
        let outer = self.depth;
        let mut negative = false;
        loop {
            let t = self.peek();
            match t.tok {
                Tok::Minus => negative = !negative,
                Tok::Plus => {}
                _ => break,
            }
            self.enter(t.col)?;
            self.bump();
        }
        let v = self.power()?;
        self.depth = outer;
        // Negation is exact, so an even run of minus signs is the value itself.
        Ok(if negative {
            self.b.op(Instr::Neg(v))
        } else {
            v
        })
    }

    fn power(&mut self) -> R {
        let base = self.primary()?;
        let t = self.peek();
        if t.tok != Tok::Caret {
            return Ok(base);
        }
        self.bump();
        self.enter(t.col)?;
        let exponent = self.unary()?;
        self.depth -= 1;
        Ok(self.b.op(Instr::Pow(base, exponent)))
    }

    fn primary(&mut self) -> R {
        let t = self.peek();
        match &t.tok {
            Tok::Num(v) => {
                self.bump();
                Ok(self.b.constant(*v))
            }
            Tok::Name(name) => {
                self.bump();
                if self.peek().tok == Tok::LParen {
                    self.call(name, t.col)
                } else {
                    self.name(name, t.col)
                }
            }
            Tok::LParen => {
                self.enter(t.col)?;
                self.bump();
                let v = self.expr()?;
                let close = self.peek();
                if close.tok != Tok::RParen {
                    return Err(self.unclosed(t.col, close));
                }
                self.bump();
                self.depth -= 1;
                Ok(v)
            }
            Tok::End => Err(Fault::new(
                t.col,
                format!(
                    "formula ends too early at column {}; expected a number, name or '('",
                    t.col
                ),
            )),
            other => Err(Fault::new(
                t.col,
                format!(
                    "unexpected {} at column {}; expected a number, name or '('",
                    other.describe(),
                    t.col
                ),
            )),
        }
    }

    /// The error for a '(' at `open` that is not closed where `found` stands.
    fn unclosed(&self, open: usize, found: &Token) -> Fault {
        if found.tok == Tok::End {
            Fault::new(
                open,
                format!("missing ')' to close the '(' at column {open}"),
            )
        } else {
            Fault::new(
                found.col,
                format!(
                    "unexpected {} at column {}; expected ')' to close the '(' at column {open}",
                    found.tok.describe(),
                    found.col
                ),
            )
        }
    }

    fn name(&mut self, name: &str, col: usize) -> R {
        match self.names.map.get(name) {
            Some(Meaning::Slot(s)) => Ok(self.b.slot(*s)),
            Some(Meaning::Const(v)) => Ok(self.b.constant(*v)),
            None if instr::function(name).is_some() => Err(Fault::new(
                col,
                format!("function '{name}' at column {col} needs its arguments in parentheses"),
            )),
            None => {
                let known = if self.names.known.is_empty() {
                    "no names are defined here".to_string()
                } else {
                    format!("known names are {}", self.names.known)
                };
                Err(Fault::new(
                    col,
                    format!("unknown name '{name}' at column {col}; {known}"),
                ))
            }
        }
    }

    fn call(&mut self, name: &str, col: usize) -> R {
        let Some(f) = instr::function(name) else {
            let all = FUNCTIONS.iter().map(|f| f.name).collect::<Vec<_>>();
            return Err(Fault::new(
                col,
                format!(
                    "unknown function '{name}' at column {col}; functions are {}",
                    all.join(", ")
                ),
            ));
        };
        let open = self.peek().col;
        self.enter(open)?;
        self.bump();
        let mut args = [0u32; 3];
        let mut count = 0;
        if self.peek().tok == Tok::RParen {
            self.bump();
        } else {
            loop {
                let v = self.expr()?;
                if count < args.len() {
                    args[count] = v;
                }
                count += 1;
                let t = self.peek();
                match t.tok {
                    Tok::Comma => self.bump(),
                    Tok::RParen => {
                        self.bump();
                        break;
                    }
                    _ => return Err(self.unclosed(open, t)),
                }
            }
        }
        self.depth -= 1;
        if count != f.arity {
            let plural = if f.arity == 1 { "" } else { "s" };
            return Err(Fault::new(
                col,
                format!(
                    "function '{name}' at column {col} takes {} argument{plural}, not {count}",
                    f.arity
                ),
            ));
        }
        Ok(self.b.op((f.make)(args)))
    }
}
