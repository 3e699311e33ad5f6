//! The message passes of one row: upward (collect), downward (distribute), max-product and
//! sampling down the tree, with the scaled arithmetic they share.

use super::{Evidence, Inference, Scratch, Slot, MISSING};
use crate::rng::Rng;

/// Multiplies `v` by `m` and scales it to a maximum of 1; returns the scale (0: all zero).
fn mul_scale(v: &mut [f64], m: &[f64]) -> f64 {
    v.iter_mut().zip(m).for_each(|(x, y)| *x *= y);
    scale(v)
}

/// Scales `v` to a maximum of 1; returns the factor it was divided by (0 when all are zero).
fn scale(v: &mut [f64]) -> f64 {
    let max = v.iter().fold(0.0f64, |m, x| m.max(*x));
    if max > 0.0 && max != 1.0 {
        let inv = 1.0 / max;
        v.iter_mut().for_each(|x| *x *= inv);
    }
    max
}

/// A product of scale factors (each in (0, 1]) kept as a number while it is comfortably above
/// underflow and folded into its logarithm otherwise: one `ln` per many factors.
struct LogProduct {
    log: f64,
    mul: f64,
}

impl LogProduct {
    /// Below this a factor (or the running product) goes to the logarithm.
    const FOLD: f64 = 1e-150;

    fn new() -> Self {
        LogProduct { log: 0.0, mul: 1.0 }
    }

    fn push(&mut self, k: f64) {
        if k < Self::FOLD {
            self.log += k.ln();
            return;
        }
        self.mul *= k;
        if self.mul < Self::FOLD {
            self.log += self.mul.ln();
            self.mul = 1.0;
        }
    }

    fn ln(&self) -> f64 {
        self.log + self.mul.ln()
    }
}

fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).fold(0.0, |acc, (x, y)| acc + x * y)
}

/// Scales `v` to sum to 1 (left unchanged when the sum is 0).
fn normalise(v: &mut [f64]) {
    let sum: f64 = v.iter().fold(0.0, |acc, x| acc + x);
    if sum > 0.0 {
        v.iter_mut().for_each(|x| *x /= sum);
    }
}

/// The first index of the largest value (ties go to the lower code), if any is above `floor`.
pub(super) fn argmax(v: &[f64], floor: f64) -> Option<usize> {
    let mut best: Option<(usize, f64)> = None;
    for (k, &x) in v.iter().enumerate() {
        if x > floor && best.is_none_or(|(_, b)| x > b) {
            best = Some((k, x));
        }
    }
    best.map(|(k, _)| k)
}

/// A draw from weights `w` (not normalised) with the uniform number `u`; None if all are zero.
fn draw(w: &[f64], u: f64) -> Option<usize> {
    let total: f64 = w.iter().fold(0.0, |acc, x| acc + x);
    if total <= 0.0 {
        return None;
    }
    let target = u * total;
    let mut acc = 0.0;
    for (k, &x) in w.iter().enumerate() {
        acc += x;
        if x > 0.0 && acc > target {
            return Some(k);
        }
    }
    // Rounding ran off the end: the last code with any weight.
    w.iter().rposition(|x| *x > 0.0)
}

pub(super) fn as_code(k: usize) -> u16 {
    u16::try_from(k).unwrap_or(MISSING)
}

impl Inference {
    pub(super) fn scratch(&self) -> Scratch {
        let d = self.cards.len();
        Scratch {
            slot: vec![Slot::Free; d],
            lam: vec![0.0; self.total],
            up: vec![0.0; self.up_total],
            pi: vec![0.0; self.total],
            suffix: vec![0.0; self.max_fan],
            pre: vec![0.0; self.max_card],
            ctx: vec![0.0; self.max_card],
            back: vec![0; self.up_total],
            best: vec![0; d],
        }
    }

    /// Sets row `i`'s slots; a null cell of a column in `fill` allows only concrete values.
    pub(super) fn load(&self, ev: &Evidence, i: usize, fill: Option<&[bool]>, s: &mut Scratch) {
        for (c, slot) in s.slot.iter_mut().enumerate() {
            let code = ev.codes[c][i];
            let filled = fill.is_some_and(|f| f.get(c).copied().unwrap_or(false));
            *slot = if code != MISSING && usize::from(code) < self.cards[c] {
                Slot::Seen(usize::from(code))
            } else if filled && ev.null[c][i] && self.n_values[c] > 0 {
                Slot::Values
            } else {
                Slot::Free
            };
        }
    }

