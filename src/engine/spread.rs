//! A smoothed time and its mean deviation, kept as a retransmission timer
//! keeps round-trip times ("Computing TCP's Retransmission Timer", RFC
//! 6298, 2011, section 2: gains 1/8 and 1/4, a bound of the mean plus four
//! deviations). Used where a time that varies from run to run must be
//! planned for by what it rarely exceeds, not by its mean.

#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Spread {
    /// Smoothed value and mean deviation; `None` before the first sample.
    state: Option<(f64, f64)>,
    samples: u64,
}

impl Spread {
    pub fn observe(&mut self, sample: f64) {
        self.state = Some(match self.state {
            None => (sample, sample / 2.0),
            Some((mean, deviation)) => (
                mean + (sample - mean) / 8.0,
                deviation + ((sample - mean).abs() - deviation) / 4.0,
            ),
        });
        self.samples += 1;
    }

    /// Samples seen.
    pub fn samples(&self) -> u64 {
        self.samples
    }

    /// The smoothed value plus four mean deviations; `None` before any
    /// sample.
    pub fn bound(&self) -> Option<f64> {
        self.state.map(|(mean, deviation)| mean + 4.0 * deviation)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

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
        assert_eq!(spread.samples(), 2);
    }
}
