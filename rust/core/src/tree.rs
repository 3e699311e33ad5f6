//! Structure: Kruskal's maximum spanning tree under one strict edge order, then orientation away
//! from the root by a breadth-first walk with sorted neighbours.

use std::cmp::Ordering;
use std::collections::VecDeque;

use crate::stats::pairs;

/// The strict edge order: weight descending (`total_cmp`), then the lower column, then the higher.
pub fn edge_order(a: (f64, usize, usize), b: (f64, usize, usize)) -> Ordering {
    b.0.total_cmp(&a.0).then(a.1.cmp(&b.1)).then(a.2.cmp(&b.2))
}

fn find(parent: &mut [usize], mut x: usize) -> usize {
    while parent[x] != x {
        parent[x] = parent[parent[x]];
        x = parent[x];
    }
    x
}

/// Kruskal's algorithm over `d` columns with pair weights in pair-index order. `keep` decides, for
/// each candidate edge in order, whether it may join the structure (pruning); with a `keep` that
/// always says yes the result is a spanning tree. Edges come back in the order they were chosen.
pub fn kruskal(d: usize, weights: &[f64], keep: impl Fn(usize) -> bool) -> Vec<(usize, usize)> {
    let all = pairs(d);
    let mut order: Vec<usize> = (0..all.len()).collect();
    order.sort_unstable_by(|&p, &q| {
        edge_order(
            (weights[p], all[p].0, all[p].1),
            (weights[q], all[q].0, all[q].1),
        )
    });
    let mut uf: Vec<usize> = (0..d).collect();
    let mut chosen = Vec::with_capacity(d.saturating_sub(1));
    for p in order {
        if chosen.len() + 1 >= d {
            break;
        }
        let (i, j) = all[p];
        let (ri, rj) = (find(&mut uf, i), find(&mut uf, j));
        if ri != rj && keep(p) {
            uf[ri.max(rj)] = ri.min(rj);
            chosen.push((i, j));
        }
    }
    chosen
}

/// An oriented forest: each column's parent (`None` for a root) and a breadth-first order in which
/// every parent comes before its children.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Oriented {
    pub parent: Vec<Option<usize>>,
    pub order: Vec<usize>,
}

/// Each column's children under parent links, in index order (a link outside the columns is
/// left out).
pub fn children(parent: &[Option<usize>]) -> Vec<Vec<usize>> {
    let mut children = vec![Vec::new(); parent.len()];
    for (c, p) in parent.iter().enumerate() {
        if let Some(list) = p.and_then(|p| children.get_mut(p)) {
            list.push(c);
        }
    }
    children
}

/// The breadth-first walk over `next` (where each column leads, in visiting order): from `root`,
/// then from each other column in index order that `start` accepts and no walk has reached yet.
/// Returns where each column was reached from and the order of the visits.
fn breadth_first(next: &[Vec<usize>], root: usize, start: impl Fn(usize) -> bool) -> Oriented {
    let d = next.len();
    let mut parent = vec![None; d];
    let mut seen = vec![false; d];
    let mut order = Vec::with_capacity(d);
    for s in std::iter::once(root).chain((0..d).filter(|&c| c != root)) {
        if s >= d || seen[s] || !start(s) {
            continue;
        }
        seen[s] = true;
        // `order` doubles as the queue: the visits from `head` on are still to expand.
        let mut head = order.len();
        order.push(s);
        while head < order.len() {
            let v = order[head];
            head += 1;
            for &w in &next[v] {
                if !seen[w] {
                    seen[w] = true;
                    parent[w] = Some(v);
                    order.push(w);
                }
            }
        }
    }
    Oriented { parent, order }
}

/// Orients undirected edges away from `root`; any other component is walked from its lowest column.
pub fn orient(d: usize, edges: &[(usize, usize)], root: usize) -> Oriented {
    let mut neighbours: Vec<Vec<usize>> = vec![Vec::new(); d];
    for &(i, j) in edges {
        neighbours[i].push(j);
        neighbours[j].push(i);
    }
    neighbours.iter_mut().for_each(|n| n.sort_unstable());
    breadth_first(&neighbours, root, |_| true)
}

/// The breadth-first order of a forest given by parent links, from `root` first and then from the
/// other roots in index order; children are visited in index order. None if `root` is not a
/// column or the links do not form a forest (a cycle, or a link outside the columns).
pub fn forest_order(parent: &[Option<usize>], root: usize) -> Option<Vec<usize>> {
    parent.get(root)?;
    let walk = breadth_first(&children(parent), root, |c| parent[c].is_none());
    (walk.order.len() == parent.len()).then_some(walk.order)
}

