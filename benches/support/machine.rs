//! Machine facts the benchmarks print beside their figures: the CPU model and the number of
//! cores this process may use. Shared by the bench binaries through `#[path]`.

/// The CPU's model name from `/proc/cpuinfo`, when the system gives one.
pub fn cpu_model() -> Option<String> {
    let cpuinfo = std::fs::read_to_string("/proc/cpuinfo").ok()?;
    cpuinfo
        .lines()
        .find_map(|l| l.strip_prefix("model name")?.split_once(':').map(|(_, m)| m.trim().to_string()))
}

/// Cores available to this process (0 when unknown).
pub fn cores() -> usize {
    std::thread::available_parallelism().map(|n| n.get()).unwrap_or(0)
}
