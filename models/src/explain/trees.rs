//! Exact path-dependent TreeSHAP: Lundberg, Erion and Lee 2018, "Consistent individualized feature attribution
//! for tree ensembles" (arXiv:1802.03888), Algorithm 2, in f64.
//!
//! The value of a coalition `S` of features is the tree's output when the features in `S` follow the row and the
//! others are averaged out over the training data as the tree saw it: at a split on a feature outside `S` both
//! children are taken, weighted by their share of the split's cover. Algorithm 2 computes the Shapley values of
//! that game in `O(L D^2)` per tree (`L` leaves, `D` depth) by carrying, down each root-to-leaf path, the
//! proportion of every subset size (`EXTEND`), and removing one feature's step again (`UNWIND`) at a leaf or when
//! a feature repeats on the path.
//!
//! The row goes down each split by the model's own test ([`Ensemble::step`]: thresholds, `<` and `<=`, float32
//! split precision, missing values, unknown categories), so the path followed for the features in `S` is exactly
//! the one scoring follows.
//!
//! Two details the paper leaves open, both ours:
//! - A child whose weight is zero for every coalition (zero share of the cover on the side the row does not take)
//!   adds nothing and is skipped; this also keeps every division of UNWIND away from zero.
//! - A split with zero cover (never reached in training) shares its weight by its children's covers, or half and
//!   half when they are zero too; a share is never above 1. Any fixed shares give an exact decomposition, since
//!   the bias below is the empty coalition's value under the same shares.
//!
//! The walk is a loop with an explicit stack (no recursion on input); the path segments of the nodes on the
//! current root-to-node path live one after another in one buffer.

use crate::engine::tree::{Ensemble, Step};

/// The per-node cover and the preorder copy of an ensemble's trees that explanations walk.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct TreePaths {
    pub(crate) trees: Ensemble,
    /// Cover of each node, by absolute preorder index.
    pub(crate) covers: Vec<f64>,
    /// The empty coalition's margin: the base margin plus each tree's cover-weighted mean leaf, in tree order.
    bias: f64,
}

/// One step of a root-to-leaf path (the paper's `m`): the feature split on, the share of the weight that goes
/// this way when the feature is left out (`zero`) and whether the row goes this way (`one`), and the
/// proportion of coalitions of each size (`weight`).
#[derive(Debug, Clone, Copy, Default)]
struct PathStep {
    feature: usize,
    zero: f64,
    one: f64,
    weight: f64,
}

/// No feature: the first step of every path.
const NO_FEATURE: usize = usize::MAX;

/// A node waiting on the walk's stack.
#[derive(Debug, Clone, Copy)]
struct Frame {
    node: usize,
    /// Where the parent's path segment starts in the buffer, and where this node's starts.
    parent_at: usize,
    at: usize,
    /// This node's unique depth: the parent's path has this many steps to copy.
    depth: usize,
    zero: f64,
    one: f64,
    feature: usize,
}

/// Reusable buffers of the walk.
#[derive(Debug, Default, Clone)]
pub struct Workspace {
    path: Vec<PathStep>,
    stack: Vec<Frame>,
}

/// The shares of a split's weight that go to its children when its feature is left out. A share is at most 1: a
/// child's cover above its parent's (float32 hessian sums can round that way, a damaged file can say anything)
/// counts as all of it, so weights never grow down a path.
pub(crate) fn shares(node: f64, left: f64, right: f64) -> (f64, f64) {
    if node > 0.0 {
        ((left / node).min(1.0), (right / node).min(1.0))
    } else if left + right > 0.0 {
        (left / (left + right), right / (left + right))
    } else {
        (0.5, 0.5)
    }
}

/// EXTEND: adds a step to the path `p` of `depth` steps already (`p` has room for one more).
fn extend(p: &mut [PathStep], depth: usize, zero: f64, one: f64, feature: usize) {
    p[depth] = PathStep {
        feature,
        zero,
        one,
        weight: if depth == 0 { 1.0 } else { 0.0 },
    };
    let d1 = (depth + 1) as f64;
    for i in (0..depth).rev() {
        p[i + 1].weight += one * p[i].weight * (i + 1) as f64 / d1;
        p[i].weight = zero * p[i].weight * (depth - i) as f64 / d1;
    }
}

/// UNWIND: removes step `k` from the path `p` whose last step is at `depth`.
fn unwind(p: &mut [PathStep], depth: usize, k: usize) {
    let (one, zero) = (p[k].one, p[k].zero);
    let d1 = (depth + 1) as f64;
    let mut next = p[depth].weight;
    for i in (0..depth).rev() {
        if one != 0.0 {
            let w = p[i].weight;
            p[i].weight = next * d1 / ((i + 1) as f64 * one);
            next = w - p[i].weight * zero * (depth - i) as f64 / d1;
        } else {
            p[i].weight = p[i].weight * d1 / (zero * (depth - i) as f64);
        }
    }
    for i in k..depth {
        p[i].feature = p[i + 1].feature;
        p[i].zero = p[i + 1].zero;
        p[i].one = p[i + 1].one;
    }
}

