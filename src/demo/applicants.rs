//! Synthetic rental applicants for the Larchmont Housing Co-operative demo
//! (a fictional co-operative). Every number here comes from the documented
//! generator below; no data from anywhere else is used.
//!
//! # Generative process
//!
//! Each applicant draws four independent standard normals `u`, `n`, `e_s`,
//! `e_r` (plus the draws named below), all from a `ChaCha8Rng` seeded with
//! the caller's seed, so a seed always yields the same applicants.
//!
//! | column | feature | how it is drawn | mean |
//! | --- | --- | --- | --- |
//! | 0 | `monthly_income` (dollars) | `4200 · exp(0.45 u)` (log-normal) | `4200 · e^(0.45²/2)` ≈ 4647 |
//! | 1 | `rent_to_income` (monthly rent ÷ income) | `0.32 − 0.04 u + 0.07 n`, `n` standard normal, clamped to `[0.08, 0.75]`: higher earners spend a smaller share | ≈ 0.32 (the clamp sits 3 sd out) |
//! | 2 | `savings_months` (savings ÷ monthly rent) | `2 · exp(0.8 s)` with `s = 0.5 u + √0.75 e_s`, so log savings and log income correlate at 0.5 | `2 · e^0.32` ≈ 2.754 |
//! | 3 | `on_time_payment_share` (last 24 months) | reliability `r = 0.3 s + √0.91 e_r`; each of 24 monthly payments is on time with probability `q = logistic(2.2 + r)`; the share of on-time months | `E[q]` ≈ 0.866 |
//! | 4 | `late_payments_12m` | the late months among the most recent 12 of those 24, so it moves against the on-time share | `12 (1 − E[q])` ≈ 1.60 |
//! | 5 | `prior_evictions` | `0` for first-time renters; otherwise Poisson with rate `0.05 · exp(−0.8 r)` | renters: `0.05 · e^0.32` ≈ 0.0689 |
//! | 6 | `months_rental_history` | first-time renter with probability 0.15: NaN (no history to measure); otherwise `round(6 + Gamma(shape 2, scale 30))` | renters: 66 |
//! | 7 | `months_at_address` | renters: `round(history · B)`, `B ~ Beta(2, 3)`; first-time renters: `round(Gamma(shape 2, scale 24))` | renters 26.4, first-time renters 48 |
//! | 8 | `verified_references` | Binomial(3, 0.7) | 2.1 |
//!
//! `E[q]` is the mean of `logistic(2.2 + r)` over a standard normal `r`
//! (no closed form; numerical integration gives 0.8664).
//!
//! # Ground truth
//!
//! The label is 1 when the applicant "paid rent reliably over the next 12
//! months" and 0 otherwise, drawn as Bernoulli(`logistic(η)`) with
//!
//! ```text
//! η = 1.9
//!     − 10 · max(rent_to_income − 0.30, 0) · (1 if savings_months < 3 else 0.5)
//!     + 0.5 · ln(savings_months)
//!     + 0.2 · ln(monthly_income / 4200)
//!     + 6 · (on_time_payment_share − 0.85)
//!     − 0.3 · late_payments_12m
//!     − 1.5 · prior_evictions
//!     + 0.2 · (verified_references − 2)
//!     + 0.01 · min(months_at_address, 48)
//!     + (first-time renter: −0.3; otherwise 0.006 · min(months_rental_history, 72) − 0.2)
//! ```
//!
//! The rent-burden term is a hinge (no effect below 30% of income), and a
//! savings cushion of three months or more halves it: an interaction a
//! linear model cannot represent, which the tree model can. About three in
//! four generated applicants are labelled 1.
//!
//! # What is deliberately left out
//!
//! The generator has no protected characteristic — race, colour, religion,
//! sex, sexual orientation, gender identity, national origin, familial
//! status, disability, age, marital status, source of income (income is
//! an amount only, never where it comes from) — and no
//! obvious proxy for one (no names, addresses, postcodes, language, or
//! household size, which tracks familial status). Fair-housing law forbids
//! basing housing decisions on those characteristics, and a demo that
//! scored them would teach the wrong thing. Two features still deserve a
//! compliance review in any real use: `months_rental_history` and
//! `months_at_address` both rise with age.

