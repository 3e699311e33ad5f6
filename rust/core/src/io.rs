//! The four file formats (model, pair statistics, codebook tallies, codebook) written in the
//! shared byte layout of `bytes` (docs/model-format.md describes them byte by byte).

use crate::bytes::{bad, Reader, Writer, KIND_CODEBOOK, KIND_MODEL, KIND_STATS, KIND_TALLIES};
use crate::codebook::{Codebook, ColumnCode, Shape, Values};
use crate::error::{Error, Result};
use crate::model::TreeModel;
use crate::shape::{Tail, Within};
use crate::stats::PairStats;
use crate::tally::{family_code, family_from_code, CodebookBuilder};

const NO_PARENT: u32 = u32::MAX;

fn variant_code(values: &Values) -> u8 {
    match values {
        Values::Bool(_) => 0,
        Values::Int(_) => 1,
        Values::UInt(_) => 2,
        Values::Str(_) => 3,
        Values::Float(_) => 4,
        Values::Bins { .. } => 5,
    }
}

fn write_values(w: &mut Writer, values: &Values) {
    w.u8(variant_code(values));
    match values {
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
        Values::Float(v) => w.f64s(v),
        Values::Bins {
            edges,
            low,
            high,
            specials,
        } => {
            w.f64s(edges);
            w.f64(*low);
            w.f64(*high);
            w.f64s(specials);
        }
    }
}

fn read_values(r: &mut Reader<'_>, name: &str) -> Result<Values> {
    Ok(match r.u8()? {
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
        4 => Values::Float(r.f64s()?),
        5 => Values::Bins {
            edges: r.f64s()?,
            low: r.f64()?,
            high: r.f64()?,
            specials: r.f64s()?,
        },
        other => {
            return Err(bad(format!(
                "column '{name}' has unknown values kind {other}"
            )))
        }
    })
}

/// Writes a codebook's columns: name, value family, codes, and the shape inside the codes.
pub fn write_codebook(w: &mut Writer, codebook: &Codebook) {
    w.len(codebook.columns().len());
    for col in codebook.columns() {
        w.str(col.name());
        w.u8(family_code(col.family()));
        w.u8(u8::from(col.has_other()));
        w.u8(u8::from(col.has_null()));
        write_values(w, col.values());
        let shape = col.shape();
        w.u8(u8::from(shape.integral));
        match &shape.tail {
            None => w.u8(0),
            Some(tail) => {
                w.u8(1);
                write_values(w, &tail.values);
                w.u64s(&tail.counts);
                w.u64(tail.rest_values);
                w.u64(tail.rest_rows);
            }
        }
        w.len(shape.within.len());
        for within in &shape.within {
            match within {
                Within::Atoms { values, counts } => {
                    w.u8(0);
                    w.f64s(values);
                    w.u64s(counts);
                }
                Within::Steps(points) => {
                    w.u8(1);
                    w.f64s(points);
                }
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

/// Reads a codebook, validating each column (sorted, distinct values; bins, tails and the values
/// inside bins consistent; sizes checked before allocating).
pub fn read_codebook(r: &mut Reader<'_>) -> Result<Codebook> {
    // The smallest column takes 8 + 4 + 9 + 1 + 1 + 8 bytes; that bounds the count.
    let n = r.len(31)?;
    let mut columns = Vec::with_capacity(n);
    for _ in 0..n {
        let name = r.str()?;
        if name.contains('\0') {
            // fit refuses such names (sources.check_columns): a file that has one is forged.
            return Err(bad("a column name contains the NUL character"));
        }
        let family = family_from_code(r.u8()?)
            .ok_or_else(|| bad(format!("column '{name}' has an unknown value family")))?;
        let has_other = flag(r)?;
        let has_null = flag(r)?;
        let values = read_values(r, &name)?;
        let integral = flag(r)?;
        let tail = if flag(r)? {
            Some(Tail {
                values: read_values(r, &name)?,
                counts: r.u64s()?,
                rest_values: r.u64()?,
                rest_rows: r.u64()?,
            })
        } else {
            None
        };
        let k = r.len(9)?;
        let mut within = Vec::with_capacity(k);
        for _ in 0..k {
            within.push(match r.u8()? {
                0 => Within::Atoms {
                    values: r.f64s()?,
                    counts: r.u64s()?,
                },
                1 => Within::Steps(r.f64s()?),
                other => return Err(bad(format!("column '{name}' has bin summary kind {other}"))),
            });
        }
        let shape = Shape {
            tail,
            within,
            integral,
        };
        let col = ColumnCode::build(name, family, values, has_other, has_null, shape).map_err(
            |e| match e {
                Error::CorruptModel(m) => Error::CorruptModel(m),
                other => bad(other),
            },
        )?;
        columns.push(col);
    }
    Codebook::new(columns).map_err(bad)
}

/// The bytes of a model file.
pub fn model_to_bytes(model: &TreeModel) -> Vec<u8> {
    model_writer(model).finish(KIND_MODEL)
}

/// The bytes of the model file of a private fit: the model, then its privacy statement (a
/// UTF-8 text, docs/model-format.md field 9).
pub fn private_model_to_bytes(model: &TreeModel, statement: &str) -> Vec<u8> {
    let mut w = model_writer(model);
    w.str(statement);
    w.finish(KIND_MODEL)
}

fn model_writer(model: &TreeModel) -> Writer {
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
    w
}

/// Reads and validates a model file.
pub fn model_from_bytes(file: &[u8]) -> Result<TreeModel> {
    model_and_statement_from_bytes(file).map(|(model, _)| model)
}

/// Reads and validates a model file, with the privacy statement of a private fit (if any).
pub fn model_and_statement_from_bytes(file: &[u8]) -> Result<(TreeModel, Option<String>)> {
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
    let statement = if r.is_done() { None } else { Some(r.str()?) };
    r.end()?;
    TreeModel::new(
        codebook, dtypes, n_rows, root, parent, counts, pair_mi, alpha,
    )
    .map(|model| (model, statement))
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
    use crate::bytes::HEADER_LEN;

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
                specials: vec![],
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
            Some(0),
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
        let codebook = whole.finish(128, 2, &[])?.codebook;
        assert!(codebook.columns()[0].shape().integral);
        assert_eq!(
            codebook_from_bytes(&codebook_to_bytes(&codebook))?,
            codebook
        );
        Ok(())
    }

    #[test]
    fn a_private_model_keeps_its_statement() -> Result<()> {
        let model = small_model()?;
        let plain = model_to_bytes(&model);
        assert_eq!(model_and_statement_from_bytes(&plain)?.1, None);
        let statement = r#"{"epsilon": 1.0}"#;
        let bytes = private_model_to_bytes(&model, statement);
        let (again, read) = model_and_statement_from_bytes(&bytes)?;
        assert_eq!(read.as_deref(), Some(statement));
        assert_eq!(private_model_to_bytes(&again, statement), bytes);
        // The plain reader accepts the file and drops the statement.
        assert_eq!(model_to_bytes(&model_from_bytes(&bytes)?), plain);
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
