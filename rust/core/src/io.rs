//! The model file: our own little-endian binary layout with a version and a CRC-32, read with a
//! bounds check before every allocation (docs/model-format.md describes it byte by byte).

use crate::codebook::{Codebook, CodebookBuilder, ColumnCode, Values};
use crate::error::{Error, Result};
use crate::model::TreeModel;
use crate::stats::PairStats;
use crate::values::Kind;

/// The first eight bytes of every treewise file.
pub const MAGIC: &[u8; 8] = b"TREEWISE";
/// The layout version this build writes and reads.
pub const FORMAT_VERSION: u32 = 1;
/// The file holds a fitted model.
pub const KIND_MODEL: u32 = 1;
/// The file holds pair statistics with the codebook they were counted with.
pub const KIND_STATS: u32 = 2;
/// The file holds the tallies of a codebook pass (to merge across workers).
pub const KIND_TALLIES: u32 = 3;
/// The file holds a codebook alone.
pub const KIND_CODEBOOK: u32 = 4;
const HEADER_LEN: usize = 8 + 4 + 4 + 8 + 4;
const NO_PARENT: u32 = u32::MAX;

/// Appends little-endian fields to a byte buffer.
#[derive(Default)]
pub struct Writer {
    buf: Vec<u8>,
}

impl Writer {
    pub fn u8(&mut self, v: u8) {
        self.buf.push(v);
    }
    pub fn u32(&mut self, v: u32) {
        self.buf.extend_from_slice(&v.to_le_bytes());
    }
    pub fn u64(&mut self, v: u64) {
        self.buf.extend_from_slice(&v.to_le_bytes());
    }
    pub fn i64(&mut self, v: i64) {
        self.buf.extend_from_slice(&v.to_le_bytes());
    }
    pub fn f64(&mut self, v: f64) {
        self.buf.extend_from_slice(&v.to_le_bytes());
    }
    pub fn len(&mut self, n: usize) {
        self.u64(n as u64);
    }
    pub fn str(&mut self, s: &str) {
        self.len(s.len());
        self.buf.extend_from_slice(s.as_bytes());
    }
    pub fn u64s(&mut self, v: &[u64]) {
        self.len(v.len());
        v.iter().for_each(|x| self.u64(*x));
    }
    pub fn f64s(&mut self, v: &[f64]) {
        self.len(v.len());
        v.iter().for_each(|x| self.f64(*x));
    }

    /// The finished file: header (magic, version, kind, payload length, CRC-32) and payload.
    pub fn finish(self, kind: u32) -> Vec<u8> {
        let mut out = Vec::with_capacity(HEADER_LEN + self.buf.len());
        out.extend_from_slice(MAGIC);
        out.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
        out.extend_from_slice(&kind.to_le_bytes());
        out.extend_from_slice(&(self.buf.len() as u64).to_le_bytes());
        out.extend_from_slice(&crc32fast::hash(&self.buf).to_le_bytes());
        out.extend_from_slice(&self.buf);
        out
    }
}

/// Reads little-endian fields, refusing any length that the remaining bytes cannot hold.
pub struct Reader<'a> {
    buf: &'a [u8],
    pos: usize,
}

fn bad(what: impl std::fmt::Display) -> Error {
    Error::CorruptModel(format!(
        "{what}; the file is damaged or was not written by treewise"
    ))
}

impl<'a> Reader<'a> {
    /// Checks the header of `file` and returns a reader over its payload.
    pub fn open(file: &'a [u8], kind: u32) -> Result<Self> {
        if file.len() < HEADER_LEN || &file[..8] != MAGIC {
            return Err(bad("this is not a treewise file (no TREEWISE header)"));
        }
        let word =
            |at: usize| u32::from_le_bytes([file[at], file[at + 1], file[at + 2], file[at + 3]]);
        let version = word(8);
        if version != FORMAT_VERSION {
            return Err(Error::CorruptModel(format!(
                "the file has layout version {version}, but this treewise reads version \
                 {FORMAT_VERSION}; use the treewise release that wrote it"
            )));
        }
        let found = word(12);
        if found != kind {
            return Err(bad(format!("the file holds kind {found}, not kind {kind}")));
        }
        let mut len_bytes = [0u8; 8];
        len_bytes.copy_from_slice(&file[16..24]);
        let declared = u64::from_le_bytes(len_bytes);
        let payload = &file[HEADER_LEN..];
        if declared != payload.len() as u64 {
            return Err(bad(format!(
                "the header declares {declared} bytes of payload but {} follow (truncated?)",
                payload.len()
            )));
        }
        if crc32fast::hash(payload) != word(24) {
            return Err(bad("the checksum does not match the contents"));
        }
        Ok(Reader {
            buf: payload,
            pos: 0,
        })
    }

