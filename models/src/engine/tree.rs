//! The compiled tree ensemble: every tree's nodes in one flat array, laid out in preorder.
//!
//! A node is 24 bytes. In preorder a split's left child is the next node, so only the right child's absolute index
//! is stored; a walk down the left side reads memory sequentially. A leaf keeps its value, a numeric split its
//! threshold, in the same `value` slot. A categorical split's left set lives in a shared pool, either as a bitset
//! (`bitsets`, for small category indices) or as a sorted index list (`lists`, when a bitset would be much larger
//! than the list); `aux` is the offset of the set in its pool, whose first entry is the set's length.
//!
//! A numeric split always tests `x <= threshold`: a file's `x < t` is stored as `x <= t.next_down()`, which gives
//! the same answer for every non-NaN f64 `x`, infinities included (no f64 lies strictly between the two
//! thresholds). With float32 split precision the rounded feature is still an f64, so the same holds there.
//!
//! The loader (`model::load`) guarantees the invariants the walk relies on: every tree is acyclic, every child
//! index is inside the array, every feature index is inside the row. Traversal is a loop, never recursion.

use crate::error::ModelError;

/// Node flag: a leaf; `value` is its value.
const LEAF: u8 = 1;
/// Node flag: a missing value goes left.
const MISSING_LEFT: u8 = 4;
/// Node flag: a categorical split.
const CATEGORICAL: u8 = 8;
/// Node flag: an unknown category goes left.
const UNKNOWN_LEFT: u8 = 16;
/// Node flag: the left set is a sorted list in `lists` (otherwise a bitset in `bitsets`).
const SET_IS_LIST: u8 = 32;

/// Rows evaluated together per tree in a batch: enough to reuse a tree while it is in cache, few enough that the
/// block's rows stay in cache too.
const BLOCK_ROWS: usize = 64;

/// Rows walked through one tree in lockstep in a batch.
const LANES: usize = 8;

/// Bitsets up to this many words are always used; beyond, only when no longer than the index list.
const SMALL_BITSET_WORDS: usize = 8;

#[derive(Debug, Clone, Copy, PartialEq)]
struct Node {
    /// Leaf value or numeric threshold.
    value: f64,
    feature: u32,
    /// Absolute index of the right child.
    right: u32,
    /// Offset of a categorical split's left set in its pool.
    aux: u32,
    flags: u8,
}

/// How a split sends a missing value or an unknown category.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Side {
    Left,
    Right,
}

/// A compiled, validated tree ensemble.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Ensemble {
    nodes: Vec<Node>,
    roots: Vec<u32>,
    /// Depth (largest root-to-leaf edge count) of each tree, parallel to `roots`: a lockstep walk of that many
    /// steps reaches a leaf in every lane.
    depths: Vec<usize>,
    bitsets: Vec<u64>,
    lists: Vec<u32>,
    /// Number of categories of each feature (0 for a numeric one): a categorical value is a known category only
    /// when it is an integer below this.
    n_categories: Vec<u32>,
    base_margin: f64,
    float32: bool,
    leaves: usize,
    max_depth: usize,
}

/// Builds an [`Ensemble`] node by node in preorder, one tree after another.
#[derive(Debug)]
pub(crate) struct EnsembleBuilder {
    e: Ensemble,
}

fn overflow(what: &'static str, got: usize) -> ModelError {
    ModelError::TooLarge {
        path: "ensemble".into(),
        what,
        got,
        limit: u32::MAX as usize,
    }
}

impl EnsembleBuilder {
    /// Starts an ensemble over features with the given category counts (0 for numeric).
    pub(crate) fn new(
        base_margin: f64,
        float32: bool,
        n_categories: Vec<u32>,
        nodes: usize,
    ) -> Self {
        EnsembleBuilder {
            e: Ensemble {
                nodes: Vec::with_capacity(nodes),
                roots: Vec::new(),
                depths: Vec::new(),
                bitsets: Vec::new(),
                lists: Vec::new(),
                n_categories,
                base_margin,
                float32,
                leaves: 0,
                max_depth: 0,
            },
        }
    }

    /// Index the next pushed node will get.
    pub(crate) fn next_index(&self) -> Result<u32, ModelError> {
        u32::try_from(self.e.nodes.len()).map_err(|_| overflow("nodes", self.e.nodes.len()))
    }

