//! Attributions → principal reasons: the players that pushed a decision the
//! adverse way most, each with its reason statement and how sure the
//! estimate is of its sign.
//!
//! At most four are listed by default: the commentary to Regulation B says
//! more than four reasons is not likely to be helpful (12 CFR part 1002,
//! Supplement I, comment 9(b)(2)-1). A reason is only given for a player the
//! model actually used (a non-zero attribution), never as a catch-all
//! (same commentary; consumer-protection circulars 2022-03 and 2023-03).

/// The default number of reasons listed.
pub const DEFAULT_REASONS: usize = 4;

/// Std errors a contribution must clear to count as confidently adverse.
const CONFIDENT_STD_ERRORS: f64 = 2.0;

#[derive(Debug, Clone, PartialEq)]
pub struct Reason {
    pub player: usize,
    pub statement: String,
    /// The attribution, in the adverse direction (always > 0).
    pub weight: f64,
    /// Whether the contribution is at least two std errors from zero; exact
    /// attributions always are.
    pub confident: bool,
}

/// The players whose attributions pushed the value down (for a score where
/// higher is better), largest first, at most `limit`. `statements[i]` is
/// player `i`'s reason statement; players with an empty statement are never
/// listed.
pub fn principal_reasons(
    values: &[f64],
    std_errors: &[f64],
    statements: &[String],
    limit: usize,
) -> Vec<Reason> {
    let mut adverse: Vec<Reason> = values
        .iter()
        .enumerate()
        .filter(|&(i, v)| *v < 0.0 && !statements[i].is_empty())
        .map(|(i, v)| Reason {
            player: i,
            statement: statements[i].clone(),
            weight: -v,
            confident: -v > CONFIDENT_STD_ERRORS * std_errors[i],
        })
        .collect();
    adverse.sort_by(|a, b| b.weight.total_cmp(&a.weight).then(a.player.cmp(&b.player)));
    adverse.truncate(limit);
    adverse
}

#[cfg(test)]
mod tests {
    use super::*;

    fn statements(n: usize) -> Vec<String> {
        (0..n).map(|i| format!("reason {i}")).collect()
    }

    #[test]
    fn at_most_four_adverse_reasons_largest_first() {
        // Regulation B commentary 9(b)(2)-1: more than four is not likely helpful.
        let values = [-0.1, 0.5, -0.4, -0.05, -0.3, -0.2, 0.0];
        let reasons = principal_reasons(&values, &[0.0; 7], &statements(7), DEFAULT_REASONS);
        let players: Vec<usize> = reasons.iter().map(|r| r.player).collect();
        assert_eq!(players, vec![2, 4, 5, 0]);
        assert!(reasons.iter().all(|r| r.confident));
    }

    #[test]
    fn unused_and_favourable_players_are_never_reasons() {
        // Reasons relate to factors the model actually scored (circulars
        // 2022-03 and 2023-03): zero or positive attributions give none.
        let reasons = principal_reasons(&[0.0, 0.2, -0.1], &[0.0, 0.0, 0.08], &statements(3), 4);
        assert_eq!(reasons.len(), 1);
        assert_eq!(reasons[0].player, 2);
        assert!(
            !reasons[0].confident,
            "0.1 is within two std errors of 0.08"
        );
    }
}
