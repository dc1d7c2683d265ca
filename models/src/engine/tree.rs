//! The compiled tree ensemble, in two layouts chosen per group of [`LANES`] consecutive trees.
//!
//! **Complete layout** (numeric splits only, depth at most [`MAX_COMPLETE_DEPTH`]): each tree of the group is
//! padded to a complete binary tree of the group's largest depth. Its splits are an array in breadth-first order
//! (the children of position `p` are `2p + 1` and `2p + 2`; `2^depth` slots, the last one unused), 16 bytes each
//! (threshold and column), and its leaves a separate array of `2^depth` values. A walk is exactly `depth` steps of
//! `p = 2p + 1 + (x > threshold)`, with no leaf test, no child pointer and no missing-value test: the row is first
//! written out twice, missing values as -inf in the first copy and as +inf in the second, and a split whose
//! missing values go right reads its feature from the second copy (its column is `feature + n`). Since every
//! threshold is finite, -inf always goes left and +inf right, and a real infinity goes the same way in either
//! copy. The walks are compiled once per depth so the steps unroll and every index is masked into its
//! power-of-two array (no bounds check but the column's); a leaf shallower than the group's
//! depth is copied to every leaf position under it, and the splits under it are never-mind placeholders whose
//! subtrees all hold the same value. Consecutive complete groups of one depth form one run. Batches walk 8 rows
//! through one tree in lockstep; a single row walks 16 trees of a run in lockstep. Either way the walks are
//! independent, so the processor overlaps their loads.
//!
//! **Preorder layout** (groups with a categorical split, or too deep or too sparse to pad): every tree's nodes in
//! one flat array, laid out in preorder. A node is 24 bytes. In preorder a split's left child is the next node, so
//! only the right child's absolute index is stored; a walk down the left side reads memory sequentially. A leaf keeps its value, a numeric split its
//! threshold, in the same `value` slot. A categorical split's left set lives in a shared pool, either as a bitset
//! (`bitsets`, for small category indices) or as a sorted index list (`lists`, when a bitset would be much larger
//! than the list); `aux` is the offset of the set in its pool, whose first entry is the set's length.
//!
//! A numeric split always tests `x <= threshold`: a file's `x < t` is stored as `x <= t.next_down()`, which gives
//! the same answer for every non-NaN f64 `x`, infinities included (no f64 lies strictly between the two
//! thresholds). With float32 split precision (a library that compares `x` rounded to f32), the threshold is moved
//! at load to the largest f64 whose f32 rounding passes the test ([`f32_equivalent`]): rounding is monotone, so
//! `x <= that` gives the same answer for every non-NaN `x`, and the walk never rounds.
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

/// Rows walked through one tree in lockstep in a batch; trees per group in the layout choice.
const LANES: usize = 8;

/// Trees walked in lockstep for one row.
const TREE_LANES: usize = 16;

/// Deepest group kept in the complete layout (a tree of this depth has 1,023 splits and 1,024 leaves).
const MAX_COMPLETE_DEPTH: usize = 10;

/// A group takes the complete layout only when padding at most multiplies its node count by this.
const MAX_PADDING: usize = 4;

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

/// A numeric split in the complete layout.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Split {
    /// The threshold (finite): `x <= threshold` goes left.
    threshold: f64,
    /// Where `x` is in the sided row (see the module overview): the feature's index, plus the number of
    /// features when a missing value goes right.
    column: u32,
}

/// A placeholder under a shallow leaf: both of its subtrees hold that leaf's value, so its test does not matter.
const PLACEHOLDER: Split = Split {
    threshold: 0.0,
    column: 0,
};

/// Writes `row` twice into `sided`: missing values as -inf, then as +inf.
#[inline]
fn write_sided(row: &[f64], sided: &mut [f64]) {
    let (low, high) = sided.split_at_mut(row.len());
    for ((&x, lo), hi) in row.iter().zip(low).zip(high) {
        let nan = x.is_nan();
        *lo = if nan { f64::NEG_INFINITY } else { x };
        *hi = if nan { f64::INFINITY } else { x };
    }
}

/// Sided rows up to this long (models of up to half as many features) are scored from a stack array whose length
/// is a power of two, so a column is masked into it rather than bounds-checked.
const SMALL_SIDED: usize = 256;

/// A sided row, read by column.
trait Sided {
    fn get(&self, column: u32) -> f64;
}

impl Sided for [f64] {
    #[inline(always)]
    fn get(&self, column: u32) -> f64 {
        self[column as usize]
    }
}