    /// Marks the next pushed node as the root of a new tree.
    pub(crate) fn start_tree(&mut self) -> Result<(), ModelError> {
        let root = self.next_index()?;
        self.e.roots.push(root);
        self.e.depths.push(0);
        Ok(())
    }

    /// Records the depth of a leaf of the current tree.
    pub(crate) fn note_depth(&mut self, depth: usize) {
        self.e.max_depth = self.e.max_depth.max(depth);
        if let Some(d) = self.e.depths.last_mut() {
            *d = (*d).max(depth);
        }
    }

    pub(crate) fn push_leaf(&mut self, value: f64) -> Result<(), ModelError> {
        // A leaf is its own right child, so a lockstep walk can step it without changing it.
        let here = self.next_index()?;
        self.e.leaves += 1;
        self.e.nodes.push(Node {
            value,
            feature: 0,
            right: here,
            aux: 0,
            flags: LEAF,
        });
        Ok(())
    }

    /// Pushes a numeric split; its right child is set later with [`Self::set_right`].
    pub(crate) fn push_numeric(&mut self, feature: u32, le: bool, threshold: f64, missing: Side) {
        // See the module overview: `<` becomes `<=` on the previous f64, so the walk makes one comparison.
        let threshold = if le { threshold } else { threshold.next_down() };
        let mut flags = 0;
        if missing == Side::Left {
            flags |= MISSING_LEFT;
        }
        self.e.nodes.push(Node {
            value: threshold,
            feature,
            right: 0,
            aux: 0,
            flags,
        });
    }

    /// Pushes a categorical split with left set `left` (indices in range, unique, any order).
    pub(crate) fn push_categorical(
        &mut self,
        feature: u32,
        left: &[u32],
        missing: Side,
        unknown: Side,
    ) -> Result<(), ModelError> {
        let mut flags = CATEGORICAL;
        if missing == Side::Left {
            flags |= MISSING_LEFT;
        }
        if unknown == Side::Left {
            flags |= UNKNOWN_LEFT;
        }
        let words = left.iter().max().map_or(0, |&m| m as usize / 64 + 1);
        let aux = if words <= SMALL_BITSET_WORDS || words <= left.len() {
            let off = self.e.bitsets.len();
            self.e.bitsets.push(words as u64);
            self.e.bitsets.resize(off + 1 + words, 0);
            for &c in left {
                self.e.bitsets[off + 1 + c as usize / 64] |= 1u64 << (c % 64);
            }
            u32::try_from(off).map_err(|_| overflow("bitset words", off))?
        } else {
            flags |= SET_IS_LIST;
            let off = self.e.lists.len();
            self.e
                .lists
                .push(u32::try_from(left.len()).map_err(|_| overflow("categories", left.len()))?);
            let start = self.e.lists.len();
            self.e.lists.extend_from_slice(left);
            self.e.lists[start..].sort_unstable();
            u32::try_from(off).map_err(|_| overflow("category list entries", off))?
        };
        self.e.nodes.push(Node {
            value: 0.0,
            feature,
            right: 0,
            aux,
            flags,
        });
        Ok(())
    }

    /// Sets the right child of split `node` (both absolute indices).
    pub(crate) fn set_right(&mut self, node: u32, right: u32) {
        if let Some(n) = self.e.nodes.get_mut(node as usize) {
            n.right = right;
        }
    }

    pub(crate) fn finish(self) -> Ensemble {
        self.e
    }
}

/// Whether `x` is the index of a known category of a feature with `n` categories.
#[inline]
pub(crate) fn known_category(x: f64, n: usize) -> Option<usize> {
    if x >= 0.0 && x < n as f64 && x.trunc() == x {
        Some(x as usize)
    } else {
        None
    }
}

/// Whether numeric split (or leaf) `node` sends value `x` left; a leaf never does.
///
/// Written with `&` and `|` on booleans rather than `if`s so the compiler can select without branches: which
/// way a lane goes depends on the data and predicts badly.
#[inline(always)]
fn numeric_left<const F32: bool>(node: &Node, x: f64) -> bool {
    // Training libraries that store features as f32 compare the rounded value with the threshold (NaN stays
    // NaN, so the missing test is unchanged).
    let x = if F32 { x as f32 as f64 } else { x };
    let split = node.flags & LEAF == 0;
    // `x <= t` is false for NaN, which then goes where the flag says.
    let left = (x <= node.value) | (x.is_nan() & (node.flags & MISSING_LEFT != 0));
    split & left
}

