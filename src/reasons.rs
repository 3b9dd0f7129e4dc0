//! Attributions → principal reasons: the players that pushed a decision
//! toward its unfavourable side most, in the decision's direction, each
//! with its reason statement and the probability that it belongs among the
//! listed ones, and for the whole list the probability that it is the right
//! set.
//!
//! At most four are listed by default: the commentary to Regulation B says
//! more than four reasons is not likely to be helpful (12 CFR part 1002,
//! Supplement I, comment 9(b)(2)-1). A reason is only given for a player the
//! model actually used (a non-zero attribution) and that has a statement,
//! never as a catch-all (same commentary; consumer-protection circulars
//! 2022-03 and 2023-03). Players sharing a reason code give one reason.

use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, StandardNormal};

/// The default number of reasons listed.
pub const DEFAULT_REASONS: usize = 4;

/// The default probability the listed set must reach to be called certain.
pub const DEFAULT_LEVEL: f64 = 0.95;

/// Std errors a contribution must clear to count as confidently adverse.
const CONFIDENT_STD_ERRORS: f64 = 2.0;

/// Draws of the normal approximation behind the list's probabilities: the
/// Monte Carlo error of a probability near 0.95 is then about 0.003.
const DRAWS: usize = 4096;

/// Which way of the score is good for the person decided about.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Favourable {
    /// A reliability or approval score.
    Higher,
    /// A risk score: probability of default, of late rent, of fraud.
    Lower,
}

/// The space the decision is taken in.
#[derive(Debug, Clone, Copy, PartialEq, Eq, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Space {
    /// The raw output (margin).
    Output,
    /// The probability of a logistic model.
    Probability,
}

/// How a registered model's decision is taken.
#[derive(Debug, Clone, Copy, PartialEq, serde::Serialize, serde::Deserialize)]
pub struct Decision {
    pub favourable: Favourable,
    /// `None`: the space the request's target names.
    pub space: Option<Space>,
    /// The cut-off in that space, if there is one.
    pub threshold: Option<f64>,
}

impl Default for Decision {
    /// A score where higher is favourable, taken in the request's space.
    fn default() -> Decision {
        Decision {
            favourable: Favourable::Higher,
            space: None,
            threshold: None,
        }
    }
}

/// Where the instance's value falls against the decision's threshold.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Outcome {
    /// No threshold, or the value is not in the decision's space.
    Unknown,
    Favourable,
    Adverse,
}

impl Decision {
    /// The outcome of `value` (in the decision's space): at the threshold
    /// or beyond it in the favourable direction is favourable.
    pub fn outcome(&self, value: f64) -> Outcome {
        match self.threshold {
            None => Outcome::Unknown,
            Some(t) => {
                let favourable = match self.favourable {
                    Favourable::Higher => value >= t,
                    Favourable::Lower => value <= t,
                };
                if favourable {
                    Outcome::Favourable
                } else {
                    Outcome::Adverse
                }
            }
        }
    }
}

/// One listed reason.
#[derive(Debug, Clone, PartialEq)]
pub struct Reason {
    /// The players it stands for (several when they share a reason code),
    /// in player order.
    pub players: Vec<usize>,
    pub code: String,
    pub statement: String,
    /// How far they pushed the value the unfavourable way (always > 0).
    pub weight: f64,
    /// Whether that push is at least two std errors from zero.
    pub confident: bool,
    /// The probability, under the normal approximation of the estimates,
    /// that this reason belongs among the listed ones (1 for exact answers).
    pub in_list_probability: f64,
}

/// The listed reasons and how sure the list is.
#[derive(Debug, Clone, PartialEq)]
pub struct Reasons {
    pub reasons: Vec<Reason>,
    /// The probability that the listed set is the set of the top reasons.
    pub set_probability: f64,
    /// Whether `set_probability` reaches the requested level.
    pub certain: bool,
}

/// What the reasons are computed from.
pub struct Attributions<'a> {
    pub values: &'a [f64],
    pub std_errors: &'a [f64],
    /// Per player; empty: none.
    pub codes: &'a [String],
    pub statements: &'a [String],
}

/// A candidate reason: a player with a statement, or the players sharing a
/// reason code.
struct Unit {
    players: Vec<usize>,
}