use ndarray::{Array2, ArrayView1};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha8Rng;
use rand_distr::{Beta, Distribution, Gamma, Poisson, StandardNormal};

use crate::model::logistic;

pub const MONTHLY_INCOME: usize = 0;
pub const RENT_TO_INCOME: usize = 1;
pub const SAVINGS_MONTHS: usize = 2;
pub const ON_TIME_PAYMENT_SHARE: usize = 3;
pub const LATE_PAYMENTS_12M: usize = 4;
pub const PRIOR_EVICTIONS: usize = 5;
pub const MONTHS_RENTAL_HISTORY: usize = 6;
pub const MONTHS_AT_ADDRESS: usize = 7;
pub const VERIFIED_REFERENCES: usize = 8;
/// Number of feature columns.
pub const FEATURES: usize = 9;

/// One feature of the scenario as the engine registers it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct FeatureSpec {
    pub name: &'static str,
    /// Features sharing a group are explained as one player; "" for none.
    /// Members of a group carry the same reason, since the group is what an
    /// explanation names.
    pub group: &'static str,
    /// Plain-English statement used when the feature counts against an
    /// applicant.
    pub reason: &'static str,
}

/// The feature columns of [`Applicants::rows`], in column order.
pub fn features() -> Vec<FeatureSpec> {
    let payment_history = "Payment history shows late or missed payments";
    vec![
        FeatureSpec {
            name: "monthly_income",
            group: "",
            reason: "Monthly income is low",
        },
        FeatureSpec {
            name: "rent_to_income",
            group: "",
            reason: "Rent is high relative to income",
        },
        FeatureSpec {
            name: "savings_months",
            group: "",
            reason: "Savings cover few months of rent",
        },
        FeatureSpec {
            name: "on_time_payment_share",
            group: "payment_history",
            reason: payment_history,
        },
        FeatureSpec {
            name: "late_payments_12m",
            group: "payment_history",
            reason: payment_history,
        },
        FeatureSpec {
            name: "prior_evictions",
            group: "",
            reason: "A prior eviction is on record",
        },
        FeatureSpec {
            name: "months_rental_history",
            group: "",
            reason: "Rental history is short or absent",
        },
        FeatureSpec {
            name: "months_at_address",
            group: "",
            reason: "Time at the current address is short",
        },
        FeatureSpec {
            name: "verified_references",
            group: "",
            reason: "Few references could be verified",
        },
    ]
}

/// Applicants as rows (`count × FEATURES`, NaN only in
/// `months_rental_history`) and their 0/1 labels.
#[derive(Debug, Clone, PartialEq)]
pub struct Applicants {
    pub rows: Array2<f64>,
    pub labels: Vec<f64>,
}

