//! Streams of integers coded with an ANS stack coder under per-symbol integer tables.
//!
//! Each value is coded with one [`IntTable`]: a value inside the table's support is one symbol;
//! any other value is the escape symbol followed by its distance past the support, coded with
//! Elias-gamma-style uniform chunks (bit length in `0..32`, the bits below the leading one in
//! chunks of at most 16 bits, then the side). So every `i32` is codable, however far in the tail.
//!
//! ANS is a stack: the encoder records every operation, then pushes them in reverse so that the
//! decoder pops them in reading order.

use constriction::UnwrapInfallible;
use constriction::stream::model::UniformModel;
use constriction::stream::stack::DefaultAnsCoder;
use constriction::stream::{Decode, Encode};

use super::table::{CodingModel, IntTable, PRECISION};
use crate::error::{KilnError, Result};

type Uniform = UniformModel<u32, PRECISION>;

/// A set of tables with their ready-built coding models.
#[derive(Debug, Clone)]
pub struct TableSet {
    tables: Vec<IntTable>,
    models: Vec<CodingModel>,
}

impl TableSet {
    /// Builds the coding models of `tables` (integer arithmetic only).
    pub fn new(tables: Vec<IntTable>) -> Result<Self> {
        let models = tables.iter().map(IntTable::coding_model).collect::<Result<Vec<_>>>()?;
        Ok(TableSet { tables, models })
    }

    /// The tables.
    pub fn tables(&self) -> &[IntTable] {
        &self.tables
    }

    /// Number of tables.
    pub fn len(&self) -> usize {
        self.tables.len()
    }

    /// Whether the set is empty.
    pub fn is_empty(&self) -> bool {
        self.tables.is_empty()
    }
}

#[derive(Debug, Clone, Copy)]
enum Op {
    Table { table: u32, symbol: u32 },
    Uniform { range: u32, value: u32 },
}

/// Collects values, then produces the compressed words.
#[derive(Debug)]
pub struct SymbolEncoder<'a> {
    set: &'a TableSet,
    ops: Vec<Op>,
    ideal_bits: f64,
}

fn uniform_bits(range: u32) -> f64 {
    let per_bin = (1u64 << PRECISION) / range as u64;
    PRECISION as f64 - (per_bin as f64).log2()
}

impl<'a> SymbolEncoder<'a> {
    /// A new, empty stream over `set`.
    pub fn new(set: &'a TableSet) -> Self {
        SymbolEncoder { set, ops: Vec::new(), ideal_bits: 0.0 }
    }

    fn push_uniform(&mut self, range: u32, value: u32) {
        self.ideal_bits += uniform_bits(range);
        self.ops.push(Op::Uniform { range, value });
    }

    /// Appends `value`, coded with table `table`.
    ///
    /// # Panics
    /// If `table` is out of range of the set (a bug in the caller, never input-dependent).
    pub fn push(&mut self, table: usize, value: i32) {
        let t = &self.set.tables[table];
        let idx = value as i64 - t.lo as i64;
        let n = t.support() as i64;
        let symbol = if (0..n).contains(&idx) { idx as u32 } else { n as u32 };
        self.ideal_bits += t.symbol_bits(value);
        self.ops.push(Op::Table { table: table as u32, symbol });
        if symbol as i64 == n {
            let (distance, side) = if idx < 0 { ((-idx - 1) as u64, 0) } else { ((idx - n) as u64, 1) };
            let v = distance + 1; // ≥ 1, so it has a leading one bit
            let bits = 64 - v.leading_zeros(); // 1..=33
            self.push_uniform(64, bits - 1);
            let mut rest_bits = bits - 1;
            while rest_bits > 0 {
                let chunk = rest_bits.min(16);
                rest_bits -= chunk;
                let value = ((v >> rest_bits) & ((1 << chunk) - 1)) as u32;
                self.push_uniform(1 << chunk, value);
            }
            self.push_uniform(2, side);
        }
    }

    /// The model's information content of everything pushed so far, `−Σ log2 p`, in bits.
    pub fn ideal_bits(&self) -> f64 {
        self.ideal_bits
    }

    /// Number of values and escape-payload operations pushed.
    pub fn len(&self) -> usize {
        self.ops.len()
    }

    /// Whether nothing was pushed.
    pub fn is_empty(&self) -> bool {
        self.ops.is_empty()
    }

    /// Runs the ANS coder and returns the compressed words.
    pub fn finish(self) -> Vec<u32> {
        let mut coder = DefaultAnsCoder::new();
        for op in self.ops.iter().rev() {
            match *op {
                Op::Table { table, symbol } => {
                    coder.encode_symbol(symbol as usize, self.set.models[table as usize].as_view())
                }
                Op::Uniform { range, value } => coder.encode_symbol(value as usize, Uniform::new(range as usize)),
            }
            .expect("symbols are in the support of their models by construction");
        }
        coder.into_compressed().unwrap_infallible()
    }
}

/// Reads values back in the order they were pushed.
#[derive(Debug)]
pub struct SymbolDecoder<'a> {
    set: &'a TableSet,
    coder: DefaultAnsCoder,
}

fn corrupt(what: &str) -> KilnError {
    KilnError::Corrupt(what.to_string())
}

impl<'a> SymbolDecoder<'a> {
    /// Starts decoding `words` with tables from `set`.
    pub fn new(set: &'a TableSet, words: Vec<u32>) -> Result<Self> {
        let coder =
            DefaultAnsCoder::from_compressed(words).map_err(|_| corrupt("entropy-coded stream ends in a zero word"))?;
        Ok(SymbolDecoder { set, coder })
    }

    fn pop_uniform(&mut self, range: u32) -> Result<u32> {
        let v = self
            .coder
            .decode_symbol(Uniform::new(range as usize))
            .map_err(|_| corrupt("entropy-coded stream ended early"))?;
        Ok(v as u32)
    }

    /// Decodes the next value, which was pushed with table `table`.
    ///
    /// Returns an error (never panics) when `table` is out of range or the stream is damaged.
    pub fn pop(&mut self, table: usize) -> Result<i32> {
        let t = self.set.tables.get(table).ok_or_else(|| corrupt("table index out of range"))?;
        let model = self.set.models[table].as_view();
        let symbol = self.coder.decode_symbol(model).map_err(|_| corrupt("entropy-coded stream ended early"))?;
        let n = t.support();
        if symbol < n {
            return Ok(t.lo + symbol as i32);
        }
        let bits = self.pop_uniform(64)? + 1;
        if bits > 33 {
            return Err(corrupt("escape code longer than 33 bits"));
        }
        let mut v: u64 = 1;
        let mut rest_bits = bits - 1;
        while rest_bits > 0 {
            let chunk = rest_bits.min(16);
            rest_bits -= chunk;
            v = (v << chunk) | self.pop_uniform(1 << chunk)? as u64;
        }
        let side = self.pop_uniform(2)?;
        let distance = (v - 1) as i64;
        let value = if side == 0 { t.lo as i64 - 1 - distance } else { t.lo as i64 + n as i64 + distance };
        i32::try_from(value).map_err(|_| corrupt("escaped value outside the 32-bit range"))
    }

    /// Checks that the whole stream was consumed, as it is for an intact file.
    pub fn finish(self) -> Result<()> {
        if self.coder.is_empty() { Ok(()) } else { Err(corrupt("entropy-coded stream has trailing data")) }
    }
}