impl Sided for [f64; SMALL_SIDED] {
    /// Every column is below twice the feature count, at most [`SMALL_SIDED`]: the mask changes nothing.
    #[inline(always)]
    fn get(&self, column: u32) -> f64 {
        self[column as usize & (SMALL_SIDED - 1)]
    }
}

std::thread_local! {
    /// The sided row of [`Ensemble::margin`], reused between calls on a thread.
    static SIDED: std::cell::RefCell<Vec<f64>> = const { std::cell::RefCell::new(Vec::new()) };
}

/// Consecutive trees in one layout, in file order: a run of complete trees of one depth, or at most [`LANES`]
/// trees in the preorder layout.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Group {
    /// A run in the complete layout.
    Complete(Run),
    /// Trees `first..first + trees` of `roots` in the preorder layout.
    Preorder { first: usize, trees: usize },
}

/// `trees` trees padded to `depth` (at most [`MAX_COMPLETE_DEPTH`]): tree `k`'s `2^depth` split slots at
/// `splits[splits_at + k * 2^depth..]`, its `2^depth` leaves at `leaf_values[leaves_at + k * 2^depth..]`.
#[derive(Debug, Clone, Copy, PartialEq)]
struct Run {
    trees: usize,
    depth: usize,
    splits_at: usize,
    leaves_at: usize,
}

/// How a split sends a missing value or an unknown category.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Side {
    Left,
    Right,
}

/// One node of the preorder layout as a walk sees it (see [`Ensemble::step`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Step {
    /// A leaf and its value.
    Leaf(f64),
    /// A split: its feature, its children's absolute indices, and whether the row goes left.
    Split {
        feature: usize,
        left: usize,
        right: usize,
        goes_left: bool,
    },
}

/// A compiled, validated tree ensemble.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Ensemble {
    /// The trees in file order, as groups of either layout.
    groups: Vec<Group>,
    /// Splits of the complete layout.
    splits: Vec<Split>,
    /// Leaves of the complete layout.
    leaf_values: Vec<f64>,
    /// Nodes of the preorder layout.
    nodes: Vec<Node>,
    /// Root of each tree of the preorder layout, in `nodes`.
    roots: Vec<u32>,
    /// Depth (largest root-to-leaf edge count) of each tree, parallel to `roots`: a lockstep walk of that many
    /// steps reaches a leaf in every lane.
    depths: Vec<usize>,
    /// Trees, nodes (splits and leaves as written in the file) in all.
    n_trees: usize,
    n_nodes: usize,
    /// Features in a row.
    n_features: usize,
    bitsets: Vec<u64>,
    lists: Vec<u32>,
    /// Number of categories of each feature (0 for a numeric one): a categorical value is a known category only
    /// when it is an integer below this.
    n_categories: Vec<u32>,
    base_margin: f64,
    leaves: usize,
    max_depth: usize,
}

/// Builds an [`Ensemble`] node by node in preorder, one tree after another.
#[derive(Debug)]
pub(crate) struct EnsembleBuilder {
    e: Ensemble,
    /// Whether thresholds are compared with features rounded to f32.
    float32: bool,
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
            float32,
            e: Ensemble {
                groups: Vec::new(),
                splits: Vec::new(),
                leaf_values: Vec::new(),
                n_trees: 0,
                n_nodes: 0,
                n_features: 0,
                nodes: Vec::with_capacity(nodes),
                roots: Vec::new(),
                depths: Vec::new(),
                bitsets: Vec::new(),
                lists: Vec::new(),
                n_categories,
                base_margin,
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
        Ok(())
    }

