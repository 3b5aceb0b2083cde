//! systemd's watchdog (sd_watchdog_enabled(3)): when to ping, and when the scoring loop counts as stalled.

use std::time::Duration;

use crate::config::Config;

/// The systemd watchdog, when the unit asks for one (`WatchdogSec` sets `WATCHDOG_USEC` and
/// `WATCHDOG_PID` for the main process).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Watchdog {
    /// Ping at least this often: half of `WATCHDOG_USEC` (sd_watchdog_enabled(3) asks for a ping within
    /// the interval and recommends half of it).
    pub every: Duration,
    /// Stop pinging once the scoring loop has been silent this long: twice the engine's per-batch time
    /// budget plus a minute for parsing, filing and the store (the loop otherwise comes round every 500 ms).
    pub stall_limit: Duration,
}

/// What the watchdog should do now.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Ping {
    /// Send `WATCHDOG=1`.
    Now,
    /// Not yet: the last ping is recent.
    Wait,
    /// The scoring loop is stalled: no ping, so systemd restarts the daemon (recovery redoes the batch).
    Stalled,
}

impl Watchdog {
    /// From the environment systemd sets, for this configuration; `None` when no watchdog is asked for.
    pub fn from_env(config: &Config) -> Option<Self> {
        let mut usec = 0;
        sd_notify::watchdog_enabled(false, &mut usec)
            .then(|| Self::new(Duration::from_micros(usec), config))
    }

    /// For an interval of `interval` (`WATCHDOG_USEC`).
    pub fn new(interval: Duration, config: &Config) -> Self {
        Self {
            every: interval / 2,
            stall_limit: Duration::from_millis(2 * config.model.time_budget_ms)
                + Duration::from_secs(60),
        }
    }

    /// Whether to ping, given the time since the last ping (`None`: never pinged) and since the scoring
    /// loop last came round.
    pub fn due(&self, since_ping: Option<Duration>, since_beat: Duration) -> Ping {
        if since_beat > self.stall_limit {
            Ping::Stalled
        } else if since_ping.is_none_or(|d| d >= self.every) {
            Ping::Now
        } else {
            Ping::Wait
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn watchdog_pings_every_half_interval_until_scoring_stalls() {
        // sd_watchdog_enabled(3): ping within WATCHDOG_USEC, recommended every half of it.
        let config = Config::default();
        let w = Watchdog::new(Duration::from_secs(30), &config);
        assert_eq!(w.every, Duration::from_secs(15));
        // Default time budget 30 s: stall limit 2 × 30 s + 60 s.
        assert_eq!(w.stall_limit, Duration::from_secs(120));
        let beat = Duration::from_millis(400);
        assert_eq!(w.due(None, beat), Ping::Now);
        assert_eq!(w.due(Some(Duration::from_secs(3)), beat), Ping::Wait);
        assert_eq!(w.due(Some(Duration::from_secs(15)), beat), Ping::Now);
        // A long batch (90 s without a heartbeat) still pings; past the limit nothing does.
        assert_eq!(
            w.due(Some(Duration::from_secs(20)), Duration::from_secs(90)),
            Ping::Now
        );
        assert_eq!(
            w.due(Some(Duration::from_secs(20)), Duration::from_secs(121)),
            Ping::Stalled
        );
    }
}