/// The reasons of `attributions` where a positive `sign × value` is
/// adverse: at most `limit`, largest push first (ties in player order),
/// with their probabilities under the normal approximation (players' errors
/// taken as independent), drawn with `seed` so a seeded answer repeats.
pub fn principal_reasons(
    attributions: &Attributions<'_>,
    sign: f64,
    limit: usize,
    level: f64,
    seed: u64,
) -> Reasons {
    let Attributions {
        values,
        std_errors,
        codes,
        statements,
    } = *attributions;
    let units: Vec<Unit> = self::units(codes, statements)
        .into_iter()
        .map(|players| Unit { players })
        .collect();
    let weight = |unit: &Unit, draw: &dyn Fn(usize) -> f64| -> f64 {
        unit.players.iter().map(|&p| sign * draw(p)).sum()
    };
    let listed = top(&units, |u| weight(u, &|p| values[p]), limit);
    let noisy = units
        .iter()
        .any(|u| u.players.iter().any(|&p| std_errors[p] > 0.0));
    let (in_list, set_probability) = if noisy {
        // Its own stream ("reasons" in ASCII), apart from the estimator's.
        let mut rng = ChaCha8Rng::seed_from_u64(seed ^ 0x0072_6561_736f_6e73);
        let mut counts = vec![0usize; units.len()];
        let mut same = 0usize;
        let mut drawn = vec![0.0; values.len()];
        let mut expected = listed.clone();
        expected.sort_unstable();
        for _ in 0..DRAWS {
            for (p, slot) in drawn.iter_mut().enumerate() {
                let z: f64 = StandardNormal.sample(&mut rng);
                *slot = values[p] + std_errors[p] * z;
            }
            let mut chosen = top(&units, |u| weight(u, &|p| drawn[p]), limit);
            for &u in &chosen {
                counts[u] += 1;
            }
            chosen.sort_unstable();
            same += usize::from(chosen == expected);
        }
        (
            counts
                .iter()
                .map(|&c| c as f64 / DRAWS as f64)
                .collect::<Vec<_>>(),
            same as f64 / DRAWS as f64,
        )
    } else {
        (vec![1.0; units.len()], 1.0)
    };
    let reasons = listed
        .iter()
        .map(|&u| {
            let unit = &units[u];
            let first = unit.players[0];
            let weight = weight(unit, &|p| values[p]);
            let spread = unit
                .players
                .iter()
                .map(|&p| std_errors[p].powi(2))
                .sum::<f64>()
                .sqrt();
            Reason {
                players: unit.players.clone(),
                code: codes[first].clone(),
                statement: statements[first].clone(),
                weight,
                confident: weight > CONFIDENT_STD_ERRORS * spread,
                in_list_probability: in_list[u],
            }
        })
        .collect();
    Reasons {
        reasons,
        set_probability,
        certain: set_probability >= level,
    }
}

/// The candidate reasons, each as its players in player order: every player
/// with a statement, those sharing a non-empty reason code together, in the
/// order of their first player.
pub fn units(codes: &[String], statements: &[String]) -> Vec<Vec<usize>> {
    let mut units: Vec<Vec<usize>> = Vec::new();
    let mut by_code: std::collections::HashMap<&str, usize> = Default::default();
    for player in 0..statements.len() {
        if statements[player].is_empty() {
            continue;
        }
        let code = codes[player].as_str();
        match by_code.get(code) {
            Some(&unit) if !code.is_empty() => units[unit].push(player),
            _ => {
                if !code.is_empty() {
                    by_code.insert(code, units.len());
                }
                units.push(vec![player]);
            }
        }
    }
    units
}

