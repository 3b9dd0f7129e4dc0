//! How the 2^p coalition values of a game are condensed into one number per
//! player.

/// The summary choices, as the API names them.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Summary {
    /// Shapley values: efficient, sum to `v(all) - v(none)`.
    Shapley,
    /// Raw Banzhaf values: the mean marginal contribution over all
    /// coalitions of the other players (weight `1/2^(p-1)`), not normalised.
    Banzhaf,
    /// `v(all) - v(all ∖ {i})`.
    LeaveOneOut,
    /// `v({i}) - v(∅)`.
    IncludeOne,
    /// Coefficients of a weighted least-squares fit of `v(S)` on the
    /// coalition indicators, constrained to sum to `v(all) - v(none)`.
    LinearFit(Kernel),
    /// The smallest set of players, chosen greedily, whose inclusion reaches
    /// `fraction` of `v(all) - v(none)`.
    Selection { fraction: f64 },
}

/// Coalition weights of a [`Summary::LinearFit`].
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Kernel {
    /// `(p - 1) / (C(p, s) s (p - s))`: the fit then equals the Shapley
    /// values ("A unified approach to interpreting model predictions",
    /// NeurIPS 2017).
    Shapley,
    /// `exp(-|s - p/2| / width)` on coalition size `s`: weighs coalitions of
    /// middling size most, a smooth choice between include-one and
    /// leave-one-out.
    Exponential { width: f64 },
}

impl Summary {
    pub fn name(&self) -> &'static str {
        match self {
            Summary::Shapley => "SHAPLEY",
            Summary::Banzhaf => "BANZHAF",
            Summary::LeaveOneOut => "LEAVE_ONE_OUT",
            Summary::IncludeOne => "INCLUDE_ONE",
            Summary::LinearFit(_) => "LINEAR_FIT",
            Summary::Selection { .. } => "SELECTION",
        }
    }

    /// Whether the values sum to `v(all) - v(none)` by construction.
    pub fn is_efficient(&self) -> bool {
        matches!(self, Summary::Shapley | Summary::LinearFit(_))
    }
}