/// The total weight of the path `p` (last step at `depth`) with step `k` unwound, without changing `p`.
fn unwound_sum(p: &[PathStep], depth: usize, k: usize) -> f64 {
    let (one, zero) = (p[k].one, p[k].zero);
    let d1 = (depth + 1) as f64;
    let mut next = p[depth].weight;
    let mut total = 0.0;
    for i in (0..depth).rev() {
        if one != 0.0 {
            let w = next * d1 / ((i + 1) as f64 * one);
            total += w;
            next = p[i].weight - w * zero * ((depth - i) as f64 / d1);
        } else {
            total += (p[i].weight / zero) / ((depth - i) as f64 / d1);
        }
    }
    total
}

impl TreePaths {
    /// Wraps a preorder-only ensemble ([`crate::engine::tree::EnsembleBuilder::preorder_only`]) and its covers.
    pub(crate) fn new(trees: Ensemble, covers: Vec<f64>) -> TreePaths {
        let mut expected = Vec::with_capacity(trees.preorder_roots().len());
        let mut stack = Vec::new();
        for &root in trees.preorder_roots() {
            // (node, weight of reaching it with every feature left out)
            stack.push((root as usize, 1.0f64));
            let mut sum = 0.0;
            while let Some((i, w)) = stack.pop() {
                match trees.children(i) {
                    None => sum += w * trees.value(i),
                    Some((l, r)) => {
                        let (zl, zr) = shares(covers[i], covers[l], covers[r]);
                        stack.push((r, w * zr));
                        stack.push((l, w * zl));
                    }
                }
            }
            expected.push(sum);
        }
        let bias = expected.iter().fold(trees.base_margin(), |acc, &e| acc + e);
        TreePaths {
            trees,
            covers,
            bias,
        }
    }

    /// The empty coalition's margin: base margin plus each tree's cover-weighted mean leaf.
    pub(crate) fn bias(&self) -> f64 {
        self.bias
    }

    /// Adds every tree's contributions for `row` (length checked by the caller) into `phi` (one per feature).
    pub(crate) fn add_contributions(&self, row: &[f64], phi: &mut [f64], ws: &mut Workspace) {
        for &root in self.trees.preorder_roots() {
            self.tree(root as usize, row, phi, ws);
        }
    }

    /// Algorithm 2 on the tree rooted at `root`.
    fn tree(&self, root: usize, row: &[f64], phi: &mut [f64], ws: &mut Workspace) {
        let Workspace { path, stack } = ws;
        stack.clear();
        stack.push(Frame {
            node: root,
            parent_at: 0,
            at: 0,
            depth: 0,
            zero: 1.0,
            one: 1.0,
            feature: NO_FEATURE,
        });
        while let Some(f) = stack.pop() {
            // This node's path: the parent's `depth` steps, then this one.
            let end = f.at + f.depth + 1;
            if path.len() < end {
                path.resize(end, PathStep::default());
            }
            if f.depth > 0 {
                path.copy_within(f.parent_at..f.parent_at + f.depth, f.at);
            }
            let p = &mut path[f.at..end];
            let mut depth = f.depth;
            extend(p, depth, f.zero, f.one, f.feature);
            match self.trees.step(f.node, row) {
                Step::Leaf(value) => {
                    for k in 1..=depth {
                        let w = unwound_sum(p, depth, k);
                        let s = p[k];
                        phi[s.feature] += w * (s.one - s.zero) * value;
                    }
                }
                Step::Split {
                    feature,
                    left,
                    right,
                    goes_left,
                } => {
                    let (hot, cold) = if goes_left {
                        (left, right)
                    } else {
                        (right, left)
                    };
                    let (z_left, z_right) =
                        shares(self.covers[f.node], self.covers[left], self.covers[right]);
                    let (z_hot, z_cold) = if goes_left {
                        (z_left, z_right)
                    } else {
                        (z_right, z_left)
                    };
                    // A feature already on the path: undo its earlier step and carry its shares on.
                    let (mut in_zero, mut in_one) = (1.0, 1.0);
                    if let Some(k) = (1..=depth).find(|&k| p[k].feature == feature) {
                        in_zero = p[k].zero;
                        in_one = p[k].one;
                        unwind(p, depth, k);
                        depth -= 1;
                    }
                    let child = |node, zero, one| Frame {
                        node,
                        parent_at: f.at,
                        at: end,
                        depth: depth + 1,
                        zero,
                        one,
                        feature,
                    };
                    let cold_zero = z_cold * in_zero;
                    // The cold side has `one = 0`: with no share of the cover either, it weighs nothing.
                    if cold_zero != 0.0 {
                        stack.push(child(cold, cold_zero, 0.0));
                    }
                    let hot_zero = z_hot * in_zero;
                    if hot_zero != 0.0 || in_one != 0.0 {
                        stack.push(child(hot, hot_zero, in_one));
                    }
                }
            }
        }
    }
}