/// `count` applicants drawn by the documented process from `seed`.
pub fn generate(count: usize, seed: u64) -> Applicants {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let history_gamma = Gamma::<f64>::new(2.0, 30.0).expect("constant parameters are valid");
    let first_timer_address_gamma =
        Gamma::<f64>::new(2.0, 24.0).expect("constant parameters are valid");
    let address_share = Beta::<f64>::new(2.0, 3.0).expect("constant parameters are valid");

    let mut rows = Array2::<f64>::zeros((count, FEATURES));
    let mut labels = Vec::with_capacity(count);
    for mut row in rows.rows_mut() {
        let u: f64 = rng.sample(StandardNormal);
        let rent_noise: f64 = rng.sample(StandardNormal);
        let savings_noise: f64 = rng.sample(StandardNormal);
        let reliability_noise: f64 = rng.sample(StandardNormal);
        let s = 0.5 * u + 0.75_f64.sqrt() * savings_noise;
        let r = 0.3 * s + 0.91_f64.sqrt() * reliability_noise;

        row[MONTHLY_INCOME] = 4200.0 * (0.45 * u).exp();
        row[RENT_TO_INCOME] = (0.32 - 0.04 * u + 0.07 * rent_noise).clamp(0.08, 0.75);
        row[SAVINGS_MONTHS] = 2.0 * (0.8 * s).exp();

        let on_time_probability = logistic(2.2 + r);
        let mut on_time_months = 0;
        let mut late_recent = 0;
        for month in 0..24 {
            let on_time = rng.random::<f64>() < on_time_probability;
            on_time_months += usize::from(on_time);
            // Months 12..24 are the most recent twelve.
            if month >= 12 && !on_time {
                late_recent += 1;
            }
        }
        row[ON_TIME_PAYMENT_SHARE] = on_time_months as f64 / 24.0;
        row[LATE_PAYMENTS_12M] = f64::from(late_recent);

        let first_time_renter = rng.random::<f64>() < 0.15;
        if first_time_renter {
            row[PRIOR_EVICTIONS] = 0.0;
            row[MONTHS_RENTAL_HISTORY] = f64::NAN;
            row[MONTHS_AT_ADDRESS] = first_timer_address_gamma.sample(&mut rng).round();
        } else {
            // The rate is positive and finite for every finite r.
            let evictions =
                Poisson::new(0.05 * (-0.8 * r).exp()).map_or(0.0, |d| d.sample(&mut rng));
            row[PRIOR_EVICTIONS] = evictions;
            let history = (6.0 + history_gamma.sample(&mut rng)).round();
            row[MONTHS_RENTAL_HISTORY] = history;
            row[MONTHS_AT_ADDRESS] = (history * address_share.sample(&mut rng)).round();
        }
        row[VERIFIED_REFERENCES] = (0..3).filter(|_| rng.random::<f64>() < 0.7).count() as f64;

        let reliable = rng.random::<f64>() < logistic(ground_truth_log_odds(row.view()));
        labels.push(if reliable { 1.0 } else { 0.0 });
    }
    Applicants { rows, labels }
}

