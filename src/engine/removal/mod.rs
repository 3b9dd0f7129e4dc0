//! How a model is evaluated with features missing: the model always needs a
//! full row, so each removal kind fills the missing features of a coalition
//! with its own rows and weights. What depends only on the background
//! ([`GaussianFit`], [`inverse_scales`], [`background_mean`]) is computed
//! once per registration and borrowed by the per-request removals.

mod fixed;
mod gaussian;
mod independent;
mod marginal;
mod neighbors;

pub use fixed::{Fixed, background_mean};
pub use gaussian::{ConditionalGaussian, GaussianFit};
pub use independent::Independent;
pub use marginal::Marginal;
pub use neighbors::{ConditionalNeighbors, inverse_scales};

use ndarray::{ArrayView1, ArrayViewMut2};

use super::coalition::Coalition;

/// The removal choices, as the API names them.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub enum RemovalKind {
    Fixed,
    Marginal,
    Independent,
    ConditionalGaussian,
    ConditionalNeighbors,
}

/// How a removal's rows for one coalition vary with its seed, which decides
/// how the spread of their values becomes the variance of the coalition
/// value.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Noise {
    /// The rows are fixed (fixed values, background rows, neighbour
    /// weights): the value has no variance.
    None,
    /// Equally weighted independent draws.
    IndependentDraws,
    /// Equally weighted antithetic pairs: rows `2k` and `2k + 1` are
    /// dependent, the pairs independent.
    AntitheticPairs,
}

/// Fills the rows that stand for "the instance with only these features
/// present". Implementations borrow what was derived from the background
/// and write straight into the caller's rows: no allocation per row.
pub trait Removal: Send + Sync {
    /// Rows (and weights) one coalition costs.
    fn rows_per_coalition(&self) -> usize;

    /// How the rows of one coalition are drawn.
    fn noise(&self) -> Noise {
        Noise::None
    }

    /// Writes `rows_per_coalition()` rows into `rows` (shape `rows × features`):
    /// `x[j]` where `present[j]`, a fill-in value otherwise; and one weight
    /// per row into `weights` (non-negative, summing to 1). `coalition` is
    /// the player coalition behind `present`; random removals seed their
    /// draws from it so the same coalition always gets the same rows.
    fn fill(
        &self,
        x: ArrayView1<'_, f64>,
        present: &[bool],
        coalition: Coalition,
        rows: ArrayViewMut2<'_, f64>,
        weights: &mut [f64],
    );
}
