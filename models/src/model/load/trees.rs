//! Rules of the `ensemble` object, and its compilation into the engine's flat preorder layout.
//!
//! Per tree: each node is checked on its own (kind, feature, numbers, child indices), then one depth-first walk
//! from the root with an explicit stack checks that every node is reached exactly once and emits the nodes in
//! preorder. A node found a second time is either an ancestor of the node pointing at it (a cycle) or not (a
//! shared node); the parent links of the walk tell which.

use super::finite;
use super::raw::{RawEnsemble, RawNode, RawOp, RawPrecision, RawSide};
use crate::engine::tree::{Ensemble, EnsembleBuilder, Side};
use crate::error::ModelError;
use crate::explain::{Attribution, TreePaths};
use crate::schema::Schema;

/// Most trees in an ensemble (`docs/model-format.md`, Limits).
pub const MAX_TREES: usize = 100_000;
/// Most nodes over all trees (`docs/model-format.md`, Limits).
pub const MAX_NODES: usize = 10_000_000;

const NO_PARENT: u32 = u32::MAX;

fn side(s: RawSide) -> Side {
    match s {
        RawSide::Left => Side::Left,
        RawSide::Right => Side::Right,
    }
}

/// The format's limits on the number of trees and of nodes in all.
fn limits(trees: usize, nodes: usize) -> Result<(), ModelError> {
    if trees > MAX_TREES {
        return Err(ModelError::TooLarge {
            path: "ensemble.trees".into(),
            what: "trees",
            got: trees,
            limit: MAX_TREES,
        });
    }
    if nodes > MAX_NODES {
        return Err(ModelError::TooLarge {
            path: "ensemble.trees".into(),
            what: "nodes in all",
            got: nodes,
            limit: MAX_NODES,
        });
    }
    Ok(())
}

/// Whether the nodes carry `cover`: all of them (format version 2) or none; the path of a node that breaks the
/// rule otherwise.
fn covered(raw: &RawEnsemble, version_2: bool) -> Result<bool, ModelError> {
    let mut with = None;
    let mut without = None;
    for (t, tree) in raw.trees.iter().enumerate() {
        for (i, node) in tree.nodes.iter().enumerate() {
            let slot = if node.cover.is_some() {
                &mut with
            } else {
                &mut without
            };
            if slot.is_none() {
                *slot = Some((t, i));
            }
        }
    }
    let path = |(t, i): (usize, usize)| format!("ensemble.trees[{t}].nodes[{i}].cover");
    match (with, without) {
        (Some(at), _) if !version_2 => Err(ModelError::rule(
            path(at),
            "`cover` needs format_version 2 or later",
        )),
        (Some(_), Some(at)) => Err(ModelError::rule(
            path(at),
            "missing: some nodes carry `cover`, so every node needs it",
        )),
        (Some(_), None) => Ok(true),
        (None, _) => Ok(false),
    }
}

/// Checks and compiles an ensemble, with what explanations need when the nodes carry `cover`.
pub(super) fn ensemble(
    raw: RawEnsemble,
    schema: &Schema,
    version_2: bool,
) -> Result<(Ensemble, Attribution), ModelError> {
    let base_margin = finite(raw.base_margin, || "ensemble.base_margin".into())?;
    if raw.trees.is_empty() {
        return Err(ModelError::rule(
            "ensemble.trees",
            "an ensemble needs at least one tree",
        ));
    }
    let total: usize = raw.trees.iter().map(|t| t.nodes.len()).sum();
    limits(raw.trees.len(), total)?;
    let n_categories: Vec<u32> = schema
        .features()
        .iter()
        .map(|f| f.categories().len() as u32)
        .collect();
    let float32 = matches!(raw.split_precision, RawPrecision::Float32);
    let mut b = EnsembleBuilder::new(base_margin, float32, n_categories, total);
    let mut walk = Walk::default();
    let mut covers = if covered(&raw, version_2)? {
        Some(Vec::with_capacity(total))
    } else {
        None
    };
    for (t, tree) in raw.trees.iter().enumerate() {
        let path = |i: usize, rest: &str| format!("ensemble.trees[{t}].nodes[{i}]{rest}");
        if tree.nodes.is_empty() {
            return Err(ModelError::rule(
                format!("ensemble.trees[{t}].nodes"),
                "a tree needs at least one node",
            ));
        }
        for (i, node) in tree.nodes.iter().enumerate() {
            check_node(node, i, tree.nodes.len(), schema, &path)?;
        }
        walk.run(&tree.nodes, &mut b, covers.as_mut(), &path)?;
    }
    let attribution = match covers {
        Some(covers) => Attribution::Trees(Box::new(TreePaths::new(b.preorder_only(), covers))),
        None => Attribution::NoCover {
            path: "ensemble.trees[0].nodes[0].cover".into(),
        },
    };
    Ok((b.finish(), attribution))
}