    fn take(&mut self, n: usize) -> Result<&'a [u8]> {
        if n > self.buf.len() - self.pos {
            return Err(bad(format!(
                "a field at byte {} runs past the end",
                self.pos
            )));
        }
        let out = &self.buf[self.pos..self.pos + n];
        self.pos += n;
        Ok(out)
    }
    fn array<const N: usize>(&mut self) -> Result<[u8; N]> {
        let mut a = [0u8; N];
        a.copy_from_slice(self.take(N)?);
        Ok(a)
    }
    pub fn u8(&mut self) -> Result<u8> {
        Ok(self.take(1)?[0])
    }
    pub fn u32(&mut self) -> Result<u32> {
        Ok(u32::from_le_bytes(self.array()?))
    }
    pub fn u64(&mut self) -> Result<u64> {
        Ok(u64::from_le_bytes(self.array()?))
    }
    pub fn i64(&mut self) -> Result<i64> {
        Ok(i64::from_le_bytes(self.array()?))
    }
    pub fn f64(&mut self) -> Result<f64> {
        Ok(f64::from_le_bytes(self.array()?))
    }
    /// A count of items of `size` bytes each, checked against what is left before any allocation.
    pub fn len(&mut self, size: usize) -> Result<usize> {
        let n = self.u64()?;
        let left = (self.buf.len() - self.pos) as u64;
        if n.checked_mul(size.max(1) as u64)
            .is_none_or(|bytes| bytes > left)
        {
            return Err(bad(format!(
                "a length of {n} at byte {} is larger than the file",
                self.pos - 8
            )));
        }
        usize::try_from(n).map_err(|_| bad("a length does not fit in memory"))
    }
    pub fn str(&mut self) -> Result<String> {
        let n = self.len(1)?;
        let bytes = self.take(n)?;
        String::from_utf8(bytes.to_vec()).map_err(|_| bad("a name is not valid UTF-8"))
    }
    pub fn u64s(&mut self) -> Result<Vec<u64>> {
        let n = self.len(8)?;
        (0..n).map(|_| self.u64()).collect()
    }
    pub fn f64s(&mut self) -> Result<Vec<f64>> {
        let n = self.len(8)?;
        (0..n).map(|_| self.f64()).collect()
    }
    /// Fails unless every byte was read.
    pub fn end(&self) -> Result<()> {
        if self.pos != self.buf.len() {
            return Err(bad(format!(
                "{} unread bytes at the end",
                self.buf.len() - self.pos
            )));
        }
        Ok(())
    }
}

fn kind_code(kind: Kind) -> u8 {
    match kind {
        Kind::Bool => 0,
        Kind::Int => 1,
        Kind::UInt => 2,
        Kind::Str => 3,
        Kind::Float => 4,
    }
}

/// Writes a codebook's columns.
pub fn write_codebook(w: &mut Writer, codebook: &Codebook) {
    w.len(codebook.columns().len());
    for col in codebook.columns() {
        w.str(col.name());
        w.u8(kind_code(col.values().kind()));
        w.u8(u8::from(col.has_other()));
        w.u8(u8::from(col.has_null()));
        match col.values() {
            Values::Bool(v) => {
                w.len(v.len());
                v.iter().for_each(|b| w.u8(u8::from(*b)));
            }
            Values::Int(v) => {
                w.len(v.len());
                v.iter().for_each(|x| w.i64(*x));
            }
            Values::UInt(v) => w.u64s(v),
            Values::Str(v) => {
                w.len(v.len());
                v.iter().for_each(|s| w.str(s));
            }
            Values::Bins { edges, low, high } => {
                w.f64s(edges);
                w.f64(*low);
                w.f64(*high);
            }
        }
    }
}