    /// Writes the evidence indicator of column `c` into `v`.
    pub(super) fn indicator(&self, slot: Slot, c: usize, v: &mut [f64]) {
        match slot {
            Slot::Seen(x) => {
                v.fill(0.0);
                v[x] = 1.0;
            }
            Slot::Free => v.fill(1.0),
            Slot::Values => {
                let n = self.n_values[c];
                v.iter_mut()
                    .enumerate()
                    .for_each(|(x, l)| *l = if x < n { 1.0 } else { 0.0 });
            }
        }
    }

    /// The upward pass: each column's evidence times its children's messages (`lam`) and its
    /// message to its parent (`up`). Returns ln P(evidence), -inf when it is impossible.
    pub(super) fn upward(&self, s: &mut Scratch) -> f64 {
        let Scratch { slot, lam, up, .. } = s;
        let mut z = LogProduct::new();
        for &v in self.order.iter().rev() {
            let r = self.cards[v];
            let lam_v = &mut lam[self.off[v]..self.off[v] + r];
            self.indicator(slot[v], v, lam_v);
            if let Slot::Seen(x) = slot[v] {
                // An observed column: only its own code matters, so the children's messages
                // are numbers; lam stays the indicator and their product goes to z.
                for &ch in &self.children[v] {
                    let k = up[self.up_off[ch] + x];
                    if k == 0.0 {
                        return f64::NEG_INFINITY;
                    }
                    z.push(k);
                }
            } else {
                for &ch in &self.children[v] {
                    let m = &up[self.up_off[ch]..self.up_off[ch] + r];
                    let k = mul_scale(lam_v, m);
                    if k == 0.0 {
                        return f64::NEG_INFINITY;
                    }
                    z.push(k);
                }
            }
            let table = &self.prob[v];
            let k = match self.parent[v] {
                Some(p) => {
                    let rp = self.cards[p];
                    let msg = &mut up[self.up_off[v]..self.up_off[v] + rp];
                    match slot[v] {
                        // P(x | a) for every a: a contiguous row of the transposed table.
                        Slot::Seen(x) => msg.copy_from_slice(&self.prob_t[v][x * rp..(x + 1) * rp]),
                        _ => msg
                            .iter_mut()
                            .zip(table.chunks_exact(r))
                            .for_each(|(m, row)| *m = dot(row, lam_v)),
                    }
                    scale(msg)
                }
                None => dot(&table[..r], lam_v),
            };
            if k <= 0.0 {
                return f64::NEG_INFINITY;
            }
            z.push(k);
        }
        z.ln()
    }

    /// The downward pass after [`Self::upward`], for the columns in `needed` (closed under
    /// parents): `pi` gets each one's message from the rest of the tree.
    pub(super) fn downward(&self, s: &mut Scratch, needed: &[bool]) {
        let Scratch {
            slot,
            up,
            pi,
            suffix,
            pre,
            ctx,
            ..
        } = s;
        for &v in &self.order {
            if !needed[v] {
                continue;
            }
            let r = self.cards[v];
            if self.parent[v].is_none() {
                pi[self.off[v]..self.off[v] + r].copy_from_slice(&self.prob[v][..r]);
            }
            let kids = &self.children[v];
            if !kids.iter().any(|&c| needed[c]) {
                continue;
            }
            if let Slot::Seen(x) = slot[v] {
                // An observed parent tells each child everything: its row of the table.
                for &ch in kids.iter().filter(|&&c| needed[c]) {
                    let rc = self.cards[ch];
                    pi[self.off[ch]..self.off[ch] + rc]
                        .copy_from_slice(&self.prob[ch][x * rc..(x + 1) * rc]);
                }
                continue;
            }
            // suffix block i holds the product of the messages of children i+1.. (scaled).
            let k = kids.len();
            for i in (0..k).rev() {
                let (head, tail) = suffix.split_at_mut((i + 1) * r);
                let block = &mut head[i * r..];
                if i + 1 == k {
                    block.fill(1.0);
                } else {
                    block.copy_from_slice(&tail[..r]);
                    let m = &up[self.up_off[kids[i + 1]]..self.up_off[kids[i + 1]] + r];
                    mul_scale(block, m);
                }
            }
            let pre = &mut pre[..r];
            self.indicator(slot[v], v, pre);
            mul_scale(pre, &pi[self.off[v]..self.off[v] + r]);
            for (i, &ch) in kids.iter().enumerate() {
                if needed[ch] {
                    let ctx = &mut ctx[..r];
                    ctx.copy_from_slice(pre);
                    mul_scale(ctx, &suffix[i * r..(i + 1) * r]);
                    let rc = self.cards[ch];
                    let out = &mut pi[self.off[ch]..self.off[ch] + rc];
                    out.fill(0.0);
                    for (a, row) in self.prob[ch].chunks_exact(rc).enumerate() {
                        let w = ctx[a];
                        if w != 0.0 {
                            out.iter_mut().zip(row).for_each(|(o, p)| *o += w * p);
                        }
                    }
                    scale(out);
                }
                let m = &up[self.up_off[ch]..self.up_off[ch] + r];
                mul_scale(pre, m);
            }
        }
    }