/// The rules a node must meet on its own.
fn check_node(
    node: &RawNode,
    i: usize,
    len: usize,
    schema: &Schema,
    path: &dyn Fn(usize, &str) -> String,
) -> Result<(), ModelError> {
    let kinds = [
        node.leaf.is_some(),
        node.numeric.is_some(),
        node.categorical.is_some(),
    ];
    if kinds.iter().filter(|k| **k).count() != 1 {
        return Err(ModelError::rule(
            path(i, ""),
            "a node needs exactly one of `leaf`, `numeric` and `categorical`",
        ));
    }
    if let Some(c) = node.cover {
        finite(c, || path(i, ".cover"))?;
        if c < 0.0 {
            return Err(ModelError::rule(
                path(i, ".cover"),
                format!("must be 0 or more, got {c}"),
            ));
        }
    }
    if let Some(v) = node.leaf {
        finite(v, || path(i, ".leaf"))?;
        for (key, child) in [("left", node.left), ("right", node.right)] {
            if child.is_some() {
                return Err(ModelError::rule(
                    path(i, &format!(".{key}")),
                    "a leaf has no children",
                ));
            }
        }
        return Ok(());
    }
    if let Some(s) = &node.numeric {
        let feature = feature_index(s.feature, schema, || path(i, ".numeric.feature"))?;
        if feature.is_categorical() {
            return Err(ModelError::rule(
                path(i, ".numeric.feature"),
                format!(
                    "feature {} (`{}`) is categorical; a numeric split needs a numeric feature",
                    s.feature, feature.name
                ),
            ));
        }
        // Any threshold is valid: a JSON number is finite, and `"inf"` / `"-inf"` are the infinite ones.
    }
    if let Some(s) = &node.categorical {
        let feature = feature_index(s.feature, schema, || path(i, ".categorical.feature"))?;
        let n = feature.categories().len();
        if n == 0 {
            return Err(ModelError::rule(
                path(i, ".categorical.feature"),
                format!(
                    "feature {} (`{}`) is numeric; a categorical split needs a categorical feature",
                    s.feature, feature.name
                ),
            ));
        }
        for (j, &c) in s.left_categories.iter().enumerate() {
            if c as usize >= n {
                return Err(ModelError::rule(
                    path(i, &format!(".categorical.left_categories[{j}]")),
                    format!(
                        "category index {c} is out of range (feature `{}` has {n} categories)",
                        feature.name
                    ),
                ));
            }
        }
        // Sorting a copy keeps the cost at the list's size, whatever the number of categories.
        let mut sorted = s.left_categories.clone();
        sorted.sort_unstable();
        if let Some(w) = sorted.windows(2).find(|w| w[0] == w[1]) {
            let c = w[0];
            let second = s
                .left_categories
                .iter()
                .enumerate()
                .filter(|(_, &x)| x == c)
                .nth(1);
            let j = second.map_or(0, |(j, _)| j);
            return Err(ModelError::rule(
                path(i, &format!(".categorical.left_categories[{j}]")),
                format!("duplicate category index {c}"),
            ));
        }
    }
    let (Some(left), Some(right)) = (node.left, node.right) else {
        let key = if node.left.is_none() { "left" } else { "right" };
        return Err(ModelError::rule(
            path(i, ""),
            format!("a split needs `{key}`"),
        ));
    };
    for (key, child) in [("left", left), ("right", right)] {
        let p = || path(i, &format!(".{key}"));
        if child as usize >= len {
            return Err(ModelError::rule(
                p(),
                format!("child index {child} is out of range (tree has {len} nodes)"),
            ));
        }
        if child as usize == i {
            return Err(ModelError::rule(p(), format!("node {i} points to itself")));
        }
    }
    if left == right {
        return Err(ModelError::rule(
            path(i, ".right"),
            format!("left and right are the same node {left}"),
        ));
    }
    Ok(())
}

