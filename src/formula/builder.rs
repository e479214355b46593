//! Builds the expression graph of all formulas of one program at once, hash-consing
//! every node (common-subexpression elimination across formulas) and folding any
//! operation whose arguments are all constants. Nodes are appended after their
//! arguments, so the node order is already a valid evaluation order and later passes
//! never need to recurse.

use std::collections::HashMap;

use super::instr::{self, Instr};

/// One node of the graph; `Op` arguments are node indices.
#[derive(Debug, Clone, Copy)]
pub(crate) enum Node {
    Slot(u32),
    Const(f64),
    Op(Instr),
}

/// What identifies a node for sharing; constants by bit pattern so that `0.0` and
/// `-0.0` stay distinct.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
enum Key {
    Slot(u32),
    Const(u64),
    Op(Instr),
}

/// Largest constant integer exponent turned into repeated multiplication (`powi`);
/// beyond it `powf` is more accurate, and it is exact for integer exponents anyway.
const MAX_POWI: f64 = 64.0;

/// The graph under construction.
#[derive(Debug, Default)]
pub(crate) struct Builder {
    pub(crate) nodes: Vec<Node>,
    memo: HashMap<Key, u32>,
}

impl Builder {
    fn intern(&mut self, key: Key, node: Node) -> u32 {
        if let Some(&id) = self.memo.get(&key) {
            return id;
        }
        // Node counts are bounded by the formula length limit, far below u32::MAX.
        let id = self.nodes.len() as u32;
        self.nodes.push(node);
        self.memo.insert(key, id);
        id
    }

    /// The node reading variable slot `s`.
    pub(crate) fn slot(&mut self, s: u32) -> u32 {
        self.intern(Key::Slot(s), Node::Slot(s))
    }

    /// The node holding constant `v`.
    pub(crate) fn constant(&mut self, v: f64) -> u32 {
        self.intern(Key::Const(v.to_bits()), Node::Const(v))
    }

    /// The constant value of node `id`, if it is one.
    pub(crate) fn const_of(&self, id: u32) -> Option<f64> {
        match self.nodes[id as usize] {
            Node::Const(v) => Some(v),
            _ => None,
        }
    }

    /// The node computing `ins` (whose arguments are node indices): folded to a
    /// constant when every argument is one, shared when an identical node exists.
    pub(crate) fn op(&mut self, ins: Instr) -> u32 {
        let ins = match ins {
            // IEEE addition and multiplication are commutative bit for bit, so ordering
            // the arguments lets `a*b` and `b*a` share one register.
            Instr::Add(a, b) if b < a => Instr::Add(b, a),
            Instr::Mul(a, b) if b < a => Instr::Mul(b, a),
            Instr::Pow(a, b) => match self.const_of(b) {
                Some(k) if k.fract() == 0.0 && k.abs() <= MAX_POWI => {
                    if k == 1.0 {
                        return a;
                    }
                    Instr::Powi(a, k as i32)
                }
                _ => ins,
            },
            _ => ins,
        };
        let (args, n) = ins.args();
        let mut vals = [0.0; 3];
        let mut all_const = true;
        for i in 0..n {
            match self.const_of(args[i]) {
                Some(v) => vals[i] = v,
                None => all_const = false,
            }
        }
        if all_const {
            // Folding runs the very code the evaluator runs, so a folded constant is
            // bit-identical to what evaluating it at run time would give.
            let v = instr::value(ins.with_args([0, 1, 2]), &vals);
            return self.constant(v);
        }
        self.intern(Key::Op(ins), Node::Op(ins))
    }
}