impl Ensemble {
    /// Number of trees.
    pub(crate) fn trees(&self) -> usize {
        self.roots.len()
    }
    /// Number of nodes in all trees.
    pub(crate) fn nodes(&self) -> usize {
        self.nodes.len()
    }
    /// Number of leaves in all trees.
    pub(crate) fn leaves(&self) -> usize {
        self.leaves
    }
    /// Largest root-to-leaf edge count.
    pub(crate) fn max_depth(&self) -> usize {
        self.max_depth
    }

    /// The margin of one row whose length the caller checked.
    pub(crate) fn margin(&self, row: &[f64]) -> f64 {
        if self.float32 {
            self.margin_with::<true>(row)
        } else {
            self.margin_with::<false>(row)
        }
    }

    fn margin_with<const F32: bool>(&self, row: &[f64]) -> f64 {
        // Base margin first, then the trees in file order: the summation order of the reference libraries.
        let mut m = self.base_margin;
        for &root in &self.roots {
            m += self.leaf::<F32>(root, row);
        }
        m
    }

    /// Margins of `out.len()` rows of `n` values each (shape checked by the caller), tree-major over blocks of
    /// rows. Each row's sum is formed in the same order as in [`Self::margin`], so results are bit-identical.
    pub(crate) fn margins(&self, rows: &[f64], n: usize, out: &mut [f64]) {
        if self.float32 {
            self.margins_with::<true>(rows, n, out);
        } else {
            self.margins_with::<false>(rows, n, out);
        }
    }

    fn margins_with<const F32: bool>(&self, rows: &[f64], n: usize, out: &mut [f64]) {
        for (b, block) in out.chunks_mut(BLOCK_ROWS).enumerate() {
            let first = b * BLOCK_ROWS;
            block.fill(self.base_margin);
            for (&root, &depth) in self.roots.iter().zip(&self.depths) {
                for (g, lanes) in block.chunks_mut(LANES).enumerate() {
                    let row0 = first + g * LANES;
                    if let Ok(full) = <&mut [f64; LANES]>::try_from(&mut *lanes) {
                        self.add_leaves_of_lanes::<F32>(root, depth, rows, row0, n, full);
                    } else {
                        for (k, o) in lanes.iter_mut().enumerate() {
                            let start = (row0 + k) * n;
                            *o += self.leaf::<F32>(root, &rows[start..start + n]);
                        }
                    }
                }
            }
        }
    }

    /// Walks one tree of depth `depth` for [`LANES`] rows in lockstep and adds each row's leaf value to its
    /// output. The rows' walks are independent, so the processor overlaps their memory loads and comparisons
    /// instead of waiting on one dependent chain.
    #[inline]
    fn add_leaves_of_lanes<const F32: bool>(
        &self,
        root: u32,
        depth: usize,
        rows: &[f64],
        row0: usize,
        n: usize,
        out: &mut [f64; LANES],
    ) {
        // One slice per lane, cut once per tree, so a step's feature load checks only the feature index.
        let lane: [&[f64]; LANES] = std::array::from_fn(|k| &rows[(row0 + k) * n..][..n]);
        let mut at = [root as usize; LANES];
        // Exactly `depth` steps: no test of whether any lane still moves. A lane already at a leaf stays there,
        // since a leaf never goes left and is its own right child.
        for _ in 0..depth {
            for (i, row) in at.iter_mut().zip(&lane) {
                let node = &self.nodes[*i];
                // A leaf's feature is 0, inside every row that reaches a split (a split needs a feature).
                let x = row[node.feature as usize];
                let left = if node.flags & CATEGORICAL == 0 {
                    numeric_left::<F32>(node, x)
                } else {
                    self.categorical_left(node, x)
                };
                *i = if left { *i + 1 } else { node.right as usize };
            }
        }
        for (o, &i) in out.iter_mut().zip(&at) {
            *o += self.nodes[i].value;
        }
    }

    /// Walks one tree from `root` to a leaf and returns its value.
    #[inline]
    fn leaf<const F32: bool>(&self, root: u32, row: &[f64]) -> f64 {
        let mut i = root as usize;
        loop {
            let node = &self.nodes[i];
            if node.flags & LEAF != 0 {
                return node.value;
            }
            let x = row[node.feature as usize];
            let left = if node.flags & CATEGORICAL == 0 {
                numeric_left::<F32>(node, x)
            } else {
                self.categorical_left(node, x)
            };
            i = if left { i + 1 } else { node.right as usize };
        }
    }