/// η of the module documentation for one complete row.
fn ground_truth_log_odds(row: ArrayView1<'_, f64>) -> f64 {
    let savings = row[SAVINGS_MONTHS];
    let cushion = if savings < 3.0 { 1.0 } else { 0.5 };
    let history = row[MONTHS_RENTAL_HISTORY];
    let history_term = if history.is_nan() {
        -0.3
    } else {
        0.006 * history.min(72.0) - 0.2
    };
    1.9 - 10.0 * (row[RENT_TO_INCOME] - 0.30).max(0.0) * cushion
        + 0.5 * savings.ln()
        + 0.2 * (row[MONTHLY_INCOME] / 4200.0).ln()
        + 6.0 * (row[ON_TIME_PAYMENT_SHARE] - 0.85)
        - 0.3 * row[LATE_PAYMENTS_12M]
        - 1.5 * row[PRIOR_EVICTIONS]
        + 0.2 * (row[VERIFIED_REFERENCES] - 2.0)
        + 0.01 * row[MONTHS_AT_ADDRESS].min(48.0)
        + history_term
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::Players;

    fn column_mean(rows: &Array2<f64>, column: usize, keep: impl Fn(usize) -> bool) -> f64 {
        let kept: Vec<f64> = (0..rows.nrows())
            .filter(|&i| keep(i))
            .map(|i| rows[[i, column]])
            .collect();
        kept.iter().sum::<f64>() / kept.len() as f64
    }

    /// E[logistic(2.2 + r)] for standard normal r, by the trapezoid rule on
    /// [−10, 10]; the generator documentation defines E[q] this way.
    fn mean_on_time_probability() -> f64 {
        let steps = 20_000;
        let width = 20.0 / steps as f64;
        (0..=steps)
            .map(|k| {
                let r = -10.0 + k as f64 * width;
                let weight = if k == 0 || k == steps { 0.5 } else { 1.0 };
                let density = (-0.5 * r * r).exp() / (2.0 * std::f64::consts::PI).sqrt();
                weight * density / (1.0 + (-(2.2 + r)).exp())
            })
            .sum::<f64>()
            * width
    }

    #[test]
    fn a_seed_always_gives_the_same_applicants() {
        // Source: the module documentation (seeded, reproducible generator).
        let bits = |a: &Applicants| a.rows.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        let first = generate(300, 11);
        let again = generate(300, 11);
        let other = generate(300, 12);
        assert_eq!(bits(&first), bits(&again));
        assert_eq!(first.labels, again.labels);
        assert_ne!(bits(&first), bits(&other));
        assert_eq!(first.rows.dim(), (300, FEATURES));
        assert_eq!(features().len(), FEATURES);
    }

    #[test]
    fn marginals_match_the_documented_process() {
        // Source: the documented generative process in the module
        // documentation; tolerances are about four standard errors at this n.
        let n = 20_000;
        let data = generate(n, 2024);
        let rows = &data.rows;
        let all = |_: usize| true;
        let renter = |i: usize| !rows[[i, MONTHS_RENTAL_HISTORY]].is_nan();
        let first_timer = |i: usize| rows[[i, MONTHS_RENTAL_HISTORY]].is_nan();

        let income_mean = 4200.0 * (0.45_f64 * 0.45 / 2.0).exp();
        assert!((column_mean(rows, MONTHLY_INCOME, all) / income_mean - 1.0).abs() < 0.015);
        assert!((column_mean(rows, RENT_TO_INCOME, all) - 0.32).abs() < 0.003);
        let savings_mean = 2.0 * 0.32_f64.exp();
        assert!((column_mean(rows, SAVINGS_MONTHS, all) - savings_mean).abs() < 0.08);

        let on_time = mean_on_time_probability();
        assert!(
            (on_time - 0.8664).abs() < 1e-4,
            "documented E[q] is 0.8664, integral gives {on_time}"
        );
        assert!((column_mean(rows, ON_TIME_PAYMENT_SHARE, all) - on_time).abs() < 0.005);
        assert!((column_mean(rows, LATE_PAYMENTS_12M, all) - 12.0 * (1.0 - on_time)).abs() < 0.05);

        let first_share = (0..n).filter(|&i| first_timer(i)).count() as f64 / n as f64;
        assert!((first_share - 0.15).abs() < 0.01);
        assert!((column_mean(rows, MONTHS_RENTAL_HISTORY, renter) - 66.0).abs() < 1.5);
        assert!((column_mean(rows, MONTHS_AT_ADDRESS, renter) - 26.4).abs() < 0.8);
        assert!((column_mean(rows, MONTHS_AT_ADDRESS, first_timer) - 48.0).abs() < 2.5);
        assert!((column_mean(rows, PRIOR_EVICTIONS, renter) - 0.05 * 0.32_f64.exp()).abs() < 0.008);
        assert_eq!(column_mean(rows, PRIOR_EVICTIONS, first_timer), 0.0);
        assert!((column_mean(rows, VERIFIED_REFERENCES, all) - 2.1).abs() < 0.03);

        // Documented correlation of log income and log savings: 0.5.
        let log_income: Vec<f64> = rows.column(MONTHLY_INCOME).iter().map(|x| x.ln()).collect();
        let log_savings: Vec<f64> = rows.column(SAVINGS_MONTHS).iter().map(|x| x.ln()).collect();
        let mean = |v: &[f64]| v.iter().sum::<f64>() / v.len() as f64;
        let (mi, ms) = (mean(&log_income), mean(&log_savings));
        let covariance: f64 = log_income
            .iter()
            .zip(&log_savings)
            .map(|(a, b)| (a - mi) * (b - ms))
            .sum();
        let spread = |v: &[f64], m: f64| v.iter().map(|x| (x - m).powi(2)).sum::<f64>().sqrt();
        let correlation = covariance / (spread(&log_income, mi) * spread(&log_savings, ms));
        assert!(
            (correlation - 0.5).abs() < 0.03,
            "correlation {correlation}"
        );

        // Documented ranges: the clamp, and NaN only in the history column.
        assert!(
            rows.column(RENT_TO_INCOME)
                .iter()
                .all(|x| (0.08..=0.75).contains(x))
        );
        for ((_, j), x) in rows.indexed_iter() {
            assert!(j == MONTHS_RENTAL_HISTORY || x.is_finite());
        }
    }

    /// η of the module documentation, written again from the text.
    fn documented_log_odds(x: &[f64]) -> f64 {
        let burden = (x[1] - 0.30).max(0.0) * if x[2] < 3.0 { 1.0 } else { 0.5 };
        let history = if x[6].is_nan() {
            -0.3
        } else {
            0.006 * x[6].min(72.0) - 0.2
        };
        1.9 - 10.0 * burden + 0.5 * x[2].ln() + 0.2 * (x[0] / 4200.0).ln() + 6.0 * (x[3] - 0.85)
            - 0.3 * x[4]
            - 1.5 * x[5]
            + 0.2 * (x[8] - 2.0)
            + 0.01 * x[7].min(48.0)
            + history
    }

    #[test]
    fn labels_follow_the_documented_ground_truth() {
        // Source: the ground-truth formula in the module documentation. In
        // each decile of the documented probability, the share of label 1
        // must match the mean probability within four standard errors.
        let data = generate(20_000, 99);
        let mut scored: Vec<(f64, f64)> = data
            .rows
            .rows()
            .into_iter()
            .zip(&data.labels)
            .map(|(row, &y)| (1.0 / (1.0 + (-documented_log_odds(&row.to_vec())).exp()), y))
            .collect();
        scored.sort_by(|a, b| a.0.total_cmp(&b.0));
        for decile in scored.chunks(scored.len() / 10) {
            let expected: f64 = decile.iter().map(|(p, _)| p).sum();
            let observed: f64 = decile.iter().map(|(_, y)| y).sum();
            let spread = decile
                .iter()
                .map(|(p, _)| p * (1.0 - p))
                .sum::<f64>()
                .sqrt();
            assert!(
                (observed - expected).abs() < 4.0 * spread,
                "observed {observed}, expected {expected}"
            );
        }
        let positive_share = data.labels.iter().sum::<f64>() / data.labels.len() as f64;
        eprintln!("share of reliable payers: {positive_share:.3}");
    }

    #[test]
    fn features_register_as_the_documented_players() {
        // Source: the player convention of the design (a group is one
        // player, ordered by first appearance).
        let specs = features();
        let names: Vec<String> = specs.iter().map(|f| f.name.to_string()).collect();
        let groups: Vec<String> = specs.iter().map(|f| f.group.to_string()).collect();
        let players = Players::try_new(&names, &groups).expect("the demo features are valid");
        assert_eq!(players.len(), FEATURES - 1);
        assert_eq!(players.names()[ON_TIME_PAYMENT_SHARE], "payment_history");
        assert_eq!(
            players.members(ON_TIME_PAYMENT_SHARE),
            &[ON_TIME_PAYMENT_SHARE, LATE_PAYMENTS_12M]
        );
        assert!(specs.iter().all(|f| !f.reason.is_empty()));
        // Characteristics protected by the Fair Housing Act (42 U.S.C.
        // 3604), plus age and household size, never appear as features.
        for banned in [
            "race",
            "color",
            "colour",
            "religion",
            "sex",
            "national",
            "familial",
            "disab",
            "age",
            "household",
        ] {
            assert!(
                names
                    .iter()
                    .all(|n| !n.split('_').any(|w| w.starts_with(banned))),
                "{banned}"
            );
        }
    }
}
