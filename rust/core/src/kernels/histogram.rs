//! The naive kernel (one increment per row) and the row-blocked histogram of the combined code.

/// The largest table the histogram kernel gives block-local counters (16 MiB of u32).
const HISTOGRAM_MAX_CELLS: usize = 1 << 22;
/// Rows per histogram block, at least (block-local u32 counters are merged after each block).
const HISTOGRAM_BLOCK_ROWS: usize = 1 << 16;

/// One increment per row: the definition.
pub(super) fn count_pair_naive(a: &[u16], b: &[u16], rb: usize, table: &mut [u64]) {
    for (&x, &y) in a.iter().zip(b) {
        table[usize::from(x) * rb + usize::from(y)] += 1;
    }
}

/// A histogram of the combined code in block-local u32 counters, merged into `table` per block.
pub(super) fn count_pair_histogram(
    a: &[u16],
    b: &[u16],
    ra: usize,
    rb: usize,
    local: &mut Vec<u32>,
    table: &mut [u64],
) {
    let cells = ra * rb;
    if cells > HISTOGRAM_MAX_CELLS {
        // Block-local counters as big as the table would only add memory: count in place.
        count_pair_naive(a, b, rb, table);
        return;
    }
    local.clear();
    local.resize(cells, 0);
    // A block of at least 65,536 rows (2 x 128 KiB of codes), longer for big tables so that
    // clearing the counters stays cheap next to counting.
    let block = (2 * cells).max(HISTOGRAM_BLOCK_ROWS);
    for (ca, cb) in a.chunks(block).zip(b.chunks(block)) {
        let largest = |c: &[u16]| usize::from(c.iter().fold(0u16, |m, &x| m.max(x)));
        let len = ca.len().min(cb.len());
        if !ca.is_empty() && largest(ca) < ra && largest(cb) < rb && local.len() == cells {
            let counters = local.as_mut_ptr();
            for (&x, &y) in ca[..len].iter().zip(&cb[..len]) {
                let cell = usize::from(x) * rb + usize::from(y);
                // SAFETY: x < ra and y < rb (the maxima were just checked), so
                // cell <= (ra - 1) * rb + rb - 1 < ra * rb = cells = local.len().
                unsafe { *counters.add(cell) += 1 };
            }
        } else {
            for (&x, &y) in ca.iter().zip(cb) {
                local[usize::from(x) * rb + usize::from(y)] += 1;
            }
        }
        for (t, l) in table.iter_mut().zip(local.iter_mut()) {
            *t += u64::from(*l);
            *l = 0;
        }
    }
}