    /// Column `c`'s posterior marginal after both passes, into `out` (summing to 1).
    pub(super) fn belief(&self, s: &Scratch, c: usize, out: &mut [f64]) {
        let r = self.cards[c];
        let o = self.off[c];
        out.iter_mut()
            .zip(&s.pi[o..o + r])
            .zip(&s.lam[o..o + r])
            .for_each(|((b, p), l)| *b = p * l);
        normalise(out);
    }

    /// Max-product: the most probable completion of the row into `best`; false if impossible.
    pub(super) fn max_product(&self, s: &mut Scratch) -> bool {
        let Scratch {
            slot,
            lam,
            up,
            back,
            best,
            ctx,
            ..
        } = s;
        // Max-product with the same scaling as sum-product: every product is scaled back to a
        // maximum of 1, which changes no argmax.
        for &v in self.order.iter().rev() {
            let r = self.cards[v];
            let lam_v = &mut lam[self.off[v]..self.off[v] + r];
            self.indicator(slot[v], v, lam_v);
            for &ch in &self.children[v] {
                let m = &up[self.up_off[ch]..self.up_off[ch] + r];
                if mul_scale(lam_v, m) == 0.0 {
                    return false;
                }
            }
            let table = &self.prob[v];
            match self.parent[v] {
                Some(p) => {
                    let rp = self.cards[p];
                    let o = self.up_off[v];
                    let (msg, from) = (&mut up[o..o + rp], &mut back[o..o + rp]);
                    match slot[v] {
                        Slot::Seen(x) => {
                            msg.copy_from_slice(&self.prob_t[v][x * rp..(x + 1) * rp]);
                            from.fill(as_code(x));
                        }
                        _ => {
                            for ((m, b), row) in msg.iter_mut().zip(from).zip(table.chunks_exact(r))
                            {
                                let mut top = (0, 0.0);
                                for (x, (t, l)) in row.iter().zip(lam_v.iter()).enumerate() {
                                    let value = t * l;
                                    if value > top.1 {
                                        top = (x, value);
                                    }
                                }
                                *m = top.1;
                                *b = as_code(top.0);
                            }
                        }
                    }
                    if scale(msg) == 0.0 {
                        return false;
                    }
                }
                None => {
                    let w = &mut ctx[..r];
                    w.iter_mut()
                        .zip(&table[..r])
                        .zip(lam_v.iter())
                        .for_each(|((w, t), l)| *w = t * l);
                    match argmax(w, 0.0) {
                        Some(x) => best[v] = x,
                        None => return false,
                    }
                }
            }
        }
        for &v in &self.order {
            if let Some(p) = self.parent[v] {
                best[v] = usize::from(back[self.up_off[v] + best[p]]);
            }
        }
        true
    }

    /// Draws a completion from the joint posterior after [`Self::upward`], into `best`.
    pub(super) fn sample_down(&self, s: &mut Scratch, rng: &mut Rng) -> bool {
        let Scratch { lam, ctx, best, .. } = s;
        for &v in &self.order {
            let r = self.cards[v];
            let a = self.parent[v].map_or(0, |p| best[p]);
            let row = &self.prob[v][a * r..(a + 1) * r];
            let w = &mut ctx[..r];
            w.iter_mut()
                .zip(row)
                .zip(&lam[self.off[v]..self.off[v] + r])
                .for_each(|((w, p), l)| *w = p * l);
            match draw(w, rng.next_f64()) {
                Some(x) => best[v] = x,
                None => return false,
            }
        }
        true
    }
}