/// The default root: a centre of the largest component (the column whose longest path to the
/// others is shortest), among the `eligible` columns when any is; ties go to the lower index.
pub fn centre(d: usize, edges: &[(usize, usize)], eligible: &[bool]) -> usize {
    let mut neighbours: Vec<Vec<usize>> = vec![Vec::new(); d];
    for &(i, j) in edges {
        neighbours[i].push(j);
        neighbours[j].push(i);
    }
    // Distances from `start` to every column of its component (usize::MAX elsewhere).
    let distances = |start: usize| {
        let mut dist = vec![usize::MAX; d];
        dist[start] = 0;
        let mut queue = VecDeque::from([start]);
        while let Some(v) = queue.pop_front() {
            for &w in &neighbours[v] {
                if dist[w] == usize::MAX {
                    dist[w] = dist[v] + 1;
                    queue.push_back(w);
                }
            }
        }
        dist
    };
    // The largest component (ties: the one holding the lowest column).
    let mut component = vec![usize::MAX; d];
    let mut best: (usize, usize) = (0, 0);
    for start in 0..d {
        if component[start] != usize::MAX {
            continue;
        }
        let dist = distances(start);
        let members = dist.iter().filter(|x| **x != usize::MAX).count();
        dist.iter()
            .enumerate()
            .filter(|(_, x)| **x != usize::MAX)
            .for_each(|(c, _)| component[c] = start);
        if members > best.1 {
            best = (start, members);
        }
    }
    let members: Vec<usize> = (0..d).filter(|&c| component[c] == best.0).collect();
    let any_eligible = members
        .iter()
        .any(|&c| eligible.get(c).copied().unwrap_or(false));
    members
        .iter()
        .copied()
        .filter(|&c| !any_eligible || eligible.get(c).copied().unwrap_or(false))
        .map(|c| {
            let far = distances(c)
                .into_iter()
                .filter(|x| *x != usize::MAX)
                .max()
                .unwrap_or(0);
            (far, c)
        })
        .min()
        .map_or(0, |(_, c)| c)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn ties_break_by_lower_then_higher_column() {
        // Four columns, every weight equal: the tree is the star at column 0, chosen in order.
        let w = vec![1.0; 6];
        assert_eq!(kruskal(4, &w, |_| true), vec![(0, 1), (0, 2), (0, 3)]);
    }

    #[test]
    fn heaviest_edges_win() {
        // Pairs: (0,1)=0.1 (0,2)=0.9 (0,3)=0.2 (1,2)=0.8 (1,3)=0.05 (2,3)=0.3
        let w = vec![0.1, 0.9, 0.2, 0.8, 0.05, 0.3];
        let t = kruskal(4, &w, |_| true);
        assert_eq!(t, vec![(0, 2), (1, 2), (2, 3)]);
        let o = orient(4, &t, 3);
        assert_eq!(o.parent, vec![Some(2), Some(2), Some(3), None]);
        assert_eq!(o.order, vec![3, 2, 0, 1]);
        assert_eq!(forest_order(&o.parent, 3), Some(o.order));
    }

    #[test]
    fn forest_order_walks_every_root_and_refuses_cycles() {
        // 0 <- 2 -> 1 and a second tree 3 -> 4: the root first, then the other root.
        let parent = vec![Some(2), Some(2), None, None, Some(3)];
        assert_eq!(forest_order(&parent, 3), Some(vec![3, 4, 2, 0, 1]));
        assert_eq!(forest_order(&parent, 2), Some(vec![2, 0, 1, 3, 4]));
        assert_eq!(forest_order(&parent, 7), None);
        // 0 -> 1 -> 0 is a cycle; 1 -> 9 points outside the columns.
        assert_eq!(forest_order(&[Some(1), Some(0), None], 2), None);
        assert_eq!(forest_order(&[None, Some(9)], 0), None);
        assert_eq!(
            children(&[None, Some(9), Some(0)]),
            vec![vec![2], vec![], vec![]]
        );
    }

    #[test]
    fn the_centre_of_a_path_is_its_middle() {
        // 0 - 1 - 2 - 3 - 4, plus an isolated column 5.
        let edges = [(0, 1), (1, 2), (2, 3), (3, 4)];
        assert_eq!(centre(6, &edges, &[true; 6]), 2);
        // Not eligible (constant): the next best is the lower of its neighbours.
        let mut eligible = [true; 6];
        eligible[2] = false;
        assert_eq!(centre(6, &edges, &eligible), 1);
    }
}