fn flag(r: &mut Reader<'_>) -> Result<bool> {
    match r.u8()? {
        0 => Ok(false),
        1 => Ok(true),
        other => Err(bad(format!("a flag byte is {other}, not 0 or 1"))),
    }
}

/// Reads a codebook, validating each column (sorted, distinct, finite values; sizes).
pub fn read_codebook(r: &mut Reader<'_>) -> Result<Codebook> {
    // The smallest column takes 8 + 3 + 8 bytes; that bounds the count before allocating.
    let n = r.len(19)?;
    let mut columns = Vec::with_capacity(n);
    for _ in 0..n {
        let name = r.str()?;
        let kind = r.u8()?;
        let has_other = flag(r)?;
        let has_null = flag(r)?;
        let values = match kind {
            0 => {
                let k = r.len(1)?;
                Values::Bool((0..k).map(|_| flag(r)).collect::<Result<_>>()?)
            }
            1 => {
                let k = r.len(8)?;
                Values::Int((0..k).map(|_| r.i64()).collect::<Result<_>>()?)
            }
            2 => Values::UInt(r.u64s()?),
            3 => {
                let k = r.len(8)?;
                Values::Str(
                    (0..k)
                        .map(|_| r.str().map(String::into_boxed_str))
                        .collect::<Result<_>>()?,
                )
            }
            4 => {
                let edges = r.f64s()?;
                Values::Bins {
                    edges,
                    low: r.f64()?,
                    high: r.f64()?,
                }
            }
            other => return Err(bad(format!("column '{name}' has unknown kind {other}"))),
        };
        let col = ColumnCode::new(name, values, has_other, has_null).map_err(|e| match e {
            Error::CorruptModel(m) => Error::CorruptModel(m),
            other => bad(other),
        })?;
        columns.push(col);
    }
    Codebook::new(columns).map_err(bad)
}

/// The bytes of a model file.
pub fn model_to_bytes(model: &TreeModel) -> Vec<u8> {
    let mut w = Writer::default();
    write_codebook(&mut w, model.codebook());
    w.len(model.dtypes().len());
    model.dtypes().iter().for_each(|t| w.str(t));
    w.u64(model.n_rows());
    w.f64(model.alpha());
    w.u32(u32::try_from(model.root()).unwrap_or(NO_PARENT));
    for p in model.parent() {
        w.u32(p.map_or(NO_PARENT, |p| u32::try_from(p).unwrap_or(NO_PARENT)));
    }
    model.counts().iter().for_each(|c| w.u64s(c));
    w.f64s(model.pair_mi());
    w.finish(KIND_MODEL)
}

/// Reads and validates a model file.
pub fn model_from_bytes(file: &[u8]) -> Result<TreeModel> {
    let mut r = Reader::open(file, KIND_MODEL)?;
    let codebook = read_codebook(&mut r)?;
    let d = codebook.columns().len();
    let n_types = r.len(8)?;
    if n_types != d {
        return Err(bad(format!("{n_types} column types for {d} columns")));
    }
    let dtypes = (0..d).map(|_| r.str()).collect::<Result<Vec<_>>>()?;
    let n_rows = r.u64()?;
    let alpha = r.f64()?;
    let root = r.u32()? as usize;
    let parent = (0..d)
        .map(|_| r.u32().map(|p| (p != NO_PARENT).then_some(p as usize)))
        .collect::<Result<Vec<_>>>()?;
    let counts = (0..d).map(|_| r.u64s()).collect::<Result<Vec<_>>>()?;
    let pair_mi = r.f64s()?;
    r.end()?;
    TreeModel::new(
        codebook, dtypes, n_rows, root, parent, counts, pair_mi, alpha,
    )
    .map_err(|e| match e {
        Error::CorruptModel(m) => Error::CorruptModel(m),
        other => bad(other),
    })
}