/// The indices of the units with a positive weight, largest first (ties in
/// order), at most `limit`.
fn top(units: &[Unit], weight: impl Fn(&Unit) -> f64, limit: usize) -> Vec<usize> {
    let mut scored: Vec<(usize, f64)> = units
        .iter()
        .enumerate()
        .map(|(i, u)| (i, weight(u)))
        .filter(|(_, w)| *w > 0.0)
        .collect();
    scored.sort_by(|a, b| b.1.total_cmp(&a.1).then(a.0.cmp(&b.0)));
    scored.truncate(limit);
    scored.into_iter().map(|(i, _)| i).collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    fn statements(n: usize) -> Vec<String> {
        (0..n).map(|i| format!("reason {i}")).collect()
    }

    fn exact(values: &[f64], sign: f64, limit: usize) -> Reasons {
        let n = values.len();
        let zeros = vec![0.0; n];
        let codes = vec![String::new(); n];
        let statements = statements(n);
        principal_reasons(
            &Attributions {
                values,
                std_errors: &zeros,
                codes: &codes,
                statements: &statements,
            },
            sign,
            limit,
            DEFAULT_LEVEL,
            0,
        )
    }

    fn players(reasons: &Reasons) -> Vec<usize> {
        reasons.reasons.iter().map(|r| r.players[0]).collect()
    }

    #[test]
    fn at_most_four_adverse_reasons_largest_first() {
        // Regulation B commentary 9(b)(2)-1: more than four is not likely helpful.
        let values = [-0.1, 0.5, -0.4, -0.05, -0.3, -0.2, 0.0];
        let reasons = exact(&values, -1.0, DEFAULT_REASONS);
        assert_eq!(players(&reasons), vec![2, 4, 5, 0]);
        assert!(reasons.reasons.iter().all(|r| r.confident));
        assert_eq!(reasons.set_probability, 1.0, "exact answers are certain");
        assert!(reasons.certain);
    }

    #[test]
    fn a_risk_score_lists_what_raised_it() {
        // A risk score is the reliability score negated: the same players
        // are adverse (common practice, no source).
        let reliability = [-0.1, 0.5, -0.4, -0.05];
        let risk: Vec<f64> = reliability.iter().map(|v| -v).collect();
        assert_eq!(
            players(&exact(&reliability, -1.0, 4)),
            players(&exact(&risk, 1.0, 4))
        );
    }

    #[test]
    fn unused_favourable_and_unstated_players_are_never_reasons() {
        // Reasons relate to factors the model actually scored (circulars
        // 2022-03 and 2023-03): zero or favourable attributions give none,
        // and nor does a player with no statement.
        let values = [0.0, 0.2, -0.1, -0.9];
        let std_errors = [0.0, 0.0, 0.08, 0.0];
        let codes = vec![String::new(); 4];
        let mut statements = statements(4);
        statements[3].clear();
        let reasons = principal_reasons(
            &Attributions {
                values: &values,
                std_errors: &std_errors,
                codes: &codes,
                statements: &statements,
            },
            -1.0,
            4,
            DEFAULT_LEVEL,
            1,
        );
        assert_eq!(players(&reasons), vec![2]);
        assert!(
            !reasons.reasons[0].confident,
            "0.1 is within two std errors of 0.08"
        );
        // N(0.1, 0.08²) is positive with probability Φ(1.25) ≈ 0.894
        // (standard normal table).
        let p = reasons.reasons[0].in_list_probability;
        assert!((p - 0.894).abs() < 0.02, "{p}");
        assert!(!reasons.certain);
    }

    #[test]
    fn players_sharing_a_code_give_one_reason() {
        let values = [-0.2, -0.3, -0.25, 0.1];
        let codes: Vec<String> = ["D1", "D1", "", "D1"].map(String::from).to_vec();
        let statements = statements(4);
        let reasons = principal_reasons(
            &Attributions {
                values: &values,
                std_errors: &[0.0; 4],
                codes: &codes,
                statements: &statements,
            },
            -1.0,
            4,
            DEFAULT_LEVEL,
            0,
        );
        // D1: 0.2 + 0.3 − 0.1 = 0.4 ahead of player 2's 0.25.
        assert_eq!(reasons.reasons.len(), 2);
        assert_eq!(reasons.reasons[0].players, vec![0, 1, 3]);
        assert!((reasons.reasons[0].weight - 0.4).abs() < 1e-12);
        assert_eq!(reasons.reasons[1].players, vec![2]);
    }

    #[test]
    fn outcomes_follow_the_direction() {
        let risk = Decision {
            favourable: Favourable::Lower,
            space: Some(Space::Probability),
            threshold: Some(0.2),
        };
        assert_eq!(risk.outcome(0.1), Outcome::Favourable);
        assert_eq!(risk.outcome(0.3), Outcome::Adverse);
        assert_eq!(Decision::default().outcome(0.3), Outcome::Unknown);
    }
}
