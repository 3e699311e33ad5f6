//! Tests of exact inference against enumeration of every row of small forests.

use super::*;
use crate::fit::model_from_parents;
use crate::fit::tests::int_codebook;
use crate::stats::PairStats;

/// A random forest model over `cards.len()` integer columns fitted to random rows.
fn forest(cards: &[usize], parent: Vec<Option<usize>>, alpha: f64, seed: u64) -> Result<Inference> {
    let mut rng = Rng::new(seed, 0);
    let codebook = int_codebook(cards)?;
    let n = 40;
    let mut codes: Vec<Vec<u16>> = vec![Vec::with_capacity(n); cards.len()];
    for _ in 0..n {
        // Children copy their parent's code often, so the tables are far from uniform.
        let mut row = vec![0usize; cards.len()];
        for c in 0..cards.len() {
            let own = (rng.next_f64() * cards[c] as f64) as usize;
            row[c] = match parent[c] {
                Some(p) if p < c && rng.next_f64() < 0.6 => row[p] % cards[c],
                _ => own,
            };
        }
        for (c, x) in row.iter().enumerate() {
            codes[c].push(as_code(*x));
        }
    }
    let mut stats = PairStats::new(codebook.cardinalities())?;
    stats.add_codes(&codes)?;
    let dtypes = vec!["int64".to_string(); cards.len()];
    Inference::new(model_from_parents(codebook, dtypes, &stats, parent, alpha)?)
}

fn every_row(cards: &[usize]) -> Vec<Vec<usize>> {
    let mut rows = vec![vec![]];
    for &r in cards {
        rows = rows
            .into_iter()
            .flat_map(|row| {
                (0..r).map(move |x| {
                    let mut next = row.clone();
                    next.push(x);
                    next
                })
            })
            .collect();
    }
    rows
}

fn joint(inf: &Inference, row: &[usize]) -> f64 {
    (0..row.len())
        .map(|c| {
            let a = inf.parent[c].map_or(0, |p| row[p]);
            inf.prob[c][a * inf.cards[c] + row[c]]
        })
        .product()
}

fn evidence(rows: &[Vec<Option<usize>>]) -> Evidence {
    let d = rows[0].len();
    Evidence {
        n_rows: rows.len(),
        codes: (0..d)
            .map(|c| rows.iter().map(|r| r[c].map_or(MISSING, as_code)).collect())
            .collect(),
        null: (0..d)
            .map(|c| rows.iter().map(|r| r[c].is_none()).collect())
            .collect(),
        unseen: vec![0; d],
    }
}

fn cases() -> Vec<(Vec<usize>, Vec<Option<usize>>)> {
    vec![
        (vec![2, 3, 2, 3], vec![None, Some(0), Some(0), Some(1)]),
        (
            vec![3, 2, 2, 3, 2],
            vec![Some(2), None, Some(1), None, Some(3)],
        ),
        (vec![2, 2, 3], vec![None, None, None]),
    ]
}

#[test]
fn marginals_and_evidence_match_enumeration() -> Result<()> {
    for (k, (cards, parent)) in cases().into_iter().enumerate() {
        for alpha in [0.0, 0.7] {
            let inf = forest(&cards, parent.clone(), alpha, k as u64)?;
            let all = every_row(&cards);
            let mut rng = Rng::new(99, k as u64);
            let queries: Vec<Vec<Option<usize>>> = (0..30)
                .map(|_| {
                    cards
                        .iter()
                        .map(|&r| {
                            (rng.next_f64() < 0.4).then(|| (rng.next_f64() * r as f64) as usize)
                        })
                        .collect()
                })
                .collect();
            let ev = evidence(&queries);
            let targets: Vec<usize> = (0..cards.len()).collect();
            let post = inf.posterior(&ev, &targets)?;
            let logz = inf.log_evidence(&ev)?;
            for (i, q) in queries.iter().enumerate() {
                let fits =
                    |row: &Vec<usize>| q.iter().zip(row).all(|(e, x)| e.is_none_or(|e| e == *x));
                let z: f64 = all.iter().filter(|r| fits(r)).map(|r| joint(&inf, r)).sum();
                if z == 0.0 {
                    assert_eq!(logz[i], f64::NEG_INFINITY);
                    assert!(post.tables[0][i * cards[0]].is_nan());
                    continue;
                }
                assert!(
                    (logz[i] - z.ln()).abs() < 1e-12,
                    "{} vs {}",
                    logz[i],
                    z.ln()
                );
                for (t, &r) in cards.iter().enumerate() {
                    for x in 0..r {
                        let p: f64 = all
                            .iter()
                            .filter(|row| fits(row) && row[t] == x)
                            .map(|row| joint(&inf, row))
                            .sum::<f64>()
                            / z;
                        let got = post.tables[t][i * r + x];
                        assert!(
                            (got - p).abs() < 1e-12,
                            "case {k} row {i} col {t}: {got} vs {p}"
                        );
                    }
                }
            }
        }
    }
    Ok(())
}

