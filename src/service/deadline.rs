//! Deadlines: the `grpc-timeout` a call carries, the budget an Explain
//! call gets within it, and the time its computation keeps back for what
//! comes after it.

use std::sync::Mutex;
use std::time::Duration;

use tonic::metadata::MetadataMap;

/// The `grpc-timeout` header (gRPC over HTTP/2 protocol spec): at most 8
/// digits and a unit, H, M, S, m (milli), u (micro) or n (nano).
pub fn grpc_timeout(metadata: &MetadataMap) -> Option<Duration> {
    let text = metadata.get("grpc-timeout")?.to_str().ok()?;
    let (digits, unit) = text.split_at(text.len().checked_sub(1)?);
    if digits.is_empty() || digits.len() > 8 {
        return None;
    }
    let amount: u64 = digits.parse().ok()?;
    Some(match unit {
        "H" => Duration::from_secs(amount * 3600),
        "M" => Duration::from_secs(amount * 60),
        "S" => Duration::from_secs(amount),
        "m" => Duration::from_millis(amount),
        "u" => Duration::from_micros(amount),
        "n" => Duration::from_nanos(amount),
        _ => return None,
    })
}

/// The budget an Explain call gets: what it asked for (or the default),
/// cut to the deadline less the margin.
pub fn effective_budget(
    budget_ms: u32,
    default_budget: Duration,
    timeout: Option<Duration>,
    margin: Duration,
) -> Duration {
    let asked = if budget_ms == 0 {
        default_budget
    } else {
        Duration::from_millis(u64::from(budget_ms))
    };
    match timeout {
        Some(timeout) => asked.min(timeout.saturating_sub(margin)),
        None => asked,
    }
}

/// A smoothed time and its mean deviation, kept as a retransmission timer
/// keeps round-trip times ("Computing TCP's Retransmission Timer", RFC
/// 6298, 2011, section 2: gains 1/8 and 1/4, a bound of the mean plus four
/// deviations): a time that varies from call to call, planned for by what
/// it rarely exceeds rather than by its mean.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
struct Spread {
    /// Smoothed value and mean deviation; `None` before the first sample.
    state: Option<(f64, f64)>,
}

impl Spread {
    fn observe(&mut self, sample: f64) {
        self.state = Some(match self.state {
            None => (sample, sample / 2.0),
            Some((mean, deviation)) => (
                mean + (sample - mean) / 8.0,
                deviation + ((sample - mean).abs() - deviation) / 4.0,
            ),
        });
    }

    /// The smoothed value plus four mean deviations; `None` before any
    /// sample.
    fn bound(&self) -> Option<f64> {
        self.state.map(|(mean, deviation)| mean + 4.0 * deviation)
    }
}

/// What an answer has measurably taken beyond its computation's end: the
/// computation's overrun of its own deadline, then the hand-off from a
/// compute thread, the conversion and the records. A computation is planned
/// and stopped this much before the budget ends, so that the answer is back
/// within it: the bound of a [`Spread`] of those times.
#[derive(Debug, Default)]
pub struct Reserve {
    /// In seconds.
    spread: Mutex<Spread>,
}

impl Reserve {
    /// Adds one answer's time beyond its computation.
    pub fn observe(&self, beyond: Duration) {
        let mut spread = self
            .spread
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        spread.observe(beyond.as_secs_f64());
    }

    /// The time to keep back from a budget: none before any answer, and
    /// never more than a quarter of the budget (an answer that needs more
    /// than that after its computation cannot be made on time by cutting
    /// the computation).
    pub fn kept_back(&self, budget: Duration) -> Duration {
        let spread = *self
            .spread
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        let Some(bound) = spread.bound() else {
            return Duration::ZERO;
        };
        Duration::try_from_secs_f64(bound)
            .unwrap_or(Duration::MAX)
            .min(budget / 4)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn grpc_timeout_header_units_are_read() {
        // Units from the gRPC over HTTP/2 protocol spec (PROTOCOL-HTTP2.md).
        let mut metadata = MetadataMap::new();
        metadata.insert("grpc-timeout", "250m".parse().unwrap());
        assert_eq!(grpc_timeout(&metadata), Some(Duration::from_millis(250)));
        metadata.insert("grpc-timeout", "3S".parse().unwrap());
        assert_eq!(grpc_timeout(&metadata), Some(Duration::from_secs(3)));
        metadata.insert("grpc-timeout", "123456789m".parse().unwrap());
        assert_eq!(grpc_timeout(&metadata), None, "more than 8 digits");
        metadata.insert("grpc-timeout", "5x".parse().unwrap());
        assert_eq!(grpc_timeout(&metadata), None);
    }

    #[test]
    fn the_budget_is_cut_to_the_deadline_less_the_margin() {
        // The API's documented rule (common practice, no source).
        let default = Duration::from_millis(200);
        let margin = Duration::from_millis(5);
        assert_eq!(effective_budget(0, default, None, margin), default);
        assert_eq!(
            effective_budget(50, default, None, margin),
            Duration::from_millis(50)
        );
        assert_eq!(
            effective_budget(50, default, Some(Duration::from_millis(30)), margin),
            Duration::from_millis(25)
        );
        assert_eq!(
            effective_budget(0, default, Some(Duration::from_millis(2)), margin),
            Duration::ZERO
        );
    }

    #[test]
    fn the_bound_follows_the_retransmission_timer_rule() {
        // RFC 6298 (2011), section 2: the first sample R gives SRTT = R and
        // RTTVAR = R/2; then RTTVAR += (|SRTT - R| - RTTVAR)/4 before
        // SRTT += (R - SRTT)/8, and the timeout is SRTT + 4 RTTVAR.
        let mut spread = Spread::default();
        assert_eq!(spread.bound(), None);
        spread.observe(1.0);
        // 1 + 4 * 0.5.
        assert!((spread.bound().unwrap() - 3.0).abs() < 1e-12);
        spread.observe(3.0);
        // RTTVAR = 0.5 + (2 - 0.5)/4 = 0.875; SRTT = 1 + 2/8 = 1.25;
        // 1.25 + 3.5 = 4.75.
        assert!((spread.bound().unwrap() - 4.75).abs() < 1e-12);
    }

    #[test]
    fn the_reserve_is_the_bound_of_the_times_seen_within_a_quarter_of_the_budget() {
        let reserve = Reserve::default();
        let budget = Duration::from_secs(1);
        assert_eq!(
            reserve.kept_back(budget),
            Duration::ZERO,
            "nothing measured"
        );
        reserve.observe(Duration::from_millis(1));
        // The first sample's bound: 1 + 4 * 0.5 = 3 ms (RFC 6298, as above).
        let first = reserve.kept_back(budget).as_secs_f64();
        assert!((first - 3e-3).abs() < 1e-12, "{first}");
        assert_eq!(
            reserve.kept_back(Duration::from_millis(8)),
            Duration::from_millis(2)
        );
    }
}
