//! A grown tree: its nodes, and the branch-free walks that take a row to
//! its leaf, by bins for rows of the training matrix and by raw values for
//! any other row.

/// One tree node. A leaf's two children are the leaf itself, so every row
/// reaches its leaf in exactly the tree's `depth` steps with no test for
/// leaves: the walk is branch-free, and a group of rows can walk in
/// lockstep.
#[derive(Debug, Clone, Copy)]
pub(super) struct Node {
    pub(super) feature: u32,
    /// Rows with bin <= `bin` (raw value <= `threshold`) go left.
    pub(super) bin: u8,
    pub(super) threshold: f64,
    pub(super) left: u32,
    pub(super) right: u32,
    pub(super) value: f64,
}

impl Node {
    pub(super) fn leaf(id: usize) -> Self {
        Self {
            feature: 0,
            bin: u8::MAX,
            threshold: f64::INFINITY,
            left: id as u32,
            right: id as u32,
            value: 0.0,
        }
    }
}

/// Rows walked together by [`Tree::add_leaf_values`].
const LANES: usize = 8;

#[derive(Debug, Clone, Default)]
pub(super) struct Tree {
    pub(super) nodes: Vec<Node>,
    /// Levels of splits; a row's walk takes this many steps.
    pub(super) depth: usize,
}

impl Tree {
    #[inline]
    fn step_bins(&self, i: usize, bins: &[u8]) -> usize {
        let n = &self.nodes[i];
        (if bins[n.feature as usize] <= n.bin {
            n.left
        } else {
            n.right
        }) as usize
    }

    #[inline]
    pub(super) fn leaf_of_bins(&self, bins: &[u8]) -> f64 {
        let mut i = 0usize;
        for _ in 0..self.depth {
            i = self.step_bins(i, bins);
        }
        self.nodes[i].value
    }

    #[inline]
    pub(super) fn leaf_of_values(&self, x: impl Fn(usize) -> f64) -> f64 {
        let mut i = 0usize;
        for _ in 0..self.depth {
            let n = &self.nodes[i];
            i = if x(n.feature as usize) <= n.threshold {
                n.left
            } else {
                n.right
            } as usize;
        }
        self.nodes[i].value
    }

    /// Adds each row's leaf value to its running prediction: row `r` of
    /// `rows` has its bins at `bins[r * d..]` and its prediction at
    /// `out[r]`. Rows walk in groups of [`LANES`], one level at a time, so
    /// the loads along one row's path overlap with the others' instead of
    /// waiting on each other.
    pub(super) fn add_leaf_values(&self, bins: &[u8], d: usize, rows: &[u32], out: &mut [f64]) {
        let mut groups = rows.chunks_exact(LANES);
        for group in &mut groups {
            let mut at = [0usize; LANES];
            for _ in 0..self.depth {
                for (a, &r) in at.iter_mut().zip(group) {
                    let r = r as usize;
                    *a = self.step_bins(*a, &bins[r * d..r * d + d]);
                }
            }
            for (&a, &r) in at.iter().zip(group) {
                out[r as usize] += self.nodes[a].value;
            }
        }
        for &r in groups.remainder() {
            let r = r as usize;
            out[r] += self.leaf_of_bins(&bins[r * d..r * d + d]);
        }
    }
}