#[test]
fn the_joint_completion_is_the_most_probable_one() -> Result<()> {
    for (k, (cards, parent)) in cases().into_iter().enumerate() {
        let inf = forest(&cards, parent, 0.3, 10 + k as u64)?;
        let all = every_row(&cards);
        let queries: Vec<Vec<Option<usize>>> = (0..cards.len())
            .map(|c| (0..cards.len()).map(|j| (j == c).then_some(0)).collect())
            .chain(std::iter::once(vec![None; cards.len()]))
            .collect();
        let filled = inf.impute(
            &evidence(&queries),
            &vec![true; cards.len()],
            Strategy::Joint,
            0,
            0,
        )?;
        for (i, q) in queries.iter().enumerate() {
            let fits = |row: &Vec<usize>| q.iter().zip(row).all(|(e, x)| e.is_none_or(|e| e == *x));
            let best = all
                .iter()
                .filter(|r| fits(r))
                .map(|r| joint(&inf, r))
                .fold(0.0, f64::max);
            let got: Vec<usize> = (0..cards.len())
                .map(|c| q[c].unwrap_or(usize::from(filled.codes[c][i])))
                .collect();
            assert!(q.iter().zip(&got).all(|(e, g)| e.is_none_or(|e| e == *g)));
            assert!((joint(&inf, &got) - best).abs() <= 1e-12 * best);
        }
    }
    Ok(())
}

#[test]
fn conditional_samples_do_not_depend_on_chunking() -> Result<()> {
    let (cards, parent) = cases().remove(0);
    let inf = forest(&cards, parent, 0.5, 3)?;
    let ev = evidence(&[vec![None, Some(1), None, None]]);
    let whole = inf.sample_given(&ev, 2000, 0, 7)?;
    let first = inf.sample_given(&ev, 1100, 0, 7)?;
    let rest = inf.sample_given(&ev, 900, 1100, 7)?;
    for c in 0..cards.len() {
        let joined: Vec<u16> = first.codes[c]
            .iter()
            .chain(&rest.codes[c])
            .copied()
            .collect();
        assert_eq!(joined, whole.codes[c]);
    }
    assert!(whole.codes[1].iter().all(|x| *x == MISSING));
    assert!(whole.codes[0].iter().all(|x| *x != MISSING));
    Ok(())
}

#[test]
fn back_off_tables_are_distributions_between_the_counts_and_the_marginal() -> Result<()> {
    let (cards, parent) = cases().remove(0);
    let plain = forest(&cards, parent, 0.5, 5)?;
    let model = plain.model().clone();
    let pulled = Inference::with_backoff(model.clone(), 3.0)?;
    for c in 0..cards.len() {
        let Some(p) = plain.parent[c] else {
            assert_eq!(pulled.prob[c], plain.prob[c]);
            continue;
        };
        let q: Vec<f64> = model
            .log_marginal(c)
            .unwrap_or(&[])
            .iter()
            .map(|l| l.exp())
            .collect();
        for a in 0..cards[p] {
            let row = &model.counts()[c][a * cards[c]..(a + 1) * cards[c]];
            let n_a = row.iter().sum::<u64>() as f64;
            let got = &pulled.prob[c][a * cards[c]..(a + 1) * cards[c]];
            assert!((got.iter().sum::<f64>() - 1.0).abs() < 1e-12);
            for x in 0..cards[c] {
                let want = (row[x] as f64 + 3.0 * q[x]) / (n_a + 3.0);
                assert!((got[x] - want).abs() < 1e-15);
            }
        }
    }
    assert!(Inference::with_backoff(model, -1.0).is_err());
    Ok(())
}

#[test]
fn a_forest_given_by_its_tables_answers_as_the_model() -> Result<()> {
    let cards = [2, 3, 2];
    let parent = vec![None, Some(0), Some(1)];
    let inf = forest(&cards, parent.clone(), 0.5, 11)?;
    let model = inf.model().clone();
    let logp: Vec<Vec<f64>> = (0..3)
        .map(|c| model.log_table(c).map(<[f64]>::to_vec).unwrap_or_default())
        .collect();
    let order = model.order().to_vec();
    let same = Inference::from_tables(model.clone(), parent.clone(), order.clone(), logp.clone())?;
    let ev = evidence(&[vec![Some(1), None, Some(0)], vec![None, Some(2), None]]);
    assert_eq!(same.log_evidence(&ev)?, inf.log_evidence(&ev)?);
    // The posterior's own upward pass gives the same evidence likelihood.
    assert_eq!(
        inf.posterior(&ev, &[1])?.log_evidence,
        inf.log_evidence(&ev)?
    );
    assert_eq!(
        same.posterior(&ev, &[0, 1, 2])?.tables,
        inf.posterior(&ev, &[0, 1, 2])?.tables
    );
    // Shapes that do not fit the codebook, and an order with a child before its parent.
    let mut short = logp.clone();
    short[1].pop();
    assert!(Inference::from_tables(model.clone(), parent.clone(), order.clone(), short).is_err());
    assert!(
        Inference::from_tables(model.clone(), parent.clone(), vec![2, 1, 0], logp.clone()).is_err()
    );
    assert!(Inference::from_tables(model, vec![None, Some(0)], order, logp).is_err());
    Ok(())
}