/// The bytes of a pair-statistics file: the codebook, each column's output type name, then the
/// exact counts.
pub fn stats_to_bytes(codebook: &Codebook, dtypes: &[String], stats: &PairStats) -> Vec<u8> {
    let mut w = Writer::default();
    write_codebook(&mut w, codebook);
    w.len(dtypes.len());
    dtypes.iter().for_each(|t| w.str(t));
    w.u64(stats.n_rows());
    stats.marginals().iter().for_each(|m| w.u64s(m));
    w.u64s(stats.cells());
    w.finish(KIND_STATS)
}

/// Reads and validates a pair-statistics file (every count is checked against the others).
pub fn stats_from_bytes(file: &[u8]) -> Result<(Codebook, Vec<String>, PairStats)> {
    let mut r = Reader::open(file, KIND_STATS)?;
    let codebook = read_codebook(&mut r)?;
    let d = codebook.columns().len();
    let n_types = r.len(8)?;
    if n_types != d {
        return Err(bad(format!("{n_types} column types for {d} columns")));
    }
    let dtypes = (0..d).map(|_| r.str()).collect::<Result<Vec<_>>>()?;
    if let Some((col, t)) = codebook
        .columns()
        .iter()
        .zip(&dtypes)
        .find(|(c, t)| !crate::dtype::fits(t, c))
    {
        return Err(bad(format!(
            "column '{}' is stored as type {t:?}, which cannot hold its values",
            col.name()
        )));
    }
    let n_rows = r.u64()?;
    let marginals = (0..d).map(|_| r.u64s()).collect::<Result<Vec<_>>>()?;
    let cells = r.u64s()?;
    r.end()?;
    let stats =
        PairStats::from_parts(n_rows, codebook.cardinalities(), marginals, cells).map_err(|e| {
            match e {
                Error::CorruptModel(m) => Error::CorruptModel(m),
                other => bad(other),
            }
        })?;
    Ok((codebook, dtypes, stats))
}

/// The bytes of a codebook-pass tally file.
pub fn tallies_to_bytes(builder: &CodebookBuilder) -> Vec<u8> {
    let mut w = Writer::default();
    builder.write(&mut w);
    w.finish(KIND_TALLIES)
}

/// Reads a codebook-pass tally file.
pub fn tallies_from_bytes(file: &[u8]) -> Result<CodebookBuilder> {
    let mut r = Reader::open(file, KIND_TALLIES)?;
    let builder = CodebookBuilder::read(&mut r)?;
    r.end()?;
    Ok(builder)
}

/// The bytes of a codebook file.
pub fn codebook_to_bytes(codebook: &Codebook) -> Vec<u8> {
    let mut w = Writer::default();
    write_codebook(&mut w, codebook);
    w.finish(KIND_CODEBOOK)
}