fn feature_index(
    index: u32,
    schema: &Schema,
    path: impl FnOnce() -> String,
) -> Result<&crate::schema::Feature, ModelError> {
    schema.feature(index as usize).ok_or_else(|| {
        ModelError::rule(
            path(),
            format!(
                "feature index {index} is out of range (the model has {} features)",
                schema.len()
            ),
        )
    })
}

/// Reusable buffers of the per-tree walk.
#[derive(Default)]
struct Walk {
    /// Parent of each node found so far, `NO_PARENT` for the root and for nodes not found yet.
    parent: Vec<u32>,
    found: Vec<bool>,
    /// (node, depth, absolute index of the split whose right child this node is).
    stack: Vec<(u32, usize, Option<u32>)>,
}

impl Walk {
    /// Walks one tree whose nodes passed [`check_node`], checking reachability and emitting it in preorder.
    fn run(
        &mut self,
        nodes: &[RawNode],
        b: &mut EnsembleBuilder,
        mut covers: Option<&mut Vec<f64>>,
        path: &dyn Fn(usize, &str) -> String,
    ) -> Result<(), ModelError> {
        self.parent.clear();
        self.parent.resize(nodes.len(), NO_PARENT);
        self.found.clear();
        self.found.resize(nodes.len(), false);
        self.stack.clear();
        self.found[0] = true;
        self.stack.push((0, 0, None));
        b.start_tree()?;
        while let Some((i, depth, right_of)) = self.stack.pop() {
            let here = b.next_index()?;
            if let Some(parent) = right_of {
                b.set_right(parent, here);
            }
            let node = &nodes[i as usize];
            if let Some(c) = covers.as_deref_mut() {
                // `covered` checked that every node has one.
                c.push(node.cover.unwrap_or(0.0));
            }
            if let Some(v) = node.leaf {
                b.push_leaf(v)?;
                b.note_depth(depth);
                continue;
            }
            if let Some(s) = &node.numeric {
                b.push_numeric(s.feature, s.op == RawOp::Le, s.threshold.0, side(s.missing));
            } else if let Some(s) = &node.categorical {
                b.push_categorical(
                    s.feature,
                    &s.left_categories,
                    side(s.missing),
                    side(s.unknown),
                )?;
            }
            // check_node guarantees both children of a split, in range.
            let (left, right) = (node.left.unwrap_or(0), node.right.unwrap_or(0));
            for (key, child) in [("left", left), ("right", right)] {
                self.discover(i, child, key, path)?;
            }
            // Right first so that the left subtree is emitted right after this node.
            self.stack.push((right, depth + 1, Some(here)));
            self.stack.push((left, depth + 1, None));
        }
        if let Some(lost) = self.found.iter().position(|f| !f) {
            return Err(ModelError::rule(
                path(lost, ""),
                format!("node {lost} is not reachable from the root"),
            ));
        }
        Ok(())
    }

    /// Records that `child` hangs under `parent`, or explains why it cannot.
    fn discover(
        &mut self,
        parent: u32,
        child: u32,
        key: &str,
        path: &dyn Fn(usize, &str) -> String,
    ) -> Result<(), ModelError> {
        let c = child as usize;
        if !self.found[c] {
            self.found[c] = true;
            self.parent[c] = parent;
            return Ok(());
        }
        let p = path(parent as usize, &format!(".{key}"));
        // Is `child` an ancestor of `parent`? Walk up the (acyclic so far) parent links.
        let mut a = parent;
        while a != NO_PARENT {
            if a == child {
                return Err(ModelError::rule(
                    p,
                    format!("node {child} is an ancestor of node {parent}: the tree has a cycle"),
                ));
            }
            a = self.parent[a as usize];
        }
        Err(ModelError::rule(
            p,
            format!(
                "node {child} is reached a second time (it is already a child of node {})",
                self.parent[c]
            ),
        ))
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn node_limit() {
        // A file at the node limit takes gigabytes to build in a test, so the check itself is tested here.
        assert!(limits(1, MAX_NODES).is_ok());
        let err = limits(1, MAX_NODES + 1).unwrap_err();
        assert_eq!(
            err.to_string(),
            "ensemble.trees: 10000001 nodes in all, the limit is 10000000"
        );
        assert_eq!(
            limits(MAX_TREES + 1, 5).unwrap_err().path(),
            Some("ensemble.trees")
        );
    }
}
