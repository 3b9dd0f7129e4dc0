//! What every benchmark table shares: the machine line it opens with.

/// The CPU model and core count, for the first line of a table.
pub fn machine() -> String {
    let cpu = std::fs::read_to_string("/proc/cpuinfo")
        .ok()
        .and_then(|s| {
            s.lines()
                .find(|l| l.starts_with("model name"))
                .and_then(|l| l.split(':').nth(1))
                .map(|m| m.trim().to_string())
        })
        .unwrap_or_else(|| "unknown CPU".into());
    let cores = std::thread::available_parallelism().map_or(0, |n| n.get());
    format!("{cpu}, {cores} cores")
}