/// Reads a codebook file.
pub fn codebook_from_bytes(file: &[u8]) -> Result<Codebook> {
    let mut r = Reader::open(file, KIND_CODEBOOK)?;
    let codebook = read_codebook(&mut r)?;
    r.end()?;
    Ok(codebook)
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::codebook::ColumnCode;

    fn small_model() -> Result<TreeModel> {
        let a = ColumnCode::new(
            "a".into(),
            Values::Str(vec!["x".into(), "y".into()]),
            false,
            true,
        )?;
        let b = ColumnCode::new(
            "b".into(),
            Values::Bins {
                edges: vec![1.5],
                low: 0.0,
                high: 3.0,
            },
            false,
            false,
        )?;
        let codebook = Codebook::new(vec![a, b])?;
        let mut stats = PairStats::new(codebook.cardinalities())?;
        stats.add_codes(&[vec![0, 1, 2, 1, 0], vec![0, 1, 1, 1, 0]])?;
        crate::fit_model(
            codebook,
            vec!["string".into(), "float64".into()],
            &stats,
            0,
            0.5,
            crate::Prune::None,
        )
    }

    fn batch(
        ints: Vec<Option<i64>>,
        strs: Vec<Option<&str>>,
        floats: Vec<f64>,
    ) -> Result<arrow_array::RecordBatch> {
        use arrow_array::{ArrayRef, Float64Array, Int64Array, StringArray};
        use std::sync::Arc;
        let columns: Vec<(&str, ArrayRef)> = vec![
            ("i", Arc::new(Int64Array::from(ints))),
            ("s", Arc::new(StringArray::from(strs))),
            ("f", Arc::new(Float64Array::from(floats))),
        ];
        arrow_array::RecordBatch::try_from_iter(columns).map_err(|e| Error::Invalid(e.to_string()))
    }

    #[test]
    fn merged_tallies_equal_one_pass_and_round_trip() -> Result<()> {
        let names = vec!["i".to_string(), "s".to_string(), "f".to_string()];
        let first = batch(
            vec![Some(1), None, Some(3)],
            vec![Some("a"), Some("b"), None],
            vec![0.5, f64::NAN, 2.0],
        )?;
        let second = batch(
            vec![Some(3), Some(7)],
            vec![Some("b"), Some("z")],
            vec![-1.0, 0.5],
        )?;
        let mut whole = CodebookBuilder::new(names.clone());
        whole.observe(&first)?;
        whole.observe(&second)?;
        let mut a = CodebookBuilder::new(names.clone());
        a.observe(&second)?;
        let mut b = CodebookBuilder::new(names);
        b.observe(&first)?;
        let b = tallies_from_bytes(&tallies_to_bytes(&b))?;
        a.merge(&b)?;
        assert_eq!(tallies_to_bytes(&a), tallies_to_bytes(&whole));
        let (codebook, _) = whole.finish(128, 10)?;
        assert_eq!(
            codebook_from_bytes(&codebook_to_bytes(&codebook))?,
            codebook
        );
        Ok(())
    }

    #[test]
    fn save_load_save_is_byte_identical() -> Result<()> {
        let model = small_model()?;
        let bytes = model_to_bytes(&model);
        let again = model_to_bytes(&model_from_bytes(&bytes)?);
        assert_eq!(bytes, again);
        Ok(())
    }

    #[test]
    fn stats_round_trip_and_refuse_damage() -> Result<()> {
        let model = small_model()?;
        let mut stats = PairStats::new(model.codebook().cardinalities())?;
        stats.add_codes(&[vec![0, 1, 2, 1, 0], vec![0, 1, 1, 1, 0]])?;
        let bytes = stats_to_bytes(model.codebook(), model.dtypes(), &stats);
        let (codebook, dtypes, back) = stats_from_bytes(&bytes)?;
        assert_eq!((&codebook, &back), (model.codebook(), &stats));
        assert_eq!(dtypes, model.dtypes());
        assert!(stats_from_bytes(&bytes[..bytes.len() - 1]).is_err());
        assert!(
            model_from_bytes(&bytes).is_err(),
            "a stats file is not a model file"
        );
        Ok(())
    }

    #[test]
    fn every_truncation_and_bit_flip_is_refused() -> Result<()> {
        let bytes = model_to_bytes(&small_model()?);
        for cut in 0..bytes.len() {
            assert!(
                matches!(model_from_bytes(&bytes[..cut]), Err(Error::CorruptModel(_))),
                "cut {cut}"
            );
        }
        for at in 0..bytes.len() {
            for bit in [0u8, 3, 7] {
                let mut flipped = bytes.clone();
                flipped[at] ^= 1 << bit;
                assert!(
                    model_from_bytes(&flipped).is_err(),
                    "flip at byte {at} bit {bit}"
                );
            }
        }
        Ok(())
    }

    #[test]
    fn a_huge_declared_length_is_refused_before_allocating() -> Result<()> {
        let bytes = model_to_bytes(&small_model()?);
        let mut payload = bytes[HEADER_LEN..].to_vec();
        // The first field is the column count: claim 2^60 columns and re-sign the payload.
        payload[..8].copy_from_slice(&(1u64 << 60).to_le_bytes());
        let forged = Writer { buf: payload }.finish(KIND_MODEL);
        match model_from_bytes(&forged) {
            Err(Error::CorruptModel(m)) => assert!(m.contains("larger than the file"), "{m}"),
            other => panic!("expected a corrupt-model error, got {other:?}"),
        }
        Ok(())
    }
}
