//! k-nearest-neighbour distance, read as a density: with r_k(x) the distance
//! from x to its k-th nearest training row, p̂(x) = k / (m · V_d · r_k(x)^d)
//! (Loftsgaarden and Quesenberry 1965), so the score is
//! s(x) = d ln r_k + ln V_d + ln m − ln k, V_d the volume of the unit d-ball.
//!
//! Distances are Euclidean on features standardised by the training mean and
//! standard deviation (divisor m), and the score adds Σ ln sd_j so that p̂ is
//! a density in the features' own units. The search is exact: a k-d tree
//! (Bentley 1975; leaves of 16 rows, split at the median of the widest
//! feature) prunes only boxes that cannot hold a nearer row, queries run on
//! all cores (rayon), and each distance is summed in feature order, so the
//! result equals a brute-force search and does not depend on the thread count. A distance below
//! 1e-12 (a query equal to a training row) counts as 1e-12, so no score is −∞.

use ndarray::ArrayView2;
use rayon::prelude::*;

use super::{ln, refuse_constant, Detector, Model, Params};
use crate::error::{Error, Result};

const NAME: &str = "knn-distance";
/// Smallest distance used (see the module docs).
const MIN_DISTANCE: f64 = 1e-12;

/// The k-nearest-neighbour detector.
#[derive(Debug, Clone, Copy)]
pub struct KnnDistance {
    /// Which neighbour's distance is used.
    pub k: usize,
}

struct Fitted {
    k: usize,
    d: usize,
    mean: Vec<f64>,
    sd: Vec<f64>,
    /// Standardised training rows, row-major, in tree order.
    train: Vec<f64>,
    tree: Vec<Node>,
    m: usize,
    constant: f64,
}

/// A k-d tree node over the rows `start..end` of the tree-ordered training data.
#[derive(Debug, Clone)]
enum Node {
    Leaf {
        start: usize,
        end: usize,
    },
    Split {
        dim: usize,
        value: f64,
        left: usize,
        right: usize,
    },
}

const LEAF: usize = 16;

/// Builds the tree over `idx` (row indices into `rows`), appending the rows in
/// tree order to `ordered`; returns the node's index.
fn build(
    rows: &[f64],
    d: usize,
    idx: &mut [usize],
    ordered: &mut Vec<f64>,
    tree: &mut Vec<Node>,
) -> usize {
    let at = tree.len();
    if idx.len() <= LEAF {
        let start = ordered.len() / d;
        for &i in idx.iter() {
            ordered.extend_from_slice(&rows[i * d..(i + 1) * d]);
        }
        tree.push(Node::Leaf {
            start,
            end: start + idx.len(),
        });
        return at;
    }
    let spread = |j: usize| {
        let (lo, hi) = idx
            .iter()
            .fold((f64::INFINITY, f64::NEG_INFINITY), |(lo, hi), &i| {
                (lo.min(rows[i * d + j]), hi.max(rows[i * d + j]))
            });
        hi - lo
    };
    let dim = (0..d).fold(0, |best, j| if spread(j) > spread(best) { j } else { best });
    let mid = idx.len() / 2;
    idx.select_nth_unstable_by(mid, |&a, &b| {
        rows[a * d + dim]
            .total_cmp(&rows[b * d + dim])
            .then(a.cmp(&b))
    });
    let value = rows[idx[mid] * d + dim];
    tree.push(Node::Leaf { start: 0, end: 0 });
    let (l, r) = idx.split_at_mut(mid);
    let left = build(rows, d, l, ordered, tree);
    let right = build(rows, d, r, ordered, tree);
    tree[at] = Node::Split {
        dim,
        value,
        left,
        right,
    };
    at
}

impl Detector for KnnDistance {
    fn fit(&self, train: ArrayView2<'_, f64>, features: &[String]) -> Result<Box<dyn Model>> {
        refuse_constant(NAME, train, features)?;
        let (m, d) = train.dim();
        if m < self.k {
            return Err(Error::Fit {
                detector: NAME.into(),
                message: format!("{m} training rows are fewer than k = {}", self.k),
                features: vec![],
            });
        }
        let mean = super::means(train);
        let sd: Vec<f64> = (0..d)
            .map(|j| {
                let v = train
                    .column(j)
                    .iter()
                    .map(|x| (x - mean[j]).powi(2))
                    .sum::<f64>()
                    / m as f64;
                v.sqrt()
            })
            .collect();
        let mut flat = Vec::with_capacity(m * d);
        for row in train.rows() {
            for j in 0..d {
                flat.push((row[j] - mean[j]) / sd[j]);
            }
        }
        let mut idx: Vec<usize> = (0..m).collect();
        let mut ordered = Vec::with_capacity(m * d);
        let mut tree = Vec::new();
        build(&flat, d, &mut idx, &mut ordered, &mut tree);
        let half_d = d as f64 / 2.0;
        let ln_unit_ball =
            half_d * ln(std::f64::consts::PI) - statrs::function::gamma::ln_gamma(half_d + 1.0);
        let constant = ln_unit_ball + ln(m as f64) - ln(self.k as f64)
            + sd.iter().map(|s| ln(*s)).sum::<f64>();
        Ok(Box::new(Fitted {
            k: self.k,
            d,
            mean,
            sd,
            train: ordered,
            tree,
            m,
            constant,
        }))
    }
}

