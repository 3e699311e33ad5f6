//! Fuzz target: the readers of every treewise file kind must refuse damaged input with an error,
//! never panic nor allocate past the input's own size; what they accept must be usable.
//!
//! Input layout: byte 0 selects the mode. With bit 2 clear, the rest is a whole file, given to
//! every reader (model, pair statistics, tallies, codebook). With bit 2 set, the rest is a
//! payload that gets a valid header (magic, version, kind = bits 0-1 plus 1, length, CRC-32), so
//! that mutations reach the field checks behind the checksum.
#![no_main]

use libfuzzer_sys::fuzz_target;
use treewise_core::bytes::{FORMAT_VERSION, MAGIC};
use treewise_core::io::{
    codebook_from_bytes, codebook_to_bytes, model_from_bytes, model_to_bytes, stats_from_bytes,
    stats_to_bytes, tallies_from_bytes, tallies_to_bytes,
};
use treewise_core::{chow_liu, fit_model, Prune};

fn signed(kind: u32, payload: &[u8]) -> Vec<u8> {
    let mut out = Vec::with_capacity(28 + payload.len());
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
    out.extend_from_slice(&kind.to_le_bytes());
    out.extend_from_slice(&(payload.len() as u64).to_le_bytes());
    out.extend_from_slice(&crc32fast::hash(payload).to_le_bytes());
    out.extend_from_slice(payload);
    out
}

fn check_model(file: &[u8]) {
    let Ok(model) = model_from_bytes(file) else {
        return;
    };
    // Save, load, save gives the same bytes.
    let bytes = model_to_bytes(&model);
    let again = model_from_bytes(&bytes).expect("a written model reads back");
    assert_eq!(
        model_to_bytes(&again),
        bytes,
        "save-load-save changed the bytes"
    );
    // Sampling a loaded model never panics and gives codes within each column's range.
    let cards = model.codebook().cardinalities();
    let sampled = model.sample(0, 64, 7).expect("sampling a valid model");
    for (col, r) in sampled.codes.iter().zip(&cards) {
        assert!(
            col.iter().all(|&c| usize::from(c) < *r),
            "a sampled code is out of range"
        );
    }
    let mut model = model;
    for alpha in [0.0, 1e-300, 1e300] {
        let _ = model.set_alpha(alpha);
        let _ = model.sample(4096, 10, 1);
    }
}

fn check_stats(file: &[u8]) {
    let Ok((codebook, dtypes, stats)) = stats_from_bytes(file) else {
        return;
    };
    let bytes = stats_to_bytes(&codebook, &dtypes, &stats);
    let (c2, t2, s2) = stats_from_bytes(&bytes).expect("written statistics read back");
    assert!(
        c2 == codebook && t2 == dtypes && s2 == stats,
        "stats round trip differs"
    );
    if stats.n_rows() > 0 && stats.n_columns() > 0 && stats.n_columns() <= 64 {
        let _ = chow_liu(&stats, 0, Prune::Bic);
        let _ = fit_model(codebook, dtypes, &stats, None, 0.5, Prune::None);
    }
}

fn check_tallies(file: &[u8]) {
    let Ok(builder) = tallies_from_bytes(file) else {
        return;
    };
    let bytes = tallies_to_bytes(&builder);
    let again = tallies_from_bytes(&bytes).expect("written tallies read back");
    assert_eq!(
        tallies_to_bytes(&again),
        bytes,
        "tallies round trip differs"
    );
    let mut doubled = builder.clone();
    let _ = doubled.merge(&again);
    let _ = builder.finish(128, 10, &[]);
    let _ = doubled.finish(2, 1, &[]);
}

fn check_codebook(file: &[u8]) {
    let Ok(codebook) = codebook_from_bytes(file) else {
        return;
    };
    let bytes = codebook_to_bytes(&codebook);
    let again = codebook_from_bytes(&bytes).expect("a written codebook reads back");
    assert_eq!(again, codebook, "codebook round trip differs");
}

fuzz_target!(|data: &[u8]| {
    let Some((&mode, rest)) = data.split_first() else {
        return;
    };
    if mode & 4 == 0 {
        check_model(rest);
        check_stats(rest);
        check_tallies(rest);
        check_codebook(rest);
    } else {
        let kind = u32::from(mode & 3) + 1;
        let file = signed(kind, rest);
        match kind {
            1 => check_model(&file),
            2 => check_stats(&file),
            3 => check_tallies(&file),
            _ => check_codebook(&file),
        }
    }
});
