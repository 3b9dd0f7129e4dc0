//! Coalitions of players as fixed 128-bit sets, with the enumeration and
//! sampling helpers the estimators share.

use rand::Rng;

/// Most players any estimator accepts; one bit per player in a `u128`.
pub const MAX_PLAYERS: usize = 128;

/// A set of players, player `i` being bit `i`. Copy, hashable and ordered so
/// it can key the per-request cache.
#[derive(Clone, Copy, PartialEq, Eq, Hash, PartialOrd, Ord, Default)]
pub struct Coalition(u128);

impl Coalition {
    pub const EMPTY: Coalition = Coalition(0);

    /// All of players `0..players`.
    pub fn full(players: usize) -> Coalition {
        debug_assert!(players <= MAX_PLAYERS);
        if players == MAX_PLAYERS {
            Coalition(u128::MAX)
        } else {
            Coalition((1u128 << players) - 1)
        }
    }

    pub fn from_bits(bits: u128) -> Coalition {
        Coalition(bits)
    }

    pub fn bits(self) -> u128 {
        self.0
    }

    pub fn singleton(player: usize) -> Coalition {
        Coalition(1u128 << player)
    }

    pub fn contains(self, player: usize) -> bool {
        self.0 >> player & 1 == 1
    }

    pub fn with(self, player: usize) -> Coalition {
        Coalition(self.0 | 1u128 << player)
    }

    pub fn without(self, player: usize) -> Coalition {
        Coalition(self.0 & !(1u128 << player))
    }

    pub fn len(self) -> usize {
        self.0.count_ones() as usize
    }

    pub fn is_empty(self) -> bool {
        self.0 == 0
    }

    /// The players of `0..players` that are not in this coalition.
    pub fn complement(self, players: usize) -> Coalition {
        Coalition(!self.0 & Coalition::full(players).0)
    }

    pub fn union(self, other: Coalition) -> Coalition {
        Coalition(self.0 | other.0)
    }

    /// Members in increasing order.
    pub fn members(self) -> impl Iterator<Item = usize> {
        let mut rest = self.0;
        std::iter::from_fn(move || {
            if rest == 0 {
                return None;
            }
            let player = rest.trailing_zeros() as usize;
            rest &= rest - 1;
            Some(player)
        })
    }
}

impl std::fmt::Debug for Coalition {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_set().entries(self.members()).finish()
    }
}

/// Every coalition of `players` players (2^players of them), in binary
/// counting order. Callers check the exact-enumeration cap before calling.
pub fn all_coalitions(players: usize) -> impl Iterator<Item = Coalition> {
    assert!(
        players < 64,
        "enumeration of 2^{players} coalitions is not feasible"
    );
    (0u64..1u64 << players).map(|bits| Coalition(bits as u128))
}

/// A uniformly random coalition of exactly `size` of `players` players
/// (partial Fisher–Yates over the player indices; `scratch` avoids a per-call
/// allocation).
pub fn random_of_size(
    players: usize,
    size: usize,
    scratch: &mut Vec<usize>,
    rng: &mut impl Rng,
) -> Coalition {
    scratch.clear();
    scratch.extend(0..players);
    let mut coalition = Coalition::EMPTY;
    for k in 0..size {
        let j = rng.random_range(k..players);
        scratch.swap(k, j);
        coalition = coalition.with(scratch[k]);
    }
    coalition
}

/// A uniformly random permutation of `0..players`, written into `order`.
pub fn random_permutation(players: usize, order: &mut Vec<usize>, rng: &mut impl Rng) {
    order.clear();
    order.extend(0..players);
    for k in (1..players).rev() {
        let j = rng.random_range(0..=k);
        order.swap(k, j);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn set_operations_agree_with_a_bool_vector() {
        let c = Coalition::EMPTY.with(0).with(5).with(127);
        assert_eq!(c.members().collect::<Vec<_>>(), vec![0, 5, 127]);
        assert_eq!(c.len(), 3);
        assert!(c.contains(127) && !c.contains(1));
        assert_eq!(c.without(5).members().collect::<Vec<_>>(), vec![0, 127]);
        assert_eq!(Coalition::full(128).len(), 128);
        assert_eq!(c.complement(128).len(), 125);
        assert_eq!(all_coalitions(4).count(), 16);
    }

    #[test]
    fn random_subsets_have_the_requested_size() {
        let mut rng = rand_chacha::ChaCha8Rng::seed_from_u64(7);
        let mut scratch = Vec::new();
        for size in 0..=10 {
            assert_eq!(random_of_size(10, size, &mut scratch, &mut rng).len(), size);
        }
    }

    use rand::SeedableRng;
}