impl Fitted {
    /// The k-th smallest squared distance from `q` (standardised) to the training rows.
    fn kth_sq_distance(&self, q: &[f64]) -> f64 {
        // The k smallest so far, kept sorted (k is small).
        let mut best: Vec<f64> = Vec::with_capacity(self.k + 1);
        self.visit(0, q, &mut best);
        best[self.k - 1]
    }

    fn visit(&self, node: usize, q: &[f64], best: &mut Vec<f64>) {
        let d = self.d;
        match self.tree[node] {
            Node::Leaf { start, end } => {
                for t in self.train[start * d..end * d].chunks_exact(d) {
                    let mut s = 0.0;
                    for j in 0..d {
                        let diff = q[j] - t[j];
                        s += diff * diff;
                    }
                    if best.len() < self.k || s < best[best.len() - 1] {
                        let at = best.partition_point(|&b| b <= s);
                        best.insert(at, s);
                        best.truncate(self.k);
                    }
                }
            }
            Node::Split {
                dim,
                value,
                left,
                right,
            } => {
                let gap = q[dim] - value;
                let (near, far) = if gap < 0.0 {
                    (left, right)
                } else {
                    (right, left)
                };
                self.visit(near, q, best);
                // A box farther than the current k-th distance holds no nearer row.
                if best.len() < self.k || gap * gap <= best[best.len() - 1] {
                    self.visit(far, q, best);
                }
            }
        }
    }
}

impl Model for Fitted {
    fn score(&self, x: ArrayView2<'_, f64>) -> Vec<f64> {
        let queries: Vec<Vec<f64>> = x
            .rows()
            .into_iter()
            .map(|r| {
                (0..self.d)
                    .map(|j| (r[j] - self.mean[j]) / self.sd[j])
                    .collect()
            })
            .collect();
        queries
            .par_iter()
            .map(|q| {
                let r = self.kth_sq_distance(q).sqrt().max(MIN_DISTANCE);
                self.d as f64 * ln(r) + self.constant
            })
            .collect()
    }

    fn params(&self) -> Params {
        Params::KnnDistance {
            k: self.k,
            training_rows: self.m,
            mean: self.mean.clone(),
            sd: self.sd.clone(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::Array2;

    /// Closed form (no source needed): training points 0, 1, …, 9 on a line
    /// (mean 4.5, sd √8.25); the query 20 has its 2nd neighbour at 8, so
    /// r₂ = 12/√8.25 standardised, and with d = 1, V₁ = 2:
    /// s = ln r₂ + ln 2 + ln 10 − ln 2 + ln √8.25 = ln 12 + ln 10 − ln 2 + ln 2 = ln 120 − ln 2.
    #[test]
    fn one_dimensional_score_by_hand() {
        let x = Array2::from_shape_fn((10, 1), |(i, _)| i as f64);
        let fitted = KnnDistance { k: 2 }.fit(x.view(), &["x".into()]).unwrap();
        let s = fitted.score(Array2::from_shape_vec((1, 1), vec![20.0]).unwrap().view());
        // p̂ = k / (m · 2 r) = 2 / (10 · 2 · 12) → −ln p̂ = ln 120.
        assert!((s[0] - 120f64.ln()).abs() < 1e-12, "{}", s[0]);
    }

    /// The exact search agrees with a direct sort of all distances, and gives
    /// the same bits on one thread as on all of them.
    #[test]
    fn exact_and_thread_independent() {
        let mut rng = crate::rng::seeded(8, 0);
        let x = Array2::from_shape_fn((500, 3), |_| crate::rng::unit(&mut rng));
        let q = Array2::from_shape_fn((50, 3), |_| crate::rng::unit(&mut rng) * 1.5);
        let names: Vec<String> = ["a", "b", "c"].iter().map(|s| s.to_string()).collect();
        let fitted = KnnDistance { k: 5 }.fit(x.view(), &names).unwrap();
        let all = fitted.score(q.view());
        let one = rayon::ThreadPoolBuilder::new()
            .num_threads(1)
            .build()
            .unwrap()
            .install(|| fitted.score(q.view()));
        assert_eq!(all, one);
        let Params::KnnDistance { sd, .. } = fitted.params() else {
            unreachable!()
        };
        // V₃ = 4π/3; s = 3 ln r₅ + ln V₃ + ln 500 − ln 5 + Σ ln sd.
        let constant = (4.0 * std::f64::consts::PI / 3.0).ln() + 500f64.ln() - 5f64.ln()
            + sd.iter().map(|s| s.ln()).sum::<f64>();
        for (i, row) in q.rows().into_iter().enumerate() {
            let mut d: Vec<f64> = x
                .rows()
                .into_iter()
                .map(|t| {
                    (0..3)
                        .map(|j| ((row[j] - t[j]) / sd[j]).powi(2))
                        .sum::<f64>()
                })
                .collect();
            d.sort_by(f64::total_cmp);
            let want = 3.0 * d[4].sqrt().ln() + constant;
            assert!((all[i] - want).abs() < 1e-9, "{} vs {want}", all[i]);
        }
    }
}