    /// Records the depth of a leaf, for [`Ensemble::max_depth`] (the layout works out each tree's depth itself).
    pub(crate) fn note_depth(&mut self, depth: usize) {
        self.e.max_depth = self.e.max_depth.max(depth);
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
        // `x < -inf` holds for no `x`, not even -inf: stored as a NaN threshold, which `<=` never passes
        // (`-inf.next_down()` is -inf itself, which -inf would pass).
        let threshold = if le {
            threshold
        } else if threshold == f64::NEG_INFINITY {
            f64::NAN
        } else {
            threshold.next_down()
        };
        let threshold = if self.float32 && !threshold.is_nan() {
            f32_equivalent(threshold)
        } else {
            threshold
        };
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

    /// Every tree built so far in the preorder layout alone, every node kept: for walks that visit each node
    /// (explanations, `crate::explain`), which route a row with the same rules as scoring.
    pub(crate) fn preorder_only(&self) -> Ensemble {
        let mut e = self.e.clone();
        let n = e.roots.len();
        e.n_trees = n;
        e.n_nodes = e.nodes.len();
        e.n_features = e.n_categories.len();
        e.depths = (0..n).map(|t| e.tree_depth(t)).collect();
        e.groups = (0..n)
            .step_by(LANES)
            .map(|first| Group::Preorder {
                first,
                trees: LANES.min(n - first),
            })
            .collect();
        e
    }

    /// Lays the trees out for evaluation, in groups of [`LANES`] consecutive trees: the complete layout where
    /// it applies (see the module overview), the preorder layout otherwise.
    pub(crate) fn finish(self) -> Ensemble {
        let mut built = self.e;
        let bitsets = std::mem::take(&mut built.bitsets);
        let lists = std::mem::take(&mut built.lists);
        let n_categories = std::mem::take(&mut built.n_categories);
        let n = built.roots.len();
        let n_features = n_categories.len();
        let end_of = |t: usize| {
            built
                .roots
                .get(t + 1)
                .map_or(built.nodes.len(), |&r| r as usize)
        };
        let mut e = Ensemble {
            groups: Vec::with_capacity(n.div_ceil(LANES)),
            splits: Vec::new(),
            leaf_values: Vec::new(),
            nodes: Vec::new(),
            roots: Vec::new(),
            depths: Vec::new(),
            n_trees: n,
            n_nodes: built.nodes.len(),
            n_features,
            bitsets,
            lists,
            n_categories,
            base_margin: built.base_margin,
            leaves: built.leaves,
            max_depth: built.max_depth,
        };
        for first in (0..n).step_by(LANES) {
            let trees = LANES.min(n - first);
            let range = built.roots[first] as usize..end_of(first + trees - 1);
            let depth = (first..first + trees)
                .map(|t| built.tree_depth(t))
                .max()
                .unwrap_or(0);
            // Numeric splits with finite thresholds only (the loader requires finite thresholds; a float32
            // threshold moved by `f32_equivalent` stays finite).
            let numeric = built.nodes[range.clone()]
                .iter()
                .all(|node| node.flags & CATEGORICAL == 0 && node.value.is_finite());
            // Padded size, only worked out for depths where it cannot overflow.
            let small = |depth: usize| trees * (2usize << depth) <= MAX_PADDING * range.len();
            if numeric && depth <= MAX_COMPLETE_DEPTH && small(depth) {
                let splits_at = e.splits.len();
                let leaves_at = e.leaf_values.len();
                let size = 1 << depth;
                e.splits.resize(splits_at + trees * size, PLACEHOLDER);
                e.leaf_values.resize(leaves_at + trees * size, 0.0);
                for k in 0..trees {
                    built.fill_complete(
                        built.roots[first + k] as usize,
                        n_features,
                        depth,
                        &mut e.splits[splits_at + k * size..][..size],
                        &mut e.leaf_values[leaves_at + k * size..][..size],
                    );
                }
                // Consecutive complete groups of one depth are contiguous in both arrays: one run.
                match e.groups.last_mut() {
                    Some(Group::Complete(run)) if run.depth == depth => run.trees += trees,
                    _ => e.groups.push(Group::Complete(Run {
                        trees,
                        depth,
                        splits_at,
                        leaves_at,
                    })),
                }
            } else {
                e.groups.push(Group::Preorder {
                    first: e.roots.len(),
                    trees,
                });
                for t in first..first + trees {
                    // Child indices are absolute: moving a tree down by `shift` moves them by as much.
                    let old = built.roots[t] as usize;
                    let shift = old - e.nodes.len();
                    e.roots.push(e.nodes.len() as u32);
                    e.depths.push(built.tree_depth(t));
                    e.nodes
                        .extend(built.nodes[old..end_of(t)].iter().map(|node| Node {
                            right: node.right - shift as u32,
                            ..*node
                        }));
                }
            }
        }
        e
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

/// The largest f64 `T` such that `x as f32 as f64 <= threshold` exactly when `x <= T`, for every non-NaN `x`.
///
/// Rounding to f32 is monotone (non-decreasing), so the set of `x` that pass is a down-set of the f64 line: found
/// by bisection over the f64 values in order (64 halvings at most), at load time only.
pub(crate) fn f32_equivalent(threshold: f64) -> f64 {
    // A key that orders every non-NaN f64 as the numbers do (-0.0 just below +0.0).
    fn key(x: f64) -> i128 {
        let b = x.to_bits() as i64;
        i128::from(if b < 0 { b ^ i64::MAX } else { b })
    }
    fn value(k: i128) -> f64 {
        // Only keys between those of -inf and +inf are asked for, which fit in i64.
        let k = k as i64;
        f64::from_bits((if k < 0 { k ^ i64::MAX } else { k }) as u64)
    }
    let passes = |x: f64| (x as f32 as f64) <= threshold;
    if threshold.is_nan() || passes(f64::INFINITY) {
        return threshold.max(f64::INFINITY);
    }
    // Invariant: passes(value(lo)), !passes(value(hi)). -inf always passes (threshold is not NaN).
    let (mut lo, mut hi) = (key(f64::NEG_INFINITY), key(f64::INFINITY));
    while hi - lo > 1 {
        let mid = lo + (hi - lo) / 2;
        if passes(value(mid)) {
            lo = mid;
        } else {
            hi = mid;
        }
    }
    value(lo)
}

/// Whether numeric split (or leaf) `node` sends value `x` left; a leaf never does.
///
/// Written with `&` and `|` on booleans rather than `if`s so the compiler can select without branches: which
/// way a lane goes depends on the data and predicts badly.
#[inline(always)]
fn numeric_left(node: &Node, x: f64) -> bool {
    let split = node.flags & LEAF == 0;
    // `x <= t` is false for NaN, which then goes where the flag says.
    let left = (x <= node.value) | (x.is_nan() & (node.flags & MISSING_LEFT != 0));
    split & left
}

/// The walks of the complete layout for one depth `D` (`N = 2^D` split slots and leaves per tree): with `D` a
/// constant the steps unroll, and with `N` a power of two every index is masked into its array.
struct Walk<const D: usize, const N: usize>;

impl<const D: usize, const N: usize> Walk<D, N> {
    /// One step from position `at`, on a sided row.
    #[inline(always)]
    fn step<R: Sided + ?Sized>(splits: &[Split; N], sided: &R, at: usize) -> usize {
        let s = &splits[at & (N - 1)];
        2 * at + 1 + usize::from(sided.get(s.column) > s.threshold)
    }

    /// The leaf at the position `D` steps reached (`N - 1 ..= 2N - 2`).
    #[inline(always)]
    fn leaf(leaves: &[f64; N], at: usize) -> f64 {
        leaves[(at + 1) & (N - 1)]
    }

    /// Adds the group's trees' leaves for every row of `block` (`sided`: the block's sided rows, `width` values
    /// each): [`LANES`] rows through one tree in lockstep.
    fn add_rows(splits: &[Split], leaves: &[f64], sided: &[f64], width: usize, block: &mut [f64]) {
        let (splits, _) = splits.as_chunks::<N>();
        let (leaves, _) = leaves.as_chunks::<N>();
        for (s, l) in splits.iter().zip(leaves) {
            for (g, lanes) in block.chunks_mut(LANES).enumerate() {
                let first = g * LANES;
                if let Ok(out) = <&mut [f64; LANES]>::try_from(&mut *lanes) {
                    let lane: [&[f64]; LANES] =
                        std::array::from_fn(|j| &sided[(first + j) * width..][..width]);
                    let mut at = [0usize; LANES];
                    for _ in 0..D {
                        for (a, row) in at.iter_mut().zip(&lane) {
                            *a = Self::step(s, *row, *a);
                        }
                    }
                    for (o, &a) in out.iter_mut().zip(&at) {
                        *o += Self::leaf(l, a);
                    }
                } else {
                    for (j, o) in lanes.iter_mut().enumerate() {
                        let row = &sided[(first + j) * width..][..width];
                        let mut at = 0;
                        for _ in 0..D {
                            at = Self::step(s, row, at);
                        }
                        *o += Self::leaf(l, at);
                    }
                }
            }
        }
    }

    /// Adds the group's trees' leaves for one sided row to `m`, in tree order; a full group's trees walk in
    /// lockstep.
    fn add_row<R: Sided + ?Sized>(splits: &[Split], leaves: &[f64], row: &R, m: &mut f64) {
        let (splits, _) = splits.as_chunks::<N>();
        let (leaves, _) = leaves.as_chunks::<N>();
        let (full, rest) = splits.as_chunks::<TREE_LANES>();
        let (full_leaves, rest_leaves) = leaves.as_chunks::<TREE_LANES>();
        for (splits, leaves) in full.iter().zip(full_leaves) {
            let mut at = [0usize; TREE_LANES];
            for _ in 0..D {
                for (a, s) in at.iter_mut().zip(splits) {
                    *a = Self::step(s, row, *a);
                }
            }
            for (&a, l) in at.iter().zip(leaves) {
                *m += Self::leaf(l, a);
            }
        }
        {
            for (s, l) in rest.iter().zip(rest_leaves) {
                let mut at = 0;
                for _ in 0..D {
                    at = Self::step(s, row, at);
                }
                *m += Self::leaf(l, at);
            }
        }
    }
}

/// Calls `Walk::<D, 2^D>::$f(args)` for a complete group's depth (at most [`MAX_COMPLETE_DEPTH`], which
/// [`EnsembleBuilder::finish`] ensures).
macro_rules! walk_by_depth {
    ($depth:expr, $f:ident($($arg:expr),*)) => {
        match $depth {
            0 => Walk::<0, 1>::$f($($arg),*),
            1 => Walk::<1, 2>::$f($($arg),*),
            2 => Walk::<2, 4>::$f($($arg),*),
            3 => Walk::<3, 8>::$f($($arg),*),
            4 => Walk::<4, 16>::$f($($arg),*),
            5 => Walk::<5, 32>::$f($($arg),*),
            6 => Walk::<6, 64>::$f($($arg),*),
            7 => Walk::<7, 128>::$f($($arg),*),
            8 => Walk::<8, 256>::$f($($arg),*),
            9 => Walk::<9, 512>::$f($($arg),*),
            10 => Walk::<10, 1024>::$f($($arg),*),
            _ => unreachable!("complete groups are at most MAX_COMPLETE_DEPTH deep"),
        }
    };
}
const _: () = assert!(
    MAX_COMPLETE_DEPTH == 10,
    "walk_by_depth! covers depths 0 to 10"
);

impl Ensemble {
    /// Number of trees.
    pub(crate) fn trees(&self) -> usize {
        self.n_trees
    }
    /// Number of nodes in all trees, as written in the file.
    pub(crate) fn nodes(&self) -> usize {
        self.n_nodes
    }
    /// Bytes held by the compiled trees (both layouts and the category sets).
    pub(crate) fn bytes(&self) -> usize {
        use std::mem::size_of;
        self.splits.len() * size_of::<Split>()
            + self.leaf_values.len() * size_of::<f64>()
            + self.nodes.len() * size_of::<Node>()
            + self.roots.len() * size_of::<u32>()
            + self.depths.len() * size_of::<usize>()
            + self.groups.len() * size_of::<Group>()
            + self.bitsets.len() * size_of::<u64>()
            + self.lists.len() * size_of::<u32>()
    }

    /// Depth of tree `t` of the preorder layout, found by walking it (a loop with an explicit stack).
    fn tree_depth(&self, t: usize) -> usize {
        let mut deepest = 0;
        let mut stack = vec![(self.roots[t] as usize, 0usize)];
        while let Some((i, level)) = stack.pop() {
            let node = &self.nodes[i];
            if node.flags & LEAF != 0 {
                deepest = deepest.max(level);
            } else {
                stack.push((i + 1, level + 1));
                stack.push((node.right as usize, level + 1));
            }
        }
        deepest
    }

    /// Writes tree `root` of the preorder layout (numeric splits only, no deeper than `depth`) in the complete
    /// layout: `splits` and `leaves` have `2^depth` entries (placeholders on entry; the last split slot stays
    /// one).
    fn fill_complete(
        &self,
        root: usize,
        n_features: usize,
        depth: usize,
        splits: &mut [Split],
        leaves: &mut [f64],
    ) {
        // (preorder node, breadth-first position, level)
        let mut stack = vec![(root, 0usize, 0usize)];
        while let Some((i, pos, level)) = stack.pop() {
            let node = &self.nodes[i];
            if node.flags & LEAF != 0 {
                // Every leaf position under `pos`.
                let span = 1usize << (depth - level);
                let first = (pos + 1 - (1 << level)) * span;
                leaves[first..first + span].fill(node.value);
            } else {
                let side = if node.flags & MISSING_LEFT == 0 {
                    n_features
                } else {
                    0
                };
                splits[pos] = Split {
                    threshold: node.value,
                    column: node.feature + side as u32,
                };
                stack.push((i + 1, 2 * pos + 1, level + 1));
                stack.push((node.right as usize, 2 * pos + 2, level + 1));
            }
        }
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
        if self.splits.is_empty() {
            return self.margin_sided(row, &[][..]);
        }
        if 2 * row.len() <= SMALL_SIDED {
            let mut sided = [0.0; SMALL_SIDED];
            write_sided(row, &mut sided[..2 * row.len()]);
            return self.margin_sided(row, &sided);
        }
        SIDED.with(|cell| match cell.try_borrow_mut() {
            Ok(mut sided) => {
                sided.resize(2 * row.len(), 0.0);
                write_sided(row, &mut sided);
                self.margin_sided(row, &sided[..])
            }
            // Not reachable (nothing here calls itself), but never a panic: a buffer of its own.
            Err(_) => {
                let mut sided = vec![0.0; 2 * row.len()];
                write_sided(row, &mut sided);
                self.margin_sided(row, &sided[..])
            }
        })
    }

    /// [`Self::margin`] with the row's sided copy made.
    fn margin_sided<R: Sided + ?Sized>(&self, row: &[f64], sided: &R) -> f64 {
        // Base margin first, then the trees in file order: the summation order of the reference libraries.
        let mut m = self.base_margin;
        for group in &self.groups {
            match *group {
                Group::Complete(run) => {
                    let (splits, leaves) = self.complete(&run);
                    walk_by_depth!(run.depth, add_row(splits, leaves, sided, &mut m));
                }
                Group::Preorder { first, trees } => {
                    for &root in &self.roots[first..first + trees] {
                        m += self.leaf(root, row);
                    }
                }
            }
        }
        m
    }

    /// The split slots and leaves of a complete run.
    #[inline]
    fn complete(&self, run: &Run) -> (&[Split], &[f64]) {
        let len = run.trees << run.depth;
        (
            &self.splits[run.splits_at..][..len],
            &self.leaf_values[run.leaves_at..][..len],
        )
    }

    /// Margins of `out.len()` rows of `n` values each (shape checked by the caller), tree-major over blocks of
    /// rows. Each row's sum is formed in the same order as in [`Self::margin`], so results are bit-identical.
    pub(crate) fn margins(&self, rows: &[f64], n: usize, out: &mut [f64]) {
        let mut sided = if self.splits.is_empty() {
            Vec::new()
        } else {
            vec![0.0; BLOCK_ROWS * 2 * n]
        };
        for (b, block) in out.chunks_mut(BLOCK_ROWS).enumerate() {
            let first = b * BLOCK_ROWS;
            block.fill(self.base_margin);
            if !sided.is_empty() {
                for (j, s) in sided.chunks_exact_mut(2 * n).take(block.len()).enumerate() {
                    write_sided(&rows[(first + j) * n..][..n], s);
                }
            }
            for group in &self.groups {
                match *group {
                    Group::Complete(run) => {
                        let (splits, leaves) = self.complete(&run);
                        walk_by_depth!(run.depth, add_rows(splits, leaves, &sided, 2 * n, block));
                    }
                    Group::Preorder { first: t0, trees } => {
                        for t in t0..t0 + trees {
                            let (root, depth) = (self.roots[t], self.depths[t]);
                            for (g, lanes) in block.chunks_mut(LANES).enumerate() {
                                let row0 = first + g * LANES;
                                if let Ok(full) = <&mut [f64; LANES]>::try_from(&mut *lanes) {
                                    self.add_leaves_of_lanes(root, depth, rows, row0, n, full);
                                } else {
                                    for (k, o) in lanes.iter_mut().enumerate() {
                                        let start = (row0 + k) * n;
                                        *o += self.leaf(root, &rows[start..start + n]);
                                    }
                                }
                            }
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
    fn add_leaves_of_lanes(
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
                    numeric_left(node, x)
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
    fn leaf(&self, root: u32, row: &[f64]) -> f64 {
        let mut i = root as usize;
        loop {
            let node = &self.nodes[i];
            if node.flags & LEAF != 0 {
                return node.value;
            }
            let x = row[node.feature as usize];
            let left = if node.flags & CATEGORICAL == 0 {
                numeric_left(node, x)
            } else {
                self.categorical_left(node, x)
            };
            i = if left { i + 1 } else { node.right as usize };
        }
    }

    /// Roots of the trees of the preorder layout (all trees for [`EnsembleBuilder::preorder_only`]).
    pub(crate) fn preorder_roots(&self) -> &[u32] {
        &self.roots
    }

    /// The base margin.
    pub(crate) fn base_margin(&self) -> f64 {
        self.base_margin
    }

    /// Children of node `i` of the preorder layout, `None` for a leaf.
    #[inline]
    pub(crate) fn children(&self, i: usize) -> Option<(usize, usize)> {
        let node = &self.nodes[i];
        (node.flags & LEAF == 0).then_some((i + 1, node.right as usize))
    }

    /// Value of leaf `i` of the preorder layout (a split's threshold otherwise: ask [`Self::children`] first).
    #[inline]
    pub(crate) fn value(&self, i: usize) -> f64 {
        self.nodes[i].value
    }

    /// Node `i` of the preorder layout seen from row `row`: a leaf's value, or a split's feature, children and
    /// the side the row takes, decided by the same tests as scoring.
    #[inline]
    pub(crate) fn step(&self, i: usize, row: &[f64]) -> Step {
        let node = &self.nodes[i];
        if node.flags & LEAF != 0 {
            return Step::Leaf(node.value);
        }
        let x = row[node.feature as usize];
        let goes_left = if node.flags & CATEGORICAL == 0 {
            numeric_left(node, x)
        } else {
            self.categorical_left(node, x)
        };
        Step::Split {
            feature: node.feature as usize,
            left: i + 1,
            right: node.right as usize,
            goes_left,
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
    fn infinite_thresholds_follow_the_comparison_as_written() {
        // A file may write `"inf"` or `"-inf"` as a threshold (scikit-learn's HistGradientBoosting splits missing
        // from non-missing with `x <= +inf`). Such splits leave the complete layout; every op, threshold, missing
        // side and precision must still answer as `value op threshold` does on the value (rounded to f32 first in
        // float32 mode), with NaN to the missing side.
        for t in [f64::INFINITY, f64::NEG_INFINITY] {
            for le in [true, false] {
                for missing in [Side::Left, Side::Right] {
                    for float32 in [false, true] {
                        let mut b = EnsembleBuilder::new(0.0, float32, vec![0], 3);
                        b.start_tree().unwrap();
                        b.note_depth(1);
                        b.push_numeric(0, le, t, missing);
                        b.push_leaf(-1.0).unwrap();
                        b.set_right(0, 2);
                        b.push_leaf(1.0).unwrap();
                        let e = b.finish();
                        let xs = [
                            0.0,
                            -0.0,
                            1.0e300,
                            -1.0e300,
                            f64::MAX,
                            -f64::MAX,
                            f64::INFINITY,
                            f64::NEG_INFINITY,
                            f64::NAN,
                        ];
                        for x in xs {
                            let r = if float32 { x as f32 as f64 } else { x };
                            let left = if x.is_nan() {
                                missing == Side::Left
                            } else if le {
                                r <= t
                            } else {
                                r < t
                            };
                            let want = if left { -1.0 } else { 1.0 };
                            let what = format!(
                                "t={t} le={le} missing={missing:?} float32={float32} x={x}"
                            );
                            assert_eq!(e.margin(&[x]), want, "{what}");
                            let mut out = [0.0; LANES];
                            e.margins(&[x; LANES], 1, &mut out);
                            assert_eq!(out, [want; LANES], "batch {what}");
                        }
                    }
                }
            }
        }
    }

    /// `count` trees of depth 2 over one feature, leaves numbered so each row's margin tells which leaves it hit;
    /// tree 3 (and every 8th after it) is a single leaf and tree 5 (every 8th after) has a shallow left leaf,
    /// padded in the complete layout.
    fn numeric_trees(count: u32, categorical_in_tree: Option<u32>) -> Ensemble {
        let mut b = EnsembleBuilder::new(0.5, false, vec![0, 4], 64);
        for t in 0..count {
            b.start_tree().unwrap();
            let v = f64::from(t) * 16.0;
            if t % 8 == 3 {
                b.push_leaf(v).unwrap();
                continue;
            }
            let root = b.next_index().unwrap();
            if Some(t) == categorical_in_tree {
                b.push_categorical(1, &[1, 2], Side::Left, Side::Right)
                    .unwrap();
            } else {
                b.push_numeric(0, true, 0.0, Side::Left);
            }
            if t % 8 == 5 {
                b.push_leaf(v + 1.0).unwrap();
            } else {
                let left = b.next_index().unwrap();
                b.push_numeric(0, false, -1.0, Side::Right);
                b.push_leaf(v + 2.0).unwrap();
                let r = b.next_index().unwrap();
                b.set_right(left, r);
                b.push_leaf(v + 3.0).unwrap();
            }
            let right = b.next_index().unwrap();
            b.set_right(root, right);
            b.push_numeric(0, true, 1.0, Side::Right);
            b.push_leaf(v + 4.0).unwrap();
            let r = b.next_index().unwrap();
            b.set_right(right, r);
            b.push_leaf(v + 5.0).unwrap();
        }
        b.finish()
    }

    #[test]
    fn layouts_agree() {
        // All numeric: one group in the complete layout. With a categorical root in tree 0 (feature 1 is
        // category 1 in every row, which is in its left set): the preorder layout, and the same answers on rows
        // that go left at that root anyway (x <= 0 or missing). 19 numeric trees: one complete run, walked 16
        // trees at a time for one row, then 3 alone.
        let complete = numeric_trees(8, None);
        let preorder = numeric_trees(8, Some(0));
        let run = numeric_trees(19, None);
        assert!(matches!(
            complete.groups[..],
            [Group::Complete(Run {
                trees: 8,
                depth: 2,
                ..
            })]
        ));
        assert!(matches!(
            preorder.groups[..],
            [Group::Preorder { trees: 8, .. }]
        ));
        assert!(matches!(
            run.groups[..],
            [Group::Complete(Run {
                trees: 19,
                depth: 2,
                ..
            })]
        ));
        let xs = [-2.0, -1.0, -0.5, 0.0, 0.5, 1.0, 2.0, f64::NAN];
        let mut rows = Vec::new();
        for (i, &x) in xs.iter().cycle().take(21).enumerate() {
            rows.extend_from_slice(&[x, 1.0]);
            // Leaves by hand: tree t adds 16t plus its leaf number.
            let goes_left = x <= 0.0 || x.is_nan();
            let leaf = |t: u32| -> f64 {
                let v = f64::from(t) * 16.0;
                match t % 8 {
                    3 => v,
                    5 if goes_left => v + 1.0,
                    _ if goes_left => v + if x < -1.0 { 2.0 } else { 3.0 },
                    _ => v + if x <= 1.0 { 4.0 } else { 5.0 },
                }
            };
            let want = (0..8).fold(0.5, |m, t| m + leaf(t));
            assert_eq!(complete.margin(&[x, 1.0]), want, "row {i} x={x}");
            if goes_left {
                assert_eq!(preorder.margin(&[x, 1.0]), want, "row {i} x={x}");
            }
            let want = (0..19).fold(0.5, |m, t| m + leaf(t));
            assert_eq!(run.margin(&[x, 1.0]), want, "row {i} x={x}");
        }
        for e in [&complete, &preorder, &run] {
            let mut batch = vec![0.0; 21];
            e.margins(&rows, 2, &mut batch);
            for (r, row) in rows.chunks(2).enumerate() {
                assert_eq!(batch[r], e.margin(row), "batch row {r}");
            }
        }
        // A padded tree costs its complete size; the counts stay those of the file.
        assert_eq!(complete.nodes(), preorder.nodes());
        assert_eq!(complete.splits.len(), 8 * 4);
        assert_eq!(complete.leaf_values.len(), 8 * 4);
    }

    #[test]
    fn f32_equivalent_threshold_agrees_with_rounding() {
        // For thresholds at, between and around f32 values (the midpoint of two f32 neighbours is where rounding
        // changes, ties to even), the f64 test on the moved threshold answers as the test on the rounded value.
        let mut thresholds = vec![
            0.0,
            -0.0,
            0.1,
            -0.1,
            1.0,
            100_000_001.0,
            f64::MAX,
            -f64::MAX,
            f64::INFINITY,
            f64::NEG_INFINITY,
            f32::MAX as f64,
            (f32::MAX as f64) * 1.5,
            f32::MIN_POSITIVE as f64,
            1e-45,
            1e-300,
        ];
        for t in thresholds.clone() {
            let f = t as f32;
            let up = f64::from(f.next_up());
            let mid = (f64::from(f) + up) / 2.0;
            thresholds.extend([
                mid,
                mid.next_up(),
                mid.next_down(),
                t.next_up(),
                t.next_down(),
            ]);
        }
        for t in thresholds {
            let big_t = f32_equivalent(t);
            let mut xs = vec![
                big_t,
                big_t.next_up(),
                big_t.next_down(),
                t,
                0.0,
                -0.0,
                f64::INFINITY,
            ];
            xs.push(f64::NEG_INFINITY);
            let f = t as f32;
            for g in [f.next_down(), f, f.next_up()] {
                let up = f64::from(g.next_up());
                let mid = (f64::from(g) + up) / 2.0;
                xs.extend([f64::from(g), mid, mid.next_up(), mid.next_down()]);
            }
            for x in xs.into_iter().filter(|x| !x.is_nan()) {
                assert_eq!(
                    x <= big_t,
                    (x as f32 as f64) <= t,
                    "t={t:e} moved to {big_t:e}, x={x:e}"
                );
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