    /// Whether categorical split `node` sends value `x` left. Kept out of the numeric path, which most splits
    /// take.
    #[inline(never)]
    fn categorical_left(&self, node: &Node, x: f64) -> bool {
        if x.is_nan() {
            return node.flags & MISSING_LEFT != 0;
        }
        let n = self.n_categories[node.feature as usize] as usize;
        match known_category(x, n) {
            Some(c) => self.in_left_set(node, c),
            None => node.flags & UNKNOWN_LEFT != 0,
        }
    }

    #[inline]
    fn in_left_set(&self, node: &Node, c: usize) -> bool {
        let off = node.aux as usize;
        if node.flags & SET_IS_LIST != 0 {
            let len = self.lists[off] as usize;
            self.lists[off + 1..off + 1 + len]
                .binary_search(&(c as u32))
                .is_ok()
        } else {
            let words = self.bitsets[off] as usize;
            let w = c / 64;
            w < words && (self.bitsets[off + 1 + w] >> (c % 64)) & 1 == 1
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// One tree: categorical split on feature 0 (1000 categories), left set given, leaves -1 / +1.
    fn one_split(left: &[u32]) -> Ensemble {
        let mut b = EnsembleBuilder::new(0.0, false, vec![1000], 3);
        b.start_tree().unwrap();
        b.push_categorical(0, left, Side::Right, Side::Left)
            .unwrap();
        b.push_leaf(-1.0).unwrap();
        b.set_right(0, 2);
        b.push_leaf(1.0).unwrap();
        b.finish()
    }

    #[test]
    fn node_is_compact() {
        // The layout the module overview promises: 8 (value) + 3 * 4 (feature, right, aux) + 1 (flags), padded.
        assert_eq!(std::mem::size_of::<Node>(), 24);
    }

    #[test]
    fn strict_split_folds_to_le_exactly() {
        // `x < t` stored as `x <= t.next_down()`: check values at and around the threshold, signed zeros and
        // infinities, in both split precisions, against the strict comparison itself.
        for t in [
            0.0,
            -0.0,
            1.5,
            -2.0,
            f64::MAX,
            -f64::MAX,
            f64::MIN_POSITIVE,
            0.1,
        ] {
            for float32 in [false, true] {
                let mut b = EnsembleBuilder::new(0.0, float32, vec![0], 3);
                b.start_tree().unwrap();
                b.note_depth(1);
                b.push_numeric(0, false, t, Side::Right);
                b.push_leaf(-1.0).unwrap();
                b.set_right(0, 2);
                b.push_leaf(1.0).unwrap();
                let e = b.finish();
                let xs = [
                    t,
                    t.next_down(),
                    t.next_up(),
                    0.0,
                    -0.0,
                    f64::INFINITY,
                    f64::NEG_INFINITY,
                    f64::MAX,
                    -f64::MAX,
                    t as f32 as f64,
                ];
                for x in xs {
                    let r = if float32 { x as f32 as f64 } else { x };
                    let want = if r < t { -1.0 } else { 1.0 };
                    assert_eq!(e.margin(&[x]), want, "t={t} x={x} float32={float32}");
                    let mut out = [0.0; LANES];
                    e.margins(&[x; LANES], 1, &mut out);
                    assert_eq!(out, [want; LANES], "batch t={t} x={x} float32={float32}");
                }
                assert_eq!(e.margin(&[f64::NAN]), 1.0);
            }
        }
    }

    #[test]
    fn bitset_and_list_agree() {
        // Index 900 needs 15 words; two entries -> a list; many entries -> a bitset. Both must say the same.
        let sparse = one_split(&[900, 3]);
        assert_eq!(sparse.lists.len(), 3);
        let dense: Vec<u32> = (0..1000).filter(|c| c % 3 == 0).collect();
        let dense_e = one_split(&dense);
        assert!(dense_e.lists.is_empty());
        for c in 0..1000u32 {
            let want = if c == 900 || c == 3 { -1.0 } else { 1.0 };
            assert_eq!(sparse.margin(&[c as f64]), want, "c={c}");
            let want = if c % 3 == 0 { -1.0 } else { 1.0 };
            assert_eq!(dense_e.margin(&[c as f64]), want, "c={c}");
        }
        // Unknown goes left, missing right.
        assert_eq!(sparse.margin(&[1000.0]), -1.0);
        assert_eq!(sparse.margin(&[2.5]), -1.0);
        assert_eq!(sparse.margin(&[f64::NAN]), 1.0);
    }
}
