//! INDEPENDENT removal: each missing feature is drawn on its own from its
//! background marginal (a uniformly random background row per feature per
//! draw), which breaks the dependence between missing features.

use ndarray::{ArrayView1, ArrayView2, ArrayViewMut2};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;

use super::marginal::require_rows;
use super::{Noise, Removal};
use crate::engine::coalition::Coalition;
use crate::engine::error::{EngineError, Result};

#[derive(Debug, Clone)]
pub struct Independent<'a> {
    background: ArrayView2<'a, f64>,
    draws: usize,
    seed: u64,
}

impl<'a> Independent<'a> {
    /// `draws` rows per coalition; `seed` fixes every draw.
    pub fn try_new(
        background: ArrayView2<'a, f64>,
        draws: usize,
        seed: u64,
    ) -> Result<Independent<'a>> {
        require_rows(background, 1, "INDEPENDENT removal")?;
        if draws == 0 {
            return Err(EngineError::new("draws", "must be at least 1"));
        }
        Ok(Independent {
            background,
            draws,
            seed,
        })
    }
}

impl Removal for Independent<'_> {
    fn rows_per_coalition(&self) -> usize {
        self.draws
    }

    fn noise(&self) -> Noise {
        Noise::IndependentDraws
    }

    fn fill(
        &self,
        x: ArrayView1<'_, f64>,
        present: &[bool],
        coalition: Coalition,
        mut rows: ArrayViewMut2<'_, f64>,
        weights: &mut [f64],
    ) {
        debug_assert_eq!(rows.ncols(), self.background.ncols());
        let mut rng = coalition_rng(self.seed, coalition);
        let background_rows = self.background.nrows();
        for mut row in rows.rows_mut() {
            for (j, ((slot, &own), &keep)) in row.iter_mut().zip(x).zip(present).enumerate() {
                *slot = if keep {
                    own
                } else {
                    self.background[[rng.random_range(0..background_rows), j]]
                };
            }
        }
        weights.fill(1.0 / self.draws as f64);
    }
}

/// The generator for one coalition's draws: the same (seed, coalition) always
/// gives the same stream, whatever order coalitions are evaluated in, so the
/// per-request cache and reruns agree bit for bit.
pub(super) fn coalition_rng(seed: u64, coalition: Coalition) -> ChaCha8Rng {
    let bits = coalition.bits();
    let mixed = splitmix64(splitmix64(splitmix64(seed) ^ bits as u64) ^ (bits >> 64) as u64);
    ChaCha8Rng::seed_from_u64(mixed)
}

/// The SplitMix64 finaliser ("Fast splittable pseudorandom number
/// generators", OOPSLA 2014): a cheap bijective mix of 64 bits.
fn splitmix64(value: u64) -> u64 {
    let mut z = value.wrapping_add(0x9e37_79b9_7f4a_7c15);
    z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
    z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
    z ^ (z >> 31)
}

#[cfg(test)]
mod tests {
    use super::*;
    use ndarray::{Array2, array};

    #[test]
    fn splitmix_matches_its_reference_output() {
        // First outputs of SplitMix64 seeded with 0, as printed by the
        // reference C implementation (value from memory):
        // 0xe220a8397b1dcdaf, 0x6e789e6aa1b965f4.
        assert_eq!(splitmix64(0), 0xe220_a839_7b1d_cdaf);
        assert_eq!(splitmix64(0x9e37_79b9_7f4a_7c15), 0x6e78_9e6a_a1b9_65f4);
    }

    #[test]
    fn missing_values_come_from_their_own_column_and_present_ones_from_x() {
        // Each missing feature's value must be one of that feature's
        // background values (definition of independent removal; common
        // practice, no source).
        let background = array![[1.0, 10.0, 100.0], [2.0, 20.0, 200.0], [3.0, 30.0, 300.0]];
        let removal = Independent::try_new(background.view(), 50, 9).unwrap();
        let x = array![-1.0, -2.0, -3.0];
        let mut rows = Array2::zeros((50, 3));
        let mut weights = vec![0.0; 50];
        removal.fill(
            x.view(),
            &[false, true, false],
            Coalition::singleton(1),
            rows.view_mut(),
            &mut weights,
        );
        let mut mixed_rows = 0;
        for row in rows.rows() {
            assert_eq!(row[1], -2.0);
            assert!(background.column(0).iter().any(|v| *v == row[0]));
            assert!(background.column(2).iter().any(|v| *v == row[2]));
            // Rows whose two missing values come from different background
            // rows show the draws are per feature, not per row.
            if row[2] != row[0] * 100.0 {
                mixed_rows += 1;
            }
        }
        assert!(mixed_rows > 0);
        assert!(weights.iter().all(|w| *w == 1.0 / 50.0));
    }

    #[test]
    fn zero_draws_are_refused() {
        let background = array![[1.0]];
        assert_eq!(
            Independent::try_new(background.view(), 0, 1)
                .unwrap_err()
                .field,
            "draws"
        );
    }
}
